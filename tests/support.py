"""Helpers for the real-process daemon tests: configs, a daemon process, a small stream.

The stream here is invented for consistency checks (the same messages through MQTT and through
replay must give the same result); accuracy is checked elsewhere against external references.
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from trimtab.config import Config, load_config
from trimtab.engine.engine import Engine
from trimtab.engine.wiring import make_engine
from trimtab.messages import Reading, Reference
from trimtab.store.records import record_to_event
from trimtab.store.statestore import StateStore

BIN = Path(sys.executable).parent
PROTOCOL = "5"
"""MQTT version test configs use: 5 on Mosquitto, 3.1.1 on the embedded broker (conftest)."""


def write_config(directory: Path, port: int, *, client_id: str = "trimtab-test",
                 extra: str = "", learning: str = "", name: str = "daemon.toml") -> Path:
    """A daemon config for tests: private broker port, its own topics and state directory."""
    directory.mkdir(parents=True, exist_ok=True)
    text = f"""
[broker]
host = "127.0.0.1"
port = {port}
protocol = "{PROTOCOL}"
client_id = "{client_id}"
session_expiry = 3600
keepalive = 10

[topics]
readings = "t/{{sensor}}/raw"
references = "t/{{sensor}}/ref"
corrected = "t/{{sensor}}/corrected"
status = "trimtab-test/{{client_id}}/status"
qos = 1

[payload]
covariates = {{ temp = "temp" }}

[sensors]
ids = ["s1", "s2"]

[sensors.defaults]
inputs = ["raw", "temp"]
scaler_readings = 20

[learning]
alpha = 0.1
alpha_max = 0.5
memory = 100
warmup = 3
{learning}

[pairing]
tolerance = 30.0
buffer_span = 3600.0

[state]
dir = "{directory / 'state'}"
checkpoint_every = 0.5
durability = "fsync"

[status]
interval = 0.5

[logging]
format = "json"
level = "info"
{extra}
"""
    path = directory / name
    path.write_text(text)
    return path


def synthetic_stream(n: int = 600, *, seed: int = 7, sensors: tuple[str, ...] = ("s1", "s2"),
                     t0: float = 1_767_225_600.0, every: int = 6) -> list[Reading | Reference]:
    """Readings every 10 s from drifting sensors, and a spot reference every ``every`` readings."""
    rng = np.random.default_rng(seed)
    events: list[Reading | Reference] = []
    for i in range(n):
        t = t0 + 10.0 * i
        truth = 40.0 + 15.0 * math.sin(2 * math.pi * i / 360.0)
        temp = 15.0 + 8.0 * math.sin(2 * math.pi * i / 500.0 + 1.0)
        for k, s in enumerate(sensors):
            gain = 1.1 + 0.1 * k + 0.0002 * i
            raw = gain * truth + 0.4 * (temp - 15.0) + 2.0 * k + float(rng.normal(0, 0.5))
            events.append(Reading(t, s, {"raw": raw, "temp": temp}, truth=truth))
        if i % every == every - 1:
            for s in sensors:
                events.append(Reference(t, s, truth + float(rng.normal(0, 0.2))))
    return events


def replay_engine(cfg: Config, events: list[Reading | Reference]) -> tuple[Engine, list[Any]]:
    """The engine after an uninterrupted offline run, and its corrected outputs."""
    engine = make_engine(cfg)
    outs = []
    for e in events:
        outs.extend(engine.process(e))
    return engine, outs


def recovered_engine(cfg: Config) -> Engine:
    """The engine a daemon left behind in its state directory (checkpoint + journal)."""
    store = StateStore(Path(cfg.state.dir), durability="flush")
    try:
        rec = store.recover()
    finally:
        store.close()
    engine = make_engine(cfg)
    if rec.state is not None:
        engine.load_state(rec.state)
    for r in rec.records:
        engine.process(record_to_event(r))
    return engine


def model_states(engine: Engine) -> dict[str, Any]:
    """Per-sensor state without counters (which legitimately count redeliveries)."""
    state = engine.state_dict()["sensors"]
    return json.loads(json.dumps(state))


def assert_matches_replay(cfg: Config, events: list[Reading | Reference]) -> tuple[Engine, Engine]:
    """The daemon's recovered state equals an uninterrupted replay's, update counts included.

    Returns (replayed, recovered) engines for further checks.
    """
    engine, _ = replay_engine(cfg, events)
    recovered = recovered_engine(cfg)
    assert model_states(recovered) == model_states(engine)
    for sensor in engine.sensors():
        a, b = recovered.model(sensor), engine.model(sensor)
        assert (a is None) == (b is None)
        if a is not None and b is not None:
            assert a.updates == b.updates, sensor
    return engine, recovered


class Daemon:
    """``trimtab run`` as a real child process."""

    def __init__(self, config: Path, log: Path) -> None:
        self.config = config
        self.log_path = log
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> Daemon:
        with open(self.log_path, "ab") as fh:
            self.proc = subprocess.Popen([str(BIN / "trimtab"), "run", "-c", str(self.config)],
                                         stdout=fh, stderr=fh)
        return self

    def signal(self, sig: int) -> None:
        assert self.proc is not None
        self.proc.send_signal(sig)

    def terminate(self, timeout: float = 20.0) -> int:
        assert self.proc is not None
        self.proc.send_signal(signal.SIGTERM)
        rc = self.proc.wait(timeout)
        self.proc = None
        return rc

    def kill9(self) -> None:
        if self.proc is not None:
            self.proc.kill()
            self.proc.wait()
            self.proc = None

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")


class Watcher:
    """Subscribes to the daemon's status and stats topics and remembers the latest of each."""

    def __init__(self, port: int, status_topic: str) -> None:
        self.status: str | None = None
        self.stats: dict[str, Any] | None = None
        self.events: list[str] = []
        self._cond = threading.Condition()
        self._topic = status_topic
        self._client = mqtt.Client(CallbackAPIVersion.VERSION2,
                                   client_id=f"watch-{os.getpid()}-{time.monotonic_ns()}")
        self._client.on_message = self._on_message
        self._client.connect("127.0.0.1", port)
        self._client.subscribe([(status_topic, 1), (status_topic + "/stats", 1)])
        self._client.loop_start()

    def _on_message(self, c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
        with self._cond:
            if msg.topic == self._topic:
                self.status = msg.payload.decode()
                self.events.append(self.status)
            else:
                self.stats = json.loads(msg.payload)
            self._cond.notify_all()

    def wait_for(self, pred: Callable[[Watcher], bool], timeout: float = 30.0) -> bool:
        deadline = time.monotonic() + timeout
        with self._cond:
            while not pred(self):
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                self._cond.wait(left)
        return True

    def wait_online(self, timeout: float = 30.0) -> bool:
        with self._cond:
            self.status = None
        return self.wait_for(lambda w: w.status == "online", timeout)

    def close(self) -> None:
        self._client.disconnect()
        self._client.loop_stop()


def caught_up(events: list[Reading | Reference]) -> Callable[[Watcher], bool]:
    """A predicate: the daemon's stats show every sensor's last reading of the stream."""
    last: dict[str, float] = {}
    for e in events:
        if isinstance(e, Reading):
            last[e.sensor] = e.t

    def pred(w: Watcher) -> bool:
        if w.stats is None:
            return False
        sensors = w.stats.get("sensors", {})
        return all(sensors.get(s, {}).get("last_reading_t") == t for s, t in last.items())

    return pred


__all__ = [
    "Daemon",
    "Watcher",
    "assert_matches_replay",
    "caught_up",
    "load_config",
    "model_states",
    "recovered_engine",
    "replay_engine",
    "synthetic_stream",
    "write_config",
]
