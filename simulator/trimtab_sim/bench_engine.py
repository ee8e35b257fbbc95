"""The engine alone, in this process: trimtab's model and engine beside river's linear model.

Per sample, trimtab's :class:`~trimtab.model.online.RidgeModel` takes a reading's inputs (a dict)
and builds its own terms (products, elapsed time), standardises and clips them; river's
``LinearRegression`` is handed the same terms already built and standardised, as a dict. So
the comparison leaves river the lighter job. Both run the same samples in the same process,
interleaved, and each figure is the best of a few repeats (the least disturbed by the other
work on a shared machine).

The engine rows time :class:`~trimtab.engine.engine.Engine` as the daemon drives it: a reading
through pairing buffer, model and flags to a corrected value; a reference through pairing,
gate, update and guard.
"""

from __future__ import annotations

import itertools
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from trimtab.config import Config
from trimtab.engine.wiring import make_engine
from trimtab.messages import Reading, Reference
from trimtab.model.online import RidgeModel
from trimtab.model.terms import Scaler, TermSpec

REPEATS = 3


@dataclass(frozen=True, slots=True)
class EngineFigures:
    """Operations per second of one kind of work (None when not measured)."""

    name: str
    terms: int
    predict: float | None
    update: float | None


def _spec(terms: int) -> TermSpec:
    if terms == 4:
        return TermSpec(("raw", "temp", "rh"), elapsed=True)
    if terms == 16:
        inputs = ("raw", "temp", "rh", "pres", "wind")
        return TermSpec(inputs, products=tuple(itertools.combinations(inputs, 2)), elapsed=True)
    raise ValueError(f"terms must be 4 or 16, got {terms}")


def _samples(spec: TermSpec, n: int) -> list[tuple[dict[str, float], float, float]]:
    rng = np.random.default_rng(1)
    out = []
    for i in range(n):
        inputs = {name: float(40.0 + 10.0 * rng.standard_normal()) for name in spec.inputs}
        t = 1_767_225_600.0 + 10.0 * i
        y = 0.9 * inputs["raw"] + 2.0 + float(rng.standard_normal())
        out.append((inputs, t, y))
    return out


def _best(fn: Callable[[], None], ops: int) -> float:
    best = math.inf
    for _ in range(REPEATS):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return ops / best


def model_figures(terms: int, n: int) -> tuple[EngineFigures, EngineFigures | None]:
    """(trimtab, river) predictions/s and updates/s at ``terms`` terms; river None if absent."""
    spec = _spec(terms)
    samples = _samples(spec, n)
    origin = samples[0][1]
    rows = np.array([spec.row(x, t, origin) for x, t, _ in samples])
    scaler = Scaler.from_terms(rows)
    model = RidgeModel(spec, scaler, origin=origin, lam=1.0, memory=200.0, normalised=True,
                       clip=6.0)

    def ours_predict() -> None:
        predict = model.predict
        for x, t, _ in samples:
            predict(x, t)

    def ours_update() -> None:
        step = model.step
        for x, t, y in samples:
            step(x, t, y, 0.05)

    updates = _best(ours_update, n)
    ours = EngineFigures("trimtab RidgeModel", terms, _best(ours_predict, n), updates)
    try:
        from river import linear_model, optim
    except ImportError:
        return ours, None
    z = scaler.transform(rows)
    names = spec.names()
    feats = [(dict(zip(names, map(float, row), strict=True)), y)
             for row, (_, _, y) in zip(z, samples, strict=True)]
    river_model: Any = linear_model.LinearRegression(optimizer=optim.SGD(0.01), l2=0.005)

    def river_predict() -> None:
        predict = river_model.predict_one
        for x, _ in feats:
            predict(x)

    def river_update() -> None:
        learn = river_model.learn_one
        for x, y in feats:
            learn(x, y)

    updates = _best(river_update, n)  # first, so predictions use trained weights
    theirs = EngineFigures("river LinearRegression", terms, _best(river_predict, n), updates)
    return ours, theirs


def engine_figures(cfg: Config, n: int) -> EngineFigures:
    """Engine readings/s (reading → corrected value) and references/s (pair, gate, update)."""
    sensors = [f"s{k:03d}" for k in range(20)]
    rng = np.random.default_rng(2)
    readings: list[Reading] = []
    refs: list[Reference] = []
    for i in range(n):
        t = 1_767_225_600.0 + 10.0 * (i // len(sensors))
        s = sensors[i % len(sensors)]
        raw = float(40.0 + 10.0 * rng.standard_normal())
        readings.append(Reading(t, s, {"raw": raw, "temp": 15.0 + i % 7, "rh": 60.0 + i % 11}))
        refs.append(Reference(t, s, raw * 0.9 + 2.0))
    best_read = best_ref = math.inf
    for _ in range(REPEATS):
        engine = make_engine(cfg)
        start = time.perf_counter()
        for r in readings:
            engine.on_reading(r)
        best_read = min(best_read, time.perf_counter() - start)
        start = time.perf_counter()
        for ref in refs:
            engine.on_reference(ref)
        best_ref = min(best_ref, time.perf_counter() - start)
    return EngineFigures("trimtab Engine", 4, n / best_read, n / best_ref)


__all__ = ["EngineFigures", "engine_figures", "model_figures"]
