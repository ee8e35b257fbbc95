"""The soak: every reliability scenario at a chosen scale, with the figures each one reports.

The scenarios themselves are the tests in ``tests/service/test_reliability.py``,
``service/test_outbox.py``, ``service/test_storage_faults.py``, ``wire/test_fuzz.py``,
``engine/test_adversarial.py``, ``service/test_reload.py`` and ``service/test_security.py``:
CI runs them at the small ``ci`` scale, and ``make soak`` (``python -m trimtab_sim.soak --scale
full``) runs the same tests at the ``full`` scale — 20 kills, 5 broker restarts, 100,000 fuzz
inputs per decoder, 100,000 malformed messages, 60 s of overload, a backlog of 200,000 readings
— and prints what they measured. The scale reaches the tests
through ``TRIMTAB_SOAK_SCALE``; each test appends its figures to the JSON Lines file named by
``TRIMTAB_SOAK_FIGURES`` (when set), and the runner sums them up at the end.

Also here: the load tools the scenarios share — a QoS 1 publisher and a collector of corrected
values that both keep a persistent session and ride out broker restarts, and the resident
memory of a process read from ``/proc``.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode

from trimtab.errors import DecodeError, TransportError
from trimtab.wire.codec import JsonCodec, SenmlCodec

SCALE_ENV = "TRIMTAB_SOAK_SCALE"
FIGURES_ENV = "TRIMTAB_SOAK_FIGURES"
TEST_FILES = ("service/test_reliability.py", "service/test_outbox.py",
              "service/test_storage_faults.py", "wire/test_fuzz.py", "engine/test_adversarial.py",
              "service/test_reload.py", "service/test_security.py")


@dataclass(frozen=True, slots=True)
class Scale:
    """How hard each scenario pushes."""

    name: str
    kills: int
    """kill -9 points in the crash scenario."""
    broker_restarts: int
    """Broker stops and restarts in the broker-loss scenario."""
    fuzz_inputs: int
    """Inputs fed to each decoder by the fuzz tests."""
    malformed: int
    """Malformed messages interleaved with the good stream over the broker."""
    overload_seconds: float
    """How long load is offered at twice the measured sustained rate."""


SCALES = {
    "ci": Scale("ci", kills=6, broker_restarts=2, fuzz_inputs=1500, malformed=3000,
                overload_seconds=6.0),
    "full": Scale("full", kills=20, broker_restarts=5, fuzz_inputs=100_000, malformed=100_000,
                  overload_seconds=60.0),
}


def current_scale() -> Scale:
    """The scale named by ``TRIMTAB_SOAK_SCALE`` (``ci`` when unset)."""
    name = os.environ.get(SCALE_ENV, "ci")
    try:
        return SCALES[name]
    except KeyError:
        raise ValueError(f"{SCALE_ENV}={name!r}: expected one of {sorted(SCALES)}") from None


def record(name: str, value: float | int, unit: str = "") -> None:
    """Append one figure to the soak's figures file (a no-op when no soak is collecting)."""
    path = os.environ.get(FIGURES_ENV)
    if not path:
        return
    line = json.dumps({"name": name, "value": value, "unit": unit}, allow_nan=False)
    with open(path, "a", encoding="utf-8") as fh:
        fh.write(line + "\n")


# What a figure means when several tests report it: summed (counts) or the largest (peaks).
_PEAKS = ("peak", "rate", "max")


def summarise(path: Path) -> list[tuple[str, float, str]]:
    """The figures in a figures file, one per name: counts summed, peaks and rates maximised."""
    merged: dict[str, tuple[float, str]] = {}
    if not path.exists():
        return []
    for line in path.read_text(encoding="utf-8").splitlines():
        item = json.loads(line)
        name, value, unit = str(item["name"]), float(item["value"]), str(item["unit"])
        if name in merged:
            old = merged[name][0]
            value = max(old, value) if any(w in name for w in _PEAKS) else old + value
        merged[name] = (value, unit)
    return [(name, value, unit) for name, (value, unit) in sorted(merged.items())]


def memory_kib(pid: int) -> tuple[int, int]:
    """(VmRSS, VmHWM) of a live process in KiB, from ``/proc/<pid>/status`` (Linux)."""
    fields: dict[str, int] = {}
    with open(f"/proc/{pid}/status", encoding="ascii") as fh:
        for line in fh:
            key, _, rest = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                fields[key] = int(rest.split()[0])
    return fields["VmRSS"], fields["VmHWM"]


# -- load tools ----------------------------------------------------------------------------------


class Publisher:
    """A QoS 1 publisher on a persistent session that rides out broker restarts.

    paho keeps every unacknowledged QoS 1 message and sends it again after reconnecting, so
    what was handed to :meth:`publish` reaches the broker once it is back. At most ``window``
    messages are outstanding; :meth:`publish` waits (bounded by ``timeout``) for room.
    """

    def __init__(self, port: int, client_id: str, *, window: int = 500,
                 timeout: float = 120.0) -> None:
        self.window = window
        self.timeout = timeout
        self.sent = 0
        self._acked = 0
        self._lock = threading.Lock()
        self._client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                   protocol=mqtt.MQTTv311, clean_session=False)
        self._client.reconnect_delay_set(1, 2)
        self._client.on_publish = self._on_publish
        self._client.connect("127.0.0.1", port, keepalive=10)
        self._client.loop_start()

    def _on_publish(self, c: mqtt.Client, u: Any, mid: int, reason: Any, p: Any) -> None:
        with self._lock:  # paho calls this once per message, when its PUBACK arrives
            self._acked += 1

    def outstanding(self) -> int:
        """Messages handed over but not yet acknowledged by the broker."""
        with self._lock:
            return self.sent - self._acked

    def publish(self, topic: str, payload: bytes) -> None:
        """Queue one QoS 1 message; waits while ``window`` messages are unacknowledged."""
        info = self._client.publish(topic, payload, qos=1)
        # NO_CONN: paho keeps the message and sends it after reconnecting.
        if info.rc not in (MQTTErrorCode.MQTT_ERR_SUCCESS, MQTTErrorCode.MQTT_ERR_NO_CONN):
            raise TransportError(f"publish to {topic!r} refused locally: rc={info.rc}")
        with self._lock:
            self.sent += 1
        if self.outstanding() >= self.window:
            self._settle(self.window // 2)

    def _settle(self, keep: int) -> None:
        deadline = time.monotonic() + self.timeout
        while self.outstanding() > keep:
            if time.monotonic() > deadline:
                raise TransportError(f"{self.outstanding()} messages unacknowledged for "
                                     f"{self.timeout} s")
            time.sleep(0.005)

    def flush(self) -> None:
        """Wait until the broker has acknowledged every message."""
        self._settle(0)

    def close(self) -> None:
        self._client.disconnect()
        self._client.loop_stop()


class Collector:
    """Collects corrected values on a persistent QoS 1 session, keyed by (sensor, time).

    A value delivered twice (a redelivery after a restart) counts once in ``unique`` and is
    tallied in ``duplicates``.
    """

    def __init__(self, port: int, client_id: str, topic_filter: str,
                 codec: JsonCodec | SenmlCodec) -> None:
        self.unique: dict[tuple[str, float], bytes] = {}
        self.duplicates = 0
        self.undecodable = 0
        self._codec = codec
        self._lock = threading.Lock()
        self._subscribed = threading.Event()
        self._filter = topic_filter
        self._client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                   protocol=mqtt.MQTTv311, clean_session=False)
        self._client.reconnect_delay_set(1, 2)
        self._client.on_connect = self._on_connect
        self._client.on_message = self._on_message
        self._client.on_subscribe = lambda *a: self._subscribed.set()
        self._client.connect("127.0.0.1", port, keepalive=10)
        self._client.loop_start()
        if not self._subscribed.wait(10.0):
            raise TransportError("collector subscription not acknowledged within 10 s")

    def _on_connect(self, c: mqtt.Client, u: Any, f: Any, reason: Any, p: Any) -> None:
        if not reason.is_failure:
            c.subscribe(self._filter, qos=1)

    def _on_message(self, c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            value = self._codec.decode_corrected(msg.payload)
        except DecodeError:
            self.undecodable += 1
            return
        key = (value.sensor, value.t)
        with self._lock:
            if key in self.unique:
                self.duplicates += 1
            else:
                self.unique[key] = bytes(msg.payload)

    def count(self) -> int:
        with self._lock:
            return len(self.unique)

    def wait(self, count: int, timeout: float) -> int:
        """Wait until ``count`` distinct values arrived or ``timeout`` passed; how many did."""
        deadline = time.monotonic() + timeout
        while self.count() < count and time.monotonic() < deadline:
            time.sleep(0.05)
        return self.count()

    def close(self) -> None:
        self._client.disconnect()
        self._client.loop_stop()


# -- the runner ----------------------------------------------------------------------------------


def _print_figures(scale: Scale, figures: list[tuple[str, float, str]], seconds: float) -> None:
    print(f"\nsoak figures (scale {scale.name}: {json.dumps(asdict(scale))}), "
          f"{seconds:.0f} s in all")
    width = max((len(name) for name, _, _ in figures), default=10)
    for name, value, unit in figures:
        shown = f"{value:,.0f}" if float(value).is_integer() else f"{value:,.1f}"
        print(f"  {name:<{width}}  {shown:>12} {unit}")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the reliability tests at a scale and print their figures; pytest's exit code."""
    parser = argparse.ArgumentParser(prog="python -m trimtab_sim.soak", description=__doc__
                                     and __doc__.splitlines()[0])
    parser.add_argument("--scale", choices=sorted(SCALES), default="full")
    parser.add_argument("--tests", type=Path, default=Path("tests"),
                        help="the project's tests directory (default: ./tests)")
    parser.add_argument("pytest_args", nargs="*", help="extra arguments for pytest")
    args = parser.parse_args(argv)
    files = [str(args.tests / name) for name in TEST_FILES]
    missing = [f for f in files if not Path(f).is_file()]
    if missing:
        print(f"soak: test files not found: {missing}; run from the project root", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory(prefix="trimtab-soak-") as tmp:
        figures_path = Path(tmp) / "figures.jsonl"
        env = dict(os.environ, **{SCALE_ENV: args.scale, FIGURES_ENV: str(figures_path)})
        started = time.monotonic()
        rc = subprocess.call([sys.executable, "-m", "pytest", "-q", *files, *args.pytest_args],
                             env=env)
        _print_figures(SCALES[args.scale], summarise(figures_path), time.monotonic() - started)
    print("soak: " + ("passed" if rc == 0 else f"FAILED (pytest exit code {rc})"))
    return rc


if __name__ == "__main__":
    sys.exit(main())
