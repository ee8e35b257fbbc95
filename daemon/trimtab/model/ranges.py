"""A sensor's operating range, followed causally, and the scaler moves it asks for.

A scaler fixed from the first days of a deployment starves the normalised step when the
operating range moves (measured on a real year of a tin-oxide CO cell: ‖φ‖² three times larger
in summer than in March, so every step was three times smaller just when the sensor drifted
most). :class:`RangeTracker` follows each term's centre and spread from the readings; at each
reference the engine moves the model's scaler toward ``centre = mean``, ``scale = width × sd``
and re-expresses θ and the prior so that no prediction changes.

The move (``remap``), for a scaler going from (c, s) to (c′, s′)::

    ŷ = θ_0 + Σ_j θ_j (x_j − c_j)/s_j = θ′_0 + Σ_j θ′_j (x_j − c′_j)/s′_j   for every x
    ⇔  θ′_j = θ_j · (s′_j / s_j),   θ′_0 = θ_0 + Σ_j θ_j · (c′_j − c_j)/s_j

The prior is moved with the same map, so it describes the same calibration in engineering
units. The penalty λ Σ (θ_j − p_j)² is then measured in the new standardised units: a term
whose spread grew by a factor f has its engineering-unit deviation from the prior penalised
f² times more than before, which is what "standardised" means — the penalty stays a statement
about typical contributions to ŷ over the current operating range.

The running statistics, per reading at time t after one at t_prev (β = 1 − exp(−Δt/span))::

    d = clip(x − μ, −INFLUENCE·sd, +INFLUENCE·sd)     (one reading cannot move them far)
    μ ← μ + β d,     v ← (1 − β)(v + β d²)

Moves are bounded in rate: each changes a scale by at most a factor ``MAX_FACTOR`` and a centre
by at most one (current) scale, and a scale never falls below ``FLOOR`` times its starting
value. The elapsed-time term keeps its centre and scale. ``remap`` takes θ as a sequence of
floats or of numpy arrays (one entry per candidate), so the daemon and the vectorised tuner run
this one function and get the same bits.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from trimtab.errors import DataError
from trimtab.model.terms import Scaler, as_float, float_list

__all__ = ["FLOOR", "INFLUENCE", "MAX_FACTOR", "RangeTracker", "remap"]

INFLUENCE = 4.0
"""A reading moves the running mean by at most this many running standard deviations × β."""
MAX_FACTOR = 2.0
"""One move changes a term's scale by at most this factor (up or down)."""
FLOOR = 0.01
"""A term's scale never falls below this fraction of where it started."""

def remap(theta: Sequence[Any], old: Scaler, new: Scaler) -> list[Any]:
    """θ re-expressed for scaler ``new`` so that θ·φ is unchanged (see the module docstring).

    Entries of θ may be floats or arrays; the arithmetic is the same, term by term, left to
    right. Terms whose centre and scale did not move keep their weight exactly.
    """
    out: list[Any] = [theta[0]]
    acc: Any = theta[0]
    for j, (c0, s0, c1, s1) in enumerate(zip(old.centre, old.scale, new.centre, new.scale,
                                             strict=True), start=1):
        w = theta[j]
        if c1 != c0:
            acc = acc + w * ((c1 - c0) / s0)
        out.append(w if s1 == s0 else w * (s1 / s0))
    out[0] = acc
    return out


class RangeTracker:
    """Running mean and variance of a sensor's terms; the scaler it suggests at a reference."""

    __slots__ = ("_fixed", "floor", "last_t", "mean", "var")

    def __init__(self, *, fixed: Sequence[bool], mean: Sequence[float], var: Sequence[float],
                 floor: Sequence[float], last_t: float | None = None) -> None:
        self._fixed = tuple(bool(f) for f in fixed)
        self.mean = [float(v) for v in mean]
        self.var = [float(v) for v in var]
        self.floor = [float(v) for v in floor]
        k = len(self._fixed)
        if len(self.mean) != k or len(self.var) != k or len(self.floor) != k:
            raise DataError(f"ranges: fixed, mean, var and floor must have {k} entries each")
        if any(v < 0.0 for v in self.var) or any(v < 0.0 for v in self.floor):
            raise DataError("ranges: var and floor must be ≥ 0")
        self.last_t = last_t

    @classmethod
    def start(cls, scaler: Scaler, fixed: Sequence[bool]) -> RangeTracker:
        """A tracker at a scaler (mean = centre, sd = scale); fixed terms hold no statistics."""
        if len(fixed) != len(scaler):
            raise DataError(f"ranges: {len(fixed)} flags for {len(scaler)} terms")
        keep = [not f for f in fixed]
        return cls(fixed=fixed,
                   mean=[c if k else 0.0 for c, k in zip(scaler.centre, keep, strict=True)],
                   var=[s * s if k else 0.0 for s, k in zip(scaler.scale, keep, strict=True)],
                   floor=[FLOOR * s if k else 0.0 for s, k in zip(scaler.scale, keep,
                                                                  strict=True)])

    def observe(self, row: Sequence[float], t: float, span: float) -> None:
        """Fold one fresh reading's term values (the elapsed term is ignored) into the range."""
        last = self.last_t
        if last is not None and not t > last:
            return  # not later than the last: the clock never goes back
        self.last_t = t
        if last is None:
            return
        beta = -math.expm1(-(t - last) / span)
        mean, var, fixed = self.mean, self.var, self._fixed
        for j, x in enumerate(row):
            if fixed[j]:
                continue
            m = mean[j]
            lim = INFLUENCE * math.sqrt(var[j])
            d = x - m
            if d > lim:
                d = lim
            elif d < -lim:
                d = -lim
            mean[j] = m + beta * d
            var[j] = (1.0 - beta) * (var[j] + beta * d * d)

    def target(self, current: Scaler, width: float) -> Scaler:
        """The scaler to move to from ``current``: toward (mean, width × sd), bounded in rate."""
        centre = list(current.centre)
        scale = list(current.scale)
        for j, fixed in enumerate(self._fixed):
            if fixed:
                continue
            c, s = centre[j], scale[j]
            want = max(width * math.sqrt(self.var[j]), self.floor[j])
            scale[j] = min(max(want, s / MAX_FACTOR), s * MAX_FACTOR)
            centre[j] = min(max(self.mean[j], c - s), c + s)
        if centre == list(current.centre) and scale == list(current.scale):
            return current
        return Scaler(tuple(centre), tuple(scale))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able state; floats round-trip exactly through json."""
        return {"fixed": list(self._fixed), "mean": self.mean, "var": self.var,
                "floor": self.floor, "last_t": self.last_t}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> RangeTracker:
        """Rebuild from :meth:`to_dict`'s form; DataError names what is malformed."""
        if not isinstance(d, Mapping):
            raise DataError("ranges: expected an object")
        try:
            fixed = d["fixed"]
            if not isinstance(fixed, list) or not all(isinstance(f, bool) for f in fixed):
                raise DataError("ranges.fixed: expected a list of true/false")
            last = d["last_t"]
            return cls(fixed=fixed, mean=float_list(d["mean"], "ranges.mean"),
                       var=float_list(d["var"], "ranges.var"),
                       floor=float_list(d["floor"], "ranges.floor"),
                       last_t=None if last is None else as_float(last, "ranges.last_t"))
        except KeyError as exc:
            raise DataError(f"ranges: missing key {exc.args[0]!r}") from None
