"""A ridge model's cost and gradient over a batch of references (fitting and tests).

Over rows Φ (features [1, z…]) and references y, with weights θ, prior p and memory m::

    J(θ) = 1/(2m) [ Σ ρ(θ·φ − y) + λ Σ_{j≥1} (θ_j − p_j)² ]
    ∇J(θ) = (1/m) [ Φᵀψ(Φθ − y) + λ L (θ − p) ]

ρ(r) = r² without δ, and 2·Huber with δ (r² for |r| ≤ δ, 2δ|r| − δ² beyond), so ½ρ′ = ψ, the
clip of r at ±δ; L = diag(0, 1, …, 1), or the identity when the intercept is penalised.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from trimtab.errors import ModelError

__all__ = ["batch_cost", "batch_gradient"]

F64 = NDArray[np.float64]


def batch_cost(theta: Sequence[float], prior: Sequence[float], Phi: F64, y: F64, *, lam: float,
               memory: float, delta: float | None, penalise_intercept: bool) -> float:
    """J(θ) of the module docstring."""
    r, d = _parts(theta, prior, Phi, y, penalise_intercept)
    loss = float(np.sum(_rho(r, delta)))
    return (loss + lam * float(d @ d)) / (2.0 * memory)


def batch_gradient(theta: Sequence[float], prior: Sequence[float], Phi: F64, y: F64, *,
                   lam: float, memory: float, delta: float | None,
                   penalise_intercept: bool) -> F64:
    """∇J(θ) of the module docstring."""
    r, d = _parts(theta, prior, Phi, y, penalise_intercept)
    if delta is not None:
        r = np.clip(r, -delta, delta)
    g: F64 = (np.asarray(Phi, dtype=np.float64).T @ r + lam * d)
    return g / memory


def _parts(theta: Sequence[float], prior: Sequence[float], Phi: F64, y: F64,
           penalise_intercept: bool) -> tuple[F64, F64]:
    """Residuals Φθ − y and the penalised distance L(θ − p)."""
    Phi = np.asarray(Phi, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if Phi.ndim != 2 or Phi.shape[1] != len(theta) or y.shape != (Phi.shape[0],):
        raise ModelError(
            f"Phi {Phi.shape} and y {y.shape} do not fit a model of {len(theta)} weights"
        )
    th = np.asarray(theta)
    d = th - np.asarray(prior)
    if not penalise_intercept:
        d[0] = 0.0
    return Phi @ th - y, d


def _rho(r: F64, delta: float | None) -> F64:
    """Squared loss r² or Huber's 2·ρ_δ (so that both share J's leading 1/(2m))."""
    if delta is None:
        out: F64 = r * r
        return out
    a = np.abs(r)
    out = np.where(a <= delta, r * r, 2.0 * delta * a - delta * delta)
    return out
