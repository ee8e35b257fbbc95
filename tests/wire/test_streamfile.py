"""Tests of JSON Lines stream files: events and corrected values."""

from __future__ import annotations

import json
import struct
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from trimtab.errors import DataError, DecodeError, EncodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.wire.codec import MAX_ABS
from trimtab.wire.streamfile import (
    REASONS,
    decode_corrected_line,
    decode_event,
    encode_corrected_line,
    encode_event,
    read_corrected,
    read_events,
    write_corrected,
    write_events,
)

T0 = 1767225600.0  # 2026-01-01T00:00:00Z
DESIGN_READING = (
    '{"t": 1767225600.0, "sensor": "no2-07", "reading": {"raw": 41.2, "temp": 21.4, "rh": 55.0}}'
)
DESIGN_REFERENCE = '{"t": 1767229200.0, "sensor": "no2-07", "reference": 38.9, "window": 3600}'

finite = st.floats(min_value=-MAX_ABS, max_value=MAX_ABS, allow_nan=False)
times = st.floats(min_value=0.0, max_value=4e9, allow_nan=False)
sensors = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9._-]{0,20}", fullmatch=True).filter(
    lambda s: ".." not in s
)
readings = st.builds(
    Reading,
    t=times,
    sensor=sensors,
    inputs=st.dictionaries(st.sampled_from(["temp", "rh", "p"]), finite).flatmap(
        lambda d: finite.map(lambda raw: {"raw": raw, **d})
    ),
    truth=st.none() | finite,
)
references = st.builds(
    Reference,
    t=times,
    sensor=sensors,
    value=finite,
    window=st.none() | st.floats(min_value=1e-3, max_value=1e6),
)
correcteds = st.builds(
    Corrected,
    t=times,
    sensor=sensors,
    value=finite,
    raw=finite,
    band=st.floats(min_value=0.0, max_value=MAX_ABS),
    flags=st.lists(st.sampled_from(["warmup", "stale", "held"])).map(tuple),
    updates=st.integers(min_value=0, max_value=2**40),
)


def bits(x: float) -> bytes:
    """The IEEE 754 bytes of a float, to compare values bit for bit."""
    return struct.pack("<d", x)


class TestDecodeEvent:
    def test_design_reading_line(self) -> None:
        """The design's reading line decodes to its time, sensor and inputs."""
        r = decode_event(DESIGN_READING)
        assert r == Reading(T0, "no2-07", {"raw": 41.2, "temp": 21.4, "rh": 55.0})

    def test_design_reference_line(self) -> None:
        """The design's reference line decodes with its hour window."""
        assert decode_event(DESIGN_REFERENCE) == Reference(T0 + 3600, "no2-07", 38.9, 3600.0)

    def test_iso_time_and_truth(self) -> None:
        """An ISO 8601 time with a zone is accepted and truth is carried."""
        line = '{"t": "2026-01-01T00:00:00Z", "sensor": "s", "reading": {"raw": 1}, "truth": 2}'
        assert decode_event(line) == Reading(T0, "s", {"raw": 1.0}, truth=2.0)

    @pytest.mark.parametrize(
        ("line", "reason", "detail"),
        [
            ("[]", "not_object", "JSON object"),
            ('{"t": 0, "sensor": "s"}', "missing_field", "'reading' or 'reference'"),
            ('{"t": 0, "sensor": "s", "reading": {"raw": 1}, "reference": 1}',
             "ambiguous_event", "not both"),
            ('{"t": 0, "sensor": "s", "reference": 1, "windw": 60}', "unknown_field", "windw"),
            ('{"t": 0, "sensor": "s", "reading": {"raw": 1}, "window": 60}', "unknown_field",
             "window"),
            ('{"t": 0, "sensor": "s", "reading": {"temp": 1}}', "missing_field", "reading.raw"),
            ('{"t": 0, "sensor": "s", "reading": [1]}', "wrong_type", "field 'reading'"),
            ('{"t": 0, "sensor": "s", "reading": {"raw": 1, "rh": "x"}}', "wrong_type",
             "reading.rh"),
            ('{"t": 0, "sensor": "s", "reading": {"raw": NaN}}', "non_finite", "NaN"),
            ('{"t": 0, "sensor": 7, "reference": 1}', "wrong_type", "'sensor'"),
            ('{"t": 0, "sensor": "a/b", "reference": 1}', "bad_sensor_id", "'a/b'"),
            ('{"sensor": "s", "reference": 1}', "missing_field", "'t'"),
            ('{"t": "2026-01-01 00:00", "sensor": "s", "reference": 1}', "bad_time", "no zone"),
            ('{"t": 0, "sensor": "s", "reference": 1, "window": 0}', "bad_window", "> 0"),
            ('{"t": 0, "sensor": "s", "reference": 1e13}', "out_of_range", "'reference'"),
            ('{"t": 0, "sensor": "s", "reading": {"raw": 1}, "truth": "x"}', "wrong_type",
             "'truth'"),
            ('{"t": 0, "t": 1, "sensor": "s", "reference": 1}', "duplicate_field", "'t'"),
            ('{"t": 0, "sensor": "s", "reference": 1', "bad_json", "Expecting"),
            ('"' + "x" * 70000 + '"', "oversize", "more than the 65536"),
        ],
    )  # fmt: skip
    def test_rejections(self, line: str, reason: str, detail: str) -> None:
        """Each malformed line fails with its reason and a detail naming the field."""
        with pytest.raises(DecodeError) as info:
            decode_event(line)
        assert info.value.reason == reason
        assert detail in info.value.detail

    @given(st.text(max_size=200))
    def test_arbitrary_text_only_raises_decode_error(self, line: str) -> None:
        """Any text decodes or fails with a DecodeError carrying a known reason."""
        try:
            decode_event(line)
        except DecodeError as exc:
            assert exc.reason in REASONS
            assert exc.detail

    @given(
        st.fixed_dictionaries(
            {},
            optional={
                "t": st.floats() | st.text(max_size=30) | st.integers() | st.none(),
                "sensor": sensors | st.text(max_size=5) | st.integers(),
                "reading": st.dictionaries(st.sampled_from(["raw", "rh", ""]),
                                           st.floats() | st.booleans() | st.none())
                | st.integers(),
                "reference": st.floats() | st.text(max_size=2) | st.none(),
                "window": st.floats() | st.integers() | st.none(),
                "truth": st.floats() | st.none(),
            },
        )
    )  # fmt: skip
    def test_structured_lines_only_raise_decode_error(self, obj: dict[str, object]) -> None:
        """Lines built from the format's fields with odd values decode or fail with a reason."""
        try:
            decode_event(json.dumps(obj))
        except DecodeError as exc:
            assert exc.reason in REASONS


class TestEncodeEvent:
    @given(readings | references)
    def test_round_trips_bit_exactly(self, e: Reading | Reference) -> None:
        """Encoding then decoding an event gives it back with identical float bits."""
        line = encode_event(e)
        assert "\n" not in line
        back = decode_event(line)
        assert back == e
        assert bits(back.t) == bits(e.t)
        if isinstance(e, Reading):
            assert isinstance(back, Reading)
            assert [bits(v) for v in back.inputs.values()] == [bits(v) for v in e.inputs.values()]

    def test_reading_layout(self) -> None:
        """A reading is written with t as a float, its inputs, and truth only when known."""
        assert json.loads(encode_event(Reading(T0, "s", {"raw": 1.0}))) == {
            "t": T0, "sensor": "s", "reading": {"raw": 1.0}
        }  # fmt: skip
        assert '"truth": 2.5' in encode_event(Reading(1, "s", {"raw": 1.0}, truth=2.5))
        assert '"t": 1.0' in encode_event(Reading(1, "s", {"raw": 1.0}))

    def test_refuses_non_finite(self) -> None:
        """A non-finite value cannot be written into a stream file."""
        with pytest.raises(EncodeError, match="input 'raw'"):
            encode_event(Reading(T0, "s", {"raw": float("nan")}))


class TestFiles:
    def test_write_then_read_events(self, tmp_path: Path) -> None:
        """Events written to a file are read back in order, and the count is returned."""
        events: list[Reading | Reference] = [
            Reading(T0, "s", {"raw": 0.1}),
            Reference(T0 + 1, "s", 0.3, 60.0),
        ]
        path = tmp_path / "stream.jsonl"
        assert write_events(path, events) == 2
        assert list(read_events(path)) == events

    def test_bad_line_raises_data_error_with_place(self, tmp_path: Path) -> None:
        """Without a handler, a bad line stops the read with file, line, reason and detail."""
        path = tmp_path / "s.jsonl"
        path.write_text(DESIGN_READING + "\n\n" + '{"t": 0, "sensor": "s"}\n')
        events = read_events(path)
        assert next(events) == decode_event(DESIGN_READING)
        with pytest.raises(DataError, match=r"s\.jsonl:3: missing_field: field 'reading'"):
            next(events)

    def test_handler_reports_and_skips(self, tmp_path: Path) -> None:
        """With a handler, bad lines (including non-UTF-8) are reported by number and skipped."""
        path = tmp_path / "s.jsonl"
        path.write_bytes(
            b"\n".join([b"garbage", DESIGN_READING.encode(), b"\xff\xfe", b"  ",
                        DESIGN_REFERENCE.encode()]) + b"\n"
        )  # fmt: skip
        seen: list[tuple[int, str]] = []
        got = list(read_events(path, on_error=lambda n, e: seen.append((n, e.reason))))
        assert got == [decode_event(DESIGN_READING), decode_event(DESIGN_REFERENCE)]
        assert seen == [(1, "bad_json"), (3, "bad_json")]

    def test_write_then_read_corrected(self, tmp_path: Path) -> None:
        """Corrected values written to a file are read back unchanged."""
        items = [Corrected(T0, "s", 1.5, 2.0, 0.25, ("stale",), 4)]
        path = tmp_path / "out.jsonl"
        assert write_corrected(path, items) == 1
        assert list(read_corrected(path)) == items

    def test_bad_corrected_line_is_a_data_error(self, tmp_path: Path) -> None:
        """A corrected file with a broken line fails with its place."""
        path = tmp_path / "out.jsonl"
        path.write_text('{"t": 0}\n')
        with pytest.raises(DataError, match=r"out\.jsonl:1: missing_field"):
            list(read_corrected(path))


class TestCorrectedLines:
    def test_design_line(self) -> None:
        """The design's corrected line decodes to its fields."""
        line = ('{"t": 1767225600.0, "sensor": "no2-07", "value": 39.4, "raw": 41.2, '
                '"band": 1.8, "flags": [], "updates": 57}')  # fmt: skip
        assert decode_corrected_line(line) == Corrected(T0, "no2-07", 39.4, 41.2, 1.8, (), 57)

    @given(correcteds)
    def test_round_trips_bit_exactly(self, c: Corrected) -> None:
        """Encoding then decoding a corrected line gives it back with identical float bits."""
        back = decode_corrected_line(encode_corrected_line(c))
        assert back == c
        assert [bits(x) for x in (back.t, back.value, back.raw, back.band)] == [
            bits(x) for x in (c.t, c.value, c.raw, c.band)
        ]
