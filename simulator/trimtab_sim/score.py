"""Scoring a corrected stream against the truth a simulated stream carries.

Three series are scored per sensor against ``truth``, on the same readings (those that have
a corrected value): ``raw``, ``corrected`` (the daemon's output, joined by (sensor, t)) and a
hindsight ``oracle``.

Metrics of a series v against truth y (n samples):

- RMSE = √mean((v − y)²), MAE = mean|v − y|, bias = mean(v − y);
- R² = 1 − Σ(v − y)² / Σ(y − ȳ)², the coefficient of determination of v as a prediction of y
  (sklearn's ``r2_score``; it can be negative);
- slope, intercept and r² of the least-squares line v = slope·y + intercept (value against
  truth, as ``scipy.stats.linregress(y, v)`` gives them);
- NRMSE = RMSE / mean(y), normalised by the mean truth (not the range).

The oracle is a batch ridge fit (``trimtab.model.closedform.solve``) that sees every reference in
hindsight: the stream is cut into consecutive blocks of ``oracle_days``; each block is
predicted by a fit to the references within the block widened by half a block on each side
(when that holds fewer references than there are weights, the references nearest the block's
centre, one per weight). Its terms are the intercept, the
reading's inputs (raw and covariates) and the products raw × covariate, standardised over the
sensor's readings, shrunk by ``oracle_lambda`` toward the factory prior (gain 1 on raw).
A reference with a window is paired with the mean inputs of the readings in its window;
a spot reference with the nearest reading within 1.5 reading intervals.

Recovery after a drift step at t_s: the rolling error is the RMS of (v − y) over the trailing
``recovery_window`` seconds of samples at or after t_s; the time to recover is the end of the
first full window whose rolling error is within the tolerance, minus t_s (so it is never less
than the window). The tolerance is ``recovery_tolerance`` if set, otherwise 1.5 × the
series' RMS error over the day before the step. ``None`` means it never recovered.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from trimtab.errors import DataError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.model.closedform import solve

F64 = NDArray[np.float64]
DAY = 86400.0
SERIES = ("raw", "corrected", "oracle")


@dataclass(frozen=True, slots=True)
class Settings:
    """Knobs of the scorer (a scenario's ``[score]`` table supplies them)."""

    oracle_days: float = 1.0
    oracle_lambda: float = 1.0
    recovery_window: float = 3600.0
    recovery_tolerance: float | None = None
    stamp: Literal["end", "start"] = "end"
    min_improvement: float = 0.2


@dataclass(frozen=True, slots=True)
class Metrics:
    """Agreement of one series with truth (see the module docstring for definitions)."""

    n: int
    rmse: float
    mae: float
    bias: float
    r2: float
    slope: float
    intercept: float
    fit_r2: float
    nrmse: float


@dataclass(frozen=True, slots=True)
class Recovery:
    """Time for one series to recover after a step at ``at`` (None: never)."""

    at: float
    series: str
    tolerance: float | None
    seconds: float | None


@dataclass(slots=True)
class Joined:
    """One sensor's readings that have a corrected value, as aligned arrays."""

    sensor: str
    t: F64
    truth: F64
    inputs: dict[str, F64]
    corrected: F64
    band: F64
    missing: int = 0
    ref_t: F64 = field(default_factory=lambda: np.empty(0))
    ref_y: F64 = field(default_factory=lambda: np.empty(0))
    ref_w: F64 = field(default_factory=lambda: np.empty(0))
    oracle: F64 | None = None

    def series(self, name: str) -> F64 | None:
        """The values of ``raw``, ``corrected`` or ``oracle``."""
        if name == "raw":
            return self.inputs["raw"]
        return self.corrected if name == "corrected" else self.oracle


@dataclass(frozen=True, slots=True)
class SensorScore:
    """Everything scored for one sensor (``overall`` uses sensor ``"*"``)."""

    sensor: str
    n: int
    missing: int
    references: int
    metrics: dict[str, Metrics]
    coverage: float | None
    recovery: list[Recovery]


def metrics(value: Sequence[float] | F64, truth: Sequence[float] | F64) -> Metrics:
    """RMSE, MAE, bias, R², line fit and NRMSE of ``value`` against ``truth``."""
    v = np.asarray(value, dtype=np.float64)
    y = np.asarray(truth, dtype=np.float64)
    if v.shape != y.shape or v.ndim != 1 or v.size < 2:
        raise DataError(f"need two equal 1-d arrays of >= 2 values, got {v.shape} and {y.shape}")
    e = v - y
    rmse = float(np.sqrt(np.mean(e * e)))
    yc = y - y.mean()
    sst = float(np.dot(yc, yc))
    sse = float(np.dot(e, e))
    r2 = 1.0 - sse / sst if sst > 0 else math.nan
    if sst > 0:
        vc = v - v.mean()
        slope = float(np.dot(yc, vc) / sst)
        svv = float(np.dot(vc, vc))
        fit_r2 = float(np.dot(yc, vc) ** 2 / (sst * svv)) if svv > 0 else math.nan
    else:
        slope, fit_r2 = math.nan, math.nan
    intercept = float(v.mean() - slope * y.mean())
    mean_y = float(y.mean())
    return Metrics(
        n=int(v.size),
        rmse=rmse,
        mae=float(np.mean(np.abs(e))),
        bias=float(e.mean()),
        r2=r2,
        slope=slope,
        intercept=intercept,
        fit_r2=fit_r2,
        nrmse=rmse / mean_y if mean_y != 0 else math.nan,
    )


def join(events: Iterable[Reading | Reference], corrected: Iterable[Corrected]) -> list[Joined]:
    """Align readings (with truth) and references with corrected values by (sensor, t)."""
    out_of: dict[tuple[str, float], Corrected] = {(c.sensor, c.t): c for c in corrected}
    rows: dict[str, list[tuple[Reading, Corrected]]] = {}
    missing: dict[str, int] = {}
    refs: dict[str, list[Reference]] = {}
    for e in events:
        if isinstance(e, Reference):
            refs.setdefault(e.sensor, []).append(e)
            continue
        if e.truth is None:
            raise DataError(f"reading of {e.sensor} at t={e.t} carries no truth (not simulated)")
        c = out_of.get((e.sensor, e.t))
        if c is None:
            missing[e.sensor] = missing.get(e.sensor, 0) + 1
        else:
            rows.setdefault(e.sensor, []).append((e, c))
    joined: list[Joined] = []
    for sensor in sorted(set(rows) | set(missing)):
        pairs = sorted(rows.get(sensor, []), key=lambda p: p[0].t)
        names = sorted(set.intersection(*(set(r.inputs) for r, _ in pairs))) if pairs else ["raw"]
        if "raw" not in names:
            raise DataError(f"readings of {sensor} carry no 'raw' input")
        names = ["raw", *[n for n in names if n != "raw"]]
        rs = sorted(refs.get(sensor, []), key=lambda r: r.t)
        joined.append(
            Joined(
                sensor=sensor,
                t=np.array([r.t for r, _ in pairs], dtype=np.float64),
                truth=np.array([r.truth for r, _ in pairs], dtype=np.float64),
                inputs={n: np.array([r.inputs[n] for r, _ in pairs]) for n in names},
                corrected=np.array([c.value for _, c in pairs], dtype=np.float64),
                band=np.array([c.band for _, c in pairs], dtype=np.float64),
                missing=missing.get(sensor, 0),
                ref_t=np.array([r.t for r in rs], dtype=np.float64),
                ref_y=np.array([r.value for r in rs], dtype=np.float64),
                ref_w=np.array([r.window or 0.0 for r in rs], dtype=np.float64),
            )
        )
    return joined


def _terms(inputs: Mapping[str, F64]) -> F64:
    raw = inputs["raw"]
    cols = [raw, *[inputs[n] for n in inputs if n != "raw"]]
    cols += [raw * inputs[n] for n in inputs if n != "raw"]
    return np.column_stack(cols)


def pair_references(j: Joined, stamp: str = "end") -> tuple[F64, F64, F64]:
    """Reference times, values and the matching term rows (window mean or nearest reading)."""
    T = _terms(j.inputs)
    if j.t.size < 2:
        return np.empty(0), np.empty(0), np.empty((0, T.shape[1]))
    tol = 1.5 * float(np.median(np.diff(j.t)))
    ts, ys, rows = [], [], []
    for t, y, w in zip(j.ref_t, j.ref_y, j.ref_w, strict=True):
        if w > 0:
            if stamp == "end":
                lo, hi = np.searchsorted(j.t, [t - w, t], side="right")
            else:
                lo, hi = np.searchsorted(j.t, [t, t + w], side="left")
            if hi <= lo:
                continue
            row = T[lo:hi].mean(axis=0)
        else:
            k = int(np.argmin(np.abs(j.t - t)))
            if abs(j.t[k] - t) > tol:
                continue
            row = T[k]
        ts.append(t)
        ys.append(y)
        rows.append(row)
    if not rows:
        return np.empty(0), np.empty(0), np.empty((0, T.shape[1]))
    return np.array(ts), np.array(ys), np.vstack(rows)


def oracle(j: Joined, settings: Settings) -> F64 | None:
    """Hindsight ridge predictions for every reading of ``j`` (None without references)."""
    rt, ry, R = pair_references(j, settings.stamp)
    if rt.size == 0:
        return None
    T = _terms(j.inputs)
    centre = T.mean(axis=0)
    scale = T.std(axis=0)
    scale[scale == 0] = 1.0
    Z = (T - centre) / scale
    Zr = (R - centre) / scale
    # Factory prior, standardised: value = raw, i.e. intercept centre_raw, weight scale_raw.
    prior = np.zeros(T.shape[1] + 1)
    prior[0], prior[1] = centre[0], scale[0]
    block = settings.oracle_days * DAY
    out = np.empty(j.t.size)
    t0 = float(j.t[0])
    nblocks = int(np.floor((j.t[-1] - t0) / block)) + 1
    # Too few references near a block: borrow the nearest ones, one per weight.
    need = T.shape[1] + 1
    for b in range(nblocks):
        a, e = t0 + b * block, t0 + (b + 1) * block
        sel = np.flatnonzero((rt >= a - block / 2) & (rt < e + block / 2))
        if sel.size < need:
            sel = np.argsort(np.abs(rt - (a + e) / 2), kind="stable")[:need]
        phi = np.column_stack([np.ones(sel.size), Zr[sel]])
        theta = solve(phi, ry[sel], settings.oracle_lambda, prior)
        idx = np.flatnonzero((j.t >= a) & (j.t < e))
        out[idx] = theta[0] + Z[idx] @ theta[1:]
    return out


def recovery(
    t: F64, err: F64, at: float, window: float, tolerance: float | None
) -> tuple[float | None, float | None]:
    """(tolerance used, seconds to recover) for errors ``err`` after a step at ``at``."""
    if tolerance is None:
        before = (t >= at - DAY) & (t < at)
        if not before.any():
            return None, None
        tolerance = 1.5 * float(np.sqrt(np.mean(err[before] ** 2)))
    k0 = int(np.searchsorted(t, at, side="left"))
    tt, e2 = t[k0:], err[k0:] ** 2
    csum = np.concatenate([[0.0], np.cumsum(e2)])
    for k in range(tt.size):
        if tt[k] - at < window - 1e-9:
            continue
        lo = int(np.searchsorted(tt, tt[k] - window, side="right"))
        rms = math.sqrt((csum[k + 1] - csum[lo]) / (k + 1 - lo))
        if rms <= tolerance:
            return tolerance, float(tt[k] - at)
    return tolerance, None


def score_sensor(j: Joined, settings: Settings, steps: Sequence[float] = ()) -> SensorScore:
    """Metrics of raw, corrected and oracle, band coverage and recoveries for one sensor."""
    if j.t.size < 2:
        raise DataError(f"sensor {j.sensor}: fewer than two readings have a corrected value")
    if j.oracle is None:
        j.oracle = oracle(j, settings)
    out: dict[str, Metrics] = {}
    recs: list[Recovery] = []
    for name in SERIES:
        v = j.series(name)
        if v is None:
            continue
        out[name] = metrics(v, j.truth)
        for at in steps:
            tol, sec = recovery(
                j.t, v - j.truth, at, settings.recovery_window, settings.recovery_tolerance
            )
            recs.append(Recovery(at=at, series=name, tolerance=tol, seconds=sec))
    coverage = float(np.mean(np.abs(j.corrected - j.truth) <= j.band))
    return SensorScore(j.sensor, int(j.t.size), j.missing, int(j.ref_t.size), out, coverage, recs)


def overall(joined: Sequence[Joined]) -> SensorScore:
    """Metrics pooled over every sensor's readings (sensor ``"*"``)."""
    truth = np.concatenate([j.truth for j in joined])
    out: dict[str, Metrics] = {}
    for name in SERIES:
        parts = [j.series(name) for j in joined]
        if all(p is not None for p in parts):
            out[name] = metrics(np.concatenate([p for p in parts if p is not None]), truth)
    corr = np.concatenate([j.corrected for j in joined])
    band = np.concatenate([j.band for j in joined])
    coverage = float(np.mean(np.abs(corr - truth) <= band))
    refs = sum(int(j.ref_t.size) for j in joined)
    missing = sum(j.missing for j in joined)
    return SensorScore("*", int(truth.size), missing, refs, out, coverage, [])


def to_jsonable(obj: Any) -> Any:
    """Dataclasses, dicts and lists with NaN and infinities replaced by None."""
    if hasattr(obj, "__dataclass_fields__"):
        return to_jsonable(asdict(obj))
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


@dataclass(frozen=True, slots=True)
class Result:
    """A whole scoring run: per-sensor scores and the pooled score."""

    sensors: list[SensorScore]
    overall: SensorScore
    settings: Settings


def score(
    joined: list[Joined],
    settings: Settings,
    steps: Mapping[str, Sequence[float]] | None = None,
) -> Result:
    """Score every joined sensor; ``steps`` maps sensor → drift-step times (epoch s)."""
    if not joined:
        raise DataError("no sensor has readings with corrected values to score")
    steps = steps or {}
    per = [score_sensor(j, settings, steps.get(j.sensor, ())) for j in joined]
    return Result(per, overall(joined), settings)
