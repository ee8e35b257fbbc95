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
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal, TypeVar

import numpy as np

Verdict = Literal["apply", "suspect", "shift"]
T = TypeVar("T", float, "np.ndarray[Any, np.dtype[np.float64]]")


def gap_fraction(gap: T, span: T | float) -> T:
    """How far a reference's step rises toward α_max after ``gap`` seconds without one.

    ``gap / (gap + span)``: 0 right after a reference, ½ after ``span``, → 1 after a long gap.
    A random-walk drift grows the model's uncertainty with elapsed time, so the first
    reference after a long gap deserves the largest step (the Kalman filter's gain does the
    same); consecutive references fall back to the configured α. Plain arithmetic, so floats
    and arrays (the tuner's candidates) give the same bits.
    """
    return gap / (gap + span)


def lifted(alpha: T, alpha_max: T | float, fraction: T | float) -> T:
    """α raised the given fraction of the way to α_max: always inside [α, α_max].

    The ``minimum`` keeps a rounding of α + (α_max − α)·1 from landing one ulp above α_max.
    """
    out: T = np.minimum(alpha_max, alpha + (alpha_max - alpha) * fraction)
    return out
SQRT_HALF_PI = math.sqrt(math.pi / 2.0)


@dataclass(frozen=True, slots=True)
class GuardSettings:
    """The guard's knobs, taken from the ``[learning]`` section of the config."""

    gate_k: float
    gate_run: int
    warmup: int
    snapshot_every: int
    rollback_factor: float
    alpha: float
    alpha_min: float
    error_window: int = 200
    alpha_recovery: float = 0.0
    shift_after: float = 0.0


@dataclass(slots=True)
class Guard:
    """Mutable guard state of one sensor; plain data so it checkpoints as a dict."""

    alpha: float
    applied: int = 0
    run_sign: int = 0
    suspects: list[tuple[list[float], float]] = field(default_factory=list)
    run_t0: float | None = None
    """Event time of the first suspect of the current run."""
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

    def judge(self, residual: float, spread: float, s: GuardSettings, t: float = 0.0) -> Verdict:
        """Decide what to do with a paired reference (event time t, prequential residual)."""
        gate_active = self.applied >= s.warmup and spread > 0.0
        # the larger of the recent spread and the long-window scale: a calm night's spread
        # alone would gate the next ordinary rush hour
        scale = max(spread, SQRT_HALF_PI * self.long_abs)
        if not gate_active or abs(residual) <= s.gate_k * scale:
            self.run_sign = 0
            self.suspects.clear()
            self.run_t0 = None
            return "apply"
        sign = 1 if residual > 0 else -1
        if sign != self.run_sign:
            self.run_sign = sign
            self.suspects.clear()
            self.run_t0 = t
        if self.run_t0 is None:
            self.run_t0 = t
        if len(self.suspects) + 1 >= s.gate_run and t - self.run_t0 >= s.shift_after:
            return "shift"
        return "suspect"

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
        held, self.suspects = self.suspects, []
        self.run_sign = 0
        self.run_t0 = None
        return held

    def record(self, residual: float, s: GuardSettings) -> None:
        """Fold one applied reference's prequential residual into the recent error."""
        w = 2.0 / (s.snapshot_every + 1.0)
        sq = residual * residual
        self.recent_ms = sq if self.fresh else (1.0 - w) * self.recent_ms + w * sq
        self.fresh = False
        a = abs(residual)
        wl = 2.0 / (s.error_window + 1.0)
        self.long_abs = a if self.long_n == 0 else self.long_abs + wl * (a - self.long_abs)
        self.long_n += 1
        self.applied += 1
        self.since_snapshot += 1

    def exploded(self, s: GuardSettings) -> bool:
        """Whether the recent error has grown past the rollback threshold (see the module)."""
        if self.snapshot is None or self.long_n < s.snapshot_every or self.long_abs <= 0.0:
            return False
        limit = s.rollback_factor * SQRT_HALF_PI * self.long_abs
        return self.recent_ms > limit * limit

    def recover(self, s: GuardSettings) -> None:
        """After a good reference: α moves ``alpha_recovery`` of the way back to its setting."""
        if self.alpha < s.alpha and s.alpha_recovery > 0.0:
            self.alpha = min(s.alpha, self.alpha + s.alpha_recovery * (s.alpha - self.alpha))
            self.recoveries += 1

    def due_snapshot(self, s: GuardSettings) -> bool:
        """Whether enough references were applied since the last good snapshot."""
        return self.since_snapshot >= s.snapshot_every

    def take_snapshot(self, model_state: dict[str, Any]) -> None:
        """Remember the model as the last good one, with the error it had."""
        self.snapshot = model_state
        self.snapshot_ms = self.recent_ms
        self.since_snapshot = 0

    def roll_back(self, s: GuardSettings) -> dict[str, Any] | None:
        """Halve α (not below α_min), mark outputs held, and return the snapshot to restore."""
        self.alpha = max(self.alpha * 0.5, s.alpha_min)
        self.held = True
        self.rollbacks += 1
        self.recent_ms = self.snapshot_ms
        self.since_snapshot = 0
        self.suspects.clear()
        self.run_sign = 0
        self.run_t0 = None
        return self.snapshot

    def restart_baseline(self, model_state: dict[str, Any]) -> None:
        """After an accepted level shift: snapshot now, and measure the new regime afresh.

        The snapshot's error is unknown until the next due snapshot, so no rollback can fire
        on the shift's own large residuals.
        """
        self.snapshot = model_state
        self.snapshot_ms = 0.0
        self.since_snapshot = 0
        self.fresh = True
        self.long_abs = 0.0
        self.long_n = 0

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
            "run_t0": self.run_t0,
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
            run_t0=None if d["run_t0"] is None else float(d["run_t0"]),
        )
