"""Everything the engine keeps for one sensor, and its checkpointed form.

A :class:`SensorState` is also the learning kernel's *lane* of one sensor
(:mod:`trimtab.engine.learn`): it holds the sensor's figures in the kernel's names (floats;
``last_applied_t`` is NaN before any applied reference) and answers the kernel's questions
about what is stored only here — the model's weights and its guarded step, the last good
snapshot (a model's ``to_dict``, sharing its spec, scaler and prior with other snapshots) and
the held suspects (feature vectors and reference values).
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from trimtab.engine.guards import Guard, GuardSettings
from trimtab.engine.learn import band_start
from trimtab.engine.pairing import ReadingBuffer
from trimtab.engine.settings import ranges_for
from trimtab.errors import ModelError, StateError
from trimtab.model.online import RidgeModel
from trimtab.model.ranges import RangeTracker
from trimtab.model.terms import TermSpec

if TYPE_CHECKING:
    from trimtab.config import SensorSettings

__all__ = ["SHARED_PARTS", "STATE_VERSION", "Parts", "SensorState", "upgraded"]

STATE_VERSION = 2
SHARED_PARTS = 256
"""Distinct spec and scaler parts of snapshots shared between sensors, at most."""
_PART_KEY = json.JSONEncoder(sort_keys=True).encode


class Parts:
    """The spec, scaler and prior parts of snapshots, one instance of each equal part.

    Those parts never change for a model, and sensors of one configuration have equal ones:
    sharing them keeps a guard's snapshot small. Nothing mutates a snapshot.
    """

    __slots__ = ("_parts",)

    def __init__(self) -> None:
        self._parts: dict[str, Any] = {}

    def share(self, snapshot: dict[str, Any]) -> dict[str, Any]:
        """Replace the snapshot's parts by equal ones seen before (at most SHARED_PARTS)."""
        for key in ("spec", "scaler", "prior"):
            part = snapshot.get(key)
            if not isinstance(part, dict | list):
                continue
            ident = _PART_KEY(part)
            shared = self._parts.get(ident)
            if shared is None and len(self._parts) < SHARED_PARTS:
                self._parts[ident] = shared = part
            if shared is not None:
                snapshot[key] = shared
        return snapshot


class SensorState:
    """Everything the engine keeps for one sensor; the kernel's lane of one sensor."""

    __slots__ = (
        "band_hit",
        "band_k",
        "band_n",
        "buffer",
        "guard",
        "last_applied_t",
        "last_reading_t",
        "last_ref_t",
        "model",
        "n_preq",
        "parts",
        "pending",
        "ranges",
        "ref_window",
        "ref_window_n",
        "scaler_rows",
        "settings",
        "spec",
        "sq_preq",
        "warm",
    )

    def __init__(self, settings: SensorSettings, spec: TermSpec, buffer: ReadingBuffer,
                 guard: Guard, parts: Parts) -> None:
        self.settings = settings
        self.spec = spec
        self.model: RidgeModel | None = None
        self.scaler_rows: list[list[float]] = []
        self.pending: list[tuple[list[float], float, float, float]] = []
        self.buffer = buffer
        self.guard = guard
        self.parts = parts
        self.last_reading_t: float | None = None
        self.last_ref_t: float | None = None
        self.last_applied_t = math.nan
        self.sq_preq = 0.0
        self.n_preq = 0
        self.warm = False
        self.ranges: RangeTracker | None = None
        self.ref_window = -1
        self.ref_window_n = 0
        self.band_k = 0.0
        self.band_hit = 0
        self.band_n = 0

    def rmse(self) -> float | None:
        """Prequential RMSE over every paired reference (applied or gated)."""
        return math.sqrt(self.sq_preq / self.n_preq) if self.n_preq else None

    def last_applied(self) -> float | None:
        """Event time of the last applied reference, or None."""
        return None if math.isnan(self.last_applied_t) else self.last_applied_t

    def start(self, model: RidgeModel, coverage: float) -> None:
        """Give the sensor its model, a range tracker at its scaler, and a fresh band."""
        self.model = model
        self.ranges = ranges_for(model)
        self.band_k = band_start(coverage)

    # -- the lane: what the kernel asks of one sensor ------------------------------------------

    def _model(self) -> RidgeModel:
        model = self.model
        assert model is not None  # the kernel runs only on a sensor with a model
        return model

    def theta(self) -> list[float]:
        return self._model().weights()

    def spread(self) -> float:
        return self._model().spread

    def step(self, m: bool, phi: list[float], y: float, alpha: float,
             phisq: float | None) -> tuple[bool, float]:
        """The model's shrink-then-step update; (False, NaN) when refused (state untouched)."""
        if not m:
            return False, math.nan
        try:
            return True, self._model().step_phi(phi, y, alpha)
        except ModelError:
            return False, math.nan

    def snapshot(self) -> dict[str, Any]:
        """``model.to_dict()`` sharing its spec, scaler and prior with other snapshots."""
        return self.parts.share(self._model().to_dict())

    def save(self, m: bool) -> None:
        if m:
            self.guard.snapshot = self.snapshot()

    def restore(self, m: bool) -> None:
        snap = self.guard.snapshot
        if m and snap is not None:
            self.model = RidgeModel.from_dict(snap)

    def hold(self, m: bool, item: tuple[list[float], float], s: GuardSettings) -> None:
        if m:
            self.guard.hold(item[0], item[1], s)

    def flat(self, m: bool, y: float) -> bool:
        return m and self.guard.flat_run(y)

    def take(self, m: bool) -> tuple[list[tuple[list[float], float]], int]:
        held = self.guard.suspects if m else []
        return held, len(held)

    @staticmethod
    def held_item(held: list[tuple[list[float], float]],
                  slot: int) -> tuple[list[float], float, None]:
        phi, y = held[slot]
        return phi, y, None

    # -- checkpointed form ------------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able state; floats round-trip exactly."""
        return {
            "model": None if self.model is None else self.model.to_dict(),
            "scaler_rows": self.scaler_rows,
            "pending": [[v, tp, y, rt] for v, tp, y, rt in self.pending],
            "buffer": self.buffer.to_dict(packed=True),
            "guard": self.guard.to_dict(),
            "last_reading_t": self.last_reading_t,
            "last_ref_t": self.last_ref_t,
            "last_applied_t": self.last_applied(),
            "sq_preq": self.sq_preq,
            "n_preq": self.n_preq,
            "warm": self.warm,
            "ranges": None if self.ranges is None else self.ranges.to_dict(),
            "band": [self.band_k, self.band_hit, self.band_n],
            "ref_window": [self.ref_window, self.ref_window_n],
        }

    def load(self, name: str, d: Mapping[str, Any]) -> None:
        """Take the state of :meth:`to_dict` (this version's form; see :func:`upgraded`)."""
        self.model = None if d["model"] is None else RidgeModel.from_dict(d["model"])
        if self.model is not None and self.model.spec != self.spec:
            raise StateError(f"sensor {name}: stored model has terms "
                             f"{list(self.model.spec.names())} but the config gives "
                             f"{list(self.spec.names())}")
        self.scaler_rows = [[float(v) for v in row] for row in d["scaler_rows"]]
        self.pending = [([float(x) for x in v], float(tp), float(y), float(rt))
                        for v, tp, y, rt in d["pending"]]
        self.buffer = ReadingBuffer.from_dict(d["buffer"])
        self.guard = Guard.from_dict(d["guard"])
        if isinstance(self.guard.snapshot, dict):
            self.parts.share(self.guard.snapshot)
        self.last_reading_t = d["last_reading_t"]
        self.last_ref_t = d["last_ref_t"]
        last = d["last_applied_t"]
        self.last_applied_t = math.nan if last is None else float(last)
        self.sq_preq = float(d["sq_preq"])
        self.n_preq = int(d["n_preq"])
        self.warm = bool(d["warm"])
        self.ranges = None if d["ranges"] is None else RangeTracker.from_dict(d["ranges"])
        band_k, band_hit, band_n = d["band"]
        self.band_k, self.band_hit, self.band_n = float(band_k), int(band_hit), int(band_n)
        self.ref_window, self.ref_window_n = (int(v) for v in d["ref_window"])


def upgraded(d: Mapping[str, Any], version: object, coverage: float) -> Mapping[str, Any]:
    """A sensor's state as this version stores it; version 1 (before the followed scaler,
    the long-window guard and the calibrated band) gains their starting values."""
    if version == STATE_VERSION:
        return d
    if version != 1:
        raise StateError(f"engine state version {version!r} is neither 1 nor {STATE_VERSION}")
    out = dict(d)
    guard = dict(out["guard"])
    for key, value in (("long_abs", 0.0), ("long_n", 0), ("recoveries", 0), ("run_t0", None)):
        guard.setdefault(key, value)
    out["guard"] = guard
    model = None if out["model"] is None else RidgeModel.from_dict(out["model"])
    out.setdefault("ranges", None if model is None else ranges_for(model).to_dict())
    out.setdefault("band", [band_start(coverage), 0, 0])
    out.setdefault("ref_window", [-1, 0])
    return out
