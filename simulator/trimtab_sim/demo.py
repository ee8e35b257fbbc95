"""The whole loop on one machine: generate, broker, daemon, play, record, replay, score.

Everything it starts it stops: a private broker on a free loopback port (Mosquitto when the
binary is on PATH, otherwise the embedded pure-Python broker), ``trimtab run`` as a child
process with its state under the output directory, a player and a recorder.
"""

from __future__ import annotations

import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Protocol

from trimtab.commands.check import to_toml
from trimtab.config import Config, load_config
from trimtab.engine.wiring import make_engine
from trimtab.errors import TrimtabError
from trimtab.messages import Reading
from trimtab.wire.streamfile import read_events, write_corrected, write_events
from trimtab.wire.tomlfile import read_toml
from trimtab_sim.broker import PrivateBroker, mosquitto_path
from trimtab_sim.embedded_broker import EmbeddedBroker
from trimtab_sim.generate import write_stream
from trimtab_sim.mqttio import Recorder, play, wait_status
from trimtab_sim.progress import progress_line
from trimtab_sim.scenario import load_scenario


class Broker(Protocol):
    port: int

    def stop(self) -> None: ...


@dataclass(frozen=True, slots=True)
class DemoResult:
    """What the demo produced and measured."""

    out: Path
    readings: int
    received: int
    identical: bool
    broker: str
    report: Path


def embedded(name: str) -> Path:
    """A file shipped inside the package (the default scenario and daemon config)."""
    return Path(str(resources.files("trimtab_sim") / "data" / name))


def start_broker(workdir: Path, kind: str) -> tuple[Broker, str]:
    """A private broker: ``mosquitto``, ``embedded``, or ``auto`` (Mosquitto when present)."""
    if kind == "mosquitto" or (kind == "auto" and mosquitto_path() is not None):
        return PrivateBroker(workdir, persistence=False).start(), "mosquitto"
    return EmbeddedBroker(workdir).start(), "embedded (amqtt)"


def demo_config(template: Path, out: Path, port: int, protocol: str) -> Path:
    """The daemon config for this run: the template with port, protocol and state dir set."""
    data: dict[str, Any] = read_toml(template, "config file")
    data.setdefault("broker", {}).update(port=port, protocol=protocol)
    state = out / "state"
    shutil.rmtree(state, ignore_errors=True)
    data.setdefault("state", {})["dir"] = str(state)
    path = out / "daemon.toml"
    path.write_text("\n".join(to_toml(data)) + "\n", encoding="utf-8")
    return path


def _say(msg: str) -> None:
    print(f"demo: {msg}", file=sys.stderr, flush=True)


def run_demo(out: Path, *, scenario: Path | None = None, config: Path | None = None,
             seed: int = 0, broker_kind: str = "auto", days: float | None = None,
             timeout: float = 600.0) -> DemoResult:
    """Run the loop end to end and write stream, corrected values and the report under ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    scenario = scenario or embedded("demo-scenario.toml")
    config = config or embedded("demo-daemon.toml")
    load_config(config)  # refuse a bad config before minutes of work, naming the user's file
    stream = out / "stream.jsonl"
    write_stream(load_scenario(scenario), stream, seed)
    events = list(read_events(stream))
    if days is not None and events:
        end = events[0].t + days * 86400.0
        events = [e for e in events if e.t < end]
        write_events(stream, events)
    n_readings = sum(1 for e in events if isinstance(e, Reading))
    _say(f"scenario {scenario.name}: {len(events):,} events, {n_readings:,} readings")
    brk, kind = start_broker(out / "broker", broker_kind)
    daemon: subprocess.Popen[bytes] | None = None
    try:
        protocol = "5" if kind == "mosquitto" else "3.1.1"
        cfg_path = demo_config(config, out, brk.port, protocol)
        cfg: Config = load_config(cfg_path)
        _say(f"broker: {kind} on 127.0.0.1:{brk.port}")
        recorder = Recorder(cfg, "127.0.0.1", brk.port).start()
        with open(out / "daemon.log", "wb") as log:
            daemon = subprocess.Popen(
                [sys.executable, "-m", "trimtab.cli", "run", "-c", str(cfg_path)],
                stdout=log, stderr=log)
        if not wait_status(cfg, "127.0.0.1", brk.port, "online", timeout=30.0):
            raise TrimtabError(f"the daemon did not come online; see {out / 'daemon.log'}")
        _say("daemon online; playing the stream as fast as the broker takes it")
        started = time.monotonic()
        play(events, cfg, host="127.0.0.1", port=brk.port, progress=progress_line("demo: played"))
        received = recorder.wait(count=n_readings, timeout=timeout,
                                 progress=progress_line("demo: corrected values received"))
        elapsed = time.monotonic() - started
        if sys.stderr.isatty():
            print(file=sys.stderr)
        recorder.stop()
        _say(f"{len(received):,} corrected values in {elapsed:.1f} s "
             f"({len(events) / max(elapsed, 1e-9):,.0f} events/s end to end)")
        daemon.send_signal(signal.SIGTERM)
        rc = daemon.wait(30)
        daemon = None
        if rc != 0:
            raise TrimtabError(f"the daemon exited with {rc}; see {out / 'daemon.log'}")
    finally:
        if daemon is not None:
            daemon.kill()
            daemon.wait()
        brk.stop()
    corrected = out / "corrected.jsonl"
    key = _order([e for e in events if isinstance(e, Reading)])
    received.sort(key=lambda c: key.get((c.sensor, c.t), len(key)))
    write_corrected(corrected, received)
    engine = make_engine(cfg)
    replayed = [c for e in events for c in engine.process(e)]
    write_corrected(out / "replayed.jsonl", replayed)
    identical = received == replayed
    _say(f"broker output identical to `trimtab replay`: {'yes' if identical else 'NO'}")
    return DemoResult(out, n_readings, len(received), identical, kind, out / "report")


def _order(readings: list[Reading]) -> dict[tuple[str, float], int]:
    return {(r.sensor, r.t): i for i, r in enumerate(readings)}


__all__ = ["DemoResult", "embedded", "run_demo", "start_broker"]
