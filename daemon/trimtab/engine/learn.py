"""The learning kernel: one paired reference gated, stepped and guarded; one reading corrected.

Written once over :mod:`trimtab.model.ops`, so the daemon and ``trimtab replay`` run it on one
sensor's floats and the tuner on K candidates' K-vectors, with the same bits by construction.
Per reference (:func:`learn`), in this order:

1. the prequential residual r = θ·φ − y (a non-finite one is counted and changes nothing);
2. its square joins the sensor's prequential error, and the band is calibrated on it
   (:func:`band_step`);
3. the gap lift of the step (:func:`trimtab.engine.guards.gap_fraction` of the time since the
   last applied reference; 0 before the first);
4. the gate (:func:`trimtab.engine.guards.judge`): a suspect is held; a run of suspects that is
   a level shift is applied — unless its values all repeat one number (a stuck reference,
   which stays held) — after the error baseline restarts, the held suspects first, at α_max;
5. :func:`apply`: a snapshot if there is none yet, the shrink-then-step update
   (:func:`trimtab.model.kernel.shrink_step`) at the lifted α, the recent and long errors,
   a rollback to the snapshot with α halved when the error exploded, else α's recovery and a
   snapshot when one is due.

A *lane* is what the kernel acts on: one sensor (:class:`trimtab.engine.sensor.SensorState`)
or K candidates (:class:`trimtab.tune.lanes.Lanes`). It holds the sensor's figures
(``sq_preq``, ``n_preq``, ``band_k``, ``band_hit``, ``band_n``, ``last_applied_t``, NaN before
any applied reference), its guard (``lane.guard``, the fields of
:class:`trimtab.engine.guards.Guard`), and answers for what is stored differently on the two:
``theta()``, ``spread()``, ``step(m, phi, y, alpha, phisq)`` (the update kept where valid;
returns the mask of kept steps and r), ``save(m)`` and ``restore(m)`` (the last good
snapshot), ``hold(m, item, s)``, ``flat(m, y)``, ``take(m)`` and ``held_item(held, slot)`` (the
suspects).
"""

from __future__ import annotations

from dataclasses import dataclass
from statistics import NormalDist
from typing import Any

from trimtab.engine.guards import (
    GuardSettings,
    end_run,
    exploded,
    gap_fraction,
    judge,
    lifted,
    mark_snapshot,
    record,
    recover,
    restart_baseline,
    roll_back,
)
from trimtab.model.ops import Ops, dot

__all__ = [
    "APPLIED",
    "NON_FINITE",
    "STATUSES",
    "Band",
    "apply",
    "band_start",
    "band_step",
    "correct",
    "learn",
]

STATUSES = ("none", "applied", "rolled_back", "non_finite", "gated", "stuck", "level_shift")
"""A reference's status by code (``none``: not in the lanes acted on)."""
NONE, APPLIED, ROLLED_BACK, NON_FINITE, GATED, STUCK, LEVEL_SHIFT = range(len(STATUSES))


@dataclass(frozen=True, slots=True)
class Band:
    """The band's calibration settings, from ``[output]``."""

    coverage: float
    gain: float


def band_start(coverage: float) -> float:
    """The band's first multiplier: the normal quantile for ``coverage`` (spread ≈ σ)."""
    return NormalDist().inv_cdf(0.5 + coverage / 2.0)


def band_step(ops: Ops, k: Any, covered: Any, coverage: float, gain: float) -> Any:
    """One online calibration step of the band multiplier after a scored reference.

    The adaptive-conformal update (after Gibbs & Candès 2021, applied to a multiplier of the
    running spread): k ← max(0, k + γ·(miss − (1 − coverage))). While k stays bounded, the
    share of references outside the band tends to 1 − coverage, whatever the residuals'
    distribution.
    """
    miss = ops.where(covered, 0.0, 1.0)
    return ops.maximum(0.0, k + gain * (miss - (1.0 - coverage)))


def learn(ops: Ops, lane: Any, m: Any, phi: Any, y: Any, t: Any, s: GuardSettings, band: Band,
          item: Any, phisq: Any = None) -> tuple[Any, Any]:
    """Gate and apply one paired reference for the lanes in ``m``; (status code, residual).

    ``item`` is what the lane holds for this reference if it becomes a suspect.
    """
    g = lane.guard
    spread = lane.spread()
    r = dot(lane.theta(), phi) - y
    fin = m & ops.isfinite(r)
    lane.sq_preq = ops.where(fin, lane.sq_preq + r * r, lane.sq_preq)
    lane.n_preq = lane.n_preq + ops.count(fin)
    covered = ops.absolute(r) <= lane.band_k * spread
    lane.band_hit = lane.band_hit + ops.count(fin & covered)
    lane.band_n = lane.band_n + ops.count(fin)
    lane.band_k = ops.where(fin, band_step(ops, lane.band_k, covered, band.coverage, band.gain),
                            lane.band_k)
    last = lane.last_applied_t
    lift = ops.where(ops.isnan(last), 0.0, gap_fraction(t - last, s.step_gap))
    rej, shift = judge(ops, g, fin, r, spread, s, t)
    suspect = rej & ops.not_(shift)
    stuck = shift & False  # no lane is stuck unless its run turns out flat below
    if ops.any(suspect):
        lane.hold(suspect, item, s)
    if ops.any(shift):
        stuck = shift & lane.flat(shift, y)
        shift = shift & ops.not_(stuck)
    if ops.any(shift):
        # A new regime: restart the error baseline *before* learning it, or the shift's own
        # large residuals would trip the rollback and the model could never follow it; the
        # model is known to be off by the shift, so it is learnt at alpha_max.
        lane.save(shift)
        restart_baseline(ops, g, shift)
        lift = ops.where(shift, 1.0, lift)
        held, n = lane.take(shift)
        end_run(ops, g, shift)
        for slot in range(ops.most(n)):
            h_phi, h_y, h_sq = lane.held_item(held, slot)
            apply(ops, lane, shift & (n > slot), h_phi, h_y, lift, s, h_sq)
    code = apply(ops, lane, fin & ops.not_(suspect | stuck), phi, y, lift, s, phisq)
    applied = code == APPLIED
    lane.last_applied_t = ops.where(applied, t, lane.last_applied_t)
    code = ops.where(applied & shift, LEVEL_SHIFT, code)
    code = ops.where(suspect, GATED, ops.where(stuck, STUCK, code))
    code = ops.where(m & ops.not_(fin), NON_FINITE, code)
    return code, r


def apply(ops: Ops, lane: Any, m: Any, phi: Any, y: Any, lift: Any, s: GuardSettings,
          phisq: Any = None) -> Any:
    """One guarded shrink-then-step update for the lanes in ``m``; a status code each."""
    if not ops.any(m):
        return ops.where(m, NONE, NONE)
    g = lane.guard
    need = m & ops.not_(g.has_snapshot())
    if ops.any(need):
        lane.save(need)
        mark_snapshot(ops, g, need, g.recent_ms)
    ok, r = lane.step(m, phi, y, lifted(g.alpha, s.alpha_max, lift, ops), phisq)
    if not ops.any(ok):
        return ops.where(m, NON_FINITE, NONE)
    record(ops, g, ok, r, s)
    g.held = g.held & ops.not_(ok)
    boom = ok & exploded(ops, g, s)
    if ops.any(boom):
        roll_back(ops, g, boom, s)
        lane.restore(boom)
    good = ok & ops.not_(boom)
    recover(ops, g, good, s)
    due = good & (g.since_snapshot >= s.snapshot_every)
    if ops.any(due):
        lane.save(due)
        mark_snapshot(ops, g, due, g.recent_ms)
    return ops.where(boom, ROLLED_BACK, ops.where(ok, APPLIED, ops.where(m, NON_FINITE, NONE)))


def correct(ops: Ops, theta: Any, prior: Any, phi: Any, raw: Any, use: Any,
            cap: float | None) -> tuple[Any, Any, Any]:
    """A reading's corrected value: (value, where the prediction was not finite, where capped).

    ŷ = θ·φ where ``use`` (the model is out of warmup), else the prior's p·φ; a non-finite ŷ
    publishes the raw value; with a cap, |ŷ − raw| is limited to it.
    """
    if ops.all(use):
        value = dot(theta, phi)
    elif not ops.any(use):
        value = dot(prior, phi)
    else:
        value = ops.where(use, dot(theta, phi), dot(prior, phi))
    bad = ops.not_(ops.isfinite(value))
    value = ops.where(bad, raw, value)
    capped = bad & False
    if cap is not None:
        d = value - raw
        capped = ops.absolute(d) > cap
        value = ops.where(capped, raw + ops.copysign(cap, d), value)
    return value, bad, capped
