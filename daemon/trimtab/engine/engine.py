"""The engine: readings and references in, corrected values and decisions out.

Pure and deterministic — no sockets, clocks or files. Given the same messages in the same order
it produces the same outputs and the same state, bit for bit; the MQTT service, ``trimtab
replay`` and crash recovery (checkpoint + journal) all rely on that.

Per sensor it keeps: the model (created from an initial model-state file, from configured
centre/scale, or from the first ``scaler_readings`` readings), a time-bounded buffer of recent
reading inputs for pairing, the guard state, and the event times of the last reading and the
last reference. Event time is used throughout, never arrival time.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from statistics import NormalDist
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

from trimtab.engine.guards import Guard, GuardSettings, gap_fraction, lifted
from trimtab.engine.pairing import Paired, ReadingBuffer, pair
from trimtab.errors import ModelError, StateError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.model.online import RidgeModel, factory_prior, shared
from trimtab.model.ranges import RangeTracker, remap
from trimtab.model.terms import Scaler, TermSpec

if TYPE_CHECKING:
    from trimtab.config import Config, SensorSettings

STATE_VERSION = 2
_K = TypeVar("_K", float, "np.ndarray[Any, np.dtype[np.float64]]")
DAY = 86400.0
_PART_KEY = json.JSONEncoder(sort_keys=True).encode
PENDING_LIMIT = 256
SHARED_PARTS = 256
"""Distinct spec and scaler parts of snapshots shared between sensors, at most."""
"""Paired references kept while a sensor's scaler is still being fixed from its readings."""


@dataclass(frozen=True, slots=True)
class RefOutcome:
    """What became of one reference for one sensor it serves."""

    sensor: str
    status: str
    residual: float | None = None


def band_start(coverage: float) -> float:
    """The band's first multiplier: the normal quantile for ``coverage`` (spread ≈ σ)."""
    return NormalDist().inv_cdf(0.5 + coverage / 2.0)


def band_step(k: _K, covered: Any, coverage: float, gain: float) -> _K:
    """One online calibration step of the band multiplier after a scored reference.

    The adaptive-conformal update (after Gibbs & Candès 2021, applied to a multiplier of the
    running spread): k ← max(0, k + γ·(miss − (1 − coverage))). While k stays bounded, the
    share of references outside the band tends to 1 − coverage, whatever the residuals'
    distribution.
    """
    miss = np.where(covered, 0.0, 1.0)
    return np.maximum(0.0, k + gain * (miss - (1.0 - coverage)))  # type: ignore[return-value]


def prior_mode(settings: SensorSettings) -> str | tuple[float, ...]:
    """The prior a sensor's settings ask for: the configured one, or the default for unset
    (``"initial"`` with an initial_state, else ``"factory"``)."""
    if settings.prior is not None:
        return settings.prior
    return "initial" if settings.initial_state is not None else "factory"


def configured_prior(settings: SensorSettings, spec: TermSpec, scaler: Scaler,
                     start: Sequence[float] | None = None) -> list[float] | None:
    """The prior the online penalty pulls toward, in standardised units; None: the factory.

    ``"factory"`` is ŷ = raw in the scaler's units, ``"zero"`` plain ridge, ``"initial"`` the
    weights the model starts from (``start``: an initial_state's fitted θ, so the penalty keeps
    the model near the calibration it was given unless references say otherwise; a model the
    engine creates starts at the factory calibration), a list is taken as given. Unset:
    ``"initial"`` when there is an initial_state, else the factory calibration.
    """
    p = prior_mode(settings)
    if p == "initial":
        return None if start is None else [float(v) for v in start]
    if p == "factory":
        return factory_prior(spec, scaler)
    if p == "zero":
        return [0.0] * (spec.n_terms + 1)
    return [float(v) for v in p]


def ranges_for(model: RidgeModel) -> RangeTracker:
    """A range tracker starting at a model's scaler (the elapsed term stays fixed)."""
    fixed = [False] * len(model.scaler)
    if model.spec.elapsed:
        fixed[-1] = True
    return RangeTracker.start(model.scaler, fixed)


def spec_of(settings: SensorSettings) -> TermSpec:
    """The term specification a sensor's settings describe."""
    return TermSpec(
        inputs=tuple(settings.inputs),
        products=tuple((a, b) for a, b in settings.products),
        squares=tuple(settings.squares),
        elapsed=settings.elapsed,
    )


def elapsed_scale_days(cfg: Config) -> float:
    """Scale of the elapsed-time term when the engine fixes it: the memory's span in days."""
    return max(1.0, cfg.learning.memory * cfg.learning.reference_interval / DAY)


def configured_scaler(spec: TermSpec, settings: SensorSettings, cfg: Config) -> Scaler | None:
    """Centre and scale from the config, when every input has both; derived for other terms.

    Products and squares get the centre and scale their inputs imply for independent inputs
    (an approximation; it only needs to be reasonable and fixed).
    """
    c, s = settings.centre, settings.scale
    if not c or not s or any(name not in c or name not in s for name in spec.inputs):
        return None
    centre = [float(c[n]) for n in spec.inputs]
    scale = [float(s[n]) for n in spec.inputs]
    for a, b in spec.products:
        centre.append(c[a] * c[b])
        scale.append(math.sqrt((s[a] * s[b]) ** 2 + (c[a] * s[b]) ** 2 + (c[b] * s[a]) ** 2))
    for a in spec.squares:
        centre.append(c[a] ** 2 + s[a] ** 2)
        scale.append(math.sqrt(2.0 * s[a] ** 4 + 4.0 * (c[a] * s[a]) ** 2))
    if spec.elapsed:
        centre.append(0.0)
        scale.append(elapsed_scale_days(cfg))
    return Scaler(tuple(centre), tuple(scale))


class SensorState:
    """Everything the engine keeps for one sensor."""

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
                 guard: Guard) -> None:
        self.settings = settings
        self.spec = spec
        self.model: RidgeModel | None = None
        self.scaler_rows: list[list[float]] = []
        self.pending: list[tuple[list[float], float, float, float]] = []
        self.buffer = buffer
        self.guard = guard
        self.last_reading_t: float | None = None
        self.last_ref_t: float | None = None
        self.last_applied_t: float | None = None
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


class Engine:
    """One model per sensor, updated from references and applied to every reading."""

    def __init__(self, cfg: Config, initial_models: Mapping[str, RidgeModel] | None = None) -> None:
        self._initial = dict(initial_models or {})
        self._sensors: dict[str, SensorState] = {}
        self.counts: Counter[str] = Counter()
        self._cfg = cfg
        self._gs = self._guard_settings(cfg)
        self._served: set[str] = set()
        self._parts: dict[str, Any] = {}
        self._specs: dict[int, tuple[SensorSettings, TermSpec]] = {}

    # -- configuration -------------------------------------------------------------------------

    @staticmethod
    def _guard_settings(cfg: Config) -> GuardSettings:
        lc = cfg.learning
        return GuardSettings(
            gate_k=lc.gate_k, gate_run=lc.gate_run, warmup=lc.warmup, shift_after=lc.shift_after,
            snapshot_every=lc.snapshot_every, rollback_factor=lc.rollback_factor,
            alpha=lc.alpha, alpha_min=lc.alpha_min, error_window=lc.error_window,
            alpha_recovery=lc.alpha_recovery,
        )

    @property
    def config(self) -> Config:
        """The config in force."""
        return self._cfg

    def reconfigure(self, cfg: Config) -> None:
        """Apply a reloaded config's live settings (learning, output) to every sensor.

        When ``[learning]`` changed, α restarts from the new configured value (a rollback's
        halving is forgotten); otherwise each sensor keeps its α. The models keep what they
        learned either way.
        """
        learning_changed = cfg.learning != self._cfg.learning
        self._cfg = cfg
        self._gs = self._guard_settings(cfg)
        self._served = set()
        self._specs = {}
        for st in self._sensors.values():
            if not learning_changed:
                continue
            if st.model is not None:
                st.model = self._with_learning(st.model)
            st.guard.alpha = min(max(cfg.learning.alpha, cfg.learning.alpha_min),
                                 cfg.learning.alpha_max)

    def rewind(self, cfg: Config, state: Mapping[str, Any]) -> None:
        """Go back to a config and a :meth:`state_dict` taken under it (an undone reload)."""
        self._cfg = cfg
        self._gs = self._guard_settings(cfg)
        self._served = set()
        self._specs = {}
        self.load_state(state)

    def _with_learning(self, model: RidgeModel) -> RidgeModel:
        lc = self._cfg.learning
        return model.with_settings(
            lam=lc.lam, memory=lc.memory, huber_delta=lc.huber_delta,
            normalised=lc.normalised, clip=lc.feature_clip,
        )

    # -- per-sensor state ----------------------------------------------------------------------

    def sensors(self) -> list[str]:
        """The sensors the engine has state for, sorted."""
        return sorted(self._sensors)

    def model(self, sensor: str) -> RidgeModel | None:
        """The current model of a sensor, if it has one yet."""
        st = self._sensors.get(sensor)
        return None if st is None else st.model

    def _state(self, sensor: str) -> SensorState:
        st = self._sensors.get(sensor)
        if st is None:
            settings = self._cfg.sensor_settings(sensor)
            spec = self._spec_of(settings)
            pc = self._cfg.pairing
            st = SensorState(
                settings, spec,
                ReadingBuffer(spec.inputs, pc.buffer_span, pc.buffer_capacity),
                Guard(alpha=self._cfg.learning.alpha),
            )
            if settings.initial_state is not None:
                model = self._initial[str(settings.initial_state)]
                prior = configured_prior(settings, model.spec, model.scaler, model.theta)
                assert prior is not None  # "initial" has the file's weights to start from
                self._start(st, self._with_learning(model.with_prior(prior)))
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
        lc = self._cfg.learning
        prior = configured_prior(st.settings, st.spec, scaler)
        return RidgeModel(
            st.spec, scaler, origin=origin, lam=lc.lam, memory=lc.memory, prior=prior,
            penalise_intercept=st.settings.penalise_intercept, huber_delta=lc.huber_delta,
            normalised=lc.normalised, clip=lc.feature_clip,
        )

    def _start(self, st: SensorState, model: RidgeModel) -> None:
        """Give a sensor its model, a range tracker at its scaler, and a fresh band."""
        st.model = model
        st.ranges = ranges_for(model)
        st.band_k = band_start(self._cfg.output.band_coverage)

    def _ensure_model(self, st: SensorState, reading: Reading) -> None:
        """Create the model when the scaler can be fixed (at once, or after N readings)."""
        if st.model is not None:
            return
        scaler = configured_scaler(st.spec, st.settings, self._cfg)
        if scaler is not None:
            self._start(st, self._new_model(st, scaler, reading.t))
            return
        origin = st.scaler_rows[0][0] if st.scaler_rows else reading.t
        st.scaler_rows.append([reading.t, *st.spec.row(reading.inputs, reading.t, origin)])
        if len(st.scaler_rows) >= st.settings.scaler_readings:
            terms = np.array([row[1:] for row in st.scaler_rows], dtype=float)
            scaler = Scaler.from_terms(terms)
            if st.spec.elapsed:
                centre = (*scaler.centre[:-1], 0.0)
                scale = (*scaler.scale[:-1], elapsed_scale_days(self._cfg))
                scaler = Scaler(centre, scale)
            self._start(st, self._new_model(st, scaler, origin))
            st.scaler_rows = []
            pending, st.pending = st.pending, []
            for values, t_pair, y, ref_t in pending:
                status, _ = self._learn(st, values, t_pair, y, ref_t)
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

        ``Config.sensor_allowed`` is remembered for served sensors (they get state anyway).
        A pattern can name any number of ids: past ``sensors.max`` sensors with state, a new
        id gets none, so traffic on made-up ids cannot grow memory without bound.
        """
        if sensor in self._served:
            return None
        if not self._cfg.sensor_allowed(sensor):
            return "unknown_sensor"
        if sensor not in self._sensors and len(self._sensors) >= self._cfg.sensors.max:
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
            if st.ranges is not None and st.model is not None and \
                    self._cfg.learning.scaler == "follow":
                # the term values serve the range and, below, the correction: computed once
                row = st.spec.row(inputs, r.t, st.model.origin)
                st.ranges.observe(row, r.t, self._cfg.learning.scaler_span)
            self.counts["reading_accepted"] += 1
        else:
            self.counts["reading_out_of_order"] += 1
        return self._correct(st, r, raw, row)

    def _correct(self, st: SensorState, r: Reading, raw: float,
                 row: list[float] | None = None) -> Corrected:
        oc = self._cfg.output
        model = st.model
        if model is None:
            return Corrected(r.t, r.sensor, raw, raw, 0.0, ("warmup",), 0)
        flags: list[str] = []
        phi, zmax = (model.phi(r.inputs, r.t) if row is None else model.phi_of_row(row, r.t))
        if st.warm or st.guard.applied >= self._cfg.learning.warmup:
            value = model.predict_phi(phi)
        else:
            flags.append("warmup")
            value = sum(p * f for p, f in zip(model.prior, phi, strict=True))
        if zmax > oc.extrapolation:
            flags.append("extrapolating")
        since = st.last_applied_t if st.last_applied_t is not None else model.origin
        if r.t - since > oc.stale_after:
            flags.append("stale")
        if st.guard.held or not math.isfinite(value):
            flags.append("held")
        if not math.isfinite(value):
            self.counts["prediction_non_finite"] += 1
            value = raw
        if oc.cap is not None and abs(value - raw) > oc.cap:
            value = raw + math.copysign(oc.cap, value - raw)
            flags.append("capped")
        return Corrected(r.t, r.sensor, value, raw, model.band(st.band_k), tuple(flags),
                         model.updates)

    def on_reference(self, ref: Reference) -> list[RefOutcome]:
        """Pair a reference with each sensor it serves, gate it, and apply it."""
        out: list[RefOutcome] = []
        for sensor in self._cfg.reference_targets(ref.sensor):
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
        pc = self._cfg.pairing
        paired = pair(st.buffer, ref, default_window=pc.window, anchor=pc.anchor,
                      tolerance=pc.tolerance)
        if not isinstance(paired, Paired):
            return paired.reason, None
        # At most learning.max_references per reference_interval reach learning: a flood of
        # references (a looping instrument, a replayed log) cannot take over a model.
        lc = self._cfg.learning
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
        return self._learn(st, paired.values, paired.t, ref.value, ref.t)

    def _learn(self, st: SensorState, values: Sequence[float], t_pair: float, y: float,
               ref_t: float) -> tuple[str, float | None]:
        """Gate one paired reference and apply it (or hold it as a suspect)."""
        model = st.model
        assert model is not None
        lc = self._cfg.learning
        self._move_scaler(st, model, self.next_scaler(st, model.scaler))
        inputs = dict(zip(st.spec.inputs, values, strict=True))
        phi, _ = model.phi(inputs, t_pair)
        residual = model.predict_phi(phi) - y
        if not math.isfinite(residual):
            return "non_finite", None
        st.sq_preq += residual * residual
        st.n_preq += 1
        oc = self._cfg.output
        covered = abs(residual) <= model.band(st.band_k)
        st.band_hit += covered
        st.band_n += 1
        st.band_k = float(band_step(st.band_k, covered, oc.band_coverage, oc.band_gain))
        lift = 0.0
        if lc.step_adapt == "gap" and st.last_applied_t is not None:
            lift = gap_fraction(ref_t - st.last_applied_t, lc.step_gap)
        verdict = st.guard.judge(residual, model.spread, self._gs, ref_t)
        if verdict == "suspect":
            st.guard.hold(phi, y, self._gs)
            return "gated", residual
        if verdict == "shift" and st.guard.flat_run(y):
            return "stuck", residual  # the run stays held; a differing value can still end it
        if verdict == "shift":
            # A new regime: restart the error baseline *before* learning it, or the shift's own
            # large residuals would trip the rollback and the model could never follow it.
            st.guard.restart_baseline(self._snapshot_of(model))
            lift = 1.0  # the model is known to be off by the shift: learn it at alpha_max
            for held_phi, held_y in st.guard.take_suspects():
                self._apply(st, held_phi, held_y, lift)
        status = self._apply(st, phi, y, lift)
        if status == "applied":
            st.last_applied_t = ref_t
            if verdict == "shift":
                status = "level_shift"
        return status, residual

    def next_scaler(self, st: SensorState, current: Scaler) -> Scaler:
        """The scaler a reference moves a sensor's model to from ``current`` (itself when the
        scaler is fixed). The tuner's recorder asks the same, so both move alike."""
        lc = self._cfg.learning
        if lc.scaler != "follow" or st.ranges is None:
            return current
        return st.ranges.target(current, lc.scaler_width)

    def _move_scaler(self, st: SensorState, model: RidgeModel, target: Scaler) -> None:
        """Move the model (and its last good snapshot) to ``target``, keeping every ŷ."""
        old = model.scaler
        if target is old or target == old:
            return
        try:
            model.move_scaler(target)
        except ModelError:
            self.counts["scaler_move_refused"] += 1
            return
        self.counts["scaler_moved"] += 1
        snap = st.guard.snapshot
        if snap is not None:
            moved = dict(snap)
            moved["theta"] = remap(list(snap["theta"]), old, target)
            moved["prior"] = list(model.prior)
            moved["scaler"] = target.to_dict()
            st.guard.snapshot = moved
            self._share(moved)

    def _apply(self, st: SensorState, phi: list[float], y: float, lift: float) -> str:
        """One guarded shrink-then-step update; returns the reference's status."""
        model = st.model
        assert model is not None
        before = self._snapshot_of(model) if st.guard.snapshot is None else None
        if before is not None:
            st.guard.take_snapshot(before)
        try:
            r = model.step_phi(phi, y, float(lifted(st.guard.alpha,
                                                    self._cfg.learning.alpha_max, lift)))
        except ModelError:
            return "non_finite"  # step_phi leaves the state untouched when it refuses
        st.guard.record(r, self._gs)
        st.guard.held = False
        if st.guard.exploded(self._gs):
            self._restore(st)
            return "rolled_back"
        st.guard.recover(self._gs)
        if st.guard.due_snapshot(self._gs):
            st.guard.take_snapshot(self._snapshot_of(model))
        return "applied"

    def _snapshot_of(self, model: RidgeModel) -> dict[str, Any]:
        """``model.to_dict()`` sharing its spec, scaler and prior with other snapshots.

        Those parts never change for a model, and sensors of one configuration have equal
        ones: sharing them keeps a guard's snapshot small. Nothing mutates a snapshot.
        """
        d = model.to_dict()
        self._share(d)
        return d

    def _share(self, snapshot: dict[str, Any]) -> None:
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

    def _restore(self, st: SensorState) -> None:
        snap = st.guard.roll_back(self._gs)
        if snap is not None:
            st.model = RidgeModel.from_dict(snap)

    # -- state ---------------------------------------------------------------------------------

    @staticmethod
    def _sensor_dict(st: SensorState) -> dict[str, Any]:
        return {
            "model": None if st.model is None else st.model.to_dict(),
            "scaler_rows": st.scaler_rows,
            "pending": [[v, tp, y, rt] for v, tp, y, rt in st.pending],
            "buffer": st.buffer.to_dict(packed=True),
            "guard": st.guard.to_dict(),
            "last_reading_t": st.last_reading_t,
            "last_ref_t": st.last_ref_t,
            "last_applied_t": st.last_applied_t,
            "sq_preq": st.sq_preq,
            "n_preq": st.n_preq,
            "warm": st.warm,
            "ranges": None if st.ranges is None else st.ranges.to_dict(),
            "band": [st.band_k, st.band_hit, st.band_n],
            "ref_window": [st.ref_window, st.ref_window_n],
        }

    def _upgraded(self, d: Mapping[str, Any], version: object) -> Mapping[str, Any]:
        """A sensor's state as this version stores it; version 1 (before the followed scaler,
        the long-window guard and the calibrated band) gains their starting values."""
        if version == STATE_VERSION:
            return d
        if version != 1:
            raise StateError(f"engine state version {version!r} is neither 1 nor "
                             f"{STATE_VERSION}")
        out = dict(d)
        guard = dict(out["guard"])
        for key, value in (("long_abs", 0.0), ("long_n", 0), ("recoveries", 0),
                           ("run_t0", None)):
            guard.setdefault(key, value)
        out["guard"] = guard
        model = None if out["model"] is None else RidgeModel.from_dict(out["model"])
        out.setdefault("ranges", None if model is None else ranges_for(model).to_dict())
        out.setdefault("band", [band_start(self._cfg.output.band_coverage), 0, 0])
        out.setdefault("ref_window", [-1, 0])
        return out

    def _load_sensor(self, name: str, d: Mapping[str, Any],
                     version: object = STATE_VERSION) -> None:
        d = self._upgraded(d, version)
        st = self._state(name)
        st.model = None if d["model"] is None else RidgeModel.from_dict(d["model"])
        if st.model is not None and st.model.spec != st.spec:
            raise StateError(f"sensor {name}: stored model has terms {list(st.model.spec.names())}"
                             f" but the config gives {list(st.spec.names())}")
        st.scaler_rows = [[float(v) for v in row] for row in d["scaler_rows"]]
        st.pending = [([float(x) for x in v], float(tp), float(y), float(rt))
                      for v, tp, y, rt in d["pending"]]
        st.buffer = ReadingBuffer.from_dict(d["buffer"])
        st.guard = Guard.from_dict(d["guard"])
        if isinstance(st.guard.snapshot, dict):
            self._share(st.guard.snapshot)
        st.last_reading_t = d["last_reading_t"]
        st.last_ref_t = d["last_ref_t"]
        st.last_applied_t = d["last_applied_t"]
        st.sq_preq = float(d["sq_preq"])
        st.n_preq = int(d["n_preq"])
        st.warm = bool(d["warm"])
        st.ranges = None if d["ranges"] is None else RangeTracker.from_dict(d["ranges"])
        band_k, band_hit, band_n = d["band"]
        st.band_k, st.band_hit, st.band_n = float(band_k), int(band_hit), int(band_n)
        st.ref_window, st.ref_window_n = (int(v) for v in d["ref_window"])

    def state_dict(self) -> dict[str, Any]:
        """The whole state as plain JSON-able data; floats round-trip exactly."""
        sensors = {name: self._sensor_dict(st) for name, st in self._sensors.items()}
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
                "state": self._sensor_dict(st)}

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
            if not self._cfg.sensor_allowed(sensor):
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
                "last_reference_t": st.last_applied_t,
                "last_reading_t": st.last_reading_t,
            }
        return {"sensors": per, "counts": dict(sorted(self.counts.items()))}
