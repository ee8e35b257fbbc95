"""The engine: readings and references in, corrected values and decisions out.

Pure and deterministic — no sockets, clocks or files. Given the same messages in the same order
it produces the same outputs and the same state, bit for bit; the MQTT service, ``trimtab
replay`` and crash recovery (checkpoint + journal) all rely on that.

Per sensor it keeps (:class:`trimtab.engine.sensor.SensorState`): the model (created from an
initial model-state file, from configured centre/scale, or from the first ``scaler_readings``
readings), a time-bounded buffer of recent reading inputs for pairing, the guard state, and the
event times of the last reading and the last reference. Event time is used throughout, never
arrival time. What it does with a paired reference and a reading once the model exists is its
:class:`~trimtab.engine.learner.Learner`'s: the learning kernel, by default.

It is given its settings and a routing predicate (:class:`trimtab.engine.settings
.EngineSettings`), not a config tree: which sensors it serves and where a reference goes are
the config's and the service's rules.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from trimtab.engine.guards import Guard
from trimtab.engine.learner import KernelLearner, Learner
from trimtab.engine.pairing import Paired, ReadingBuffer, pair
from trimtab.engine.sensor import STATE_VERSION, Parts, SensorState, upgraded
from trimtab.engine.settings import (
    EngineSettings,
    band_of,
    configured_prior,
    configured_scaler,
    elapsed_scale_days,
    guard_settings,
    spec_of,
)
from trimtab.errors import StateError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.model.online import RidgeModel, shared
from trimtab.model.terms import Scaler, TermSpec

if TYPE_CHECKING:
    from trimtab.config import SensorSettings

__all__ = ["PENDING_LIMIT", "STATE_VERSION", "Engine", "RefOutcome"]

PENDING_LIMIT = 256
"""Paired references kept while a sensor's scaler is still being fixed from its readings."""


@dataclass(frozen=True, slots=True)
class RefOutcome:
    """What became of one reference for one sensor it serves."""

    sensor: str
    status: str
    residual: float | None = None


class Engine:
    """One model per sensor, updated from references and applied to every reading."""

    def __init__(self, settings: EngineSettings,
                 initial_models: Mapping[str, RidgeModel] | None = None,
                 learner: Learner | None = None) -> None:
        self._initial = dict(initial_models or {})
        self._sensors: dict[str, SensorState] = {}
        self.counts: Counter[str] = Counter()
        self.learner: Learner = KernelLearner() if learner is None else learner
        self._parts = Parts()
        self._specs: dict[int, tuple[SensorSettings, TermSpec]] = {}
        self._served: set[str] = set()
        self._configure(settings)

    # -- configuration -------------------------------------------------------------------------

    def _configure(self, settings: EngineSettings) -> None:
        self.settings = settings
        self._routing = settings.routing
        self.guard_settings = guard_settings(settings.learning)
        self.band = band_of(settings.output)
        self._served = set()
        self._specs = {}

    def reconfigure(self, settings: EngineSettings) -> None:
        """Apply a reloaded config's live settings (learning, output) to every sensor.

        When ``[learning]`` changed, α restarts from the new configured value (a rollback's
        halving is forgotten); otherwise each sensor keeps its α. The models keep what they
        learned either way.
        """
        learning_changed = settings.learning != self.settings.learning
        self._configure(settings)
        if not learning_changed:
            return
        lc = settings.learning
        for st in self._sensors.values():
            if st.model is not None:
                st.model = self._with_learning(st.model)
            st.guard.alpha = min(max(lc.alpha, lc.alpha_min), lc.alpha_max)

    def rewind(self, settings: EngineSettings, state: Mapping[str, Any]) -> None:
        """Go back to settings and a :meth:`state_dict` taken under them (an undone reload)."""
        self._configure(settings)
        self.load_state(state)

    def _with_learning(self, model: RidgeModel) -> RidgeModel:
        lc = self.settings.learning
        return model.with_settings(
            lam=lc.lam, memory=lc.memory, huber_delta=lc.huber_delta,
            normalised=lc.normalised, clip=lc.feature_clip,
        )

    def next_scaler(self, st: SensorState, current: Scaler) -> Scaler:
        """The scaler a reference moves a sensor's model to from ``current`` (itself when the
        scaler is fixed). Learners ask this, so every learner moves alike."""
        lc = self.settings.learning
        if lc.scaler != "follow" or st.ranges is None:
            return current
        return st.ranges.target(current, lc.scaler_width)

    # -- per-sensor state ----------------------------------------------------------------------

    def sensors(self) -> list[str]:
        """The sensors the engine has state for, sorted."""
        return sorted(self._sensors)

    def model(self, sensor: str) -> RidgeModel | None:
        """The current model of a sensor, if it has one yet."""
        st = self._sensors.get(sensor)
        return None if st is None else st.model

    def sensor_state(self, sensor: str) -> SensorState | None:
        """The engine's state of a sensor, if it has one (for recorders and inspection)."""
        return self._sensors.get(sensor)

    def _state(self, sensor: str) -> SensorState:
        st = self._sensors.get(sensor)
        if st is None:
            settings = self._routing.settings(sensor)
            spec = self._spec_of(settings)
            pc = self.settings.pairing
            st = SensorState(
                settings, spec,
                ReadingBuffer(spec.inputs, pc.buffer_span, pc.buffer_capacity),
                Guard(alpha=self.settings.learning.alpha), self._parts,
            )
            if settings.initial_state is not None:
                model = self._initial[str(settings.initial_state)]
                prior = configured_prior(settings, model.spec, model.scaler, model.theta)
                assert prior is not None  # "initial" has the file's weights to start from
                st.start(self._with_learning(model.with_prior(prior)),
                         self.settings.output.band_coverage)
                st.warm = True
            self._sensors[sensor] = st
        return st

    def _spec_of(self, settings: SensorSettings) -> TermSpec:
        """``spec_of(settings)``, built once per settings object (sensors share them)."""
        found = self._specs.get(id(settings))
        if found is not None and found[0] is settings:
            return found[1]
        spec = shared(spec_of(settings))
        self._specs[id(settings)] = (settings, spec)
        return spec

    def _new_model(self, st: SensorState, scaler: Scaler, origin: float) -> RidgeModel:
        lc = self.settings.learning
        prior = configured_prior(st.settings, st.spec, scaler)
        return RidgeModel(
            st.spec, scaler, origin=origin, lam=lc.lam, memory=lc.memory, prior=prior,
            penalise_intercept=st.settings.penalise_intercept, huber_delta=lc.huber_delta,
            normalised=lc.normalised, clip=lc.feature_clip,
        )

    def _ensure_model(self, st: SensorState, reading: Reading) -> None:
        """Create the model when the scaler can be fixed (at once, or after N readings)."""
        if st.model is not None:
            return
        lc = self.settings.learning
        coverage = self.settings.output.band_coverage
        scaler = configured_scaler(st.spec, st.settings, lc)
        if scaler is not None:
            st.start(self._new_model(st, scaler, reading.t), coverage)
            return
        origin = st.scaler_rows[0][0] if st.scaler_rows else reading.t
        st.scaler_rows.append([reading.t, *st.spec.row(reading.inputs, reading.t, origin)])
        if len(st.scaler_rows) >= st.settings.scaler_readings:
            terms = np.array([row[1:] for row in st.scaler_rows], dtype=float)
            scaler = Scaler.from_terms(terms)
            if st.spec.elapsed:
                centre = (*scaler.centre[:-1], 0.0)
                scale = (*scaler.scale[:-1], elapsed_scale_days(lc))
                scaler = Scaler(centre, scale)
            st.start(self._new_model(st, scaler, origin), coverage)
            st.scaler_rows = []
            pending, st.pending = st.pending, []
            for values, t_pair, y, ref_t in pending:
                status, _ = self.learner.learn(self, st, values, t_pair, y, ref_t)
                self.counts[f"reference_{status}"] += 1

    # -- messages ------------------------------------------------------------------------------

    def process(self, event: Reading | Reference) -> list[Corrected]:
        """Handle one decoded event; a reading yields its corrected value (or nothing)."""
        if isinstance(event, Reading):
            out = self.on_reading(event)
            return [] if out is None else [out]
        self.on_reference(event)
        return []

    def _refusal(self, sensor: str) -> str | None:
        """Why a sensor is not served (None: it is): not configured, or past ``sensors.max``.

        The routing's ``serves`` is remembered for served sensors (they get state anyway).
        A pattern can name any number of ids: past ``sensors.max`` sensors with state, a new
        id gets none, so traffic on made-up ids cannot grow memory without bound.
        """
        if sensor in self._served:
            return None
        if not self._routing.serves(sensor):
            return "unknown_sensor"
        if sensor not in self._sensors and len(self._sensors) >= self._routing.max_sensors:
            return "sensor_limit"
        self._served.add(sensor)
        return None

    def on_reading(self, r: Reading) -> Corrected | None:
        """Correct one reading and buffer its inputs for pairing."""
        refused = self._refusal(r.sensor)
        if refused is not None:
            self.counts[f"reading_{refused}"] += 1
            return None
        st = self._state(r.sensor)
        inputs = r.inputs
        try:
            values = [inputs[n] for n in st.spec.inputs]
        except KeyError:
            self.counts["reading_missing_input"] += 1
            return None
        if not (math.isfinite(r.t) and all(map(math.isfinite, values))):
            # The codecs refuse these; a caller that skips them must not poison the buffer,
            # the scaler or the reading clock.
            self.counts["reading_non_finite"] += 1
            return None
        raw = float(values[0])
        fresh = st.last_reading_t is None or r.t > st.last_reading_t
        if not fresh and r.t == st.last_reading_t:
            self.counts["reading_duplicate"] += 1
            return None
        row: list[float] | None = None
        if fresh:
            st.last_reading_t = r.t
            st.buffer.add(r.t, [float(v) for v in values])
            self._ensure_model(st, r)
            lc = self.settings.learning
            if st.ranges is not None and st.model is not None and lc.scaler == "follow":
                # the term values serve the range and, below, the correction: computed once
                row = st.spec.row(inputs, r.t, st.model.origin)
                st.ranges.observe(row, r.t, lc.scaler_span)
            self.counts["reading_accepted"] += 1
        else:
            self.counts["reading_out_of_order"] += 1
        return self.learner.correct(self, st, r, raw, row)

    def on_reference(self, ref: Reference) -> list[RefOutcome]:
        """Pair a reference with each sensor it serves, gate it, and apply it."""
        out: list[RefOutcome] = []
        for sensor in self._routing.targets(ref.sensor):
            status, residual = self._reference_for(sensor, ref)
            self.counts[f"reference_{status}"] += 1
            out.append(RefOutcome(sensor, status, residual))
        return out

    def _reference_for(self, sensor: str, ref: Reference) -> tuple[str, float | None]:
        refused = self._refusal(sensor)
        if refused is not None:
            return refused, None
        if not (math.isfinite(ref.t) and math.isfinite(ref.value)):
            return "non_finite", None  # a NaN time would also defeat the at-most-once check
        st = self._state(sensor)
        # References must advance in time per sensor, whatever becomes of them: a redelivered
        # one is recognised and skipped, so each is applied at most once.
        if st.last_ref_t is not None and ref.t <= st.last_ref_t:
            return ("duplicate" if ref.t == st.last_ref_t else "out_of_order"), None
        st.last_ref_t = ref.t
        pc = self.settings.pairing
        paired = pair(st.buffer, ref, default_window=pc.window, anchor=pc.anchor,
                      tolerance=pc.tolerance)
        if not isinstance(paired, Paired):
            return paired.reason, None
        # At most learning.max_references per reference_interval reach learning: a flood of
        # references (a looping instrument, a replayed log) cannot take over a model.
        lc = self.settings.learning
        window = math.floor(ref.t / lc.reference_interval)
        if window != st.ref_window:
            st.ref_window, st.ref_window_n = window, 0
        if st.ref_window_n >= lc.max_references:
            return "rate_limited", None
        st.ref_window_n += 1
        if st.model is None:
            # The scaler is still being fixed from the first readings: keep the paired
            # reference (bounded) and learn from it as soon as the model exists.
            if len(st.pending) >= PENDING_LIMIT:
                st.pending.pop(0)
                self.counts["reference_pending_overflow"] += 1
            st.pending.append((list(paired.values), paired.t, ref.value, ref.t))
            return "pending", None
        return self.learner.learn(self, st, paired.values, paired.t, ref.value, ref.t)

    # -- state ---------------------------------------------------------------------------------

    def _load_sensor(self, name: str, d: Mapping[str, Any],
                     version: object = STATE_VERSION) -> None:
        d = upgraded(d, version, self.settings.output.band_coverage)
        self._state(name).load(name, d)

    def state_dict(self) -> dict[str, Any]:
        """The whole state as plain JSON-able data; floats round-trip exactly."""
        sensors = {name: st.to_dict() for name, st in self._sensors.items()}
        return {"version": STATE_VERSION, "sensors": sensors, "counts": dict(self.counts)}

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Replace the engine's state with one from :meth:`state_dict`."""
        version = state.get("version")
        if version not in (1, STATE_VERSION):
            raise StateError(f"engine state version {version!r} is neither 1 nor "
                             f"{STATE_VERSION}")
        try:
            self._sensors = {}
            for name, d in state["sensors"].items():
                self._load_sensor(name, d, version)
            self.counts = Counter({str(k): int(v) for k, v in state["counts"].items()})
        except (KeyError, TypeError, ValueError, AttributeError, OverflowError) as exc:
            raise StateError(f"engine state is malformed: {exc!r}") from exc

    def export_sensor(self, sensor: str) -> dict[str, Any]:
        """One sensor's whole state, to move it to another daemon."""
        st = self._sensors.get(sensor)
        if st is None:
            raise StateError(f"no state for sensor {sensor!r}")
        return {"format": "trimtab-sensor-state", "version": STATE_VERSION, "sensor": sensor,
                "state": st.to_dict()}

    def import_sensor(self, exported: Mapping[str, Any]) -> str:
        """Take over a sensor exported by :meth:`export_sensor`; returns its id."""
        try:
            if exported.get("format") != "trimtab-sensor-state":
                raise StateError("not a trimtab sensor-state export (format key)")
            version = exported.get("version")
            if version not in (1, STATE_VERSION):
                raise StateError(f"sensor-state version {version!r} is neither 1 nor "
                                 f"{STATE_VERSION}")
            sensor = str(exported["sensor"])
            if not self._routing.serves(sensor):
                raise StateError(f"sensor {sensor!r} is not configured on this daemon")
            self._sensors.pop(sensor, None)
            self._load_sensor(sensor, exported["state"], version)
        except (KeyError, TypeError, ValueError, AttributeError, OverflowError) as exc:
            raise StateError(f"sensor-state export is malformed: {exc!r}") from exc
        return sensor

    def drop_sensor(self, sensor: str) -> None:
        """Forget a sensor (after it has been exported to another daemon)."""
        self._sensors.pop(sensor, None)
        self._served.discard(sensor)

    def stats(self) -> dict[str, Any]:
        """Per-sensor figures for the status message and metrics."""
        per: dict[str, Any] = {}
        for name, st in sorted(self._sensors.items()):
            rmse = st.rmse()
            per[name] = {
                "updates": 0 if st.model is None else st.model.updates,
                "rmse": rmse,
                "alpha": st.guard.alpha,
                "rollbacks": st.guard.rollbacks,
                "recoveries": st.guard.recoveries,
                "held": st.guard.held,
                "band_coverage": st.band_hit / st.band_n if st.band_n else None,
                "scaler": None if st.model is None else st.model.scaler.to_dict(),
                "ready": st.model is not None,
                "last_reference_t": st.last_applied(),
                "last_reading_t": st.last_reading_t,
            }
        return {"sensors": per, "counts": dict(sorted(self.counts.items()))}
