"""The bench runs end to end and loses nothing; the fast paths it led to give the same bytes.

No test here asserts a timing: figures belong to ``trimtab-sim bench``, not to CI. What is
checked is that the bench works, that every message comes back exactly once, and that each
optimisation produces exactly what the slower code it replaced produced.
"""

from __future__ import annotations

import json
import math
import struct
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from trimtab.engine.pairing import ReadingBuffer
from trimtab.errors import StateError
from trimtab.messages import Corrected
from trimtab.model.online import RidgeModel
from trimtab.model.terms import Scaler, TermSpec
from trimtab.store.journal import Journal, read_journal
from trimtab.wire.codec import JsonCodec, corrected_json, corrected_to_dict
from trimtab_sim.bench_wire import _frames, _varint, publish_packet
from trimtab_sim.broker import mosquitto_path

BIN = Path(sys.executable).parent

finite = st.floats(allow_nan=False, allow_infinity=False)
flags = st.lists(st.sampled_from(["warmup", "extrapolating", "stale", "held", "capped"]),
                 max_size=3, unique=True).map(tuple)
sensor_ids = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9._-]{0,20}", fullmatch=True).filter(
    lambda s: ".." not in s)


def _reference_json(c: Corrected) -> str:
    """The encoding the daemon used before: json.dumps of the flat dict."""
    return json.dumps(corrected_to_dict(c), allow_nan=False)


@pytest.mark.slow
class TestBenchQuick:
    def test_quick_bench_runs_and_loses_nothing(self, tmp_path: Path) -> None:
        """`trimtab-sim bench --quick` finishes, writes JSON, and every reading returns once."""
        if mosquitto_path() is None:
            pytest.skip("mosquitto binary not found on PATH")
        out = tmp_path / "bench.json"
        proc = subprocess.run(
            [str(BIN / "trimtab-sim"), "bench", "--quick", "-o", str(out),
             "--workdir", str(tmp_path / "work")],
            capture_output=True, text=True, timeout=600, check=False)
        assert proc.returncode == 0, proc.stderr[-3000:]
        result: dict[str, Any] = json.loads(out.read_text())
        runs = result["transport"]["runs"]
        assert {(r["target"], r["qos"], r["mode"]) for r in runs} == {
            (t, q, m) for t in ("echo", "daemon") for q in (0, 1)
            for m in ("throughput", "latency")}
        for r in runs:
            assert r["expected"] > 0
            assert (r["received"], r["lost"], r["duplicates"]) == (r["expected"], 0, 0), r
        assert result["verdicts"]["nothing_lost"]
        assert result["replay"]["events"] > 0
        assert result["restart"]["sensors"] == result["checkpoint"]["sensors"]
        assert all(row["traced"] > 0 for row in result["memory"])
        assert "| throughput QoS 1" in proc.stdout and "| restart," in proc.stdout


class TestCorrectedEncoding:
    @given(finite, sensor_ids, finite, finite, st.floats(min_value=0.0, allow_infinity=False),
           flags, st.integers(min_value=0, max_value=2**53))
    def test_same_text_as_json_dumps(self, t: float, sensor: str, value: float, raw: float,
                                     band: float, fl: tuple[str, ...], updates: int) -> None:
        """The hand-formatted corrected value is byte for byte what json.dumps wrote."""
        c = Corrected(t, sensor, value, raw, band, fl, updates)
        assert corrected_json(c) == _reference_json(c)
        assert JsonCodec().encode_corrected(c) == _reference_json(c).encode("utf-8")

    def test_signed_zero_and_extremes(self) -> None:
        """-0.0, subnormals and the largest float keep json's exact spelling."""
        for x in (-0.0, 5e-324, 1.7976931348623157e308, 1e16, 1e-7, 0.1 + 0.2):
            c = Corrected(x, "s-1", x, -x, abs(x), ("held",), 0)
            assert corrected_json(c) == _reference_json(c)

    def test_non_finite_still_refused(self) -> None:
        """A non-finite value is refused as before, naming the field."""
        c = Corrected(1.0, "s1", math.nan, 1.0, 0.0)
        with pytest.raises(ValueError, match="value"):
            corrected_json(c)


class TestPackedBuffer:
    @given(st.lists(st.tuples(st.floats(0, 1e6), finite, finite), min_size=0, max_size=40))
    def test_packed_round_trip_is_bit_exact(self, rows: list[tuple[float, float, float]]) -> None:
        """A buffer written packed reads back with the same bits as one written as a list."""
        buf = ReadingBuffer(["raw", "temp"], span=1e7, capacity=100)
        for t, a, b in sorted(rows):
            buf.add(t, [a, b])
        packed = ReadingBuffer.from_dict(json.loads(json.dumps(buf.to_dict(packed=True))))
        plain = ReadingBuffer.from_dict(json.loads(json.dumps(buf.to_dict())))
        bits = [struct.pack("<d", x) for x in plain.to_dict()["data"]]  # type: ignore[attr-defined]
        assert [struct.pack("<d", x) for x in packed.to_dict()["data"]] == bits  # type: ignore[attr-defined]

    @pytest.mark.parametrize(
        ("data", "message"),
        [("not base64!", "Base64"), ("AAAA", "8-byte"),
         ("AAAAAAAA8H8AAAAAAAAAAA==", "non-finite")],
    )
    def test_bad_packed_data_is_a_state_error(self, data: str, message: str) -> None:
        """Packed data that is not Base64, not whole numbers, or not finite is refused."""
        d = {**ReadingBuffer(["raw"], span=60.0, capacity=10).to_dict(), "data": data}
        with pytest.raises(StateError, match=message):
            ReadingBuffer.from_dict(d)


class TestJournalBatch:
    def test_append_many_writes_what_append_writes(self, tmp_path: Path) -> None:
        """One batched write leaves the same file as appending each record in turn."""
        records = [{"t": 1.0 + i, "sensor": f"s{i % 3}", "reading": {"raw": i / 7}}
                   for i in range(50)]
        with Journal.open(tmp_path / "a.log", "flush") as a:
            for r in records:
                a.append(r)
        with Journal.open(tmp_path / "b.log", "flush") as b:
            b.append_many(records)
            b.append_many([])
        assert (tmp_path / "a.log").read_bytes() == (tmp_path / "b.log").read_bytes()
        assert read_journal(tmp_path / "b.log")[0] == records


class TestModelFastPath:
    @given(st.lists(st.floats(-1e200, 1e200), min_size=3, max_size=3),
           st.floats(0, 1e9), st.sampled_from([None, 3.0]))
    def test_phi_matches_the_checked_path(self, x: list[float], t: float,
                                          clip: float | None) -> None:
        """The summed-finiteness shortcut gives the term-by-term path's features bit for bit."""
        spec = TermSpec(("raw", "temp", "rh"), products=(("raw", "temp"),), squares=("rh",),
                        elapsed=True)
        model = RidgeModel(spec, Scaler((1.0, -2.0, 0.5, 3.0, -0.0, 0.0),
                                        (2.0, 0.5, 1.0, 4.0, 3.0, 10.0)), clip=clip)
        inputs = dict(zip(spec.inputs, x, strict=True))
        row = spec.row(inputs, t, model.origin)
        try:
            expected = model._phi_checked(row, t)
        except Exception as exc:  # the fast path must fail the same way
            with pytest.raises(type(exc)):
                model.phi(inputs, t)
            return
        got = model.phi(inputs, t)
        assert [struct.pack("<d", v) for v in got[0]] == [struct.pack("<d", v)
                                                          for v in expected[0]]
        assert struct.pack("<d", got[1]) == struct.pack("<d", expected[1])


class TestWireFraming:
    @pytest.mark.parametrize(
        ("n", "encoded"),
        [(0, b"\x00"), (127, b"\x7f"), (128, b"\x80\x01"), (16_383, b"\xff\x7f"),
         (16_384, b"\x80\x80\x01"), (2_097_151, b"\xff\xff\x7f"),
         (268_435_455, b"\xff\xff\xff\x7f")],
    )
    def test_remaining_length(self, n: int, encoded: bytes) -> None:
        """Remaining Length bytes match the table of MQTT 3.1.1 (OASIS standard, §2.2.3)."""
        assert _varint(n) == encoded

    def test_packets_split_anywhere_reassemble(self) -> None:
        """PUBLISH packets cut at every byte boundary are parsed whole, in order, once."""
        stream = (publish_packet("a/b", b"x" * 200, 1, 7)
                  + publish_packet("c", b"{}", 0) + b"\x40\x02\x00\x07")
        for cut in range(len(stream) + 1):
            buf = bytearray(stream[:cut])
            frames, used = _frames(buf)
            del buf[:used]
            buf += stream[cut:]
            rest, used2 = _frames(buf)
            firsts = [f for f, _ in frames + rest]
            assert firsts == [0x32, 0x30, 0x40] and used2 == len(buf)
