"""Through the broker: the bare echo and the daemon on the same payloads, side by side.

Each run starts its target (``bench_echo`` or ``trimtab run``) as a child process on a fresh
topic prefix, client id and state directory, subscribes a :class:`~trimtab_sim.bench_wire.Sink`
to the corrected topic, and publishes the workload from this process with a
:class:`~trimtab_sim.bench_wire.WireClient`:

* **throughput** — every message as fast as the broker takes it; the figure is messages in
  and corrected values out over the time from the first publish to the last value received;
* **latency** — readings offered at a fixed rate; each latency is the time from the moment
  its PUBLISH was handed to the socket to the moment its corrected value was read, both
  taken with ``time.perf_counter`` in this process.

Either way every reading must come back exactly once: ``lost`` and ``duplicates`` are counted
from the payloads after the clock stopped.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from trimtab.errors import TrimtabError
from trimtab_sim.bench_setup import Message, daemon_toml, workload
from trimtab_sim.bench_wire import Arrival, Sink, WireClient, publish_packet

START_TIMEOUT = 30.0
QOS1_WINDOW = 1000
"""QoS 1 publishes the load source keeps unacknowledged at most."""


@dataclass(frozen=True, slots=True)
class RunResult:
    """One run of one target: what went in and out, how fast, and what went missing."""

    target: str
    qos: int
    mode: str
    sent: int
    expected: int
    received: int
    lost: int
    duplicates: int
    seconds: float
    latencies: tuple[float, ...] = ()

    @property
    def rate_in(self) -> float:
        return self.sent / self.seconds if self.seconds > 0 else 0.0

    @property
    def rate_out(self) -> float:
        return self.received / self.seconds if self.seconds > 0 else 0.0


class Target:
    """The process under test: ``echo`` or ``daemon``, started on its own prefix."""

    def __init__(self, kind: str, port: int, qos: int, workdir: Path, prefix: str) -> None:
        if kind not in ("echo", "daemon"):
            raise ValueError(f"target must be 'echo' or 'daemon', not {kind!r}")
        self.kind, self.port, self.qos, self.prefix = kind, port, qos, prefix
        self.dir = workdir / prefix
        self.dir.mkdir(parents=True, exist_ok=True)
        self.log = self.dir / f"{kind}.log"
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> Target:
        env = {**os.environ, "PYTHONUNBUFFERED": "1"}
        if self.kind == "echo":
            cmd = [sys.executable, "-m", "trimtab_sim.bench_echo", str(self.port),
                   str(self.qos), self.prefix]
        else:
            cfg = self.dir / "daemon.toml"
            cfg.write_text(daemon_toml(port=self.port, prefix=self.prefix,
                                       client_id=f"{self.prefix}-daemon", qos=self.qos,
                                       state_dir=self.dir / "state"))
            cmd = [sys.executable, "-m", "trimtab.cli", "run", "-c", str(cfg)]
        with open(self.log, "wb") as fh:
            self.proc = subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT, env=env)
        self._wait_ready()
        return self

    def _wait_ready(self) -> None:
        want = "ready" if self.kind == "echo" else '"mqtt_subscribed"'
        deadline = time.monotonic() + START_TIMEOUT
        while time.monotonic() < deadline:
            assert self.proc is not None
            if self.proc.poll() is not None:
                raise TrimtabError(f"bench: {self.kind} exited with {self.proc.returncode}; "
                                   f"see {self.log}")
            if want in self.log.read_text(errors="replace"):
                return
            time.sleep(0.05)
        self.stop()
        raise TrimtabError(f"bench: {self.kind} not ready within {START_TIMEOUT} s; see {self.log}")

    def stop(self) -> int | None:
        """SIGTERM, then kill after a bound; returns the exit code."""
        if self.proc is None:
            return None
        proc, self.proc = self.proc, None
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                return proc.wait(30.0)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
                return None
        return proc.returncode


def _packets(messages: list[Message], qos: int) -> list[bytes]:
    return [publish_packet(m.topic, m.payload, qos, (i % 65535) + 1 if qos else 0)
            for i, m in enumerate(messages)]


def _blast(client: WireClient, packets: list[bytes], qos: int, deadline: float) -> None:
    """Send every packet as fast as the socket takes them (QoS 1: a bounded window)."""
    chunk = 256
    if qos == 0:
        for i in range(0, len(packets), chunk):
            client.send(b"".join(packets[i : i + chunk]))
        return
    outstanding = 0
    for i in range(0, len(packets), chunk):
        part = packets[i : i + chunk]
        client.send(b"".join(part))
        outstanding += len(part)
        while outstanding > QOS1_WINDOW:
            if time.perf_counter() > deadline:
                raise TrimtabError("bench: QoS 1 publishes not acknowledged in time")
            outstanding -= client.recv_pubacks(0.5)


def _paced(client: WireClient, messages: list[Message], packets: list[bytes], rate: float,
           qos: int) -> dict[tuple[str, float], float]:
    """Send one packet every 1/rate s; returns each reading's send time."""
    sent: dict[tuple[str, float], float] = {}
    start = time.perf_counter()
    acks_due = 0
    for i, (m, pkt) in enumerate(zip(messages, packets, strict=True)):
        due = start + i / rate
        while True:
            now = time.perf_counter()
            if now >= due:
                break
            time.sleep(min(due - now, 0.002))
        if m.key is not None:
            sent[m.key] = time.perf_counter()
        client.send(pkt)
        if qos:
            acks_due += 1
            if acks_due > QOS1_WINDOW // 2:
                acks_due -= client.recv_pubacks(0.0)
    return sent


def _tally(messages: list[Message], arrivals: list[Arrival]) -> tuple[dict[tuple[str, float],
                                                                          float], int, int]:
    """Arrival time per reading key; and lost and duplicate counts."""
    first: dict[tuple[str, float], float] = {}
    dupes = 0
    for a in arrivals:
        obj = json.loads(a.payload)
        key = (a.topic.split("/")[1], float(obj["t"]))
        if key in first:
            dupes += 1
        else:
            first[key] = a.at
    wanted = {m.key for m in messages if m.key is not None}
    lost = len(wanted - first.keys())
    return first, lost, dupes


def _drive(kind: str, qos: int, *, port: int, workdir: Path, prefix: str,
           messages: list[Message], wait: float,
           send: Callable[[WireClient, list[bytes]], dict[tuple[str, float], float] | None]
           ) -> tuple[list[Arrival], dict[tuple[str, float], float] | None, float]:
    """Start the target and a sink, send the load with ``send``, collect every arrival.

    ``wait`` is how long after the start the sink may still wait for values. Returns the
    arrivals, what ``send`` returned (send times per reading key, or None) and the start time.
    """
    packets = _packets(messages, qos)
    expected = sum(1 for m in messages if m.key is not None)
    target = Target(kind, port, qos, workdir, prefix).start()
    try:
        deadline = time.perf_counter() + wait
        sink = Sink("127.0.0.1", port, [(f"{prefix}/+/corrected", qos)], expected,
                    deadline=deadline).start()
        client = WireClient("127.0.0.1", port, f"{prefix}-load")
        try:
            start = time.perf_counter()
            sent = send(client, packets)
            arrivals = sink.join(max(deadline - time.perf_counter(), 0.1))
        finally:
            client.close()
            sink.close()
    finally:
        code = target.stop()
    if kind == "daemon" and code != 0:
        raise TrimtabError(f"bench: the daemon exited with {code}; see {target.log}")
    return arrivals, sent, start


def run_throughput(kind: str, qos: int, *, port: int, workdir: Path, prefix: str,
                   n: int, timeout: float) -> RunResult:
    """Every message as fast as possible; rate from first publish to last value received."""
    messages = workload(prefix, n)
    expected = sum(1 for m in messages if m.key is not None)
    limit = time.perf_counter() + timeout

    def send(client: WireClient, packets: list[bytes]) -> None:
        _blast(client, packets, qos, limit)

    arrivals, _, start = _drive(kind, qos, port=port, workdir=workdir, prefix=prefix,
                                messages=messages, wait=timeout, send=send)
    _, lost, dupes = _tally(messages, arrivals)
    end = arrivals[-1].at if arrivals else time.perf_counter()
    return RunResult(kind, qos, "throughput", len(messages), expected, len(arrivals), lost,
                     dupes, end - start)


def run_latency(kind: str, qos: int, *, port: int, workdir: Path, prefix: str,
                rate: float, seconds: float, timeout: float) -> RunResult:
    """Messages at a fixed offered rate; per-reading latency publish → corrected received."""
    messages = workload(prefix, int(rate * seconds))
    expected = sum(1 for m in messages if m.key is not None)

    def send(client: WireClient, packets: list[bytes]) -> dict[tuple[str, float], float]:
        return _paced(client, messages, packets, rate, qos)

    arrivals, sent, start = _drive(kind, qos, port=port, workdir=workdir, prefix=prefix,
                                   messages=messages, wait=seconds + timeout, send=send)
    assert sent is not None
    first, lost, dupes = _tally(messages, arrivals)
    lat = tuple(sorted(first[k] - sent[k] for k in first if k in sent))
    end = arrivals[-1].at if arrivals else time.perf_counter()
    return RunResult(kind, qos, "latency", len(messages), expected, len(arrivals), lost, dupes,
                     end - start, lat)


__all__ = ["RunResult", "Target", "run_latency", "run_throughput"]
