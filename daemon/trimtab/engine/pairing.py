"""Pairing references with readings: a per-sensor time-bounded buffer of reading inputs.

Readings arrive every few seconds, references rarely and late. Each sensor keeps its recent
reading inputs in a ``ReadingBuffer``; a reference with a window is paired with the mean of
the inputs inside the window, one without with the nearest reading within a tolerance.
All times are event times.
"""

from __future__ import annotations

import base64
import binascii
import itertools
import math
import sys
from array import array
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

from trimtab.errors import ArgumentError, StateError
from trimtab.messages import Reference

__all__ = ["Paired", "ReadingBuffer", "Unmatched", "pair"]

_COMPACT_ROWS = 32  # dead rows tolerated at the front before they are reclaimed


class ReadingBuffer:
    """The recent reading inputs of one sensor, in time order, bounded by span and capacity.

    Storage is one flat ``array('d')`` of rows ``[t, x_1, ..., x_k]``: 8 bytes a number and
    no Python object per reading, so an hour of 10-second readings of 3 inputs costs about
    11.5 KB. Rows older than ``newest - span`` are evicted; past ``capacity`` rows the oldest
    are dropped and counted in ``dropped``. A reading older than the newest is inserted in time
    order (after any of equal time); one already older than ``newest - span`` is not kept.
    Evicted rows are reclaimed from the front in batches of ``_COMPACT_ROWS`` so that steady
    appends cost amortised O(1) and at most that many dead rows are held.
    """

    __slots__ = ("_data", "_head", "_width", "capacity", "dropped", "inputs", "span")

    def __init__(self, inputs: Sequence[str], span: float, capacity: int) -> None:
        names = list(inputs)
        if not names or any(not isinstance(n, str) or not n for n in names):
            raise ArgumentError(f"inputs must be one or more non-empty names, got {names!r}")
        if len(set(names)) != len(names):
            raise ArgumentError(f"inputs must be distinct, got {names!r}")
        if isinstance(span, bool) or not isinstance(span, int | float) or not span > 0:
            raise ArgumentError(f"span must be a number of seconds > 0, got {span!r}")
        if not math.isfinite(span):
            raise ArgumentError(f"span must be finite, got {span!r}")
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise ArgumentError(f"capacity must be an integer >= 1, got {capacity!r}")
        self.inputs: tuple[str, ...] = tuple(names)
        self.span = float(span)
        self.capacity = capacity
        self.dropped = 0
        self._width = 1 + len(names)
        self._data = array("d")
        self._head = 0  # index of the first live row

    def __len__(self) -> int:
        return len(self._data) // self._width - self._head

    def _time(self, row: int) -> float:
        return self._data[row * self._width]

    def _bisect(self, t: float, *, right: bool) -> int:
        """First live row whose time is >= t (or > t when ``right``)."""
        lo, hi = self._head, len(self._data) // self._width
        while lo < hi:
            mid = (lo + hi) // 2
            rt = self._time(mid)
            if rt < t or (right and rt == t):
                lo = mid + 1
            else:
                hi = mid
        return lo

    @property
    def nbytes(self) -> int:
        """Bytes the buffer's storage takes (the array object and its allocation)."""
        return sys.getsizeof(self._data)

    @property
    def newest(self) -> float | None:
        """Time of the newest reading held, or ``None`` when empty."""
        return self._time(len(self._data) // self._width - 1) if len(self) else None

    def add(self, t: float, values: Sequence[float]) -> None:
        """Buffer one reading's inputs (in ``inputs`` order) at event time ``t``."""
        if len(values) != self._width - 1:
            raise ArgumentError(f"expected {self._width - 1} values {self.inputs}, "
                                f"got {len(values)}")
        row = array("d", [t, *values])
        if not all(map(math.isfinite, row)):
            raise ArgumentError(f"reading at t={t!r} has a non-finite time or value: {list(row)}")
        data, w = self._data, self._width
        newest = data[-w] if len(data) > self._head * w else None
        if newest is None or t >= newest:
            data.extend(row)
            newest = t
        elif t < newest - self.span:
            return  # already outside the span: nothing to pair it with later
        else:
            at = self._bisect(t, right=True) * w
            data[at:at] = row
        # Evict rows older than the span from the front: the rows are in time order, so
        # stepping the head over them finds what a bisection would, in amortised O(1).
        cutoff = newest - self.span
        head, end = self._head * w, len(data)
        while head < end and data[head] < cutoff:
            head += w
        self._head = head // w
        excess = len(self) - self.capacity
        if excess > 0:
            self._head += excess
            self.dropped += excess
        if self._head >= _COMPACT_ROWS:
            del self._data[: self._head * self._width]
            self._head = 0

    def _column_means(self, lo: int, hi: int) -> list[float]:
        w, n = self._width, hi - lo
        return [math.fsum(self._data[lo * w + j : hi * w : w]) / n for j in range(w)]

    def window_mean(self, start: float, end: float) -> tuple[list[float], float, int] | None:
        """Mean of each input over readings with ``start <= t <= end``, their mean time, count.

        ``None`` when no reading falls in the window. Sums are exactly rounded (``fsum``).
        """
        lo = self._bisect(start, right=False)
        hi = self._bisect(end, right=True)
        if hi <= lo:
            return None
        means = self._column_means(lo, hi)
        return means[1:], means[0], hi - lo

    def nearest(self, t: float, tolerance: float) -> tuple[list[float], float] | None:
        """Inputs and time of the reading nearest ``t`` within ``tolerance`` seconds, or ``None``.

        On a tie the earlier reading wins: of two readings equally far before and after ``t``,
        the one before; of several at the same time, the first buffered.
        """
        rows = len(self._data) // self._width
        at = self._bisect(t, right=False)  # first reading at or after t
        best: int | None = None
        best_gap = math.inf
        if at > self._head and t - self._time(at - 1) <= tolerance:
            best_gap = t - self._time(at - 1)
            best = self._bisect(self._time(at - 1), right=False)  # first of that time
        if at < rows and self._time(at) - t <= tolerance and self._time(at) - t < best_gap:
            best = at
        if best is None:
            return None
        w = self._width
        row = self._data[best * w : (best + 1) * w]
        return list(row[1:]), row[0]

    def to_dict(self, *, packed: bool = False) -> dict[str, object]:
        """Plain JSON-able state; ``data`` is the rows ``[t, x_1, ..., x_k]`` flattened.

        Floats survive JSON bit for bit, since ``json`` writes them as Python's repr. With
        ``packed`` the rows are instead one Base64 string (RFC 4648) of IEEE 754 binary64
        numbers, little-endian: the same bits, far quicker to write and to read back in a
        checkpoint of many sensors. :meth:`from_dict` reads both forms.
        """
        live = self._data[self._head * self._width :]
        if not packed:
            data: object = live.tolist()
        else:
            if sys.byteorder != "little":
                live.byteswap()
            data = base64.b64encode(live.tobytes()).decode("ascii")
        return {
            "inputs": list(self.inputs),
            "span": self.span,
            "capacity": self.capacity,
            "dropped": self.dropped,
            "data": data,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, object]) -> ReadingBuffer:
        """The buffer ``to_dict`` described; ``StateError`` if the state is inconsistent."""
        try:
            inputs, span, capacity = d["inputs"], d["span"], d["capacity"]
            dropped, rows = d["dropped"], d["data"]
            if not isinstance(inputs, list) or not isinstance(rows, list | str):
                raise ArgumentError("inputs and data must be lists (data may be a Base64 string)")
            if not isinstance(capacity, int) or not isinstance(span, int | float):
                raise ArgumentError("capacity must be an integer and span a number")
            buf = cls([str(n) for n in inputs], float(span), capacity)
            if isinstance(dropped, bool) or not isinstance(dropped, int) or dropped < 0:
                raise ArgumentError(f"dropped must be a count, got {dropped!r}")
            data = array("d", rows) if isinstance(rows, list) else _unpack(rows)
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"reading buffer state is malformed: {exc}") from exc
        w = buf._width
        times = data[::w]
        if len(data) % w or len(times) > capacity:
            raise StateError(f"reading buffer state holds {len(data)} numbers: not rows of {w}, "
                             f"or more than {capacity} rows")  # fmt: skip
        if not _all_finite(data):
            raise StateError("reading buffer state holds a non-finite number")
        if not _ordered(times):
            raise StateError("reading buffer state is not in time order")
        if len(times) and times[0] < times[-1] - buf.span:
            raise StateError("reading buffer state holds rows older than its span")
        buf._data, buf.dropped = data, dropped
        return buf


def _unpack(text: str) -> array[float]:
    """The numbers of a packed ``data`` string; ArgumentError if it is not whole binary64s."""
    try:
        raw = binascii.a2b_base64(text.encode("ascii"), strict_mode=True)
    except (binascii.Error, UnicodeEncodeError) as exc:
        raise ArgumentError(f"data is not Base64: {exc}") from None
    if len(raw) % 8:
        raise ArgumentError(f"data holds {len(raw)} bytes, not whole 8-byte numbers")
    data = array("d")
    data.frombytes(raw)
    if sys.byteorder != "little":
        data.byteswap()
    return data[:]  # an exact-size copy: frombytes leaves room to grow


_VECTOR_FROM = 64  # numbers from which numpy's checks beat a Python loop


def _all_finite(data: array[float]) -> bool:
    if len(data) < _VECTOR_FROM:
        return all(map(math.isfinite, data))
    return bool(np.isfinite(np.frombuffer(data, dtype=np.float64)).all())


def _ordered(times: array[float]) -> bool:
    if len(times) < _VECTOR_FROM:
        return not any(a > b for a, b in itertools.pairwise(times))
    t = np.frombuffer(times, dtype=np.float64)
    return bool((t[1:] >= t[:-1]).all())


@dataclass(frozen=True, slots=True)
class Paired:
    """A reference's matching inputs (in buffer ``inputs`` order), their time and count."""

    values: tuple[float, ...]
    t: float
    count: int


@dataclass(frozen=True, slots=True)
class Unmatched:
    """No readings to pair a reference with; ``reason`` is a stable snake_case word."""

    reason: str


def pair(
    buffer: ReadingBuffer,
    ref: Reference,
    *,
    default_window: float | None,
    anchor: Literal["start", "end"],
    tolerance: float,
) -> Paired | Unmatched:
    """Pair ``ref`` with ``buffer``'s readings.

    The window is ``ref.window``, else ``default_window``. With a window ``w`` the reference is
    the mean over ``[t - w, t]`` (``anchor="end"``) or ``[t, t + w]`` (``"start"``), both ends
    included, and pairs with the inputs' mean there (``Paired.t`` is the readings' mean time);
    with none it is a spot value and pairs with the nearest reading within ``tolerance`` (ties
    to the earlier). Unmatched reasons: ``no_reading_in_window``, ``no_reading_within_tolerance``.
    """
    if anchor not in ("start", "end"):
        raise ArgumentError(f"anchor must be 'start' or 'end', got {anchor!r}")
    window = ref.window if ref.window is not None else default_window
    if window is None:
        if not tolerance >= 0:
            raise ArgumentError(f"tolerance must be >= 0 seconds, got {tolerance!r}")
        hit = buffer.nearest(ref.t, tolerance)
        if hit is None:
            return Unmatched("no_reading_within_tolerance")
        return Paired(tuple(hit[0]), hit[1], 1)
    if not window > 0:
        raise ArgumentError(f"window must be > 0 seconds, got {window!r}")
    start, end = (ref.t - window, ref.t) if anchor == "end" else (ref.t, ref.t + window)
    mean = buffer.window_mean(start, end)
    if mean is None:
        return Unmatched("no_reading_in_window")
    return Paired(tuple(mean[0]), mean[1], mean[2])
