"""Run-time guards of one sensor's model: suspect gate, good snapshots, rollback, step size.

The config's bounds make divergence impossible in theory; these guards catch what gets past
them in practice (a broken reference instrument, a sensor swapped without notice):

* **gate** — a reference whose prequential residual exceeds ``gate_k`` robust spreads (the
  larger of the model's recent spread and the long-window scale σ_L below) is held as a
  *suspect* and not applied. ``gate_run`` suspects in a row on the same side, spanning at
  least ``shift_after`` seconds of event time (a burst of references that agree with each
  other in a second is not a new regime), are a real level shift: the latest ``gate_run``
  − 1 held suspects and this one are applied, in order, and the error baseline restarts. A
  run whose reference values are all one repeated number is a *stuck* instrument (a
  reference frozen at zero or at its last value), not a shift: it stays gated until a value
  differs.
* **snapshot / rollback** — every ``snapshot_every`` applied references the model is copied as
  the last good one. The recent error (an exponentially weighted mean of squared prequential
  residuals over about ``snapshot_every`` references) is compared with a robust long-window
  error scale σ_L = √(π/2)·(exponentially weighted mean of |residual| over about
  ``error_window`` references). When √recent > ``rollback_factor``·σ_L, with at least
  ``snapshot_every`` references behind σ_L, the model returns to the snapshot and α halves,
  never below ``alpha_min``. One calm night cannot set the threshold: σ_L spans weeks.
* **gap lift** — with ``step_adapt = "gap"`` the step of a reference is α raised toward
  ``alpha_max`` by :func:`gap_fraction` of the time since the last applied reference, so
  sparse references (a collocation day a week) correct a week's drift quickly and a run of
  hourly ones takes the configured α; the references of an accepted level shift are applied
  at α_max. The step stays within [α, α_max], where the stability proof holds.
* **recovery** — after each applied reference that is not rolled back, α moves the fraction
  ``alpha_recovery`` of the way back to the configured α, so a rollback costs steps for a
  while, not for good. α stays within [``alpha_min``, configured α] ⊆ [α_min, α_max].

Each rule is written once, as a function over :mod:`trimtab.model.ops` and a mask ``m`` of the
lanes it acts on: the daemon runs it on one sensor's :class:`Guard` (floats, ``m`` a bool),
the tuner on K candidates' guards at once (K-vectors). A guard holds, besides the fields of
:class:`Guard`, its suspects and whether it has a snapshot; how those are stored differs (a
list of feature vectors, or indices into the recorded references), so the guard object
answers for them (:class:`Guard` for floats, :class:`trimtab.tune.lanes.Lanes` for arrays).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

from trimtab.model.kernel import SQRT_HALF_PI
from trimtab.model.ops import SCALAR, Ops

__all__ = [
    "SQRT_HALF_PI",
    "Guard",
    "GuardSettings",
    "Verdict",
    "end_run",
    "exploded",
    "gap_fraction",
    "judge",
    "lifted",
    "mark_snapshot",
    "record",
    "recover",
    "restart_baseline",
    "roll_back",
]

Verdict = Literal["apply", "suspect", "shift"]


def gap_fraction(gap: Any, span: Any) -> Any:
    """How far a reference's step rises toward α_max after ``gap`` seconds without one.

    ``gap / (gap + span)``: 0 right after a reference, ½ after ``span``, → 1 after a long gap.
    A random-walk drift grows the model's uncertainty with elapsed time, so the first
    reference after a long gap deserves the largest step (the Kalman filter's gain does the
    same); consecutive references fall back to the configured α. ``span`` = +inf turns the
    lift off (``step_adapt = "none"``): the fraction is then 0.
    """
    return gap / (gap + span)


def lifted(alpha: Any, alpha_max: Any, fraction: Any, ops: Ops = SCALAR) -> Any:
    """α raised the given fraction of the way to α_max: always inside [α, α_max].

    The ``minimum`` keeps a rounding of α + (α_max − α)·1 from landing one ulp above α_max.
    """
    return ops.minimum(alpha_max, alpha + (alpha_max - alpha) * fraction)


@dataclass(frozen=True, slots=True)
class GuardSettings:
    """The guard's knobs, taken from the ``[learning]`` section of the config.

    Floats for one sensor; any of them may be a K-vector for K candidates. ``step_gap`` is
    +inf when the gap lift is off.
    """

    gate_k: Any
    gate_run: Any
    warmup: Any
    snapshot_every: Any
    rollback_factor: Any
    alpha: Any
    alpha_min: Any
    error_window: Any = 200
    alpha_recovery: Any = 0.0
    shift_after: Any = 0.0
    alpha_max: Any = 1.0
    step_gap: Any = math.inf


# -- the rules, once for floats and K-vectors ---------------------------------------------------


def judge(ops: Ops, g: Any, m: Any, residual: Any, spread: Any, s: GuardSettings,
          t: Any) -> tuple[Any, Any]:
    """Gate the references in ``m``: (beyond the gate, and of those, a level shift).

    The gate is active after ``warmup`` applied references with a spread; it compares |r| with
    ``gate_k`` times the larger of the recent spread and the long-window scale (a calm night's
    spread alone would gate the next ordinary rush hour). A reference within it ends any run;
    one beyond it on the other side from the run starts a new run at t.
    """
    gate = (g.applied >= s.warmup) & (spread > 0.0)
    scale = ops.maximum(spread, SQRT_HALF_PI * g.long_abs)
    rej = m & gate & ops.not_(ops.absolute(residual) <= s.gate_k * scale)
    accept = m & ops.not_(rej)
    if ops.any(accept):
        end_run(ops, g, accept)
    if ops.any(rej):
        sign = ops.where(residual > 0, 1, -1)
        new_run = rej & (sign != g.run_sign)
        g.run_sign = ops.where(new_run, sign, g.run_sign)
        g.clear_suspects(new_run)
        g.run_t0 = ops.where(new_run | (rej & ops.isnan(g.run_t0)), t, g.run_t0)
        shift = rej & (g.n_suspects() + 1 >= s.gate_run) & (t - g.run_t0 >= s.shift_after)
        return rej, shift
    return rej, rej


def end_run(ops: Ops, g: Any, m: Any) -> None:
    """End the suspect run where ``m``: no side, no start time, no held suspects."""
    g.run_sign = ops.where(m, 0, g.run_sign)
    g.clear_suspects(m)
    g.run_t0 = ops.where(m, math.nan, g.run_t0)


def record(ops: Ops, g: Any, m: Any, residual: Any, s: GuardSettings) -> None:
    """Fold each applied reference's prequential residual into the recent and long errors."""
    w = 2.0 / (s.snapshot_every + 1.0)
    sq = residual * residual
    g.recent_ms = ops.where(m, ops.where(g.fresh, sq, (1.0 - w) * g.recent_ms + w * sq),
                            g.recent_ms)
    g.fresh = g.fresh & ops.not_(m)
    a = ops.absolute(residual)
    wl = 2.0 / (s.error_window + 1.0)
    g.long_abs = ops.where(m, ops.where(g.long_n == 0, a, g.long_abs + wl * (a - g.long_abs)),
                           g.long_abs)
    one = ops.count(m)
    g.long_n = g.long_n + one
    g.applied = g.applied + one
    g.since_snapshot = g.since_snapshot + one


def exploded(ops: Ops, g: Any, s: GuardSettings) -> Any:
    """Where the recent error has grown past the rollback threshold (see the module)."""
    limit = s.rollback_factor * SQRT_HALF_PI * g.long_abs
    return (g.has_snapshot() & (g.long_n >= s.snapshot_every)) & (
        (g.long_abs > 0.0) & (g.recent_ms > limit * limit))


def recover(ops: Ops, g: Any, m: Any, s: GuardSettings) -> None:
    """After a good reference: α moves ``alpha_recovery`` of the way back to its setting."""
    low = m & (g.alpha < s.alpha) & (s.alpha_recovery > 0.0)
    if ops.any(low):
        back = ops.minimum(s.alpha, g.alpha + s.alpha_recovery * (s.alpha - g.alpha))
        g.alpha = ops.where(low, back, g.alpha)
        g.recoveries = g.recoveries + ops.count(low)


def mark_snapshot(ops: Ops, g: Any, m: Any, ms: Any) -> None:
    """The guard's side of a snapshot taken where ``m``: its error, and the count restarts."""
    g.snapshot_ms = ops.where(m, ms, g.snapshot_ms)
    g.since_snapshot = ops.where(m, 0, g.since_snapshot)


def roll_back(ops: Ops, g: Any, m: Any, s: GuardSettings) -> None:
    """Halve α (not below α_min), mark outputs held, restart the count and end any run.

    The caller restores the weights from the snapshot.
    """
    g.alpha = ops.where(m, ops.maximum(g.alpha * 0.5, s.alpha_min), g.alpha)
    g.held = g.held | m
    g.rollbacks = g.rollbacks + ops.count(m)
    g.recent_ms = ops.where(m, g.snapshot_ms, g.recent_ms)
    g.since_snapshot = ops.where(m, 0, g.since_snapshot)
    end_run(ops, g, m)


def restart_baseline(ops: Ops, g: Any, m: Any) -> None:
    """After an accepted level shift (the caller snapshots now): measure the regime afresh.

    The snapshot's error is unknown until the next due snapshot, so no rollback can fire on
    the shift's own large residuals.
    """
    mark_snapshot(ops, g, m, 0.0)
    g.fresh = g.fresh | m
    g.long_abs = ops.where(m, 0.0, g.long_abs)
    g.long_n = ops.where(m, 0, g.long_n)


# -- one sensor's guard -------------------------------------------------------------------------


@dataclass(slots=True)
class Guard:
    """Mutable guard state of one sensor; plain data so it checkpoints as a dict.

    The methods are the rules above on floats, plus the storage of suspects (feature vector
    and reference value, oldest first) and of the last good snapshot (a model's ``to_dict``).
    """

    alpha: float
    applied: int = 0
    run_sign: int = 0
    suspects: list[tuple[list[float], float]] = field(default_factory=list)
    run_t0: float = math.nan
    """Event time of the first suspect of the current run (NaN: no run)."""
    recent_ms: float = 0.0
    snapshot: dict[str, Any] | None = None
    snapshot_ms: float = 0.0
    since_snapshot: int = 0
    held: bool = False
    rollbacks: int = 0
    fresh: bool = True
    long_abs: float = 0.0
    long_n: int = 0
    recoveries: int = 0
    """References after which α moved back toward its setting."""

    # -- storage the rules ask for

    def has_snapshot(self) -> bool:
        """Whether a last good snapshot exists."""
        return self.snapshot is not None

    def n_suspects(self) -> int:
        """How many suspects are held."""
        return len(self.suspects)

    def clear_suspects(self, m: bool = True) -> None:
        """Forget the held suspects (where ``m``)."""
        if m and self.suspects:
            self.suspects = []

    # -- the rules on this guard (the daemon's and the tests' vocabulary)

    def judge(self, residual: float, spread: float, s: GuardSettings, t: float = 0.0) -> Verdict:
        """Decide what to do with a paired reference (event time t, prequential residual)."""
        rej, shift = judge(SCALAR, self, True, residual, spread, s, t)
        return "shift" if shift else "suspect" if rej else "apply"

    def hold(self, phi: list[float], y: float, s: GuardSettings) -> None:
        """Keep a suspect reference until the run decides: the latest ``gate_run`` − 1 only."""
        self.suspects.append((phi, y))
        if len(self.suspects) > max(1, s.gate_run - 1):
            del self.suspects[0]

    def flat_run(self, y: float) -> bool:
        """Whether the held suspects and ``y`` repeat one value exactly: stuck, not shifted."""
        return bool(self.suspects) and all(held_y == y for _, held_y in self.suspects)

    def take_suspects(self) -> list[tuple[list[float], float]]:
        """Hand over the held suspects (oldest first) and end the run."""
        held = self.suspects
        end_run(SCALAR, self, True)
        return held

    def record(self, residual: float, s: GuardSettings) -> None:
        """Fold one applied reference's prequential residual into the recent error."""
        record(SCALAR, self, True, residual, s)

    def exploded(self, s: GuardSettings) -> bool:
        """Whether the recent error has grown past the rollback threshold (see the module)."""
        return bool(exploded(SCALAR, self, s))

    def recover(self, s: GuardSettings) -> None:
        """After a good reference: α moves ``alpha_recovery`` of the way back to its setting."""
        recover(SCALAR, self, True, s)

    def due_snapshot(self, s: GuardSettings) -> bool:
        """Whether enough references were applied since the last good snapshot."""
        return bool(self.since_snapshot >= s.snapshot_every)

    def take_snapshot(self, model_state: dict[str, Any]) -> None:
        """Remember the model as the last good one, with the error it had."""
        self.snapshot = model_state
        mark_snapshot(SCALAR, self, True, self.recent_ms)

    def roll_back(self, s: GuardSettings) -> dict[str, Any] | None:
        """Halve α (not below α_min), mark outputs held, and return the snapshot to restore."""
        roll_back(SCALAR, self, True, s)
        return self.snapshot

    def restart_baseline(self, model_state: dict[str, Any]) -> None:
        """After an accepted level shift: snapshot now, and measure the new regime afresh."""
        self.snapshot = model_state
        restart_baseline(SCALAR, self, True)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able state (floats round-trip exactly through json)."""
        return {
            "alpha": self.alpha,
            "applied": self.applied,
            "run_sign": self.run_sign,
            "suspects": [[list(phi), y] for phi, y in self.suspects],
            "recent_ms": self.recent_ms,
            "snapshot": self.snapshot,
            "snapshot_ms": self.snapshot_ms,
            "since_snapshot": self.since_snapshot,
            "held": self.held,
            "rollbacks": self.rollbacks,
            "fresh": self.fresh,
            "long_abs": self.long_abs,
            "long_n": self.long_n,
            "recoveries": self.recoveries,
            "run_t0": None if math.isnan(self.run_t0) else self.run_t0,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Guard:
        """Rebuild from :meth:`to_dict`'s output."""
        return cls(
            alpha=float(d["alpha"]),
            applied=int(d["applied"]),
            run_sign=int(d["run_sign"]),
            suspects=[([float(v) for v in phi], float(y)) for phi, y in d["suspects"]],
            recent_ms=float(d["recent_ms"]),
            snapshot=d["snapshot"],
            snapshot_ms=float(d["snapshot_ms"]),
            since_snapshot=int(d["since_snapshot"]),
            held=bool(d["held"]),
            rollbacks=int(d["rollbacks"]),
            fresh=bool(d["fresh"]),
            long_abs=float(d["long_abs"]),
            long_n=int(d["long_n"]),
            recoveries=int(d["recoveries"]),
            run_t0=math.nan if d["run_t0"] is None else float(d["run_t0"]),
        )
