"""The operators' tuner: every candidate's prequential score on a recorded stream, at once.

A run has two phases. :func:`trimtab.tune.trace.record` replays the stream once through the
daemon's engine with learning switched off, recording what every candidate shares (pairing,
buffers, scaler, pending references). Then, for each sensor, the candidates whose features
are standardised alike (they differ only when the model has an elapsed-time term, whose scale
follows ``memory``) advance together through that record as lanes of the learning kernel
(:class:`~trimtab.tune.lanes.Lanes`): the daemon's own step, guards, band and correction, run
on K-vectors.

Scores (both prequential: every value is predicted before the model learns from any later
reference):

* against **truth** — each corrected value the daemon would publish, minus the reading's
  ``truth``, for every corrected reading that has one;
* against **spans** — the references' residuals again, each counted once for every corrected
  value published since the sensor's previous paired reference (at least once): the error of
  the values it stands for, which is what sparse references (one collocation day a week, one
  spot check a day) can say about every published value when there is no truth;
* against **references** — each paired reference's residual: the model's prediction at the
  paired inputs, taken before that reference is applied (or gated), minus the reference.

With e_i those errors in stream order, per sensor S = (…(0 + e_1²) + e_2²…) and the pooled
score over sensors in sorted order RMSE = √(ΣS / Σn); bias = Σe / Σn the same way. The
**tune** part holds the events before ``t_first + split·(t_last − t_first)``, the **test**
part the rest; candidates are ranked by their tune RMSE only.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from trimtab.engine.guards import Guard
from trimtab.engine.settings import band_of, elapsed_scale_days, guard_settings
from trimtab.errors import DataError
from trimtab.model.online import RidgeModel
from trimtab.model.stability import STEP_BOUND, step_check
from trimtab.model.terms import Scaler
from trimtab.tune.grid import Candidate
from trimtab.tune.lanes import COUNTED, Lanes, ModelSettings, guard_lanes, phi_block, stack
from trimtab.tune.scores import Against, Outcome, Score, Tally, TuneResult
from trimtab.tune.trace import SensorTrace, Trace

__all__ = ["Against", "Candidates", "Outcome", "Score", "TuneResult", "Tuner"]

CHUNK = 4096
"""Most readings predicted in one block (bounds a block's K × B arrays)."""


@dataclass(slots=True)
class Candidates:
    """The candidates of one scaler group of one sensor: their lanes and their scores."""

    lanes: Lanes
    tally: Tally

    def __len__(self) -> int:
        return len(self.lanes)


def _scaler_for(tr: SensorTrace, base: RidgeModel, cand: Candidate) -> Scaler:
    """The scaler the engine would fix for this candidate: only the elapsed scale can differ."""
    assert cand.config is not None and tr.state is not None
    settings = cand.config.sensor_settings(tr.sensor)
    if settings.initial_state is not None or not base.spec.elapsed:
        return base.scaler
    scale = (*base.scaler.scale[:-1], elapsed_scale_days(cand.config.learning))
    return Scaler(base.scaler.centre, scale)


class Tuner:
    """Evaluate candidates on a recorded stream; see the module docstring."""

    def __init__(self, trace: Trace, candidates: Sequence[Candidate], *, split: float = 0.7,
                 against: Against | Literal["auto"] = "auto", folds: int = 3) -> None:
        if not 1 <= folds <= 100:
            raise DataError(f"folds = {folds}: give between 1 and 100 blocks of the tune part")
        self.folds = folds
        if not 0.0 < split <= 1.0:
            raise DataError(f"split = {split}: give a fraction of the stream's time span in (0, 1]")
        self.trace = trace
        self.valid = [c for c in candidates if c.valid]
        self.refused = [c for c in candidates if not c.valid]
        self.split = split
        if against == "auto":
            against = "truth" if trace.has_truth else "references"
        self.against: Against = against
        t0, t1 = trace.t_first, trace.t_last
        self.split_t = (None if t0 is None or t1 is None or split >= 1.0
                        else t0 + split * (t1 - t0))
        # sensor → [(engine, candidate positions in self.valid)]
        self.engines: dict[str, list[tuple[Candidates, list[int]]]] = {}
        self.raw_scores: dict[str, tuple[Score, Score]] = {}

    # -- running ---------------------------------------------------------------------------------

    def _part(self, t: float) -> int:
        return 0 if self.split_t is None or t < self.split_t else 1

    def _folds(self, t: NDArray[np.float64]) -> NDArray[np.int64]:
        """Which of the tune part's consecutive time blocks each t falls in; -1 in the test
        part (one computation for a sensor's readings and, one at a time, its references)."""
        t0 = self.trace.t_first
        end = self.split_t if self.split_t is not None else self.trace.t_last
        if t0 is None or end is None:
            return np.full(len(t), -1, dtype=np.int64)
        block = (np.zeros(len(t)) if end <= t0
                 else np.floor(self.folds * (t - t0) / (end - t0)))
        fold = np.clip(block, 0, self.folds - 1).astype(np.int64)
        if self.split_t is not None:
            fold[t >= self.split_t] = -1
        out: NDArray[np.int64] = fold
        return out

    def _fold(self, t: float) -> int:
        """:meth:`_folds` of one time."""
        return int(self._folds(np.array([t]))[0])

    def _groups(self, tr: SensorTrace, base: RidgeModel) -> dict[Scaler, list[int]]:
        groups: dict[Scaler, list[int]] = {}
        for pos, cand in enumerate(self.valid):
            groups.setdefault(_scaler_for(tr, base, cand), []).append(pos)
        return groups

    def _engine(self, tr: SensorTrace, base: RidgeModel, scaler: Scaler,
                members: list[int]) -> Candidates:
        d = base.to_dict()
        d["scaler"] = scaler.to_dict()
        template = RidgeModel.from_dict(d)
        lcs = [c.learning for c in (self.valid[p].config for p in members) if c is not None]
        ms = ModelSettings(lam=stack([lc.lam for lc in lcs]),
                           memory=stack([float(lc.memory) for lc in lcs]),
                           delta=stack([math.inf if lc.huber_delta is None else lc.huber_delta
                                        for lc in lcs]),
                           normalised=stack([lc.normalised for lc in lcs]))
        cfg = self.trace.config
        assert tr.state is not None
        n = template.n_terms
        scalers = None
        if cfg.learning.scaler == "follow":
            # the recorder's elapsed scale is the base config's; this group's may differ
            scalers = [r.scaler if not template.spec.elapsed else
                       Scaler(r.scaler.centre, (*r.scaler.scale[:-1], scaler.scale[-1]))
                       for r in tr.refs]
        moved = template.copy()
        rows = []
        for i, r in enumerate(tr.refs):
            if scalers is not None:
                moved.move_scaler(scalers[i])
            rows.append(moved.phi(dict(zip(tr.inputs, r.values, strict=True)), r.t_pair)[0])
        ref_phi = np.array(rows).reshape(len(tr.refs), n)
        ref_y = np.array([r.y for r in tr.refs], dtype=np.float64)
        lanes = Lanes(len(lcs), template, guard_lanes([guard_settings(lc) for lc in lcs]), ms,
                      band_of(cfg.output), cfg.output.cap, tr.state.warm, ref_phi, ref_y,
                      scalers)
        tally = Tally(len(lanes), self.folds)
        if self.against == "spans":
            pos = np.array([r.pos for r in tr.refs], dtype=np.int64)
            tally.ref_w = np.maximum(1, np.diff(pos, prepend=0))
        return Candidates(lanes, tally)

    def _drive(self, group: Candidates, tr: SensorTrace, should_stop: Callable[[], bool],
               tick: Callable[[int], None]) -> bool:
        """Advance one group of candidates through a sensor's record; False when told to stop."""
        lanes, tally = group.lanes, group.tally
        width = len(tr.inputs)
        t = np.frombuffer(tr.out_t, dtype=np.float64)
        X = np.frombuffer(tr.out_x, dtype=np.float64).reshape(-1, width)
        truth = np.frombuffer(tr.out_truth, dtype=np.float64)
        raw = X[:, 0]
        part = (np.zeros(len(t), dtype=np.int8) if self.split_t is None
                else (t >= self.split_t).astype(np.int8))
        fold = self._folds(t)
        ready = tr.unready
        follow = lanes.ref_scalers is not None
        phi = None if follow else phi_block(lanes.model, X[ready:], t[ready:])
        pos = 0
        with np.errstate(all="ignore"):
            for i in range(len(tr.refs) + 1):
                nxt = tr.refs[i].pos if i < len(tr.refs) else tr.outputs
                while pos < nxt:
                    end = min(nxt, pos + CHUNK, ready if pos < ready else nxt)
                    if pos < ready:
                        block = None
                    elif phi is None:
                        block = phi_block(lanes.model, X[pos:end], t[pos:end], lanes.scaler)
                    else:
                        block = [f[pos - ready : end - ready] for f in phi]
                    value = lanes.corrected(block, raw[pos:end])
                    tally.outputs(value, truth[pos:end], part[pos:end], fold[pos:end])
                    tick(end - pos)
                    pos = end
                    if should_stop():
                        return False
                if i < len(tr.refs):
                    ref = tr.refs[i]
                    r = lanes.reference(i, ref.t)
                    tally.reference(i, r, self._part(ref.t), self._fold(ref.t))
                    tick(1)
                    if i % 64 == 63 and should_stop():
                        return False
        return True

    def _raw_only(self, tr: SensorTrace) -> tuple[Score, Score]:
        """A sensor whose model never existed publishes every reading raw, for every candidate."""
        acc = [[0.0, 0.0, 0], [0.0, 0.0, 0]]
        for x_t, raw, truth in zip(tr.out_t, tr.out_x[:: len(tr.inputs)], tr.out_truth,
                                   strict=True):
            if math.isnan(truth):
                continue
            a = acc[self._part(x_t)]
            e = raw - truth
            a[0] += e * e
            a[1] += e
            a[2] += 1
        return (Score(float(acc[0][0]), float(acc[0][1]), int(acc[0][2])),
                Score(float(acc[1][0]), float(acc[1][1]), int(acc[1][2])))

    def run(self, *, should_stop: Callable[[], bool] | None = None,
            progress: Callable[[float], None] | None = None) -> TuneResult:
        """Evaluate every valid candidate; ``should_stop`` ends early with the results so far."""
        stop = should_stop or (lambda: False)
        sensors = sorted(self.trace.sensors)
        total = max(1, sum((s.outputs + len(s.refs)) * max(1, len(self._groups(s, m)))
                           for s in self.trace.sensors.values()
                           if (m := self.trace.models[s.sensor]) is not None and self.valid))
        done = 0
        last = -1.0

        def tick(k: int) -> None:
            nonlocal done, last
            done += k
            if progress is not None and done / total - last >= 0.01:
                last = done / total
                progress(last)

        complete = self.trace.complete
        for name in sensors:
            tr = self.trace.sensors[name]
            base = self.trace.models[name]
            if base is None or not self.valid:
                self.raw_scores[name] = self._raw_only(tr)
                continue
            self.engines[name] = []
            for scaler, members in self._groups(tr, base).items():
                group = self._engine(tr, base, scaler, members)
                self.engines[name].append((group, members))
                if not self._drive(group, tr, stop, tick):
                    complete = False
                    break
            if not complete:
                break
        return self._result(complete)

    # -- results ---------------------------------------------------------------------------------

    def _sensor_scores(self, pos: int) -> dict[str, tuple[Score, Score]]:
        if self.against == "truth":
            out: dict[str, tuple[Score, Score]] = dict(self.raw_scores)
        else:  # a sensor without a model never paired a reference
            out = {name: (Score(), Score()) for name in self.raw_scores}
        for name, engines in self.engines.items():
            for ve, members in engines:
                if pos not in members:
                    continue
                j = members.index(pos)
                ta = ve.tally
                if self.against == "truth":
                    sse, tot, n = ta.out_sse, ta.out_sum, ta.out_n
                    parts = [Score(float(sse[p, j]), float(tot[p, j]), int(n[p])) for p in (0, 1)]
                else:
                    sse, tot, nn = ta.ref_sse, ta.ref_sum, ta.ref_n
                    parts = [Score(float(sse[p, j]), float(tot[p, j]), int(nn[p, j]))
                             for p in (0, 1)]
                out[name] = (parts[0], parts[1])
        return dict(sorted(out.items()))

    def _outcome(self, pos: int) -> Outcome:
        cand = self.valid[pos]
        per = self._sensor_scores(pos)
        pooled = []
        for p in (0, 1):
            sse = tot = 0.0
            n = 0
            for scores in per.values():
                sse += scores[p].sse
                tot += scores[p].total
                n += scores[p].n
            pooled.append(Score(sse, tot, n))
        rollbacks = gated = 0
        gain = 0.0
        for engines in self.engines.values():
            for ve, members in engines:
                if pos in members:
                    j = members.index(pos)
                    rollbacks += int(ve.lanes.rollbacks[j])
                    gated += int(ve.lanes.counts["gated"][j])
                    gain = max(gain, float(ve.lanes.max_gain[j]))
        assert cand.config is not None
        lc = cand.config.learning
        margin = min(step_check(label, terms=s.term_count(), alpha_max=lc.alpha_max,
                                lambda_max=lc.lambda_max, memory=lc.memory,
                                clip=lc.feature_clip,
                                normalised=lc.normalised).margin
                     for label, s in cand.config.settings_groups().items())
        reached = STEP_BOUND / gain if gain > 0.0 else math.inf
        return Outcome(cand, pooled[0], pooled[1], per, rollbacks, gated, margin, reached,
                       self._fold_scores(pos))

    def _fold_scores(self, pos: int) -> list[Score]:
        """The tune part's score per fold, pooled over sensors (raw-only sensors included)."""
        sse = [0.0] * self.folds
        n = [0] * self.folds
        if self.against == "truth":
            for tr in self.trace.sensors.values():
                if self.trace.models[tr.sensor] is not None:
                    continue
                for x_t, raw, truth in zip(tr.out_t, tr.out_x[:: len(tr.inputs)],
                                           tr.out_truth, strict=True):
                    f = self._fold(x_t)
                    if f >= 0 and not math.isnan(truth):
                        sse[f] += (raw - truth) ** 2
                        n[f] += 1
        for engines in self.engines.values():
            for ve, members in engines:
                if pos not in members:
                    continue
                j = members.index(pos)
                for f in range(self.folds):
                    ta = ve.tally
                    if self.against == "truth":
                        sse[f] += float(ta.fold_out_sse[f, j])
                        n[f] += int(ta.fold_out_n[f])
                    else:
                        sse[f] += float(ta.fold_ref_sse[f, j])
                        n[f] += int(ta.fold_ref_n[f, j])
        return [Score(a, 0.0, b) for a, b in zip(sse, n, strict=True)]

    def _result(self, complete: bool) -> TuneResult:
        outcomes = [self._outcome(p) for p in range(len(self.valid))]
        outcomes.sort(key=lambda o: (o.tune.rmse is None, o.tune.rmse or 0.0, o.candidate.index))
        return TuneResult(self.against, self.split, self.split_t, outcomes, self.refused,
                          self.trace.events, complete, sorted(self.trace.sensors))

    def engine_state(self, index: int) -> dict[str, Any]:
        """The engine state ``trimtab replay --state-out`` leaves with candidate ``index``."""
        pos = next((p for p, c in enumerate(self.valid) if c.index == index), None)
        if pos is None:
            raise DataError(f"candidate {index} was not evaluated")
        cand = self.valid[pos]
        assert cand.config is not None
        state = copy.deepcopy(self.trace.engine_state)
        counts = dict(self.trace.counts)
        for name, d in state["sensors"].items():
            if d["model"] is None:
                d["guard"] = Guard(alpha=cand.config.learning.alpha).to_dict()
                continue
            for ve, members in self.engines.get(name, []):
                if pos in members:
                    j = members.index(pos)
                    d.update(ve.lanes.candidate_state(j))
                    tallies = {f"reference_{s}": int(ve.lanes.counts[s][j]) for s in COUNTED}
                    tallies["prediction_non_finite"] = int(ve.lanes.prediction_non_finite[j])
                    for key, v in tallies.items():
                        counts[key] = counts.get(key, 0) + v
        state["counts"] = {k: v for k, v in counts.items() if v}
        return state


