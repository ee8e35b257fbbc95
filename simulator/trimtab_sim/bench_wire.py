"""A minimal MQTT 3.1.1 client over a plain socket, as the bench's load source and sink.

The bench measures the daemon against the best a Python MQTT process can do; if the load
generator and the collector were paho clients themselves they would share the two cores with
the process under test and could become the bottleneck. This one frames packets by hand
(MQTT 3.1.1, OASIS standard, §2 and §3: CONNECT, CONNACK, PUBLISH, PUBACK, SUBSCRIBE, SUBACK,
DISCONNECT), sends pre-built PUBLISH packets in large writes and parses what arrives in
bulk, so it costs little CPU per message. Keep-alive is 0 (disabled, §3.1.2.10), so no pings.

Only what the bench needs is implemented: QoS 0 and 1, no retained messages, no will, no
session state, no TLS. It talks to the bench's private broker on 127.0.0.1 only.
"""

from __future__ import annotations

import contextlib
import socket
import struct
import threading
import time
from collections.abc import Iterable
from dataclasses import dataclass, field

from trimtab.errors import TransportError

__all__ = ["Arrival", "Sink", "WireClient", "publish_packet"]

_CONNECT = 0x10
_CONNACK = 0x20
_PUBLISH = 0x30
_PUBACK = 0x40
_SUBSCRIBE = 0x82  # §3.8.1: SUBSCRIBE's fixed-header flags are 0010
_SUBACK = 0x90
_DISCONNECT = b"\xe0\x00"


def _varint(n: int) -> bytes:
    """The Remaining Length encoding (§2.2.3): 7 bits a byte, high bit = more follows."""
    out = bytearray()
    while True:
        byte, n = n & 0x7F, n >> 7
        out.append(byte | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _utf8(s: str) -> bytes:
    raw = s.encode("utf-8")
    return struct.pack("!H", len(raw)) + raw


def publish_packet(topic: str, payload: bytes, qos: int, packet_id: int = 0) -> bytes:
    """One PUBLISH packet (§3.3); ``packet_id`` (1–65535) is required for QoS 1."""
    if qos not in (0, 1):
        raise ValueError(f"qos must be 0 or 1, got {qos}")
    var = _utf8(topic) + (struct.pack("!H", packet_id) if qos else b"")
    body = var + payload
    return bytes([_PUBLISH | (qos << 1)]) + _varint(len(body)) + body


def _frames(buf: bytearray) -> tuple[list[tuple[int, bytes]], int]:
    """Whole packets at the front of ``buf``: [(first byte, body)], and bytes consumed."""
    out: list[tuple[int, bytes]] = []
    pos, size = 0, len(buf)
    while pos + 2 <= size:
        first = buf[pos]
        length = shift = 0
        i = pos + 1
        while True:
            if i >= size:
                return out, pos
            byte = buf[i]
            length |= (byte & 0x7F) << shift
            shift += 7
            i += 1
            if not byte & 0x80:
                break
        if i + length > size:
            break
        out.append((first, bytes(buf[i : i + length])))
        pos = i + length
    return out, pos


class WireClient:
    """One MQTT 3.1.1 connection with a clean session and keep-alive off."""

    def __init__(self, host: str, port: int, client_id: str, timeout: float = 10.0) -> None:
        try:
            self.sock = socket.create_connection((host, port), timeout=timeout)
        except OSError as exc:
            raise TransportError(f"bench: cannot connect to {host}:{port}: {exc}") from exc
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self._buf = bytearray()
        var = _utf8("MQTT") + bytes([4, 0x02]) + struct.pack("!H", 0)  # level 4, clean session
        body = var + _utf8(client_id)
        self.sock.sendall(bytes([_CONNECT]) + _varint(len(body)) + body)
        first, data = self._next_packet()
        if first != _CONNACK or len(data) != 2 or data[1] != 0:
            raise TransportError(f"bench: broker refused the connection ({first:#x} {data!r})")

    def _next_packet(self) -> tuple[int, bytes]:
        while True:
            frames, used = _frames(self._buf)
            if frames:
                first, body = frames[0]
                consumed = 1 + len(_varint(len(body))) + len(body)
                del self._buf[:consumed]
                return first, body
            del self._buf[:used]
            chunk = self.sock.recv(65536)
            if not chunk:
                raise TransportError("bench: the broker closed the connection")
            self._buf += chunk

    def subscribe(self, filters: Iterable[tuple[str, int]]) -> None:
        """Subscribe and wait for the SUBACK; a refused filter raises TransportError."""
        wanted = list(filters)
        body = struct.pack("!H", 1) + b"".join(_utf8(f) + bytes([q]) for f, q in wanted)
        self.sock.sendall(bytes([_SUBSCRIBE]) + _varint(len(body)) + body)
        first, data = self._next_packet()
        if first != _SUBACK or any(code == 0x80 for code in data[2:]):
            raise TransportError(f"bench: subscription {wanted} refused ({data!r})")

    def send(self, data: bytes) -> None:
        self.sock.sendall(data)

    def recv_pubacks(self, timeout: float) -> int:
        """Read what has arrived (waiting at most ``timeout``); returns the PUBACKs in it."""
        self.sock.settimeout(timeout)
        try:
            chunk = self.sock.recv(65536)
        except (TimeoutError, BlockingIOError):
            return 0
        finally:
            self.sock.settimeout(None)
        if not chunk:
            raise TransportError("bench: the broker closed the connection")
        self._buf += chunk
        frames, used = _frames(self._buf)
        del self._buf[:used]
        return sum(1 for first, _ in frames if first & 0xF0 == _PUBACK)

    def close(self) -> None:
        with contextlib.suppress(OSError):
            self.sock.sendall(_DISCONNECT)
        self.sock.close()


@dataclass(slots=True)
class Arrival:
    """One message the sink received: when (``time.perf_counter``), topic and payload."""

    at: float
    topic: str
    payload: bytes


@dataclass
class Sink:
    """Collects PUBLISH packets on a thread, acknowledging QoS 1 ones in bulk.

    Each packet is stamped with the time the read that completed it returned. Stops when
    ``expect`` messages arrived, when nothing arrived for ``quiet`` seconds after the first
    one, or at ``deadline`` (perf_counter time); all three bound it.
    """

    host: str
    port: int
    filters: list[tuple[str, int]]
    expect: int
    quiet: float = 20.0
    deadline: float = 0.0
    arrivals: list[Arrival] = field(default_factory=list)
    _thread: threading.Thread | None = None
    _client: WireClient | None = None

    def start(self) -> Sink:
        self._client = WireClient(self.host, self.port, f"trimtab-bench-sink-{time.time_ns()}")
        self._client.subscribe(self.filters)
        self._thread = threading.Thread(target=self._run, name="bench-sink", daemon=True)
        self._thread.start()
        return self

    def _run(self) -> None:
        assert self._client is not None
        sock = self._client.sock
        buf = self._client._buf
        arrivals = self.arrivals
        last = time.perf_counter()
        while len(arrivals) < self.expect:
            now = time.perf_counter()
            if (self.deadline and now > self.deadline) or (arrivals and now - last > self.quiet):
                break
            sock.settimeout(0.2)
            try:
                chunk = sock.recv(262144)
            except TimeoutError:
                continue
            at = time.perf_counter()
            if not chunk:
                break
            last = at
            buf += chunk
            frames, used = _frames(buf)
            acks = bytearray()
            for first, body in frames:
                if first & 0xF0 != _PUBLISH:
                    continue
                tlen = (body[0] << 8) | body[1]
                topic = body[2 : 2 + tlen].decode("utf-8")
                pos = 2 + tlen
                if (first >> 1) & 0x03:
                    acks += b"\x40\x02" + body[pos : pos + 2]
                    pos += 2
                arrivals.append(Arrival(at, topic, body[pos:]))
            del buf[:used]
            if acks:
                sock.sendall(acks)

    def join(self, timeout: float) -> list[Arrival]:
        """Wait for the collecting thread to stop (bounded); returns what arrived."""
        if self._thread is not None:
            self._thread.join(timeout)
        return self.arrivals

    def close(self) -> None:
        if self._client is not None:
            self._client.close()
