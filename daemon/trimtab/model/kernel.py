"""A ridge model's per-sample arithmetic, written once for floats and K-vectors.

:func:`standardise` — features from term values: ``z_j = (term_j − centre_j) / scale_j``,
clipped to ``[−clip, clip]`` when ``clip`` is set, ``φ = [1, z_1 … z_k]``.

:func:`shrink_step` — one stochastic-gradient step on ½ρ(r) + (λ/2m)‖θ − p‖²_L for one
reference y at features φ (see :class:`trimtab.model.online.RidgeModel` for the cost)::

    r = θ·φ − y                         (the residual before the update)
    ψ = clip(r, −δ, δ)                  (δ = +inf: the squared loss, ψ = r)
    a = α / (1 + ‖φ‖²) if normalised else α     (‖φ‖² includes the leading 1)
    θ_j ← p_j + (1 − aλ/m)(θ_j − p_j) − a·ψ·φ_j   for penalised j
    θ_0 ← θ_0 − a·ψ·φ_0                 (the intercept, unless penalised)
    spread ← |r|·√(π/2) if spread = 0 else spread + β(|r|·√(π/2) − spread)

The step is valid (``ok``) when r, every new weight (through their sum) and the
new spread are finite and the shrink factor 1 − aλ/m is positive; the caller keeps the old
state where it is not. Every quantity may be a float (one model) or a K-vector (K
candidates); θ and φ are sequences of them, so the same lines give the same bits on both
(:mod:`trimtab.model.ops`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from trimtab.model.ops import Ops, dot

__all__ = ["SQRT_HALF_PI", "Step", "shrink_step", "standardise", "why_refused"]

SQRT_HALF_PI = math.sqrt(math.pi / 2.0)


def standardise(ops: Ops, row: Sequence[Any], centre: Sequence[float], scale: Sequence[float],
                clip: float | None) -> tuple[list[Any], Any, Any]:
    """φ = [1, z…] (clipped), the largest |z| before clipping, and whether every z is finite.

    A term value may be a float (one reading) or a vector (many readings at once). The
    finiteness is that of Σz, so a NaN or infinity anywhere shows; the caller
    decides what a non-finite term means (the model names it; the tuner refuses the stream).
    """
    # lengths are the model's k, checked once where its scaler is given
    z = [(v - c) / s for v, c, s in zip(row, centre, scale, strict=False)]
    finite = ops.isfinite(sum(z))
    zmax = ops.amax(map(ops.absolute, z))
    if clip is not None and ops.any(zmax > clip):
        z = [ops.where(ops.absolute(x) > clip, ops.copysign(clip, x), x) for x in z]
    return [1.0, *z], zmax, finite


Step = tuple[Any, list[Any], Any, Any, Any, Any, Any]
"""One computed update, as (r, θ, spread, a, shrink, total, ok): the residual θ·φ − y before
it, the weights and spread it would leave, the step a actually taken (α, or α / (1 + ‖φ‖²)),
the shrink factor 1 − aλ/m, Σ of the new weights (finite exactly when every weight is), and
whether it may be kept. A plain tuple: it is built once a reference on the daemon's path."""


def shrink_step(ops: Ops, theta: Any, prior: Any, phi: Any, y: Any, alpha: Any, lam: Any,
                memory: Any, delta: Any, normalised: Any, penalise_intercept: bool, spread: Any,
                spread_decay: Any, phisq: Any = None) -> Step:
    """The update of the module docstring (δ = +inf for the squared loss).

    ``phisq`` is ‖φ‖² when the caller has it already (the tuner computes it once a reference).
    The arguments are positional (named at the callers) because the daemon calls it once a
    reference on its per-sample path.
    """
    r = dot(theta, phi) - y
    psi = ops.clip(r, delta)
    if ops.any(normalised):
        if phisq is None:
            phisq = dot(phi, phi)
        a = ops.where(normalised, alpha / (1.0 + phisq), alpha)
    else:
        a = alpha
    shrink = 1.0 - a * lam / memory
    ap = a * psi
    # lengths are the model's k + 1, checked once where θ, p and φ are made
    new = [p + shrink * (w - p) - ap * f for w, p, f in zip(theta, prior, phi, strict=False)]
    if not penalise_intercept:
        new[0] = theta[0] - ap * phi[0]
    total = sum(new)
    obs = ops.absolute(r) * SQRT_HALF_PI
    spread = ops.where(spread == 0.0, obs, spread + spread_decay * (obs - spread))
    ok = (ops.isfinite(r) & (shrink > 0.0)) & (ops.isfinite(total) & ops.isfinite(spread))
    return r, new, spread, a, shrink, total, ok


def why_refused(r: float, a: float, shrink: float, total: float, lam: float,
                memory: float) -> str:
    """Why one model's computed step may not be kept (its ``ok`` is false), in one line."""
    if not math.isfinite(r):
        # θ is always finite, so a non-finite r means a non-finite feature or an overflow
        return f"residual {r} is not finite (a non-finite feature or overflow)"
    if shrink <= 0.0:
        return (f"shrink factor 1 − aλ/m = 1 − {a}·{lam}/{memory} = {shrink} "
                "is not positive; lower the step size or λ")
    if not math.isfinite(total):
        # a non-finite weight makes the sum inf or nan (only absurd ~1e308 weights false-alarm)
        return "update would make a weight non-finite; state left unchanged"
    return "update would make the residual spread non-finite"
