"""The part of a replay that no learning setting changes, recorded once for every tuning candidate.

Which readings are accepted, buffered and corrected, how references pair with them, when a
sensor's scaler is fixed and its model created, which references wait for that model: none of
it depends on α, λ, m, δ, the gate or the step's normalisation. :func:`record` runs the daemon's
own :class:`~trimtab.engine.engine.Engine` over a stream once, with a recording
:class:`~trimtab.engine.learner.Learner` in place of the learning kernel:

* ``correct`` (one corrected value a reading) records the reading's inputs, time and truth
  and where it falls relative to the model's creation, instead of predicting;
* ``learn`` (one paired reference, once its sensor has a model) records the paired inputs,
  their time, the reference value and its time, and how many corrected values came before it,
  instead of gating and stepping.

Everything else — decoding, pairing, duplicates, pending references, scaler fixing, counts —
is the engine's own code, so the tuner cannot drift from the daemon there. The tuner then runs
the learning kernel on every candidate at once through these records
(:mod:`trimtab.tune.lanes`).
"""

from __future__ import annotations

import math
from array import array
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from trimtab.config import Config
from trimtab.engine.engine import Engine
from trimtab.engine.learner import Host
from trimtab.engine.sensor import SensorState
from trimtab.engine.wiring import engine_settings, initial_models
from trimtab.errors import DataError, DecodeError
from trimtab.messages import Corrected, Reading
from trimtab.model.online import RidgeModel
from trimtab.model.terms import Scaler
from trimtab.wire.streamfile import read_events

__all__ = ["LEARNED", "RefRecord", "SensorTrace", "Trace", "record"]

LEARNED = "learned"
"""The status the recorder gives a reference handed to learning (replaced per candidate)."""

_PLACEHOLDER = Corrected(0.0, "-", 0.0, 0.0, 0.0)


@dataclass(frozen=True, slots=True)
class RefRecord:
    """One paired reference that reached learning: inputs, times, value, and its place."""

    pos: int
    """How many corrected values of this sensor came before it (its place in the output order)."""
    values: tuple[float, ...]
    t_pair: float
    y: float
    t: float
    scaler: Scaler
    """The scaler the engine standardises with for this reference (after its scaler move)."""


@dataclass(slots=True)
class SensorTrace:
    """What one sensor's learning sees: its corrected readings and its paired references."""

    sensor: str
    inputs: tuple[str, ...]
    out_t: array[float] = field(default_factory=lambda: array("d"))
    out_x: array[float] = field(default_factory=lambda: array("d"))
    """Inputs of each corrected reading, rows of ``len(inputs)`` flattened."""
    out_truth: array[float] = field(default_factory=lambda: array("d"))
    """Each corrected reading's truth, NaN where the stream has none."""
    unready: int = 0
    """Corrected readings before the model existed (they are published raw); they come first."""
    refs: list[RefRecord] = field(default_factory=list)
    state: SensorState | None = None
    """The engine's state of the sensor after the stream (model at its initial weights)."""
    scaler: Scaler | None = None
    """The scaler in force after the last recorded reference (None: the model's own)."""

    @property
    def outputs(self) -> int:
        """How many corrected values the sensor produced."""
        return len(self.out_t)


@dataclass(slots=True)
class Trace:
    """A recorded stream: per-sensor traces, the engine's learning-free counts, the time span."""

    config: Config
    sensors: dict[str, SensorTrace]
    counts: Counter[str]
    events: int
    rejected: Counter[str]
    t_first: float | None
    t_last: float | None
    complete: bool
    engine_state: dict[str, Any]
    """The recorder engine's ``state_dict()``: the shared parts of every candidate's state."""
    models: dict[str, RidgeModel | None]
    """Each sensor's model as created (initial weights, base config's learning settings)."""

    @property
    def has_truth(self) -> bool:
        """Whether any corrected reading carries a truth value."""
        return any(bool((~np.isnan(np.frombuffer(s.out_truth, dtype=np.float64))).any())
                   for s in self.sensors.values() if s.outputs)


class _Recorder:
    """A learner that records what the candidates' learning will see instead of learning."""

    def __init__(self) -> None:
        self.traces: dict[int, SensorTrace] = {}

    def trace(self, st: SensorState, sensor: str) -> SensorTrace:
        tr = self.traces.get(id(st))
        if tr is None:
            tr = self.traces[id(st)] = SensorTrace(sensor, st.spec.inputs)
            tr.state = st
        return tr

    def correct(self, engine: Host, st: SensorState, r: Reading, raw: float,
                row: list[float] | None) -> Corrected:
        tr = self.trace(st, r.sensor)
        if st.model is None:
            if tr.unready != len(tr.out_t):
                raise DataError(f"sensor {r.sensor}: a reading without a model after one with "
                                "a model; the tuner assumes models are never dropped")
            tr.unready += 1
        tr.out_t.append(r.t)
        tr.out_x.extend([float(r.inputs[n]) for n in st.spec.inputs])
        tr.out_truth.append(math.nan if r.truth is None else r.truth)
        return _PLACEHOLDER

    def learn(self, engine: Host, st: SensorState, values: Sequence[float], t_pair: float,
              y: float, ref_t: float) -> tuple[str, float | None]:
        tr = self._find(engine, st)
        assert st.model is not None
        current = st.model.scaler if tr.scaler is None else tr.scaler
        # the engine's own move, on the scaler alone: θ is per candidate
        scaler = engine.next_scaler(st, current)
        if scaler != current:
            engine.counts["scaler_moved"] += 1
        tr.scaler = scaler
        tr.refs.append(RefRecord(len(tr.out_t), tuple(float(v) for v in values), float(t_pair),
                                 float(y), float(ref_t), scaler))
        return LEARNED, None

    def _find(self, engine: Host, st: SensorState) -> SensorTrace:
        tr = self.traces.get(id(st))
        if tr is not None:
            return tr
        for name in engine.sensors():
            if engine.sensor_state(name) is st:
                return self.trace(st, name)
        raise DataError("recorder: a sensor state the engine does not hold")  # pragma: no cover


def record(cfg: Config, stream: str | Path, *,
           should_stop: Callable[[], bool] | None = None,
           progress: Callable[[int], None] | None = None) -> Trace:
    """Run the engine's learning-free part over a stream file and return what it recorded.

    Malformed lines are counted by reason and skipped, as ``trimtab replay`` does.
    ``should_stop`` is asked every 4096 events; when it answers true, reading stops and the
    trace covers the events read so far (``complete`` is then false).
    """
    recorder = _Recorder()
    rec = Engine(engine_settings(cfg), initial_models(cfg), learner=recorder)
    rejected: Counter[str] = Counter()

    def on_error(lineno: int, exc: DecodeError) -> None:
        rejected[exc.reason] += 1

    events = 0
    t_first: float | None = None
    t_last: float | None = None
    complete = True
    for event in read_events(stream, on_error=on_error):
        events += 1
        t = event.t
        if t_first is None or t < t_first:
            t_first = t
        if t_last is None or t > t_last:
            t_last = t
        rec.process(event)
        if events % 4096 == 0:
            if progress is not None:
                progress(events)
            if should_stop is not None and should_stop():
                complete = False
                break
    sensors: dict[str, SensorTrace] = {}
    models: dict[str, RidgeModel | None] = {}
    for name in rec.sensors():
        st = rec.sensor_state(name)
        assert st is not None
        tr = recorder.trace(st, name)
        sensors[name] = tr
        models[name] = st.model
    counts = Counter({k: v for k, v in rec.counts.items() if k != f"reference_{LEARNED}"})
    return Trace(cfg, sensors, counts, events, rejected, t_first, t_last, complete,
                 rec.state_dict(), models)
