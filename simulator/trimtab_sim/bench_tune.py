"""Benchmark of ``trimtab tune``: candidate-events per second, 64 candidates at 4 terms.

Run (about a minute on a laptop core; the stream is written once to ``--dir`` and reused)::

    .venv/bin/python -m trimtab_sim.bench_tune --days 366

It generates a simulated year of two co-located monitors (readings every 60 s, an hourly
reference, inputs raw, temp and rh plus the elapsed-time term: 4 terms), then times:

* the **record** pass — decoding the stream and replaying the engine's learning-free part
  once (a fixed cost, the same for any number of candidates);
* the **evaluation** of 64 candidates (8 α × 8 λ, all inside the config's bounds) advancing
  together, and of the config's own settings alone, for the cost ratio of 64 to 1.

Candidate-events per second = candidates × events / seconds. Timings are wall-clock on one
process; numpy's elementwise operations use one core. Figures vary with the machine and its
load: compare the ratios of one run.
"""

from __future__ import annotations

import argparse
import sys
import time
import tomllib
from pathlib import Path
from typing import Any

from trimtab.config import Config, parse_config
from trimtab.tune.grid import build_candidates, grid_settings
from trimtab.tune.trace import record
from trimtab.tune.tuner import Tuner
from trimtab_sim.generate import write_stream
from trimtab_sim.scenario import parse_scenario

CONFIG = """
[broker]
client_id = "bench-tune"

[payload.covariates]
temp = "temp"
rh = "rh"

[sensors]
pattern = "[a-z0-9][a-z0-9-]*"

[sensors.defaults]
inputs = ["raw", "temp", "rh"]
elapsed = true
scaler_readings = 1440

[learning]
alpha = 0.2
alpha_min = 0.01
alpha_max = 1.0
lambda = 1.0
lambda_max = 10.0
memory = 200
normalised = true

[state]
dir = "/nonexistent/bench-tune"
"""


def scenario(days: float) -> dict[str, Any]:
    """An invented site: two NO2-like monitors drifting, an hourly reference all along."""
    sensor = {"interval": 60, "gain": 0.9, "offset": 4.0, "decimals": 2,
              "cross": {"temp": 0.5, "temp_ref": 12.0, "rh": 0.05, "rh_ref": 50.0},
              "drift": {"gain_per_day": -0.001, "offset_per_day": 0.05, "offset_walk": 0.3},
              "faults": {"noise": 2.0, "spike_prob": 0.0005, "spike_size": 25.0}}
    return {
        "name": "bench-tune", "days": days, "step": 10,
        "signal": {"base": 20.0, "daily_amplitude": 8.0, "wander": 3.0},
        "sensors": [{"id": "bench-01", **sensor}, {"id": "bench-02", **sensor, "gain": 1.1}],
        "references": [{"id": "station", "serves": ["bench-01", "bench-02"], "every": 3600,
                        "window": 3600, "noise": 1.0}],
    }


def _time(fn: Any) -> tuple[Any, float]:
    started = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - started


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m trimtab_sim.bench_tune", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--days", type=float, default=366.0, help="simulated days (≤ 366)")
    p.add_argument("--dir", type=Path, default=Path("out/bench-tune"),
                   help="where the stream is written (and reused)")
    args = p.parse_args(argv)
    args.dir.mkdir(parents=True, exist_ok=True)
    stream = args.dir / f"bench-{args.days:g}d.jsonl"
    if not stream.exists():
        print(f"bench-tune: writing {stream} …", file=sys.stderr)
        write_stream(parse_scenario(scenario(args.days)), stream, seed=1)
    raw = tomllib.loads(CONFIG)
    cfg: Config = parse_config(raw, "bench config")
    grid = {"alpha": [round(0.02 * 1.7**i, 4) for i in range(8)],
            "lambda": [0.0, 0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0]}
    cands = build_candidates(raw, cfg, grid_settings(cfg, grid), label="grid",
                             include_current=False)
    own = build_candidates(raw, cfg, [], label="grid")
    assert all(c.valid for c in cands) and len(cands) == 64
    trace, t_record = _time(lambda: record(cfg, stream))
    terms = {m.n_terms - 1 for m in trace.models.values() if m is not None}
    result, t_64 = _time(lambda: Tuner(trace, cands).run())
    _, t_1 = _time(lambda: Tuner(trace, own).run())
    n = trace.events
    k = len(result.outcomes)
    print(f"stream: {n:,} events ({len(trace.sensors)} sensors, terms {sorted(terms)}), "
          f"{args.days:g} days")
    print(f"record pass (decode + engine without learning, once): {t_record:.2f} s "
          f"({n / t_record:,.0f} events/s)")
    print(f"evaluate {k} candidates: {t_64:.2f} s = {k * n / t_64 / 1e6:.1f} M "
          "candidate-events/s")
    print(f"evaluate 1 candidate: {t_1:.2f} s; 64 cost {t_64 / t_1:.2f}× one")
    print(f"end to end, {k} candidates: {t_record + t_64:.2f} s = "
          f"{k * n / (t_record + t_64) / 1e6:.1f} M candidate-events/s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
