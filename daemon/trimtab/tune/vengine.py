"""K candidate learning settings advancing together through one sensor's recorded stream.

The state of K candidates is one set of arrays — weights as a (k+1) × K matrix, and one
K-vector for each scalar of the model and the guard — so one numpy operation advances every
candidate. Each operation is the scalar code's operation, in the scalar code's order, on
correctly rounded elementwise arithmetic, so candidate i ends with exactly the bits that
``trimtab replay`` with candidate i's config gives:

* a dot product θ·φ is :func:`trimtab.model.online.dot`'s left-to-right loop,
  ``acc = acc + θ_j·φ_j`` from 0.0, never a BLAS call or a pairwise sum;
* the update is :meth:`trimtab.model.online.RidgeModel.step_phi` term for term; the gate, snapshot,
  rollback and α halving are :class:`trimtab.engine.guards.Guard`'s, and the order of decisions is
  the engine's ``_learn`` and ``_apply``;
* readings between two references do not change any state, so a block of them is predicted
  at once: K × B products accumulated term by term (the same left-to-right order per entry);
* scores are sums accumulated in stream order (``np.add.accumulate`` is sequential by
  definition), so anyone can recompute them from a replay's output with a plain loop.

:func:`phi_rows` standardises many readings at once with :meth:`RidgeModel.phi`'s operations.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from trimtab.engine.engine import band_start, band_step
from trimtab.engine.guards import SQRT_HALF_PI, Guard, gap_fraction, lifted
from trimtab.errors import DataError
from trimtab.model.online import RidgeModel, dot
from trimtab.model.ranges import remap
from trimtab.model.terms import Scaler

__all__ = ["STATUSES", "Common", "Settings", "VEngine", "phi_rows"]

F64 = NDArray[np.float64]
I64 = NDArray[np.int64]
Mask = NDArray[np.bool_]

_SQRT_HALF_PI = math.sqrt(math.pi / 2.0)  # as trimtab.model.online computes it
STATUSES = ("applied", "rolled_back", "non_finite", "gated", "level_shift", "stuck")
_NONE, _APPLIED, _ROLLED_BACK, _NON_FINITE = 0, 1, 2, 3


@dataclass(frozen=True, slots=True)
class Settings:
    """The tuned learning settings of K candidates, one entry each."""

    alpha: F64
    lam: F64
    memory: F64
    delta: F64
    """Huber δ; +inf stands for the squared loss (unset), which clipping at ±inf leaves alone."""
    normalised: Mask
    gate_k: F64
    rollback_factor: F64
    alpha_recovery: F64
    alpha_min: F64
    alpha_max: F64
    step_gap: F64
    """Span of the gap lift per candidate; +inf where ``step_adapt`` is "none" (no lift)."""

    def __len__(self) -> int:
        return len(self.alpha)


@dataclass(frozen=True, slots=True)
class Common:
    """Settings every candidate of a run shares (not tuned)."""

    gate_run: int
    warmup: int
    snapshot_every: int
    cap: float | None
    warm: bool
    error_window: int = 200
    shift_after: float = 0.0
    band_coverage: float = 0.9
    band_gain: float = 0.05


def phi_rows(model: RidgeModel, X: F64, t: F64, scaler: Scaler | None = None) -> F64:
    """Feature rows [1, z_1 … z_k] of many readings, bit for bit what ``model.phi`` gives.

    ``scaler`` standardises instead of the model's own (a followed scaler after a move).
    """
    T = model.spec.matrix(X, t, model.origin)
    sc = model.scaler if scaler is None else scaler
    Z = (T - np.asarray(sc.centre)) / np.asarray(sc.scale)
    if np.isnan(Z).any():
        raise DataError(f"a term of the model {list(model.spec.names())} is not finite")
    clip = model.clip
    if clip is not None:
        Z = np.where(np.abs(Z) > clip, np.where(Z > 0.0, clip, -clip), Z)
    elif np.isinf(Z).any():
        raise DataError(f"a term of the model {list(model.spec.names())} is not finite")
    out: F64 = np.column_stack((np.ones(len(Z)), Z))
    return out


def _seq_add(acc: F64, parts: F64) -> F64:
    """acc + parts[:, 0] + parts[:, 1] + … in that order, per row (a K-vector of running sums)."""
    if parts.shape[1] == 0:
        return acc
    both = np.concatenate((acc[:, None], parts), axis=1)
    out: F64 = np.add.accumulate(both, axis=1)[:, -1]
    return out


class VEngine:
    """The learning state of K candidates for one sensor; see the module docstring."""

    def __init__(self, model: RidgeModel, settings: Settings, common: Common,
                 ref_phi: F64, ref_y: F64, ref_scalers: list[Scaler] | None = None,
                 folds: int = 1) -> None:
        k = len(settings)
        n = model.n_terms
        self.model = model
        self.s = settings
        self.c = common
        self.ref_phi = ref_phi
        self.ref_y = ref_y
        self.ref_scalers = ref_scalers
        self.ref_w: I64 | None = None
        """Weights of the reference scores (``against = "spans"``), None: each counts once."""
        self.scaler = model.scaler
        self.ref_phisq = np.array([dot(row, row) for row in ref_phi.tolist()])
        self.prior = np.asarray(model.prior, dtype=np.float64)[:, None]
        self.th = np.repeat(np.asarray(model.theta, dtype=np.float64)[:, None], k, axis=1)
        self.spread = np.full(k, model.spread)
        self.updates = np.full(k, model.updates, dtype=np.int64)
        # the guard, as trimtab.engine.guards.Guard holds it
        self.alpha = settings.alpha.copy()
        self.applied = np.zeros(k, dtype=np.int64)
        self.run_sign = np.zeros(k, dtype=np.int64)
        self.n_susp = np.zeros(k, dtype=np.int64)
        self.run_t0 = np.full(k, np.nan)
        self.susp = np.zeros((k, max(1, common.gate_run - 1)), dtype=np.int64)
        self.recent = np.zeros(k)
        self.has_snap = np.zeros(k, dtype=bool)
        self.snap_th = np.zeros((n, k))
        self.snap_spread = np.zeros(k)
        self.snap_updates = np.zeros(k, dtype=np.int64)
        self.snap_ms = np.zeros(k)
        self.since = np.zeros(k, dtype=np.int64)
        self.held = np.zeros(k, dtype=bool)
        self.rollbacks = np.zeros(k, dtype=np.int64)
        self.fresh = np.ones(k, dtype=bool)
        self.long_abs = np.zeros(k)
        self.long_n = np.zeros(k, dtype=np.int64)
        self.recoveries = np.zeros(k, dtype=np.int64)
        self.band_k = np.full(k, band_start(common.band_coverage))
        self.band_hit = np.zeros(k, dtype=np.int64)
        self.band_n = np.zeros(k, dtype=np.int64)
        # what the engine's sensor state adds, and the tuner's own tallies
        self.last_applied_t = np.full(k, np.nan)
        self.sq_preq = np.zeros(k)
        self.n_preq = np.zeros(k, dtype=np.int64)
        self.counts = {name: np.zeros(k, dtype=np.int64) for name in STATUSES}
        self.prediction_non_finite = np.zeros(k, dtype=np.int64)
        self.max_gain = np.zeros(k)
        self.ref_sse = np.zeros((2, k))
        self.ref_sum = np.zeros((2, k))
        self.ref_n = np.zeros((2, k), dtype=np.int64)
        self.out_sse = np.zeros((2, k))
        self.out_sum = np.zeros((2, k))
        self.out_n = np.zeros(2, dtype=np.int64)
        # the same sums per fold of the tune part (rolling origin: each fold is predicted
        # from everything before it)
        self.fold_ref_sse = np.zeros((folds, k))
        self.fold_ref_n = np.zeros((folds, k), dtype=np.int64)
        self.fold_out_sse = np.zeros((folds, k))
        self.fold_out_n = np.zeros(folds, dtype=np.int64)

    def __len__(self) -> int:
        return len(self.alpha)

    # -- arithmetic shared by prediction and learning -------------------------------------------

    def _dot(self, phi: F64) -> F64:
        """θ·φ per candidate, left to right; φ is one shared vector or one column a candidate."""
        acc = np.zeros(len(self))
        for j in range(self.th.shape[0]):
            acc = acc + self.th[j] * phi[j]
        return acc

    def _snapshot(self, m: Mask, ms: F64) -> None:
        """Guard.take_snapshot (or restart_baseline with ``ms`` = 0) for candidates in ``m``."""
        self.snap_th[:, m] = self.th[:, m]
        self.snap_spread[m] = self.spread[m]
        self.snap_updates[m] = self.updates[m]
        self.snap_ms[m] = ms[m]
        self.since[m] = 0
        self.has_snap |= m

    # -- one update: RidgeModel.step_phi inside the engine's _apply ------------------------------

    def _apply(self, m: Mask, phi: F64, y: float | F64, phisq: float | F64,
               lift: F64) -> NDArray[np.int8]:
        """The engine's ``_apply`` for candidates in ``m``; returns a status code each."""
        status = np.zeros(len(self), dtype=np.int8)
        self._snapshot(m & ~self.has_snap, self.recent)
        s = self.s
        r = self._dot(phi) - y
        psi = np.maximum(-s.delta, np.minimum(s.delta, r))
        alpha = lifted(self.alpha, s.alpha_max, lift)
        a = np.where(s.normalised, alpha / (1.0 + phisq), alpha)
        shrink = 1.0 - a * s.lam / s.memory
        ap = a * psi
        phi_c = phi if phi.ndim == 2 else phi[:, None]
        new = self.prior + shrink * (self.th - self.prior) - ap * phi_c
        if not self.model.penalise_intercept:
            new[0] = self.th[0] - ap * phi_c[0]
        total = np.zeros(len(self))
        for j in range(new.shape[0]):
            total = total + new[j]
        obs = np.abs(r) * _SQRT_HALF_PI
        spread = np.where(self.spread == 0.0, obs,
                          self.spread + self.model.spread_decay * (obs - self.spread))
        ok = m & np.isfinite(r) & (shrink > 0.0) & np.isfinite(total) & np.isfinite(spread)
        status[m & ~ok] = _NON_FINITE
        self.th[:, ok] = new[:, ok]
        self.spread[ok] = spread[ok]
        self.updates[ok] += 1
        self.max_gain = np.where(ok, np.maximum(self.max_gain, a * (s.lam / s.memory + phisq)),
                                 self.max_gain)
        # Guard.record
        w = 2.0 / (self.c.snapshot_every + 1.0)
        sq = r * r
        self.recent = np.where(ok, np.where(self.fresh, sq, (1.0 - w) * self.recent + w * sq),
                               self.recent)
        self.fresh &= ~ok
        a_r = np.abs(r)
        wl = 2.0 / (self.c.error_window + 1.0)
        self.long_abs = np.where(ok, np.where(self.long_n == 0, a_r,
                                              self.long_abs + wl * (a_r - self.long_abs)),
                                 self.long_abs)
        self.long_n += ok
        self.applied += ok
        self.since += ok
        self.held &= ~ok
        # Guard.exploded → roll back to the snapshot and halve α
        limit = s.rollback_factor * SQRT_HALF_PI * self.long_abs
        boom = ok & self.has_snap & (self.long_n >= self.c.snapshot_every) & (
            self.long_abs > 0.0) & (self.recent > limit * limit)
        if boom.any():
            self.alpha = np.where(boom, np.maximum(self.alpha * 0.5, s.alpha_min), self.alpha)
            self.held |= boom
            self.rollbacks += boom
            self.recent = np.where(boom, self.snap_ms, self.recent)
            self.since[boom] = 0
            self.n_susp[boom] = 0
            self.run_sign[boom] = 0
            self.run_t0[boom] = np.nan
            self.th[:, boom] = self.snap_th[:, boom]
            self.spread[boom] = self.snap_spread[boom]
            self.updates[boom] = self.snap_updates[boom]
            status[boom] = _ROLLED_BACK
        good = ok & ~boom
        # Guard.recover
        low = good & (self.alpha < s.alpha) & (s.alpha_recovery > 0.0)
        if low.any():
            self.recoveries += low
            back = np.minimum(s.alpha, self.alpha + s.alpha_recovery * (s.alpha - self.alpha))
            self.alpha = np.where(low, back, self.alpha)
        status[good] = _APPLIED
        self._snapshot(good & (self.since >= self.c.snapshot_every), self.recent)
        return status

    def _move(self, new: Scaler) -> None:
        """Engine._move_scaler for every candidate: θ, the prior and the snapshots follow."""
        old = self.scaler
        if new == old:
            return
        self.th = np.array(remap(list(self.th), old, new))
        self.prior = np.array(remap(list(self.prior), old, new))
        self.snap_th = np.array(remap(list(self.snap_th), old, new))
        self.scaler = new

    # -- one paired reference: the engine's _learn -------------------------------------------------

    def reference(self, i: int, t: float, part: int, fold: int = -1) -> None:
        """Gate and apply reference ``i`` (paired at record time) for every candidate."""
        if self.ref_scalers is not None:
            self._move(self.ref_scalers[i])
        phi, y, phisq = self.ref_phi[i], float(self.ref_y[i]), float(self.ref_phisq[i])
        s = self.s
        r = self._dot(phi) - y
        fin = np.isfinite(r)
        # the band's calibration (Engine._learn): covered = |r| ≤ k·spread, then band_step
        covered = np.abs(r) <= self.band_k * self.spread
        self.band_hit += fin & covered
        self.band_n += fin
        self.band_k = np.where(fin, band_step(self.band_k, covered, self.c.band_coverage,
                                              self.c.band_gain), self.band_k)
        self.counts["non_finite"] += ~fin
        sq = r * r
        self.sq_preq = np.where(fin, self.sq_preq + sq, self.sq_preq)
        self.n_preq += fin
        if self.ref_w is not None:  # scored against spans: once per value the reference stands for
            w = int(self.ref_w[i])
            sq, rw = sq * w, r * w
        else:
            w, rw = 1, r
        self.ref_sse[part] = np.where(fin, self.ref_sse[part] + sq, self.ref_sse[part])
        self.ref_sum[part] = np.where(fin, self.ref_sum[part] + rw, self.ref_sum[part])
        self.ref_n[part] += fin * w
        if fold >= 0:
            self.fold_ref_sse[fold] = np.where(fin, self.fold_ref_sse[fold] + sq,
                                               self.fold_ref_sse[fold])
            self.fold_ref_n[fold] += fin * w
        # Guard.judge
        gate = (self.applied >= self.c.warmup) & (self.spread > 0.0)
        scale = np.maximum(self.spread, SQRT_HALF_PI * self.long_abs)  # Guard.judge
        rej = fin & gate & ~(np.abs(r) <= s.gate_k * scale)
        accept = fin & ~rej
        self.run_sign[accept] = 0
        self.n_susp[accept] = 0
        self.run_t0[accept] = np.nan
        sign = np.where(r > 0, 1, -1)
        new_run = rej & (sign != self.run_sign)
        self.run_sign[new_run] = sign[new_run]
        self.n_susp[new_run] = 0
        self.run_t0[new_run | (rej & np.isnan(self.run_t0))] = t
        shift = rej & (self.n_susp + 1 >= self.c.gate_run) & (
            t - self.run_t0 >= self.c.shift_after)
        suspect = rej & ~shift
        if suspect.any():
            # Guard.hold: the latest gate_run − 1 suspects only
            full = suspect & (self.n_susp == self.susp.shape[1])
            if full.any():
                self.susp[full, :-1] = self.susp[full, 1:]
                self.n_susp[full] -= 1
            rows = np.flatnonzero(suspect)
            self.susp[rows, self.n_susp[rows]] = i
            self.n_susp[rows] += 1
            self.counts["gated"] += suspect
        # the gap lift of Engine._learn: none before the first applied reference or when off
        gap = np.where(np.isnan(self.last_applied_t), 0.0, t - self.last_applied_t)
        lift = np.where(np.isinf(s.step_gap) | np.isnan(self.last_applied_t), 0.0,
                        gap_fraction(gap, s.step_gap))
        stuck = np.zeros(len(self), dtype=bool)
        if shift.any():
            # Guard.flat_run: held suspects all repeating this very value are a stuck
            # instrument, not a shift; the run stays held.
            held_y = self.ref_y[self.susp]
            live = np.arange(self.susp.shape[1])[None, :] < self.n_susp[:, None]
            stuck = shift & (self.n_susp > 0) & np.all((held_y == y) | ~live, axis=1)
            shift &= ~stuck
            self.counts["stuck"] += stuck
        if shift.any():
            # Guard.restart_baseline before learning the new regime, then the held suspects
            self._snapshot(shift, np.zeros(len(self)))
            self.fresh |= shift
            self.long_abs[shift] = 0.0
            self.long_n[shift] = 0
            lift = np.where(shift, 1.0, lift)  # Engine._learn: a shift is learnt at alpha_max
            held = np.where(shift, self.n_susp, 0)
            self.run_sign[shift] = 0
            self.n_susp[shift] = 0
            self.run_t0[shift] = np.nan
            for slot in range(int(held.max())):
                m = held > slot
                idx = self.susp[:, slot]
                self._apply(m, self.ref_phi[idx].T, self.ref_y[idx], self.ref_phisq[idx], lift)
        status = self._apply(fin & ~suspect & ~stuck, phi, y, phisq, lift)
        applied = status == _APPLIED
        self.last_applied_t = np.where(applied, t, self.last_applied_t)
        shifted = applied & shift
        self.counts["applied"] += applied & ~shifted
        self.counts["level_shift"] += shifted
        self.counts["rolled_back"] += status == _ROLLED_BACK
        self.counts["non_finite"] += status == _NON_FINITE

    # -- corrected values: the engine's _correct, scored -------------------------------------------

    def score_outputs(self, phi: F64 | None, raw: F64, truth: F64, part: NDArray[np.int8],
                      fold: I64 | None = None) -> None:
        """Correct a block of readings (no reference between them) and score them against truth.

        ``phi`` is None for readings before the model existed: those are published raw.
        """
        k, b = len(self), len(raw)
        if phi is None:
            value = np.broadcast_to(raw, (k, b))
        else:
            value = np.zeros((k, b))
            for j in range(phi.shape[1]):
                value = value + self.th[j][:, None] * phi[:, j][None, :]
            use = np.full(k, True) if self.c.warm else self.applied >= self.c.warmup
            if not use.all():
                prior = [float(v) for v in self.prior[:, 0]]  # moved with the scaler
                # the engine's own expression for a model still in warmup
                pv = np.array([sum(p * f for p, f in zip(prior, row, strict=True))
                               for row in phi.tolist()])
                value = np.where(use[:, None], value, pv[None, :])
            bad = ~np.isfinite(value)
            if bad.any():
                self.prediction_non_finite += bad.sum(axis=1)
                value = np.where(bad, raw[None, :], value)
            cap = self.c.cap
            if cap is not None:
                d = value - raw[None, :]
                value = np.where(np.abs(d) > cap, raw[None, :] + np.copysign(cap, d), value)
        has = ~np.isnan(truth)
        for p in (0, 1):
            cols = has & (part == p)
            if not cols.any():
                continue
            err = value[:, cols] - truth[cols][None, :]
            self.out_sse[p] = _seq_add(self.out_sse[p], err * err)
            self.out_sum[p] = _seq_add(self.out_sum[p], err)
            self.out_n[p] += int(cols.sum())
        if fold is None:
            return
        for f in np.unique(fold[has & (fold >= 0)]).tolist():
            cols = has & (fold == f)
            err = value[:, cols] - truth[cols][None, :]
            self.fold_out_sse[f] = _seq_add(self.fold_out_sse[f], err * err)
            self.fold_out_n[f] += int(cols.sum())

    # -- one candidate's state in the engine's own form ------------------------------------------

    def model_of(self, i: int, th: F64, spread: float, updates: int) -> RidgeModel:
        """Candidate i's model with the given weights, spread and step count."""
        s = self.s
        d = self.model.to_dict()
        d.update(scaler=self.scaler.to_dict(), prior=[float(v) for v in self.prior[:, 0]])
        d.update(lam=float(s.lam[i]), memory=float(s.memory[i]), normalised=bool(s.normalised[i]),
                 huber_delta=None if math.isinf(s.delta[i]) else float(s.delta[i]),
                 theta=[float(v) for v in th], spread=spread, updates=updates)
        return RidgeModel.from_dict(d)

    def candidate_state(self, i: int) -> dict[str, object]:
        """Candidate i's model, guard and prequential figures, as the engine stores them."""
        snapshot = None
        if self.has_snap[i]:
            snapshot = self.model_of(i, self.snap_th[:, i], float(self.snap_spread[i]),
                                     int(self.snap_updates[i])).to_dict()
        suspects = [([float(v) for v in self.ref_phi[j]], float(self.ref_y[j]))
                    for j in self.susp[i, : self.n_susp[i]]]
        guard = Guard(
            alpha=float(self.alpha[i]), applied=int(self.applied[i]),
            run_sign=int(self.run_sign[i]), suspects=suspects, recent_ms=float(self.recent[i]),
            snapshot=snapshot, snapshot_ms=float(self.snap_ms[i]),
            since_snapshot=int(self.since[i]),
            held=bool(self.held[i]), rollbacks=int(self.rollbacks[i]), fresh=bool(self.fresh[i]),
            long_abs=float(self.long_abs[i]), long_n=int(self.long_n[i]),
            recoveries=int(self.recoveries[i]),
            run_t0=None if math.isnan(self.run_t0[i]) else float(self.run_t0[i]),
        )
        last = float(self.last_applied_t[i])
        model = self.model_of(i, self.th[:, i], float(self.spread[i]), int(self.updates[i]))
        return {
            "model": model.to_dict(),
            "guard": guard.to_dict(),
            "last_applied_t": None if math.isnan(last) else last,
            "sq_preq": float(self.sq_preq[i]),
            "n_preq": int(self.n_preq[i]),
            "band": [float(self.band_k[i]), int(self.band_hit[i]), int(self.band_n[i])],
        }
