"""How the engine learns from a paired reference and corrects a reading: the kernel on floats.

:class:`Learner` is the engine's seam between what every run shares — routing, pairing,
duplicates, pending references, scaler fixing, counts (:class:`trimtab.engine.engine.Engine`)
— and what depends on the learning settings. :class:`KernelLearner`, the daemon's and
``trimtab replay``'s, runs the learning kernel (:mod:`trimtab.engine.learn`) on one sensor's
floats; the tuner's recorder (:mod:`trimtab.tune.trace`) plugs in a learner that records
instead, and runs the same kernel later on K candidates at once.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence
from typing import Protocol

from trimtab.engine.guards import GuardSettings
from trimtab.engine.learn import NON_FINITE, STATUSES, Band, correct, learn
from trimtab.engine.sensor import SensorState
from trimtab.engine.settings import EngineSettings
from trimtab.errors import ModelError
from trimtab.messages import Corrected, Reading
from trimtab.model.online import RidgeModel
from trimtab.model.ops import SCALAR
from trimtab.model.ranges import remap
from trimtab.model.terms import Scaler

__all__ = ["Host", "KernelLearner", "Learner"]


class Host(Protocol):
    """What a learner sees of the engine it serves."""

    settings: EngineSettings
    guard_settings: GuardSettings
    band: Band
    counts: Counter[str]

    def next_scaler(self, st: SensorState, current: Scaler) -> Scaler:
        """The scaler a reference moves a sensor's model to (itself when it is fixed)."""
        ...

    def sensors(self) -> list[str]:
        """The sensors with state, sorted."""
        ...

    def sensor_state(self, sensor: str) -> SensorState | None:
        """A sensor's state, if it has one."""
        ...


class Learner(Protocol):
    """What an engine does with a sensor's readings and paired references once it has a model
    (or, for readings, before: the raw value is published then)."""

    def correct(self, engine: Host, st: SensorState, r: Reading, raw: float,
                row: list[float] | None) -> Corrected:
        """The corrected value of one accepted (or out-of-order) reading."""
        ...

    def learn(self, engine: Host, st: SensorState, values: Sequence[float], t_pair: float,
              y: float, ref_t: float) -> tuple[str, float | None]:
        """Gate and apply one paired reference: (status, prequential residual or None)."""
        ...


class KernelLearner:
    """The learning kernel on one sensor's floats (the daemon and replay)."""

    __slots__ = ()

    def correct(self, engine: Host, st: SensorState, r: Reading, raw: float,
                row: list[float] | None) -> Corrected:
        model = st.model
        if model is None:
            return Corrected(r.t, r.sensor, raw, raw, 0.0, ("warmup",), 0)
        oc = engine.settings.output
        flags: list[str] = []
        phi, zmax = (model.phi(r.inputs, r.t) if row is None else model.phi_of_row(row, r.t))
        use = st.warm or st.guard.applied >= engine.settings.learning.warmup
        value, bad, capped = correct(SCALAR, model.weights(), model.prior, phi, raw, use,
                                     oc.cap)
        if not use:
            flags.append("warmup")
        if zmax > oc.extrapolation:
            flags.append("extrapolating")
        since = st.last_applied_t if not math.isnan(st.last_applied_t) else model.origin
        if r.t - since > oc.stale_after:
            flags.append("stale")
        if st.guard.held or bad:
            flags.append("held")
        if bad:
            engine.counts["prediction_non_finite"] += 1
        if capped:
            flags.append("capped")
        return Corrected(r.t, r.sensor, value, raw, model.band(st.band_k), tuple(flags),
                         model.updates)

    def learn(self, engine: Host, st: SensorState, values: Sequence[float], t_pair: float,
              y: float, ref_t: float) -> tuple[str, float | None]:
        model = st.model
        assert model is not None
        move_scaler(engine, st, model, engine.next_scaler(st, model.scaler))
        phi, _ = model.phi(dict(zip(st.spec.inputs, values, strict=True)), t_pair)
        code, r = learn(SCALAR, st, True, phi, y, ref_t, engine.guard_settings, engine.band,
                        (phi, y))
        return STATUSES[code], (None if code == NON_FINITE and not math.isfinite(r) else r)


def move_scaler(engine: Host, st: SensorState, model: RidgeModel, target: Scaler) -> None:
    """Move the model (and its last good snapshot) to ``target``, keeping every ŷ."""
    old = model.scaler
    if target is old or target == old:
        return
    try:
        model.move_scaler(target)
    except ModelError:
        engine.counts["scaler_move_refused"] += 1
        return
    engine.counts["scaler_moved"] += 1
    snap = st.guard.snapshot
    if snap is not None:
        moved = dict(snap)
        moved["theta"] = remap(list(snap["theta"]), old, target)
        moved["prior"] = list(model.prior)
        moved["scaler"] = target.to_dict()
        st.guard.snapshot = st.parts.share(moved)
