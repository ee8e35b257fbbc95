"""The outbox: corrected values on their way to the broker, none discarded, none made twice.

Each corrected value is journaled with the reading it corrects (the ``"out"`` field of the
reading's journal record, see :func:`with_output`) before that reading is acknowledged, so the
acknowledgement always stands for a value that is on disk. The outbox then publishes the values
at QoS 1 within a window (at most ``window`` unacknowledged by the broker at once) and counts
one as done when its PUBACK arrives. What was done is written to a small mark file
(``outbox.mark``: journal generation and the count of values done from its start); after a
restart every journaled value past the mark is published again, so each is delivered at least
once and, being read back from the journal, identical every time.

Why a window of our own rather than paho's: paho keeps every QoS 1 message in a dict keyed by
its 16-bit message id and, when its own in-flight limit is set, scans that dict on every PUBACK.
With paho's limit off and ours in front, paho never holds more than ``window`` messages (far
below the 65,535 ids) and the scan is skipped. When the window is full, values wait here; the
service stops taking input until there is room, so the backlog waits at the broker.

Redelivered inputs. A message journaled and processed whose acknowledgement did not reach the
broker (a crash, a lost connection) is delivered again. :meth:`Outbox.seen` recognises it by its
journal record, so it is acknowledged without being fed to the engine twice: its value is
already in the outbox (or was delivered), never recomputed by a newer model.

Threads: everything here runs on the service's thread except :meth:`Outbox.on_published`,
which the network thread calls; it only appends to a deque and sets an event, because paho
holds its own message lock while calling it (taking a lock of ours there could deadlock).
"""

from __future__ import annotations

import os
import threading
import time
import zlib
from collections import Counter, OrderedDict, deque
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from trimtab.errors import ArgumentError, StateError
from trimtab.logs import get_logger

__all__ = ["MARK_NAME", "Mark", "Outbox", "OutboxMark", "PublishResult", "record_key",
           "stored_output", "with_output"]

MARK_NAME = "outbox.mark"
OUTPUT_FIELD = "out"
DEFAULT_KEEP = 20000
"""Journal records remembered to recognise redelivered inputs: the broker redelivers at most
what it had in flight to us (Receive Maximum 1000) plus what our inbox held, so 20,000 is a
wide margin."""
LOG_EVERY = 10.0
"""Seconds between log lines of one repeating kind (waits, failures)."""
_EVENTS = {
    "refused_by_broker": "outbox_refused_by_broker",
    "publish_deferred": "outbox_publish_deferred",
    "publish_failed": "outbox_publish_failed",
    "intake_waited": "outbox_intake_waited",
}

log = get_logger("trimtab.outbox")


@dataclass(frozen=True, slots=True)
class PublishResult:
    """What handing one value to the MQTT client gave: a message id, or a failure.

    ``mid`` is set when the client holds the message (sent, or kept for the next connection);
    otherwise ``error`` says why and ``retry`` whether trying again later can succeed.
    """

    mid: int | None
    error: str | None = None
    retry: bool = True


Publisher = Callable[[str, bytes], PublishResult]


def record_key(record: Mapping[str, Any]) -> tuple[Any, ...]:
    """What identifies a journal record's input: its kind, sensor, time and values."""
    if "reading" in record:
        inputs = record["reading"]
        return ("r", record.get("sensor"), record.get("t"), tuple(sorted(inputs.items())))
    return ("f", record.get("sensor"), record.get("t"), record.get("reference"),
            record.get("window"))


def with_output(record: dict[str, Any], payload: bytes) -> dict[str, Any]:
    """``record`` with the corrected value's payload beside the input (in place; returned)."""
    record[OUTPUT_FIELD] = payload.decode("utf-8")
    return record


def stored_output(record: Mapping[str, Any]) -> bytes | None:
    """The corrected value's payload journaled with ``record``, if any."""
    out = record.get(OUTPUT_FIELD)
    return out.encode("utf-8") if isinstance(out, str) else None


@dataclass(frozen=True, slots=True)
class Mark:
    """What ``outbox.mark`` says: in journal ``generation``, the first ``done`` values were
    delivered, and the journal had reached ``journal_bytes`` bytes and ``journal_records``
    records (so a journal found shorter after a crash says exactly what is missing)."""

    generation: int = 0
    done: int = 0
    journal_bytes: int = 0
    journal_records: int = 0


class OutboxMark:
    """``outbox.mark``: the last :class:`Mark` written, one fixed-length line rewritten in place.

    ``<generation> <done> <journal bytes> <journal records> <crc>``; no fsync: a stale or torn
    mark only makes the daemon publish again values already delivered, never fewer.
    """

    _WIDTH = 72

    def __init__(self, directory: Path) -> None:
        self.path = Path(directory) / MARK_NAME
        self._fd: int | None = None
        self.written: Mark | None = None

    def read(self) -> Mark:
        """The mark; all zeros when the file is missing, torn or damaged (logged)."""
        try:
            text = self.path.read_bytes().decode("ascii").strip()
        except FileNotFoundError:
            return Mark()
        except (OSError, UnicodeDecodeError) as exc:
            log.warning("outbox_mark_unreadable", path=str(self.path), error=str(exc))
            return Mark()
        parts = text.split()
        try:
            numbers = [int(x) for x in parts[:4]]
            crc = int(parts[4], 16)
        except (IndexError, ValueError):
            numbers, crc = [], -1
        body = " ".join(str(n) for n in numbers).encode("ascii")
        if len(numbers) != 4 or zlib.crc32(body) != crc or min(numbers) < 0:
            log.warning("outbox_mark_unreadable", path=str(self.path),
                        error="not '<generation> <done> <bytes> <records> <crc>'; every value "
                        "is published again")
            return Mark()
        return Mark(*numbers)

    def write(self, mark: Mark) -> None:
        """Record ``mark`` (a no-op when it is the one last written)."""
        if self.written == mark:
            return
        body = b"%d %d %d %d" % (mark.generation, mark.done, mark.journal_bytes,
                                 mark.journal_records)
        line = b"%s %08x" % (body, zlib.crc32(body))
        line = line.ljust(self._WIDTH - 1) + b"\n"
        if self._fd is None:
            self._fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_CLOEXEC, 0o600)
        os.pwrite(self._fd, line, 0)
        self.written = mark

    def close(self) -> None:
        if self._fd is not None:
            fd, self._fd = self._fd, None
            os.close(fd)


class Outbox:
    """Corrected values waiting for the broker, published within a window; see the module."""

    def __init__(self, window: int, *, keep: int = DEFAULT_KEEP,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if window < 1:
            raise ArgumentError(f"window must be at least 1, not {window}")
        self.window = window
        self._keep = keep
        self._clock = clock
        self._publish: Publisher | None = None
        # (seq, topic, payload): seq numbers the journaled values of this generation.
        self._unsent: deque[tuple[int, str, bytes]] = deque()
        self._inflight: dict[int, tuple[int, str, bytes]] = {}
        self._acks: deque[tuple[int, str | None]] = deque()
        self._wake = threading.Event()
        self._seen: OrderedDict[tuple[Any, ...], None] = OrderedDict()
        self.generation = 0
        self._next_seq = 0
        self._done = 0
        self._done_ahead: set[int] = set()
        self.counts: Counter[str] = Counter()
        self._logged: dict[str, float] = {}
        self._since: Counter[str] = Counter()

    # -- set-up ----------------------------------------------------------------------------

    def attach(self, publish: Publisher, window: int | None = None) -> None:
        """Publish through ``publish`` from now on, within ``window`` if given (a broker's
        Receive Maximum may be smaller than ours)."""
        self._publish = publish
        if window is not None and 0 < window < self.window:
            log.info("outbox_window_reduced", window=window, configured=self.window)
            self.window = window

    def restore(self, generation: int, records: Iterable[Mapping[str, Any]],
                mark: tuple[int, int], topic_of: Callable[[str], str]) -> int:
        """Queue again the values of journal ``generation``'s ``records`` past ``mark``.

        Returns how many were queued.
        """
        self.reset(generation)
        done = mark[1] if mark[0] == generation else 0
        queued = 0
        for record in records:
            self.remember(record)
            payload = stored_output(record)
            if payload is None:
                continue
            seq = self._next_seq
            self._next_seq += 1
            if seq < done:
                continue
            self._unsent.append((seq, topic_of(str(record.get("sensor"))), payload))
            queued += 1
        self._done = min(done, self._next_seq)
        self.counts["republished"] += queued
        return queued

    def reset(self, generation: int) -> None:
        """Start numbering the values of a new journal generation (only when drained)."""
        if self._unsent or self._inflight:
            raise StateError("outbox reset while values are pending")
        self.generation = generation
        self._next_seq = 0
        self._done = 0
        self._done_ahead.clear()

    # -- inputs ----------------------------------------------------------------------------

    def seen(self, record: Mapping[str, Any]) -> bool:
        """Whether ``record``'s input was journaled already (a redelivery); counted."""
        if record_key(record) in self._seen:
            self.counts["redelivered_inputs"] += 1
            return True
        return False

    def remember(self, record: Mapping[str, Any]) -> None:
        """Note a journaled input so that a redelivery of it is recognised (bounded)."""
        self._seen[record_key(record)] = None
        while len(self._seen) > self._keep:
            self._seen.popitem(last=False)

    def add(self, topic: str, payload: bytes) -> None:
        """Queue a journaled value; it takes the next number of this generation."""
        seq = self._next_seq
        self._next_seq += 1
        self._unsent.append((seq, topic, payload))
        self.counts["queued"] += 1

    # -- the network thread ----------------------------------------------------------------

    def on_published(self, mid: int, error: str | None) -> None:
        """PUBACK for ``mid`` (``error`` set when the broker refused it). Network thread."""
        self._acks.append((mid, error))
        self._wake.set()

    # -- publishing ------------------------------------------------------------------------

    def _settle(self) -> None:
        while self._acks:
            mid, error = self._acks.popleft()
            entry = self._inflight.pop(mid, None)
            if entry is None:
                continue  # a status or stats publish, or a duplicate PUBACK
            if error is not None:
                # The broker took the packet and refused it (e.g. not authorised): it would
                # refuse it again, so it is counted, logged and not retried.
                self._note("refused_by_broker", topic=entry[1], reason=error)
            else:
                self.counts["delivered"] += 1
            self._finish(entry[0])

    def _finish(self, seq: int) -> None:
        if seq == self._done:
            self._done += 1
            while self._done in self._done_ahead:
                self._done_ahead.discard(self._done)
                self._done += 1
        elif seq > self._done:
            self._done_ahead.add(seq)

    def pump(self) -> int:
        """Hand waiting values to the client while the window has room; returns how many."""
        self._settle()
        if self._publish is None:
            return 0
        sent = 0
        while self._unsent and len(self._inflight) < self.window:
            seq, topic, payload = self._unsent[0]
            result = self._publish(topic, payload)
            if result.mid is None:
                if result.retry:
                    self._note("publish_deferred", topic=topic, reason=result.error)
                    break  # keep it first in line; tried again at the next pump
                self._unsent.popleft()
                self._note("publish_failed", topic=topic, reason=result.error)
                self._finish(seq)
                continue
            self._unsent.popleft()
            self._inflight[result.mid] = (seq, topic, payload)
            sent += 1
        self.counts["handed_to_client"] += sent
        return sent

    def full(self) -> bool:
        """Whether more than a window's worth of values waits: intake should wait."""
        return len(self._unsent) >= self.window

    def pending(self) -> int:
        """Values not yet acknowledged by the broker."""
        self._settle()
        return len(self._unsent) + len(self._inflight)

    def waiting(self) -> list[tuple[str, bytes]]:
        """(topic, payload) of every value not yet acknowledged, in flight ones first."""
        self._settle()
        return [(t, p) for _, t, p in [*self._inflight.values(), *self._unsent]]

    def wait(self, timeout: float) -> None:
        """Sleep until a PUBACK arrives or ``timeout`` passes, then publish what fits."""
        self._wake.wait(timeout)
        self._wake.clear()
        self.pump()

    def done(self) -> int:
        """Values of this generation delivered from its start without a gap."""
        self._settle()
        return self._done

    # -- accounting ------------------------------------------------------------------------

    def note_wait(self) -> None:
        """Intake waited for room in the outbox: counted, logged at most every LOG_EVERY s."""
        self._note("intake_waited", pending=len(self._unsent) + len(self._inflight),
                   window=self.window, level="info")

    def _note(self, what: str, *, level: str = "warning", **context: Any) -> None:
        self.counts[what] += 1
        now = self._clock()
        last = self._logged.get(what)
        if last is not None and now - last < LOG_EVERY:
            self._since[what] += 1
            return
        self._logged[what] = now
        repeats = self._since.pop(what, 0)
        getattr(log, level)(_EVENTS[what], repeats_since_last_line=repeats, **context)

    def stats(self) -> dict[str, Any]:
        """Counters and the current backlog, for the stats topic and metrics."""
        self._settle()
        return {**dict(self.counts), "unsent": len(self._unsent),
                "inflight": len(self._inflight), "window": self.window}
