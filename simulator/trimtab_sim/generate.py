"""The stream generator: a scenario and a seed in, a time-ordered list of events out.

Truth and weather are built on a fine grid (``scenario.step`` seconds); each sensor samples
them at its own interval. Random draws come from ``numpy.random.SeedSequence(seed)``, split
into one child per component (signal, weather, each sensor, each reference, each check) and,
inside a sensor, one child per mechanism. Switching a mechanism on or off therefore leaves
every other mechanism's draws unchanged, and the same scenario and seed give the same events.

The sensor's raw value is

    raw = gain(t) · x · (1 + κ·rh/(100 − rh)) + offset(t)
          + c_T·(T − T_ref) + c_RH·(rh − rh_ref) + noise, then spikes, stuck spans, dropouts,

where ``x`` is what the sensor is exposed to (the ambient truth, or a check gas during a
check). The humidity factor is the single-parameter κ-Köhler hygroscopic growth
(Petters and Kreidenweis, 2007) in the form applied to optical particle counters, with any
density ratio folded into κ (quoted from memory of the literature). ``gain(t)`` and
``offset(t)`` carry linear ageing, a random walk (standard deviation per √day) and the steps
of maintenance visits.

A reference instrument measures once per report and one ``Reference`` event is written per
served sensor with the same value. Reference windows: with ``stamp = "end"`` the value is the
true mean over (t − window, t]; with ``stamp = "start"`` over [t, t + window). A reporting
``lag`` does not move an event in the file; it is returned in ``Stream.arrival`` so a player
can publish the reference late.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TypeAlias

import numpy as np
from numpy.typing import NDArray

from trimtab.messages import Reading, Reference
from trimtab_sim.scenario import CheckSpec, ReferenceSpec, Scenario, Sensor

F64 = NDArray[np.float64]
Event: TypeAlias = Reading | Reference

DAY = 86400.0
HOUR = 3600.0
_COARSE = 600.0  # seconds between knots of the slow random processes (interpolated between)


@dataclass(frozen=True, slots=True)
class Stream:
    """A generated stream: events in event-time order and when each would arrive."""

    events: list[Event]
    arrival: list[float]


@dataclass(frozen=True, slots=True)
class _Air:
    """Truth and weather on the fine grid."""

    t: F64
    truth: F64
    activity: F64
    temp: F64
    rh: F64


@dataclass(frozen=True, slots=True)
class _Exposure:
    """A check gas level applied to some sensors over [start, end)."""

    start: float
    end: float
    level: float
    sensors: frozenset[str]


def _ou(rng: np.random.Generator, t: F64, sigma: float, tau: float) -> F64:
    """A stationary Ornstein-Uhlenbeck process (sd ``sigma``, time constant ``tau`` s) at ``t``."""
    n = int(np.ceil((t[-1] - t[0]) / _COARSE)) + 2
    knots = t[0] + _COARSE * np.arange(n)
    eps = rng.standard_normal(n)
    a = float(np.exp(-_COARSE / tau))
    x = np.empty(n)
    x[0] = eps[0]
    b = float(np.sqrt(1.0 - a * a))
    for k in range(1, n):
        x[k] = a * x[k - 1] + b * eps[k]
    return np.asarray(sigma * np.interp(t, knots, x), dtype=np.float64)


def _walk(rng: np.random.Generator, t: F64, sd_per_sqrt_day: float) -> F64:
    """A random walk starting at 0 with standard deviation ``sd_per_sqrt_day``·√days."""
    n = int(np.ceil((t[-1] - t[0]) / _COARSE)) + 2
    knots = t[0] + _COARSE * np.arange(n)
    steps = rng.standard_normal(n) * np.sqrt(_COARSE / DAY)
    steps[0] = 0.0
    return np.asarray(sd_per_sqrt_day * np.interp(t, knots, np.cumsum(steps)), dtype=np.float64)


def _hour(t: F64) -> F64:
    return np.asarray(np.mod(t, DAY) / HOUR, dtype=np.float64)


def _air(sc: Scenario, seeds: list[np.random.SeedSequence]) -> _Air:
    sig, wx = sc.signal, sc.weather
    n = round(sc.duration / sc.step)
    t = sc.t0 + sc.step * np.arange(n, dtype=np.float64)
    hour = _hour(t)
    weekday = (np.floor(t / DAY).astype(np.int64) + 3) % 7  # 1970-01-01 was a Thursday
    weekly = np.asarray(sig.weekly, dtype=np.float64)[weekday]
    daily = sig.daily_amplitude * np.cos(2 * np.pi * (hour - sig.daily_peak_hour) / 24.0)

    r_ep, r_wander = (np.random.default_rng(s) for s in seeds[0].spawn(2))
    ep = sig.episodes
    height = np.zeros(n)
    activity = np.zeros(n)
    count = int(r_ep.poisson(ep.per_day * sc.days))
    mean_len = ep.mean_hours * HOUR
    starts = r_ep.uniform(-mean_len, sc.duration, size=count)
    lengths = np.maximum(r_ep.exponential(mean_len, size=count), 4 * sc.step)
    heights = r_ep.exponential(max(ep.mean_height, 1e-300), size=count) * (ep.mean_height > 0)
    rel = t - sc.t0
    for s0, ln, h in zip(starts, lengths, heights, strict=True):
        lo, hi = np.searchsorted(rel, [s0, s0 + ln])
        shape = np.sin(np.pi * (rel[lo:hi] - s0) / ln) ** 2
        height[lo:hi] += h * shape
        activity[lo:hi] = np.maximum(activity[lo:hi], shape)

    truth = (sig.base + daily) * weekly + height
    if sig.wander > 0:
        truth = truth + _ou(r_wander, t, sig.wander, sig.wander_hours * HOUR)
    if sig.floor is not None:
        truth = np.maximum(truth, sig.floor)

    r_temp, r_rh = (np.random.default_rng(s) for s in seeds[1].spawn(2))
    tau = wx.wander_hours * HOUR
    cyc = np.cos(2 * np.pi * (hour - wx.temp_peak_hour) / 24.0)
    days = (t - sc.t0) / 86400.0  # the season moves the operating range
    temp = (wx.temp_mean + wx.temp_trend_per_day * days + wx.temp_daily_amplitude * cyc
            + wx.episode_temp * activity)
    temp = temp + _ou(r_temp, t, wx.temp_wander, tau)
    # Humidity falls as the air warms: its daily cycle is the temperature's, inverted.
    rh = (wx.rh_mean + wx.rh_trend_per_day * days - wx.rh_daily_amplitude * cyc
          + wx.episode_rh * activity)
    rh = np.clip(rh + _ou(r_rh, t, wx.rh_wander, tau), wx.rh_min, wx.rh_max)
    return _Air(t=t, truth=truth, activity=activity, temp=temp, rh=rh)


def _exposures(sc: Scenario) -> list[_Exposure]:
    out: list[_Exposure] = []
    for chk in sc.checks:
        if not chk.levels:
            continue
        for start in _check_starts(sc, chk):
            for i, level in enumerate(chk.levels):
                a = start + i * chk.duration
                out.append(_Exposure(a, a + chk.duration, level, frozenset(chk.serves)))
    return out


def _check_starts(sc: Scenario, chk: CheckSpec) -> list[float]:
    span = max(1, len(chk.levels)) * chk.duration
    out: list[float] = []
    k = 0
    while True:
        start = sc.t0 + (chk.first_day + k * chk.every_days) * DAY + chk.at_hour * HOUR
        if start + span > sc.t0 + sc.duration:
            return out
        out.append(start)
        k += 1


def _piecewise(
    t: F64, drift_linear: float, walk: F64, steps: list[tuple[float, float, bool]]
) -> F64:
    """Linear drift plus walk, with maintenance steps (delta, optional reset) at their times."""
    days = (t - t[0]) / DAY
    moving = drift_linear * days + walk
    level = np.zeros_like(t)
    for at, delta, reset in sorted(steps, key=lambda s: s[0]):
        after = t >= at
        if reset:
            k = int(np.searchsorted(t, at))
            # Undo what drift and earlier steps added up to the visit, then apply the delta.
            before = (moving[k - 1] + level[k - 1]) if k > 0 else 0.0
            level[after] -= before
        level[after] += delta
    return np.asarray(moving + level, dtype=np.float64)


def _sensor_readings(
    sc: Scenario, s: Sensor, air: _Air, seed: np.random.SeedSequence, exps: list[_Exposure]
) -> list[Reading]:
    r_cov, r_noise, r_walk, r_spike, r_stuck, r_drop = (
        np.random.default_rng(c) for c in seed.spawn(6)
    )
    stride = round(s.interval / sc.step)
    idx = np.arange(0, air.t.size, stride)
    t = air.t[idx]
    x = air.truth[idx].copy()
    for e in exps:
        if s.id in e.sensors:
            x[(t >= e.start) & (t < e.end)] = e.level
    temp, rh = air.temp[idx], air.rh[idx]

    days_t = np.asarray(t, dtype=np.float64)
    visits = [(sc.t0 + st.day * DAY, st.gain, st.reset) for st in s.steps]
    visits_off = [(sc.t0 + st.day * DAY, st.offset, st.reset) for st in s.steps]
    walk_g = _walk(r_walk, days_t, s.drift.gain_walk)
    walk_o = _walk(r_walk, days_t, s.drift.offset_walk)
    gain = s.gain + _piecewise(days_t, s.drift.gain_per_day, walk_g, visits)
    offset = s.offset + _piecewise(days_t, s.drift.offset_per_day, walk_o, visits_off)

    c = s.cross
    growth = 1.0 + c.kappa * rh / (100.0 - rh)
    raw = gain * x * growth + offset + c.temp * (temp - c.temp_ref) + c.rh * (rh - c.rh_ref)
    f = s.faults
    noise = r_noise.standard_normal(t.size)
    raw = raw + noise * np.sqrt(f.noise**2 + (f.noise_rel * np.abs(x)) ** 2)

    hit = r_spike.random(t.size) < f.spike_prob
    raw = raw + hit * f.spike_size * r_spike.uniform(0.5, 1.5, size=t.size)

    for a, b in _spans(r_stuck, sc, f.stuck_per_day, f.stuck_minutes):
        lo, hi = np.searchsorted(t, [a, b])
        if lo < hi:
            raw[lo:hi] = raw[lo]
    keep = np.ones(t.size, dtype=bool)
    for a, b in _spans(r_drop, sc, f.dropout_per_day, f.dropout_minutes):
        lo, hi = np.searchsorted(t, [a, b])
        keep[lo:hi] = False
    if s.clip_min is not None:
        raw = np.maximum(raw, s.clip_min)

    temp_m = temp + r_cov.standard_normal(t.size) * s.temp_noise
    rh_m = np.clip(rh + r_cov.standard_normal(t.size) * s.rh_noise, 0.0, 100.0)
    out: list[Reading] = []
    for k in np.flatnonzero(keep):
        inputs: dict[str, float] = {"raw": round(float(raw[k]), s.decimals)}
        if "temp" in s.covariates:
            inputs["temp"] = round(float(temp_m[k]), 2)
        if "rh" in s.covariates:
            inputs["rh"] = round(float(rh_m[k]), 2)
        out.append(Reading(float(t[k]), s.id, inputs, round(float(x[k]), 4)))
    return out


def _spans(
    rng: np.random.Generator, sc: Scenario, per_day: float, minutes: float
) -> list[tuple[float, float]]:
    """Random spans (start, end) of exponential length around ``minutes``, Poisson in number."""
    count = int(rng.poisson(per_day * sc.days))
    starts = sc.t0 + rng.uniform(0.0, sc.duration, size=count)
    lengths = rng.exponential(minutes * 60.0, size=count)
    return [(float(a), float(a + ln)) for a, ln in zip(starts, lengths, strict=True)]


def _window_mean(air: _Air, t: float, window: float, stamp: str) -> float:
    """The true mean over (t − window, t] (stamp end) or [t, t + window) (stamp start)."""
    if window <= 0:
        k = int(np.clip(np.searchsorted(air.t, t), 0, air.t.size - 1))
        return float(air.truth[k])
    if stamp == "end":
        lo, hi = np.searchsorted(air.t, [t - window, t], side="right")
    else:
        lo, hi = np.searchsorted(air.t, [t, t + window], side="left")
    return float(np.mean(air.truth[lo:hi]))


def _reference_times(sc: Scenario, ref: ReferenceSpec) -> list[float]:
    end = sc.t0 + sc.duration - sc.step
    spans = [(p.start_day * DAY, p.end_day * DAY) for p in ref.periods] or [(0.0, sc.duration)]
    times: list[float] = []
    for a, b in spans:
        k0 = int(np.ceil(a / ref.every))
        k = k0
        while True:
            rel = k * ref.every
            lo, hi = (rel - ref.window, rel) if ref.stamp == "end" else (rel, rel + ref.window)
            if hi > b or sc.t0 + rel > end:
                break
            if lo >= a:
                times.append(sc.t0 + rel)
            k += 1
    return sorted(set(times))


def _reference_events(
    sc: Scenario, ref: ReferenceSpec, air: _Air, seed: np.random.SeedSequence
) -> list[tuple[Reference, float]]:
    rng = np.random.default_rng(seed)
    out: list[tuple[Reference, float]] = []
    for t in _reference_times(sc, ref):
        true = _window_mean(air, t, ref.window, ref.stamp)
        sd = float(np.hypot(ref.noise, ref.noise_rel * abs(true)))
        value = round(true + sd * float(rng.standard_normal()), ref.decimals)
        window = ref.window if ref.window > 0 else None
        arrival = t + ref.lag + (ref.window if ref.stamp == "start" else 0.0)
        out.extend((Reference(t, name, value, window), arrival) for name in ref.serves)
    return out


def _check_events(
    sc: Scenario, chk: CheckSpec, air: _Air, seed: np.random.SeedSequence
) -> list[tuple[Reference, float]]:
    rng = np.random.default_rng(seed)
    inner = chk.duration - 2 * chk.settle
    out: list[tuple[Reference, float]] = []
    for start in _check_starts(sc, chk):
        for i, level in enumerate(chk.levels or [None]):
            a = start + i * chk.duration + chk.settle
            t = a + inner if chk.stamp == "end" else a
            true = level if level is not None else _window_mean(air, t, inner, chk.stamp)
            value = round(true + chk.noise * float(rng.standard_normal()), chk.decimals)
            arrival = a + inner + chk.lag
            out.extend((Reference(t, name, value, inner), arrival) for name in chk.serves)
    return out


def _order(e: Event) -> tuple[float, int, str]:
    # A reference stamped at t follows the reading at t, so its window is complete on arrival.
    return (e.t, 1 if isinstance(e, Reference) else 0, e.sensor)


def generate(sc: Scenario, seed: int = 0) -> Stream:
    """All events of ``sc`` under ``seed``, sorted by (t, readings first, sensor)."""
    if seed < 0:
        raise ValueError("seed must be >= 0")
    n_children = 2 + len(sc.sensors) + len(sc.references) + len(sc.checks)
    seeds = np.random.SeedSequence(seed).spawn(n_children)
    air = _air(sc, seeds)
    exps = _exposures(sc)
    pairs: list[tuple[Event, float]] = []
    for i, s in enumerate(sc.sensors):
        pairs.extend((r, r.t) for r in _sensor_readings(sc, s, air, seeds[2 + i], exps))
    base = 2 + len(sc.sensors)
    for i, ref in enumerate(sc.references):
        pairs.extend(_reference_events(sc, ref, air, seeds[base + i]))
    base += len(sc.references)
    for i, chk in enumerate(sc.checks):
        pairs.extend(_check_events(sc, chk, air, seeds[base + i]))
    pairs.sort(key=lambda p: _order(p[0]))
    return Stream(events=[p[0] for p in pairs], arrival=[p[1] for p in pairs])


def write_stream(sc: Scenario, path: str | Path, seed: int = 0) -> int:
    """Generate ``sc`` under ``seed`` and write it as a stream file; returns the event count."""
    from trimtab.wire.streamfile import write_events

    count: int = write_events(path, generate(sc, seed).events)
    return count
