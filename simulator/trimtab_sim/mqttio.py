"""Playing a stream file to a broker and recording corrected values from it.

The player publishes every event through the daemon config's topics and codec, in event
order, at real time × a speed factor or as fast as the broker takes them (QoS 1 with a bounded
number in flight). The recorder subscribes to the corrected topic and keeps what arrives until
it has N messages or the stream has been quiet for a while. Both are bounded and stop by
themselves.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from trimtab.config import Config
from trimtab.engine.wiring import make_codec, status_topic, topic_templates
from trimtab.errors import DecodeError, TransportError
from trimtab.messages import Corrected, Reading, Reference
from trimtab_sim.progress import Progress


def _client(client_id: str, *, clean: bool = True) -> mqtt.Client:
    return mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                       protocol=mqtt.MQTTv311, clean_session=clean)


def _connect(client: mqtt.Client, host: str, port: int, timeout: float) -> None:
    connected = threading.Event()

    def on_connect(c: mqtt.Client, u: Any, f: Any, reason: Any, p: Any) -> None:
        if not reason.is_failure:
            connected.set()

    client.on_connect = on_connect
    try:
        client.connect(host, port, keepalive=30)
    except OSError as exc:
        raise TransportError(f"cannot connect to {host}:{port}: {exc}") from exc
    client.loop_start()
    if not connected.wait(timeout):
        client.loop_stop()
        raise TransportError(f"no CONNACK from {host}:{port} within {timeout} s")


def play(events: Iterable[Reading | Reference], cfg: Config, *, host: str, port: int,
         speed: float | None = None, qos: int = 1, inflight: int = 100,
         progress: Progress | None = None, timeout: float = 60.0) -> int:
    """Publish events in order; ``speed`` None = as fast as possible. Returns how many."""
    codec = make_codec(cfg)
    t_read, t_ref, _ = topic_templates(cfg)
    client = _client(f"trimtab-sim-play-{time.monotonic_ns()}")
    client.max_inflight_messages_set(inflight)
    _connect(client, host, port, 10.0)
    sent = 0
    pending: list[mqtt.MQTTMessageInfo] = []
    first_t: float | None = None
    started = time.monotonic()
    try:
        for event in events:
            if speed is not None:
                if first_t is None:
                    first_t = event.t
                due = started + (event.t - first_t) / speed
                delay = due - time.monotonic()
                if delay > 0:
                    time.sleep(delay)
            if isinstance(event, Reading):
                topic, payload = t_read.format(event.sensor), codec.encode_reading(event)
            else:
                topic, payload = t_ref.format(event.sensor), codec.encode_reference(event)
            pending.append(client.publish(topic, payload, qos=qos))
            sent += 1
            if len(pending) >= inflight:
                for info in pending:
                    info.wait_for_publish(timeout)
                pending.clear()
            if progress is not None:
                progress(sent, 0)
        for info in pending:
            info.wait_for_publish(timeout)
    finally:
        client.disconnect()
        client.loop_stop()
    return sent


@dataclass
class Recorder:
    """Collects corrected values from the broker until told, counted or quiet."""

    cfg: Config
    host: str
    port: int
    received: list[Corrected] = field(default_factory=list)
    rejected: int = 0
    client_id: str | None = None
    """A fixed client id with ``persistent``: the broker keeps the session (and queues QoS 1
    messages) while the recorder is away, as it does for the daemon."""
    persistent: bool = False

    def __post_init__(self) -> None:
        self._codec = make_codec(self.cfg)
        _, _, self._t_out = topic_templates(self.cfg)
        self._lock = threading.Lock()
        self._last = time.monotonic()
        self._client = _client(self.client_id or f"trimtab-sim-record-{time.monotonic_ns()}",
                               clean=not self.persistent)
        self._subscribed = threading.Event()
        self._client.on_message = self._on_message
        self._client.on_subscribe = lambda *a: self._subscribed.set()

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            c = self._codec.decode_corrected(msg.payload)
        except DecodeError:
            self.rejected += 1
            return
        with self._lock:
            self.received.append(c)
            self._last = time.monotonic()

    def start(self) -> Recorder:
        """Connect and subscribe; returns once the subscription is acknowledged."""
        _connect(self._client, self.host, self.port, 10.0)
        self._client.subscribe(self._t_out.filter, qos=1)
        if not self._subscribed.wait(10.0):
            raise TransportError("recorder subscription not acknowledged within 10 s")
        return self

    def wait(self, *, count: int | None = None, quiet: float = 2.0,
             timeout: float = 120.0, progress: Progress | None = None,
             idle_ends_count: bool = False) -> list[Corrected]:
        """Block until ``count`` messages arrived, or none for ``quiet`` s, or ``timeout``.

        With a ``count``, silence ends the wait only when ``idle_ends_count`` is set (the
        record command: a count that will never be reached must not wait for the timeout).
        """
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self._lock:
                n = len(self.received)
                idle = time.monotonic() - self._last
            if progress is not None:
                progress(n, count or 0)
            if count is not None and n >= count:
                break
            if (count is None or idle_ends_count) and n > 0 and idle >= quiet:
                break
            time.sleep(0.05)
        with self._lock:
            return list(self.received)

    def stop(self) -> None:
        self._client.disconnect()
        self._client.loop_stop()


def wait_status(cfg: Config, host: str, port: int, want: str, timeout: float = 30.0) -> bool:
    """Wait until the daemon's retained status topic says ``want`` (e.g. ``online``)."""
    seen = threading.Event()
    client = _client(f"trimtab-sim-status-{time.monotonic_ns()}")

    def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
        if msg.payload.decode(errors="replace") == want:
            seen.set()

    client.on_message = on_message
    _connect(client, host, port, 10.0)
    client.subscribe(status_topic(cfg), qos=1)
    try:
        return seen.wait(timeout)
    finally:
        client.disconnect()
        client.loop_stop()
