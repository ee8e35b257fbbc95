"""Tests of the per-sensor reading buffer and of pairing references with readings."""

from __future__ import annotations

import json
import struct
import sys

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from trimtab.engine.pairing import Paired, ReadingBuffer, Unmatched, pair
from trimtab.errors import ArgumentError, StateError
from trimtab.messages import Reference

INPUTS = ("raw", "temp", "rh")
values = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False)
rows = st.lists(
    st.tuples(st.floats(min_value=0, max_value=3600, allow_nan=False),
              st.tuples(values, values, values)),
    min_size=1, max_size=60,
)  # fmt: skip


def filled(times: list[float], span: float = 1e9, capacity: int = 10_000) -> ReadingBuffer:
    """A buffer holding one reading at each time, with inputs (t, 2t, -t)."""
    buf = ReadingBuffer(INPUTS, span, capacity)
    for t in times:
        buf.add(t, [t, 2 * t, -t])
    return buf


class TestReadingBuffer:
    @given(rows)
    def test_window_mean_equals_numpy(self, data: list[tuple[float, tuple[float, ...]]]) -> None:
        """The window mean of each input and of time equals numpy's mean of the same readings."""
        buf = ReadingBuffer(INPUTS, span=1e6, capacity=1000)
        for t, v in data:
            buf.add(t, v)
        start, end = 600.0, 2400.0
        inside = np.array([[t, *v] for t, v in data if start <= t <= end]).reshape(-1, 4)
        got = buf.window_mean(start, end)
        if len(inside) == 0:
            assert got is None
            return
        assert got is not None
        means, mean_t, count = got
        assert count == len(inside)
        np.testing.assert_allclose([mean_t, *means], inside.mean(axis=0), rtol=1e-12, atol=1e-9)

    def test_window_bounds_are_inclusive(self) -> None:
        """Readings exactly at the window's start and end are included."""
        got = filled([10.0, 20.0, 30.0, 40.0]).window_mean(20.0, 30.0)
        assert got == ([25.0, 50.0, -25.0], 25.0, 2)

    def test_nearest_within_tolerance(self) -> None:
        """The nearest reading within tolerance is returned; none beyond it."""
        buf = filled([10.0, 20.0, 30.0])
        assert buf.nearest(21.0, 5.0) == ([20.0, 40.0, -20.0], 20.0)
        assert buf.nearest(28.5, 5.0) == ([30.0, 60.0, -30.0], 30.0)
        assert buf.nearest(45.0, 5.0) is None
        assert buf.nearest(35.0, 5.0) == ([30.0, 60.0, -30.0], 30.0)

    def test_nearest_tie_goes_to_the_earlier_reading(self) -> None:
        """Equally far readings before and after resolve to the one before."""
        assert filled([10.0, 20.0]).nearest(15.0, 5.0) == ([10.0, 20.0, -10.0], 10.0)

    def test_nearest_among_equal_times_is_the_first_buffered(self) -> None:
        """Of several readings at the same time, the first one added is returned."""
        buf = ReadingBuffer(("raw",), 100.0, 10)
        buf.add(10.0, [1.0])
        buf.add(10.0, [2.0])
        assert buf.nearest(10.0, 0.0) == ([1.0], 10.0)
        assert buf.nearest(12.0, 5.0) == ([1.0], 10.0)

    def test_eviction_by_span(self) -> None:
        """Readings older than newest - span are evicted; the boundary reading is kept."""
        buf = filled([float(t) for t in range(0, 200, 10)], span=60.0)
        assert len(buf) == 7
        assert buf.window_mean(0.0, 1000.0) == ([160.0, 320.0, -160.0], 160.0, 7)
        assert buf.dropped == 0

    def test_capacity_bound_drops_oldest(self) -> None:
        """Past capacity the oldest readings go and are counted."""
        buf = filled([float(t) for t in range(100)], capacity=5)
        assert len(buf) == 5
        assert buf.dropped == 95
        assert buf.window_mean(0.0, 1000.0) == ([97.0, 194.0, -97.0], 97.0, 5)

    def test_out_of_order_insert_keeps_time_order(self) -> None:
        """A late reading is inserted in order, after any reading of equal time."""
        buf = ReadingBuffer(("raw",), 1000.0, 100)
        for t, v in [(10.0, 1.0), (30.0, 3.0), (20.0, 2.0), (30.0, 4.0), (5.0, 0.5)]:
            buf.add(t, [v])
        assert buf.to_dict()["data"] == [5.0, 0.5, 10.0, 1.0, 20.0, 2.0, 30.0, 3.0, 30.0, 4.0]

    def test_late_reading_outside_span_is_not_kept(self) -> None:
        """A reading already older than newest - span is discarded, not counted as dropped."""
        buf = filled([100.0], span=10.0)
        buf.add(50.0, [0.0, 0.0, 0.0])
        assert (len(buf), buf.dropped) == (1, 0)

    @given(st.lists(st.floats(min_value=0, max_value=1000, allow_nan=False), max_size=200),
           st.integers(min_value=1, max_value=40), st.floats(min_value=1.0, max_value=500.0))
    def test_invariants_hold_for_any_arrival_order(
        self, times: list[float], capacity: int, span: float
    ) -> None:
        """Whatever the order, the buffer is sorted, within capacity and within span."""
        buf = ReadingBuffer(("raw",), span, capacity)
        for t in times:
            buf.add(t, [t])
        held = buf.to_dict()["data"][::2]  # type: ignore[index]
        assert held == sorted(held)
        assert len(held) == len(buf) <= capacity
        if held:
            assert held[0] >= held[-1] - span
            assert held[-1] == max(times)

    def test_refuses_bad_readings(self) -> None:
        """Wrong arity or non-finite values are refused rather than stored."""
        buf = ReadingBuffer(("raw", "temp"), 60.0, 10)
        with pytest.raises(ArgumentError, match="expected 2"):
            buf.add(0.0, [1.0])
        with pytest.raises(ArgumentError, match="non-finite"):
            buf.add(float("nan"), [1.0, 2.0])

    @pytest.mark.parametrize(
        ("inputs", "span", "capacity"),
        [((), 60.0, 10), (("a", "a"), 60.0, 10), (("a",), 0.0, 10), (("a",), float("inf"), 10),
         (("a",), 60.0, 0), (("a",), 60.0, True)],
    )  # fmt: skip
    def test_refuses_bad_construction(
        self, inputs: tuple[str, ...], span: float, capacity: int
    ) -> None:
        """No inputs, duplicate inputs, a non-positive or infinite span, or capacity < 1 fail."""
        with pytest.raises(ArgumentError):
            ReadingBuffer(inputs, span, capacity)

    @given(rows)
    def test_dict_round_trip_is_bit_exact(
        self, data: list[tuple[float, tuple[float, ...]]]
    ) -> None:
        """to_dict through JSON and from_dict restores the same rows, bit for bit."""
        buf = ReadingBuffer(INPUTS, span=1800.0, capacity=40)
        for t, v in data:
            buf.add(t, v)
        back = ReadingBuffer.from_dict(json.loads(json.dumps(buf.to_dict())))
        assert back.to_dict() == buf.to_dict()
        pack = struct.Struct("<d").pack
        assert [pack(x) for x in back.to_dict()["data"]] == [  # type: ignore[attr-defined]
            pack(x) for x in buf.to_dict()["data"]  # type: ignore[attr-defined]
        ]
        back.add(4000.0, [1.0, 2.0, 3.0])  # and it keeps working

    @pytest.mark.parametrize(
        ("change", "message"),
        [
            ({"data": [1.0, 2.0]}, "not rows of 4"),
            ({"data": [2.0, 0, 0, 0, 1.0, 0, 0, 0]}, "time order"),
            ({"data": [0.0, 0, 0, 0, 9999.0, 0, 0, 0]}, "older than its span"),
            ({"data": [0.0, 0, 0, 1e400]}, "non-finite"),
            ({"capacity": 0}, "capacity"),
            ({"dropped": -1}, "dropped"),
            ({"inputs": "raw"}, "lists"),
        ],
    )
    def test_from_dict_refuses_inconsistent_state(
        self, change: dict[str, object], message: str
    ) -> None:
        """Checkpointed buffer state that could not have been written is a StateError."""
        d = {**filled([1.0], span=60.0).to_dict(), **change}
        with pytest.raises(StateError, match=message):
            ReadingBuffer.from_dict(d)

    def test_memory_of_an_hour_of_readings(self) -> None:
        """360 readings of 3 inputs (1 h at 10 s) fit in under 16 KB of array storage."""
        buf = ReadingBuffer(INPUTS, span=3600.0, capacity=400)
        for i in range(2000):  # well past the span, so eviction and compaction have run
            buf.add(10.0 * i, [1.0, 2.0, 3.0])
        assert len(buf) == 361
        assert buf.nbytes == sys.getsizeof(buf._data)
        assert buf.nbytes < 16 * 1024


class TestPair:
    def buffer(self) -> ReadingBuffer:
        """Readings every 10 s from 0 to 100 with inputs (t, 2t, -t)."""
        return filled([float(t) for t in range(0, 101, 10)])

    def test_window_anchored_at_end(self) -> None:
        """With anchor 'end' the window is [t - w, t]."""
        got = pair(self.buffer(), Reference(50.0, "s", 1.0, 20.0), default_window=None,
                   anchor="end", tolerance=0.0)  # fmt: skip
        assert got == Paired((40.0, 80.0, -40.0), 40.0, 3)

    def test_window_anchored_at_start(self) -> None:
        """With anchor 'start' the window is [t, t + w]."""
        got = pair(self.buffer(), Reference(50.0, "s", 1.0, 20.0), default_window=None,
                   anchor="start", tolerance=0.0)  # fmt: skip
        assert got == Paired((60.0, 120.0, -60.0), 60.0, 3)

    def test_default_window_applies_to_spot_references(self) -> None:
        """A reference without a window uses the configured default window."""
        got = pair(self.buffer(), Reference(100.0, "s", 1.0), default_window=30.0,
                   anchor="end", tolerance=0.0)  # fmt: skip
        assert got == Paired((85.0, 170.0, -85.0), 85.0, 4)

    def test_spot_reference_takes_nearest(self) -> None:
        """Without any window the nearest reading within tolerance is paired."""
        got = pair(self.buffer(), Reference(33.0, "s", 1.0), default_window=None,
                   anchor="end", tolerance=5.0)  # fmt: skip
        assert got == Paired((30.0, 60.0, -30.0), 30.0, 1)

    def test_unmatched_reasons(self) -> None:
        """An empty window and a too-distant spot reading are unmatched with their reasons."""
        buf = self.buffer()
        assert pair(buf, Reference(500.0, "s", 1.0, 60.0), default_window=None, anchor="end",
                    tolerance=1.0) == Unmatched("no_reading_in_window")  # fmt: skip
        assert pair(buf, Reference(35.0, "s", 1.0), default_window=None, anchor="end",
                    tolerance=4.9) == Unmatched("no_reading_within_tolerance")  # fmt: skip

    def test_refuses_a_bad_anchor(self) -> None:
        """An anchor other than 'start' or 'end' is a programming error."""
        with pytest.raises(ArgumentError, match="anchor"):
            pair(self.buffer(), Reference(1.0, "s", 1.0), default_window=None,
                 anchor="middle", tolerance=1.0)  # type: ignore[arg-type]  # fmt: skip
