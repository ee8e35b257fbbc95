"""Memory per sensor, checkpoint time and restart time, each measured in a clean child process.

Run as ``python -m trimtab_sim.bench_state memory N`` (prints one JSON object), or
``checkpoint N DIR`` (writes a checkpoint of N sensors into DIR and times it) and then
``restart DIR`` (times checkpoint load plus ``Engine.load_state`` in a fresh process).

Every sensor's state is a real one: one sensor is driven through two hours of 10-second
readings with a spot reference every 10 minutes (so its buffer holds the full one-hour
window, its model has been updated and its guard holds a snapshot); that state is written
out as JSON and every sensor of the run is loaded from its own parse of it, exactly as a
restart from a checkpoint would build it. Memory is measured twice: the process's resident
set growth, and the bytes Python allocated (``tracemalloc``) — in separate processes, since
tracemalloc's own bookkeeping would inflate the resident set.
"""

from __future__ import annotations

import gc
import json
import os
import sys
import time
import tracemalloc
from pathlib import Path
from typing import Any

from trimtab.config import Config, load_config
from trimtab.engine.engine import STATE_VERSION
from trimtab.engine.pairing import ReadingBuffer
from trimtab.engine.wiring import make_engine
from trimtab.messages import Reading, Reference
from trimtab.store.statestore import StateStore
from trimtab_sim.bench_setup import STEP, T0, _values, daemon_toml

FEED_READINGS = 720
"""Readings (two hours at 10 s) fed to the template sensor: twice the buffer's span."""


def bench_config(workdir: Path, inputs: int = 3) -> Config:
    """The bench daemon's config (port and prefix do not matter offline); 3 inputs or 1."""
    workdir.mkdir(parents=True, exist_ok=True)
    path = workdir / f"offline-{inputs}.toml"
    path.write_text(daemon_toml(port=1883, prefix="offline", client_id="offline", qos=1,
                                state_dir=workdir / "state", durability="flush",
                                covariates=inputs == 3))
    return load_config(path)


def template_state(cfg: Config) -> str:
    """One sensor's state after two hours of readings and references, as JSON text."""
    engine = make_engine(cfg)
    for i in range(FEED_READINGS):
        t = T0 + STEP * i
        truth, raw, temp, rh = _values(0, i)
        engine.on_reading(Reading(t, "s000", {"raw": raw, "temp": temp, "rh": rh}))
        if i % 60 == 59:
            engine.on_reference(Reference(t, "s000", truth))
    return json.dumps(engine.state_dict()["sensors"]["s000"])


def _parse(text: str) -> Any:
    return json.loads(text, object_hook=lambda d: {sys.intern(k): v for k, v in d.items()})


def engine_state(template: str, n: int) -> dict[str, Any]:
    """An engine state of ``n`` sensors, each from its own parse of the template."""
    sensors = {f"s{k:06d}": json.loads(template) for k in range(n)}
    return {"version": STATE_VERSION, "sensors": sensors, "counts": {}}


def _rss() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def memory(n: int, mode: str, inputs: int, workdir: Path) -> dict[str, Any]:
    """Bytes per sensor held by an engine of ``n`` sensors (``mode``: rss or traced)."""
    cfg = bench_config(workdir, inputs)
    template = template_state(cfg)
    engine = make_engine(cfg)
    gc.collect()
    if mode == "traced":
        tracemalloc.start()
    before = tracemalloc.get_traced_memory()[0] if mode == "traced" else _rss()
    # One sensor at a time, so no parsed JSON outweighs the engine being measured. Keys are
    # interned as json's own key memo does across one checkpoint document.
    for k in range(n):
        engine.import_sensor({"format": "trimtab-sensor-state", "version": STATE_VERSION,
                              "sensor": f"s{k:06d}", "state": _parse(template)})
    gc.collect()
    after = tracemalloc.get_traced_memory()[0] if mode == "traced" else _rss()
    if mode == "traced":
        tracemalloc.stop()
    assert len(engine.sensors()) == n
    return {"sensors": n, "mode": mode, "inputs": inputs, "bytes": after - before,
            "per_sensor": (after - before) / n,
            "buffer_rows": len(ReadingBuffer.from_dict(json.loads(template)["buffer"]))}


def checkpoint(n: int, workdir: Path) -> dict[str, Any]:
    """Write a checkpoint of ``n`` sensors into ``workdir/state``; time it."""
    cfg = bench_config(workdir)
    engine = make_engine(cfg)
    engine.load_state(engine_state(template_state(cfg), n))
    store = StateStore(workdir / "state", durability="fsync")
    store.recover()
    try:
        start = time.perf_counter()
        store.checkpoint(engine.state_dict())
        seconds = time.perf_counter() - start
    finally:
        store.close()
    size = sum(p.stat().st_size for p in (workdir / "state").glob("checkpoint-*.json"))
    return {"sensors": n, "seconds": seconds, "bytes": size}


def restart(workdir: Path) -> dict[str, Any]:
    """Checkpoint load plus ``Engine.load_state`` in this (fresh) process; time it."""
    cfg = bench_config(workdir)
    start = time.perf_counter()
    store = StateStore(workdir / "state", durability="fsync")
    try:
        rec = store.recover()
        loaded = time.perf_counter()
        engine = make_engine(cfg)
        if rec.state is not None:
            engine.load_state(rec.state)
        seconds = time.perf_counter() - start
    finally:
        store.close()
    return {"sensors": len(engine.sensors()), "seconds": seconds,
            "load_seconds": loaded - start, "engine_seconds": seconds - (loaded - start)}


def main(argv: list[str]) -> int:
    what = argv[0]
    if what == "memory":
        out = memory(int(argv[1]), argv[2], int(argv[3]), Path(argv[4]))
    elif what == "checkpoint":
        out = checkpoint(int(argv[1]), Path(argv[2]))
    elif what == "restart":
        out = restart(Path(argv[1]))
    else:
        raise SystemExit(f"bench_state: unknown measurement {what!r}")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
