"""Closed-form ridge toward a prior, the fit report, and time-blocked cross-validation for λ.

The closed form minimises the same J(θ) as the online step (see
:class:`trimtab.model.online.RidgeModel`):
θ = p + (ΦᵀΦ + λL)⁻¹ Φᵀ(y − Φp), L = diag(0, 1, …, 1) (L = I when the intercept is penalised),
solved as the least-squares problem ``[Φ; √λ·L^½] δ ≈ [y − Φp; 0]`` so that ill-conditioned
data keeps its digits; ΦᵀΦ is never formed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from trimtab.errors import DataError, ModelError
from trimtab.model.online import RidgeModel, factory_prior
from trimtab.model.terms import Scaler, TermSpec

_SQRT_HALF_PI = math.sqrt(math.pi / 2.0)


def solve(
    Phi: ArrayLike,
    y: ArrayLike,
    lam: float,
    prior: ArrayLike | None = None,
    penalise_intercept: bool = False,
) -> NDArray[np.float64]:
    """θ minimising ‖Φθ − y‖² + λ Σ_{j∈P} (θ_j − p_j)², P = j ≥ 1 (or all j if penalised).

    Column 0 of Φ is the intercept's column. λ = 0 with a rank-deficient Φ (for instance
    fewer references than weights) raises ModelError: λ > 0 makes the system solvable.
    """
    A = np.asarray(Phi, dtype=np.float64)
    b = np.asarray(y, dtype=np.float64)
    if A.ndim != 2 or A.shape[1] == 0:
        raise ModelError(f"design matrix has shape {A.shape}; expected n × p with p ≥ 1")
    n, p = A.shape
    if b.shape != (n,):
        raise ModelError(f"reference vector has shape {b.shape}; expected ({n},)")
    lam = float(lam)
    if not (math.isfinite(lam) and lam >= 0.0):
        raise ModelError(f"λ = {lam} must be finite and ≥ 0")
    pr = np.zeros(p) if prior is None else np.asarray(prior, dtype=np.float64)
    if pr.shape != (p,):
        raise ModelError(f"prior has shape {pr.shape}; expected ({p},)")
    for name, arr in (("design matrix", A), ("references", b), ("prior", pr)):
        if not np.all(np.isfinite(arr)):
            raise ModelError(f"{name} holds non-finite values")
    rhs = b - A @ pr
    if lam > 0.0:
        diag = np.full(p, math.sqrt(lam))
        if not penalise_intercept:
            diag[0] = 0.0
        rows = np.diag(diag)[diag > 0.0]
        A = np.vstack([A, rows])
        rhs = np.concatenate([rhs, np.zeros(rows.shape[0])])
    # Equilibrate columns (unit norm): same solution, better-scaled problem, honest rank test.
    norms = np.linalg.norm(A, axis=0)
    norms[norms == 0.0] = 1.0
    delta, _, rank, _ = np.linalg.lstsq(A / norms, rhs, rcond=None)
    if rank < p:
        if n < p:
            why = f"fewer references ({n}) than weights ({p}: intercept and {p - 1} terms)"
        else:
            why = f"the terms are collinear (rank {rank} < {p} weights)"
        raise ModelError(f"cannot fit with λ = {lam:g}: {why}; λ > 0 makes the system solvable")
    theta: NDArray[np.float64] = pr + delta / norms
    return theta


UNCERTAINTY_NOT_GIVEN = (
    "not given for λ > 0 (the penalty biases the coefficients toward the prior by an amount "
    "the data cannot measure); fit with --lambda 0 for them"
)
"""What the fit report says instead of uncertainties when λ > 0."""


@dataclass(frozen=True, slots=True)
class FitReport:
    """What a closed-form fit found, in engineering units.

    ``coefficients``: ``offset`` then one per term, so that ŷ = offset + Σ c_j·term_j.
    ``residual_sd`` = √(SSR/(n − p)) as NIST's StRD certifies it (None when n ≤ p);
    ``r2`` = 1 − SSR/SST about the mean (None when y is constant); ``rmse`` = √(SSR/n);
    ``condition``: 2-norm condition number of the standardised design [1, z…].

    Uncertainties (λ = 0 only; None otherwise, with ``uncertainty_basis`` saying why):
    ``covariance`` is the covariance matrix of the coefficients in engineering units, rows
    and columns in ``coefficients`` order, and ``uncertainties`` the square roots of its
    diagonal. Without stated reference uncertainties it is s²·(XᵀX)⁻¹ with s the residual SD
    (ordinary least squares; ISO/TS 28037:2010 Annex E, uncertainties known up to a scale
    factor). With them (weighted least squares, weights 1/u(y)²) it is (XᵀWX)⁻¹, not
    rescaled by the residuals (ISO/TS 28037:2010 clause 6), and ``chi2`` = Σ (r_i/u(y_i))²
    on ``dof`` = n − p degrees of freedom tells whether the stated u(y) are consistent with
    the scatter (χ² near dof; well above it, they are too small or the model is wrong).
    """

    n: int
    lam: float
    coefficients: dict[str, float]
    residual_sd: float | None
    r2: float | None
    condition: float
    rmse: float
    n_weights: int
    penalise_intercept: bool = False
    prior: str = "factory"
    uncertainties: dict[str, float] | None = None
    covariance: tuple[tuple[float, ...], ...] | None = None
    uncertainty_basis: str = ""
    weighted: bool = False
    chi2: float | None = None

    @property
    def dof(self) -> int:
        """Degrees of freedom of the residuals: n − p."""
        return self.n - self.n_weights

    def to_dict(self) -> dict[str, Any]:
        """A plain JSON-able form (an infinite condition number becomes None)."""
        return {
            "uncertainties": None if self.uncertainties is None else dict(self.uncertainties),
            "covariance": None if self.covariance is None else [list(r) for r in self.covariance],
            "uncertainty_basis": self.uncertainty_basis,
            "weighted": self.weighted,
            "chi2": self.chi2,
            "dof": self.dof,
            "n": self.n,
            "lambda": self.lam,
            "coefficients": dict(self.coefficients),
            "residual_sd": self.residual_sd,
            "r2": self.r2,
            "condition": self.condition if math.isfinite(self.condition) else None,
            "rmse": self.rmse,
            "n_weights": self.n_weights,
            "penalise_intercept": self.penalise_intercept,
            "prior": self.prior,
        }


@dataclass(frozen=True, slots=True)
class CVResult:
    """The cross-validation curve for λ and the λ it chose (lowest RMSE; ties → larger λ)."""

    lams: tuple[float, ...]
    rmse: tuple[float, ...]
    chosen: float
    folds: int
    scheme: str = field(default="leave-one-block-out")

    def to_dict(self) -> dict[str, Any]:
        """A plain JSON-able form (an unsolvable λ's RMSE becomes None)."""
        return {
            "scheme": self.scheme,
            "folds": self.folds,
            "lambdas": list(self.lams),
            "rmse": [r if math.isfinite(r) else None for r in self.rmse],
            "chosen": self.chosen,
        }


def design(spec: TermSpec, scaler: Scaler, X: ArrayLike, t: ArrayLike, origin: float) -> NDArray[
    np.float64
]:
    """The standardised design [1, z…] of n readings."""
    T = spec.matrix(np.asarray(X, dtype=np.float64), np.asarray(t, dtype=np.float64), origin)
    Z = scaler.transform(T)
    return np.column_stack([np.ones(Z.shape[0]), Z])


def fit_model(
    spec: TermSpec,
    X: ArrayLike,
    t: ArrayLike,
    y: ArrayLike,
    *,
    lam: float,
    origin: float | None = None,
    memory: float | None = None,
    prior: Sequence[float] | None = None,
    penalise_intercept: bool = False,
    scaler: Scaler | None = None,
    u_ref: ArrayLike | None = None,
    **model_settings: Any,
) -> tuple[RidgeModel, FitReport]:
    """Fit a model in closed form to n references and report it.

    ``u_ref``: the references' standard uncertainties, for a weighted least-squares fit
    (weights 1/u²; λ must be 0). The report carries the coefficients' covariance when λ = 0
    (see :class:`FitReport`).

    X: n × len(spec.inputs) inputs (columns in ``spec.inputs`` order); t: event times (epoch
    seconds); y: references. The scaler comes from the data unless given; ``origin`` defaults
    to min(t); ``memory`` (m, used by later online steps) to n; ``prior`` (standardised, k + 1
    weights) to the factory prior ŷ = raw. The model's spread starts at mean|r|·√(π/2) of the
    in-sample residuals, inflated by √(n/(n − p)) for the fitted degrees of freedom (0 when
    n ≤ p); its update count starts at 0. ``model_settings`` pass on to :class:`RidgeModel`.
    """
    Xa, ta, ya = _arrays(spec, X, t, y)
    n = ya.shape[0]
    if n == 0:
        raise ModelError("no references to fit")
    origin = float(np.min(ta)) if origin is None else float(origin)
    T = spec.matrix(Xa, ta, origin)
    if not np.all(np.isfinite(T)):
        raise DataError("the term matrix holds non-finite values")
    scaler = Scaler.from_terms(T) if scaler is None else scaler
    if len(scaler) != spec.n_terms:
        raise ModelError(f"scaler has {len(scaler)} terms; the spec has {spec.n_terms}")
    Phi = np.column_stack([np.ones(n), scaler.transform(T)])
    p = factory_prior(spec, scaler) if prior is None else [float(v) for v in prior]
    sw = None if u_ref is None else 1.0 / _uncertainties(u_ref, n)
    if sw is not None and lam != 0.0:
        raise ModelError(f"a weighted fit (stated reference uncertainties) needs λ = 0, not "
                         f"λ = {lam:g}: a weighted ridge is not offered")
    if sw is None:
        theta = solve(Phi, ya, lam, p, penalise_intercept)
    else:
        theta = solve(Phi * sw[:, None], ya * sw, lam, p, penalise_intercept)
    resid = Phi @ theta - ya
    ssr = float(resid @ resid)
    k1 = Phi.shape[1]
    sst = float(np.sum((ya - ya.mean()) ** 2))
    spread = 0.0
    if n > k1:
        spread = float(np.mean(np.abs(resid))) * _SQRT_HALF_PI * math.sqrt(n / (n - k1))
    unc: dict[str, float] | None = None
    cov_rows: tuple[tuple[float, ...], ...] | None = None
    chi2 = None if sw is None else float(np.sum((resid * sw) ** 2))
    if lam != 0.0:
        basis = UNCERTAINTY_NOT_GIVEN
    elif sw is not None:
        basis = "from the stated reference uncertainties (weighted least squares, not rescaled)"
        cov_rows = _engineering_covariance(_inverse_normal(Phi * sw[:, None]), scaler)
    elif n > k1:
        basis = "from the residual SD (ordinary least squares)"
        cov_rows = _engineering_covariance(_inverse_normal(Phi) * (ssr / (n - k1)), scaler)
    else:
        basis = "not given: no residual degrees of freedom (n ≤ weights)"
    model = RidgeModel(
        spec,
        scaler,
        origin=origin,
        lam=lam,
        memory=float(n) if memory is None else memory,
        prior=p,
        penalise_intercept=penalise_intercept,
        theta=[float(v) for v in theta],
        spread=spread,
        **model_settings,
    )
    report = FitReport(
        n=n,
        lam=float(lam),
        coefficients=model.coefficients(),
        residual_sd=math.sqrt(ssr / (n - k1)) if n > k1 else None,
        r2=1.0 - ssr / sst if sst > 0.0 else None,
        condition=float(np.linalg.cond(Phi)),
        rmse=math.sqrt(ssr / n),
        n_weights=k1,
        penalise_intercept=penalise_intercept,
        prior="factory" if prior is None else "given",
        uncertainties=unc,
        covariance=cov_rows,
        uncertainty_basis=basis,
        weighted=sw is not None,
        chi2=chi2,
    )
    if cov_rows is not None:
        names = list(report.coefficients)
        unc = {k: math.sqrt(max(cov_rows[i][i], 0.0)) for i, k in enumerate(names)}
        report = replace(report, uncertainties=unc)
    return model, report


def _uncertainties(u_ref: ArrayLike, n: int) -> NDArray[np.float64]:
    u = np.asarray(u_ref, dtype=np.float64)
    if u.shape != (n,):
        raise DataError(f"reference uncertainties have shape {u.shape}; expected ({n},)")
    if not np.all(np.isfinite(u) & (u > 0.0)):
        raise DataError("reference uncertainties must be finite and > 0")
    return u


def _inverse_normal(A: NDArray[np.float64]) -> NDArray[np.float64]:
    """(AᵀA)⁻¹ from the SVD of A (AᵀA is never formed, so its digits are kept)."""
    _, sv, vt = np.linalg.svd(A, full_matrices=False)
    out: NDArray[np.float64] = (vt.T / sv**2) @ vt
    return out


def _engineering_covariance(cov_z: NDArray[np.float64], scaler: Scaler
                            ) -> tuple[tuple[float, ...], ...]:
    """The covariance of [θ_0, θ_z…] (standardised) carried to [offset, c…] (engineering).

    c_j = θ_j / s_j and offset = θ_0 − Σ θ_j·μ_j/s_j, a linear map J, so Cov(c) = J Cov(θ) Jᵀ.
    """
    centre = np.asarray(scaler.centre, dtype=np.float64)
    scale = np.asarray(scaler.scale, dtype=np.float64)
    k1 = centre.shape[0] + 1
    J = np.zeros((k1, k1))
    J[0, 0] = 1.0
    J[0, 1:] = -centre / scale
    J[1:, 1:] = np.diag(1.0 / scale)
    cov = J @ cov_z @ J.T
    cov = (cov + cov.T) / 2.0
    return tuple(tuple(float(v) for v in row) for row in cov)


def cross_validate(
    spec: TermSpec,
    X: ArrayLike,
    t: ArrayLike,
    y: ArrayLike,
    lams: Sequence[float],
    *,
    folds: int = 5,
    prior: Sequence[float] | None = None,
    penalise_intercept: bool = False,
) -> CVResult:
    """Choose λ by time-blocked, leave-one-block-out cross-validation.

    The references are put in time order and cut into ``folds`` contiguous blocks of near-equal
    size (no shuffling). For each λ, each block in turn is predicted by a model fitted to all
    the other blocks (its own scaler from that training data; origin = min of all times);
    the curve is the pooled RMSE over every held-out reference. A λ that cannot be fitted on
    some training set (λ = 0 with too few references) gets RMSE inf. The chosen λ has the
    lowest RMSE; among equal RMSEs the largest λ (the most shrinkage) wins.
    """
    Xa, ta, ya = _arrays(spec, X, t, y)
    n = ya.shape[0]
    if isinstance(folds, bool) or not isinstance(folds, int) or folds < 2:
        raise ModelError(f"folds = {folds!r} must be an integer ≥ 2")
    if n < folds:
        raise ModelError(f"{n} references are fewer than the {folds} folds asked for")
    grid = [float(v) for v in lams]
    if not grid:
        raise ModelError("no λ values to try")
    for v in grid:
        if not (math.isfinite(v) and v >= 0.0):
            raise ModelError(f"λ = {v} must be finite and ≥ 0")
    order = np.argsort(ta, kind="stable")
    Xa, ta, ya = Xa[order], ta[order], ya[order]
    origin = float(ta[0])
    blocks = np.array_split(np.arange(n), folds)
    curve = []
    for lam in grid:
        sq = 0.0
        try:
            for block in blocks:
                train = np.ones(n, dtype=bool)
                train[block] = False
                model, _ = fit_model(
                    spec, Xa[train], ta[train], ya[train], lam=lam, origin=origin,
                    prior=prior, penalise_intercept=penalise_intercept,
                )
                Phi = design(spec, model.scaler, Xa[block], ta[block], origin)
                r = Phi @ np.asarray(model.theta) - ya[block]
                sq += float(r @ r)
        except ModelError:
            curve.append(math.inf)
            continue
        curve.append(math.sqrt(sq / n))
    finite = [(r, lam) for r, lam in zip(curve, grid, strict=True) if math.isfinite(r)]
    if not finite:
        raise ModelError("no λ in the grid could be fitted on every fold; try λ > 0")
    best = min(r for r, _ in finite)
    chosen = max(lam for r, lam in finite if r == best)
    return CVResult(tuple(grid), tuple(curve), chosen, folds)


def _arrays(
    spec: TermSpec, X: ArrayLike, t: ArrayLike, y: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    Xa = np.asarray(X, dtype=np.float64)
    if Xa.ndim == 1 and len(spec.inputs) == 1:
        Xa = Xa[:, None]
    ta = np.asarray(t, dtype=np.float64)
    ya = np.asarray(y, dtype=np.float64)
    if Xa.ndim != 2 or Xa.shape[1] != len(spec.inputs):
        raise DataError(f"inputs have shape {Xa.shape}; expected (n, {len(spec.inputs)})")
    n = Xa.shape[0]
    if ta.shape != (n,) or ya.shape != (n,):
        raise DataError(f"times {ta.shape} and references {ya.shape} must both be ({n},)")
    for name, arr in (("inputs", Xa), ("times", ta), ("references", ya)):
        if not np.all(np.isfinite(arr)):
            raise DataError(f"{name} hold non-finite values")
    return Xa, ta, ya
