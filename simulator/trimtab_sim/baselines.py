"""What an operator could do without trimtab, in plain numpy: the yardsticks of the real year.

None of this uses trimtab's code; each is written from its textbook definition so the margin
trimtab wins by is measured against an independent implementation:

* **fixed** — ordinary least squares on the first 14 days (what most deployments do: calibrate
  once at collocation, then trust it);
* **monthly refit** — least squares refitted every 30 days on the previous 30 days' references
  of the schedule (the first month keeps the 14-day fit);
* **plain NLMS** — the normalised least-mean-squares ridge update
  ``θ ← p + (1 − aλ/m)(θ − p) − a·r·φ`` with ``a = α / (1 + ‖φ‖²)``, the intercept unpenalised,
  from the 14-day fit with its scaler frozen; the best α and λ of a grid chosen in hindsight on
  the whole year (so it is an optimistic yardstick).

Every hour that has the analyser's value is scored, predicted before its own reference is used.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from trimtab_sim.uci import DAY, FIT_DAYS, Year

__all__ = ["Baselines", "baselines"]

F64 = NDArray[np.float64]
MONTH = 30.0 * DAY
NLMS_ALPHAS = (0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 1.0, 1.5)
NLMS_LAMBDAS = (0.0, 1.0, 10.0)
NLMS_MEMORY = 200.0


@dataclass(frozen=True, slots=True)
class Baselines:
    """RMSE (mg/m³) of each yardstick for one schedule."""

    fixed: float
    monthly: float
    nlms: float
    nlms_alpha: float
    nlms_lambda: float


def _terms(year: Year) -> tuple[F64, F64, F64]:
    t = np.array([h.t for h in year.hours])
    X = np.array([[h.raw, h.temp, h.rh, h.raw * h.raw] for h in year.hours])
    y = np.array([np.nan if h.co is None else h.co for h in year.hours])
    return t, X, y


def _ols(X: F64, y: F64) -> F64:
    A = np.column_stack((np.ones(len(X)), X))
    coef, *_ = np.linalg.lstsq(A, y, rcond=None)
    out: F64 = np.asarray(coef, dtype=np.float64)
    return out


def _predict(coef: F64, X: F64) -> F64:
    out: F64 = coef[0] + X @ coef[1:]
    return out


def _rmse(pred: F64, y: F64) -> float:
    has = ~np.isnan(y)
    return float(np.sqrt(np.mean((pred[has] - y[has]) ** 2)))


def baselines(year: Year, schedule: str) -> Baselines:
    """The three yardsticks' RMSE over every scored hour of the year, for one schedule."""
    t, X, y = _terms(year)
    has = ~np.isnan(y)
    refs = np.array([year.referenced(schedule, h) for h in year.hours])
    first = (t < year.t0 + FIT_DAYS * DAY) & has
    coef = _ols(X[first], y[first])
    fixed = _rmse(_predict(coef, X), y)

    monthly = np.empty(len(t))
    month = ((t - year.t0) // MONTH).astype(int)
    for mth in range(int(month.max()) + 1):
        rows = month == mth
        if mth > 0:
            window = refs & (t >= year.t0 + (mth - 1) * MONTH) & (t < year.t0 + mth * MONTH)
            if window.sum() >= 2 * (X.shape[1] + 1):
                coef = _ols(X[window], y[window])
        monthly[rows] = _predict(coef, X[rows])

    centre, scale = X[first].mean(axis=0), X[first].std(axis=0)
    Z = np.column_stack((np.ones(len(X)), (X - centre) / scale))
    theta0, *_ = np.linalg.lstsq(Z[first], y[first], rcond=None)
    best = (np.inf, 0.0, 0.0)
    for alpha in NLMS_ALPHAS:
        for lam in NLMS_LAMBDAS:
            e = _rmse(_nlms(Z, y, refs, theta0, alpha, lam), y)
            if e < best[0]:
                best = (e, alpha, lam)
    return Baselines(fixed, _rmse(monthly, y), best[0], best[1], best[2])


def _nlms(Z: F64, y: F64, refs: NDArray[np.bool_], theta0: F64, alpha: float,
          lam: float) -> F64:
    """Plain normalised LMS ridge toward a zero prior: predict each hour, then learn."""
    theta = theta0.copy()
    out = Z @ theta0
    for i in range(len(Z)):
        z = Z[i]
        out[i] = float(theta @ z)
        if refs[i]:
            r = out[i] - y[i]
            a = alpha / (1.0 + float(z @ z))
            intercept = theta[0] - a * r
            theta = (1.0 - a * lam / NLMS_MEMORY) * theta - a * r * z
            theta[0] = intercept
    return out
