"""K candidate learning settings of one sensor as lanes of the learning kernel.

The state of K candidates is one set of K-vectors — a weight θ_j, the spread, the step count,
every field of the guard and of the sensor's figures — so the learning kernel
(:mod:`trimtab.engine.learn`), run with :data:`trimtab.model.ops.ARRAY`, advances every
candidate in one pass of its code: the very code the daemon runs on one sensor's floats. There
is no second copy of the step, the guards, the band or the correction here; this module holds
only what is stored differently for K candidates:

* suspects are indices of recorded references (a K × (gate_run − 1) matrix and a count each),
  not feature vectors;
* the last good snapshot is the weights, spread and step count kept as K-vectors, not a
  model's ``to_dict``;
* a block of readings between two references is corrected at once: θ_j as K × 1 columns, φ_j
  as B-vectors, so :func:`trimtab.engine.learn.correct` gives K × B values.

:func:`phi_block` standardises many readings at once with
:func:`trimtab.model.kernel.standardise`, the function :meth:`RidgeModel.phi` uses.
"""

from __future__ import annotations

import math
from dataclasses import fields
from typing import Any

import numpy as np
from numpy.typing import NDArray

from trimtab.engine.guards import Guard, GuardSettings
from trimtab.engine.learn import STATUSES, Band, band_start, correct, learn
from trimtab.errors import DataError
from trimtab.model.kernel import shrink_step, standardise
from trimtab.model.online import RidgeModel
from trimtab.model.ops import ARRAY, dot
from trimtab.model.ranges import remap
from trimtab.model.terms import Scaler

__all__ = ["COUNTED", "Lanes", "ModelSettings", "guard_lanes", "phi_block", "stack"]

F64 = NDArray[np.float64]
I64 = NDArray[np.int64]
Mask = NDArray[np.bool_]

COUNTED = ("applied", "rolled_back", "non_finite", "gated", "level_shift", "stuck")
"""The reference statuses tallied per candidate (the engine's ``reference_…`` counts)."""


def stack(values: list[Any]) -> Any:
    """One setting of K candidates: the value itself when all agree, else a K-vector."""
    first = values[0]
    if all(v == first for v in values):
        return first
    return np.array(values)


class ModelSettings:
    """The model's learning settings of K candidates (λ, m, δ with +inf for unset, normalised)."""

    __slots__ = ("delta", "lam", "memory", "normalised")

    def __init__(self, lam: Any, memory: Any, delta: Any, normalised: Any) -> None:
        self.lam = lam
        self.memory = memory
        self.delta = delta
        self.normalised = normalised


def phi_block(model: RidgeModel, X: F64, t: F64, scaler: Scaler | None = None) -> list[Any]:
    """Features [1, z_1 … z_k] of many readings as columns, bit for bit what ``model.phi`` gives.

    ``scaler`` standardises instead of the model's own (a followed scaler after a move).
    """
    T = model.spec.matrix(X, t, model.origin)
    sc = model.scaler if scaler is None else scaler
    cols = [T[:, j] for j in range(T.shape[1])]
    phi, _, finite = standardise(ARRAY, cols, sc.centre, sc.scale, model.clip)
    if not np.all(finite):
        z = (T - np.asarray(sc.centre)) / np.asarray(sc.scale)
        if np.isnan(z).any() or model.clip is None:
            raise DataError(f"a term of the model {list(model.spec.names())} is not finite")
    phi[0] = np.ones(len(t))
    return phi


class Lanes:
    """The learning state of K candidates for one sensor: the kernel's lane and guard."""

    def __init__(self, k: int, model: RidgeModel, gs: GuardSettings, ms: ModelSettings,
                 band: Band, cap: float | None, warm: bool, ref_phi: F64, ref_y: F64,
                 ref_scalers: list[Scaler] | None = None) -> None:
        n = model.n_terms
        self.k = k
        self.model = model
        self.gs = gs
        self.ms = ms
        self.band = band
        self.cap = cap
        self.warm = warm
        self.guard = self
        self.ref_phi = ref_phi
        self.ref_rows = [list(row) for row in ref_phi.tolist()]
        self.ref_y = ref_y
        self.ref_phisq = np.array([dot(row, row) for row in self.ref_rows])
        self.ref_scalers = ref_scalers
        self.scaler = model.scaler
        self.prior = list(model.prior)
        self.th = [np.full(k, w) for w in model.theta]
        self.spread_k = np.full(k, model.spread)
        self.updates = np.full(k, model.updates, dtype=np.int64)
        self.all = np.ones(k, dtype=bool)
        # the guard, as trimtab.engine.guards.Guard holds it
        self.alpha = np.full(k, 1.0) * gs.alpha
        self.applied = np.zeros(k, dtype=np.int64)
        self.run_sign = np.zeros(k, dtype=np.int64)
        self.run_t0 = np.full(k, np.nan)
        self.recent_ms = np.zeros(k)
        self.snapshot_ms = np.zeros(k)
        self.since_snapshot = np.zeros(k, dtype=np.int64)
        self.held = np.zeros(k, dtype=bool)
        self.rollbacks = np.zeros(k, dtype=np.int64)
        self.fresh = np.ones(k, dtype=bool)
        self.long_abs = np.zeros(k)
        self.long_n = np.zeros(k, dtype=np.int64)
        self.recoveries = np.zeros(k, dtype=np.int64)
        self.limit = np.maximum(1, np.asarray(gs.gate_run) - 1) + np.zeros(k, dtype=np.int64)
        self.susp = np.zeros((k, int(self.limit.max())), dtype=np.int64)
        self.n_susp = np.zeros(k, dtype=np.int64)
        self.has_snap = np.zeros(k, dtype=bool)
        self.snap_th = [np.zeros(k) for _ in range(n)]
        self.snap_spread = np.zeros(k)
        self.snap_updates = np.zeros(k, dtype=np.int64)
        # the sensor's figures
        self.band_k = np.full(k, band_start(band.coverage))
        self.band_hit = np.zeros(k, dtype=np.int64)
        self.band_n = np.zeros(k, dtype=np.int64)
        self.last_applied_t = np.full(k, np.nan)
        self.sq_preq = np.zeros(k)
        self.n_preq = np.zeros(k, dtype=np.int64)
        # the tuner's own tallies
        self.counts = {name: np.zeros(k, dtype=np.int64) for name in COUNTED}
        self.prediction_non_finite = np.zeros(k, dtype=np.int64)
        self.max_gain = np.zeros(k)

    def __len__(self) -> int:
        return self.k

    # -- the lane: what the kernel asks of K candidates ------------------------------------------

    def theta(self) -> list[F64]:
        return self.th

    def spread(self) -> F64:
        return self.spread_k

    def step(self, m: Mask, phi: Any, y: Any, alpha: F64, phisq: Any) -> tuple[Mask, F64]:
        ms = self.ms
        r, theta, spread, a, _, _, ok = shrink_step(
            ARRAY, self.th, self.prior, phi, y, alpha, ms.lam, ms.memory, ms.delta,
            ms.normalised, self.model.penalise_intercept, self.spread_k, self.model.spread_decay,
            phisq)
        ok = m & ok
        self.th = [np.where(ok, new, old) for new, old in zip(theta, self.th, strict=True)]
        self.spread_k = np.where(ok, spread, self.spread_k)
        self.updates = self.updates + ok
        gain = a * (ms.lam / ms.memory + phisq)
        self.max_gain = np.where(ok, np.maximum(self.max_gain, gain), self.max_gain)
        return ok, r

    def save(self, m: Mask) -> None:
        self.snap_th = [np.where(m, w, s) for w, s in zip(self.th, self.snap_th, strict=True)]
        self.snap_spread = np.where(m, self.spread_k, self.snap_spread)
        self.snap_updates = np.where(m, self.updates, self.snap_updates)
        self.has_snap = self.has_snap | m

    def restore(self, m: Mask) -> None:
        self.th = [np.where(m, s, w) for w, s in zip(self.th, self.snap_th, strict=True)]
        self.spread_k = np.where(m, self.snap_spread, self.spread_k)
        self.updates = np.where(m, self.snap_updates, self.updates)

    def hold(self, m: Mask, item: int, s: GuardSettings) -> None:
        """Guard.hold: the latest gate_run − 1 suspects only (``item``: a reference index)."""
        full = m & (self.n_susp >= self.limit)
        if full.any():
            self.susp[full, :-1] = self.susp[full, 1:]
            self.n_susp[full] -= 1
        rows = np.flatnonzero(m)
        self.susp[rows, self.n_susp[rows]] = item
        self.n_susp[rows] += 1

    def flat(self, m: Mask, y: float) -> Mask:
        held_y = self.ref_y[self.susp]
        live = np.arange(self.susp.shape[1])[None, :] < self.n_susp[:, None]
        out: Mask = m & (self.n_susp > 0) & np.all((held_y == y) | ~live, axis=1)
        return out

    def take(self, m: Mask) -> tuple[I64, I64]:
        return self.susp.copy(), np.where(m, self.n_susp, 0)

    def held_item(self, held: I64, slot: int) -> tuple[list[F64], F64, F64]:
        idx = held[:, slot]
        rows = self.ref_phi[idx]
        return [rows[:, j] for j in range(rows.shape[1])], self.ref_y[idx], self.ref_phisq[idx]

    # the guard's storage
    def has_snapshot(self) -> Mask:
        return self.has_snap

    def n_suspects(self) -> I64:
        return self.n_susp

    def clear_suspects(self, m: Mask) -> None:
        self.n_susp = np.where(m, 0, self.n_susp)

    # -- moving through the record ---------------------------------------------------------------

    def move(self, new: Scaler) -> None:
        """The engine's scaler move for every candidate: θ, the prior and the snapshots follow."""
        old = self.scaler
        if new == old:
            return
        self.th = remap(self.th, old, new)
        self.prior = remap(self.prior, old, new)
        self.snap_th = remap(self.snap_th, old, new)
        self.scaler = new

    def reference(self, i: int, t: float) -> F64:
        """Learn recorded reference ``i`` (at event time t) in every candidate; r each."""
        if self.ref_scalers is not None:
            self.move(self.ref_scalers[i])
        code, r = learn(ARRAY, self, self.all, self.ref_rows[i], float(self.ref_y[i]), t,
                        self.gs, self.band, i, float(self.ref_phisq[i]))
        for name in COUNTED:
            self.counts[name] += code == STATUSES.index(name)
        out: F64 = r
        return out

    def corrected(self, phi: list[Any] | None, raw: F64) -> F64:
        """The K × B values the daemon publishes for a block of readings with no reference
        between them (``phi`` None: readings before the model existed, published raw)."""
        if phi is None:
            return np.broadcast_to(raw, (self.k, len(raw)))
        use = (self.all if self.warm else self.applied >= self.gs.warmup)[:, None]
        value, bad, _ = correct(ARRAY, [w[:, None] for w in self.th], self.prior, phi, raw, use,
                                self.cap)
        shape = (self.k, len(raw))  # every candidate still in warmup: one row of prior values
        self.prediction_non_finite += np.broadcast_to(bad, shape).sum(axis=1)
        out: F64 = np.broadcast_to(value, shape)
        return out

    # -- one candidate's state in the engine's own form ------------------------------------------

    def model_of(self, i: int, th: list[F64], spread: float, updates: int) -> RidgeModel:
        """Candidate i's model with the given weights (one K-vector a weight)."""
        ms = self.ms
        d = self.model.to_dict()
        d.update(scaler=self.scaler.to_dict(), prior=[float(v) for v in self.prior])
        delta = float(_at(ms.delta, i))
        d.update(lam=float(_at(ms.lam, i)), memory=float(_at(ms.memory, i)),
                 normalised=bool(_at(ms.normalised, i)),
                 huber_delta=None if math.isinf(delta) else delta,
                 theta=[float(w[i]) for w in th], spread=spread, updates=updates)
        return RidgeModel.from_dict(d)

    def candidate_state(self, i: int) -> dict[str, object]:
        """Candidate i's model, guard and prequential figures, as the engine stores them."""
        snapshot = None
        if self.has_snap[i]:
            snapshot = self.model_of(i, self.snap_th, float(self.snap_spread[i]),
                                     int(self.snap_updates[i])).to_dict()
        suspects = [(list(self.ref_rows[j]), float(self.ref_y[j]))
                    for j in self.susp[i, : self.n_susp[i]]]
        guard = Guard(
            alpha=float(self.alpha[i]), applied=int(self.applied[i]),
            run_sign=int(self.run_sign[i]), suspects=suspects,
            recent_ms=float(self.recent_ms[i]), snapshot=snapshot,
            snapshot_ms=float(self.snapshot_ms[i]), since_snapshot=int(self.since_snapshot[i]),
            held=bool(self.held[i]), rollbacks=int(self.rollbacks[i]),
            fresh=bool(self.fresh[i]), long_abs=float(self.long_abs[i]),
            long_n=int(self.long_n[i]), recoveries=int(self.recoveries[i]),
            run_t0=float(self.run_t0[i]),
        )
        last = float(self.last_applied_t[i])
        model = self.model_of(i, self.th, float(self.spread_k[i]), int(self.updates[i]))
        return {
            "model": model.to_dict(),
            "guard": guard.to_dict(),
            "last_applied_t": None if math.isnan(last) else last,
            "sq_preq": float(self.sq_preq[i]),
            "n_preq": int(self.n_preq[i]),
            "band": [float(self.band_k[i]), int(self.band_hit[i]), int(self.band_n[i])],
        }


def _at(v: Any, i: int) -> Any:
    """Candidate i's value of a stacked setting."""
    return v[i] if isinstance(v, np.ndarray) else v


def guard_lanes(per: list[GuardSettings]) -> GuardSettings:
    """K candidates' guard settings stacked field by field."""
    return GuardSettings(**{f.name: stack([getattr(g, f.name) for g in per])
                            for f in fields(GuardSettings)})
