"""Stability proofs of the online step, checked when a config loads, and the figures behind them.

Symbols: α the step size, λ the penalty, m the memory (references the penalty is scaled over),
k the number of terms of a sensor's model, c the feature clip. The feature vector is
φ = [1, z_1 … z_k] with every |z_j| ≤ c after clipping, so 1 ≤ ‖φ‖² ≤ F := 1 + k·c².

One step of the model (trimtab.model.online.RidgeModel.step_phi) with step a, where a = α for
the plain step and a = α / (1 + ‖φ‖²) for the normalised one, is for the squared loss::

    θ⁺ − θ° = (I − a·D)(θ − θ°) + a·(terms that do not depend on θ),
    D = (λ/m)·L + φφᵀ,   L = diag(0, 1, …, 1)  (the intercept unpenalised)

for any fixed θ°. D is symmetric and positive semi-definite with largest eigenvalue at most
λ/m + ‖φ‖² (the sum of the two parts' largest eigenvalues). So every eigenvalue of I − a·D
lies in (−1, 1] — no direction of the error is ever amplified — whenever a·(λ/m + ‖φ‖²) < 2.
The Huber loss replaces the residual r by ψ(r) = w·r with w ∈ (0, 1], which only scales φφᵀ
down, so the same bound holds. Since α only ever falls below its configured value (rollback
halves it), the bound is checked at α_max and λ_max, for every sensor's k:

* **shrink**: the penalised weights' pull toward the prior multiplies θ_j − p_j by
  1 − aλ/m per step; ``0 ≤ α_max·λ_max/m < 1`` keeps that factor in (0, 1] (λ_max = 0 means no
  pull at all, allowed).
* **plain step** (a = α): ``α_max·(λ_max/m + F) < 2``. This is the usual LMS step-size bound
  μ·‖x‖² < 2 (common practice, stated here from memory) widened by the shrink term.
* **normalised step** (a = α/(1 + x), x = ‖φ‖² ∈ [1, F]): a·(λ/m + x) = α·(λ/m + x)/(1 + x),
  monotone in x, so it is largest at an end of [1, F]:
  ``α_max·max((λ_max/m + 1)/2, (λ_max/m + F)/(1 + F)) < 2``. With λ = 0 this is implied by
  the NLMS bound 0 < α < 2 (common practice, from memory).

The margin reported is bound / actual = 2 / (left-hand side); above 1 means stable.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = [
    "STEP_BOUND",
    "StepCheck",
    "phi_sq_max",
    "shrink_problem",
    "shrink_ratio",
    "step_check",
]

STEP_BOUND = 2.0
"""The right-hand side of both step inequalities."""



def shrink_ratio(alpha: float, lam: float, memory: int) -> float:
    """αλ/m: how much of a penalised weight's distance to the prior one plain step removes."""
    return alpha * lam / memory


def phi_sq_max(terms: int, clip: float) -> float:
    """F = 1 + k·c², the largest ‖φ‖² a clipped feature vector with k terms can have."""
    return 1.0 + terms * clip * clip


def shrink_problem(alpha_max: float, lambda_max: float, memory: int) -> str | None:
    """Why α_max·λ_max/m breaks the shrink rule, or None when it holds."""
    s = shrink_ratio(alpha_max, lambda_max, memory)
    if s < 1.0:
        return None
    return (
        f"alpha_max·lambda_max/memory = {alpha_max:g}·{lambda_max:g}/{memory} = {s:g} ≥ 1, "
        f"so the per-step shrink factor 1 − αλ/m = {1.0 - s:g} is not above 0 "
        "(rule: 0 ≤ alpha_max·lambda_max/memory < 1); lower lambda_max or alpha_max, "
        "or raise memory"
    )


@dataclass(frozen=True, slots=True)
class StepCheck:
    """The step-stability inequality for one group of sensor settings, with its numbers."""

    label: str
    terms: int
    normalised: bool
    phi_sq_max: float
    actual: float
    inequality: str
    worked: str
    bound: float = STEP_BOUND

    @property
    def ok(self) -> bool:
        """Whether the inequality holds (strictly)."""
        return self.actual < self.bound

    @property
    def margin(self) -> float:
        """bound / actual: how many times α_max could grow before the bound is reached."""
        return self.bound / self.actual if self.actual > 0.0 else math.inf

    def problem(self) -> str | None:
        """Why the inequality fails for this group, or None when it holds."""
        if self.ok:
            return None
        kind = "normalised" if self.normalised else "plain"
        return (
            f"{self.label} ({self.terms} terms, feature clip gives ‖φ‖² ≤ {self.phi_sq_max:g}): "
            f"the {kind} step is not stable: {self.worked} = {self.actual:.6g} ≥ {self.bound:g} "
            f"(rule: {self.inequality}); lower alpha_max, lower feature_clip or use fewer terms"
            + ("" if self.normalised else ", or set normalised = true")
        )


def step_check(
    label: str,
    *,
    terms: int,
    alpha_max: float,
    lambda_max: float,
    memory: int,
    clip: float,
    normalised: bool,
) -> StepCheck:
    """The step-stability inequality of the module docstring, evaluated at the bounds."""
    f = phi_sq_max(terms, clip)
    pull = lambda_max / memory
    if normalised:
        at_one = (pull + 1.0) / 2.0
        at_f = (pull + f) / (1.0 + f)
        actual = alpha_max * max(at_one, at_f)
        inequality = (
            "alpha_max·max((lambda_max/memory + 1)/2, (lambda_max/memory + F)/(1 + F)) < 2, "
            "F = 1 + k·feature_clip²"
        )
        worked = f"{alpha_max:g}·max(({pull:g} + 1)/2, ({pull:g} + {f:g})/(1 + {f:g}))"
    else:
        actual = alpha_max * (pull + f)
        inequality = "alpha_max·(lambda_max/memory + 1 + k·feature_clip²) < 2"
        worked = f"{alpha_max:g}·({pull:g} + {f:g})"
    return StepCheck(label, terms, normalised, f, actual, inequality, worked)
