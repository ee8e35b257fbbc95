"""Tests of the flat JSON and SenML payload codecs."""

from __future__ import annotations

import json
import math
import struct

import pytest
from hypothesis import given
from hypothesis import strategies as st

from trimtab.errors import ArgumentError, DecodeError, EncodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.wire.codec import (
    MAX_ABS,
    REASONS,
    Codec,
    JsonCodec,
    SenmlCodec,
    SenmlRecord,
    parse_json,
    resolve_senml,
)

# RFC 8428 §5.1 examples, copied from the RFC text (rfc8428.txt in the core-wg/senml-spec
# repository), not typed from memory.
RFC_5_1_1 = b'[{"n":"urn:dev:ow:10e2073a01080063","u":"Cel","v":23.1}]'
RFC_5_1_2_NOW = b"""[
  {"bn":"urn:dev:ow:10e2073a01080063:","n":"voltage","u":"V","v":120.1},
  {"n":"current","u":"A","v":1.2}
]"""
RFC_5_1_2_TIMED = b"""[
  {"bn":"urn:dev:ow:10e2073a0108006:","bt":1.276020076001e+09,
   "bu":"A","bver":5,
   "n":"voltage","u":"V","v":120.1},
  {"n":"current","t":-5,"v":1.2},
  {"n":"current","t":-4,"v":1.3},
  {"n":"current","t":-3,"v":1.4},
  {"n":"current","t":-2,"v":1.5},
  {"n":"current","t":-1,"v":1.6},
  {"n":"current","v":1.7}
]"""
RFC_5_1_3 = b"""[
  {"bn":"urn:dev:ow:10e2073a01080063","bt":1.320067464e+09,
   "bu":"%RH","v":20},
  {"u":"lon","v":24.30621},
  {"u":"lat","v":60.07965},
  {"t":60,"v":20.3},
  {"u":"lon","t":60,"v":24.30622},
  {"u":"lat","t":60,"v":60.07965},
  {"t":120,"v":20.7},
  {"u":"lon","t":120,"v":24.30623},
  {"u":"lat","t":120,"v":60.07966},
  {"u":"%EL","t":150,"v":98},
  {"t":180,"v":21.2},
  {"u":"lon","t":180,"v":24.30628},
  {"u":"lat","t":180,"v":60.07967}
]"""
RFC_5_1_4 = b"""[
  {"n":"urn:dev:ow:10e2073a01080063","u":"%RH","t":1.320067464e+09,"v":20},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lon","t":1.320067464e+09,"v":24.30621},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lat","t":1.320067464e+09,"v":60.07965},
  {"n":"urn:dev:ow:10e2073a01080063","u":"%RH","t":1.320067524e+09,"v":20.3},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lon","t":1.320067524e+09,"v":24.30622},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lat","t":1.320067524e+09,"v":60.07965},
  {"n":"urn:dev:ow:10e2073a01080063","u":"%RH","t":1.320067584e+09,"v":20.7},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lon","t":1.320067584e+09,"v":24.30623},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lat","t":1.320067584e+09,"v":60.07966},
  {"n":"urn:dev:ow:10e2073a01080063","u":"%EL","t":1.320067614e+09,"v":98},
  {"n":"urn:dev:ow:10e2073a01080063","u":"%RH","t":1.320067644e+09,"v":21.2},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lon","t":1.320067644e+09,"v":24.30628},
  {"n":"urn:dev:ow:10e2073a01080063","u":"lat","t":1.320067644e+09,"v":60.07967}
]"""
RFC_5_1_5 = b"""[
  {"bn":"urn:dev:ow:10e2073a01080063:","n":"temp","u":"Cel","v":23.1},
  {"n":"label","vs":"Machine Room"},
  {"n":"open","vb":false},
  {"n":"nfv-reader","vd":"aGkgCg"}
]"""
RFC_5_1_6 = b"""[
  {"bn":"2001:db8::2/","bt":1.320078429e+09,
   "n":"temperature","u":"Cel","v":25.2},
  {"n":"humidity","u":"%RH","v":30},
  {"bn":"2001:db8::1/","n":"temperature","u":"Cel","v":12.3},
  {"n":"humidity","u":"%RH","v":67}
]"""

T0 = 1767225600.0  # 2026-01-01T00:00:00Z

finite = st.floats(min_value=-MAX_ABS, max_value=MAX_ABS, allow_nan=False)
times = st.floats(min_value=2.0**28, max_value=4e9, allow_nan=False)
sensors = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9._-]{0,20}", fullmatch=True).filter(
    lambda s: ".." not in s
)
flags = st.lists(st.sampled_from(["warmup", "extrapolating", "stale", "held", "capped"]))
corrected = st.builds(
    Corrected,
    t=times,
    sensor=sensors,
    value=finite,
    raw=finite,
    band=st.floats(min_value=0.0, max_value=MAX_ABS),
    flags=flags.map(tuple),
    updates=st.integers(min_value=0, max_value=2**40),
)
json_values = st.recursive(
    st.none() | st.booleans() | st.floats(allow_nan=False, allow_infinity=False)
    | st.integers() | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner,
                                                                max_size=4),
    max_leaves=12,
)  # fmt: skip


def bits(x: float) -> bytes:
    """The IEEE 754 bytes of a float, to compare values bit for bit."""
    return struct.pack("<d", x)


def reason_of(call: object, *args: object) -> str:
    """The DecodeError reason a call raises (fails the test if it raises nothing)."""
    assert callable(call)
    with pytest.raises(DecodeError) as info:
        call(*args)
    assert info.value.reason in REASONS | {"bad_sensor_id"}
    assert info.value.detail
    return info.value.reason


class TestParseJson:
    @pytest.mark.parametrize("literal", [b"NaN", b"[Infinity]", b'{"v": -Infinity}'])
    def test_rejects_non_finite_literals(self, literal: bytes) -> None:
        """The NaN and Infinity literals Python's json accepts are refused as non_finite."""
        assert reason_of(parse_json, literal, 100) == "non_finite"

    def test_rejects_oversize(self) -> None:
        """A payload longer than the limit is refused before parsing."""
        with pytest.raises(DecodeError, match="oversize: payload is 11 bytes, more than the 10"):
            parse_json(b'"abcdefghi"', 10)

    @pytest.mark.parametrize(
        "payload", [b"{", b"\xff\xfe", b"[" * 5000, b"1" * 5000, b"", "\ufeff{}".encode()]
    )
    def test_rejects_bad_json(self, payload: bytes) -> None:
        """Truncated, non-UTF-8, too deep, too many digits, empty or BOM-led payloads fail."""
        assert reason_of(parse_json, payload, 65536) == "bad_json"

    def test_rejects_duplicate_keys(self) -> None:
        """An object with the same key twice is ambiguous and refused."""
        with pytest.raises(DecodeError, match="duplicate_field: field 'raw'"):
            parse_json(b'{"raw": 1, "raw": 2}', 100)


class TestJsonCodec:
    codec = JsonCodec(covariates={"temp": "temperature", "rh": "humidity"})

    def test_decodes_a_reading_with_covariates(self) -> None:
        """A flat reading yields raw plus each covariate under its input name."""
        r = self.codec.decode_reading(
            "no2-07", b'{"t": 1767225600, "raw": 41.2, "temperature": 21.4, "humidity": 55}'
        )
        assert (r.t, r.sensor, dict(r.inputs)) == (
            T0, "no2-07", {"raw": 41.2, "temp": 21.4, "rh": 55.0}
        )  # fmt: skip

    def test_absent_covariate_is_left_to_the_engine(self) -> None:
        """A reading without a configured covariate decodes without it (sensors differ)."""
        r = self.codec.decode_reading("co2-1", b'{"t": 1767225600, "raw": 612, "temperature": 19}')
        assert dict(r.inputs) == {"raw": 612.0, "temp": 19.0}
        assert JsonCodec(covariates={"temp": "temperature"}).decode_reading(
            "co2-1", self.codec.encode_reading(r)) == r

    def test_unknown_fields_are_refused(self) -> None:
        """A misspelt window or an unconfigured field is refused, never silently ignored."""
        assert reason_of(self.codec.decode_reference, "no2-07",
                         b'{"t": 1767225600, "value": 38.9, "windw": 60}') == "unknown_field"
        assert reason_of(self.codec.decode_reading, "no2-07",
                         b'{"t": 1767225600, "raw": 41.2, "temp": 21.4}') == "unknown_field"
        ref = self.codec.decode_reference("no2-07",
                                          b'{"t": 1767225600, "value": 38.9, "window": 60}')
        assert ref.window == 60.0

    def test_custom_field_names(self) -> None:
        """Configured field names are read instead of the defaults."""
        codec = JsonCodec(time_field="ts", value_field="ppb", reference_field="ref",
                          window_field="avg_s")  # fmt: skip
        assert codec.decode_reading("s1", b'{"ts": 1767225600, "ppb": 3}').inputs == {"raw": 3.0}
        ref = codec.decode_reference("s1", b'{"ts": 1767225600, "ref": 2.5, "avg_s": 60}')
        assert (ref.value, ref.window) == (2.5, 60.0)

    @pytest.mark.parametrize(
        ("t", "expected"),
        [
            ('"2026-01-01T00:00:00Z"', T0),
            ('"2026-01-01T01:30:00+01:30"', T0),
            ('"2025-12-31T19:00:00.5-05:00"', T0 + 0.5),
            ("1767225600.25", T0 + 0.25),
        ],
    )
    def test_times_epoch_or_iso_with_zone(self, t: str, expected: float) -> None:
        """Epoch seconds and ISO 8601 strings with 'Z' or an offset give the same instant."""
        payload = f'{{"t": {t}, "value": 38.9}}'.encode()
        assert self.codec.decode_reference("ref-1", payload).t == expected

    def test_reference_window_is_optional_and_null_means_none(self) -> None:
        """A reference without a window, or with a null one, is a spot value."""
        assert self.codec.decode_reference("r", b'{"t": 1767225600, "value": 1}').window is None
        payload = b'{"t": 1767225600, "value": 1, "window": null}'
        assert self.codec.decode_reference("r", payload).window is None

    @pytest.mark.parametrize(
        ("payload", "reason", "detail"),
        [
            (b"[1]", "not_object", "payload must be a JSON object, got array"),
            (b'{"t": 1767225600, "temperature": 1}', "missing_field", "'raw' is missing"),
            (b'{"raw": 1, "temperature": 2, "humidity": 3}', "missing_field", "'t' is missing"),
            (b'{"t": 1767225600, "raw": "1", "temperature": 2, "humidity": 3}', "wrong_type",
             "field 'raw' must be a number, got string"),
            (b'{"t": 1767225600, "raw": true, "temperature": 2, "humidity": 3}', "wrong_type",
             "got boolean"),
            (b'{"t": 1767225600, "raw": 1e400, "temperature": 2, "humidity": 3}', "non_finite",
             "field 'raw' is inf"),
            (b'{"t": 1767225600, "raw": 2e12, "temperature": 2, "humidity": 3}', "out_of_range",
             "field 'raw' = 2000000000000.0 exceeds"),
            (b'{"t": 1' + b"0" * 400 + b', "raw": 1, "temperature": 2, "humidity": 3}',
             "out_of_range", "too large for a float"),
            (b'{"t": "2026-01-01T00:00:00", "raw": 1, "temperature": 2, "humidity": 3}',
             "bad_time", "has no zone"),
            (b'{"t": "yesterday", "raw": 1, "temperature": 2, "humidity": 3}', "bad_time",
             "not an ISO 8601 time"),
            (b'{"t": -1, "raw": 1, "temperature": 2, "humidity": 3}', "bad_time", "outside"),
            (b'{"t": "0001-01-01T00:00:00+05:00", "raw": 1, "temperature": 2, "humidity": 3}',
             "bad_time", "outside"),
            (b'{"t": null, "raw": 1, "temperature": 2, "humidity": 3}', "wrong_type", "null"),
        ],
    )  # fmt: skip
    def test_reading_rejections(self, payload: bytes, reason: str, detail: str) -> None:
        """Each malformed reading fails with its reason and a detail naming the field."""
        with pytest.raises(DecodeError) as info:
            self.codec.decode_reading("no2-07", payload)
        assert info.value.reason == reason
        assert detail in info.value.detail

    @pytest.mark.parametrize(
        ("payload", "reason"),
        [
            (b'{"t": 1767225600, "value": 1, "window": 0}', "bad_window"),
            (b'{"t": 1767225600, "value": 1, "window": -60}', "bad_window"),
            (b'{"t": 1767225600, "value": 1, "window": "1h"}', "wrong_type"),
            (b'{"t": 1767225600}', "missing_field"),
        ],
    )
    def test_reference_rejections(self, payload: bytes, reason: str) -> None:
        """A bad window or a missing value fails with its reason."""
        assert reason_of(self.codec.decode_reference, "r", payload) == reason

    def test_rejects_a_bad_sensor_from_the_caller(self) -> None:
        """The sensor id is checked even when handed over by the caller."""
        assert reason_of(self.codec.decode_reading, "../x", b"{}") == "bad_sensor_id"

    @pytest.mark.parametrize(
        "kwargs",
        [
            {"value_field": ""},
            {"time_field": "raw"},
            {"covariates": {"raw": "x"}},
            {"covariates": {"temp": "raw"}},
            {"max_bytes": 0},
        ],
    )
    def test_refuses_inconsistent_construction(self, kwargs: dict[str, object]) -> None:
        """Empty or clashing field names and a useless size limit are refused at construction."""
        with pytest.raises(ArgumentError):
            JsonCodec(**kwargs)  # type: ignore[arg-type]

    def test_corrected_has_the_design_fields(self) -> None:
        """The corrected object carries exactly the field names of the design's output."""
        c = Corrected(T0, "no2-07", 39.4, 41.2, 1.8, (), 57)
        assert json.loads(self.codec.encode_corrected(c)) == {
            "t": T0, "sensor": "no2-07", "value": 39.4, "raw": 41.2, "band": 1.8,
            "flags": [], "updates": 57,
        }  # fmt: skip

    def test_corrected_refuses_non_finite(self) -> None:
        """A non-finite corrected value is a programming error, refused rather than written."""
        with pytest.raises(EncodeError, match="band"):
            self.codec.encode_corrected(Corrected(T0, "s", 1.0, 1.0, math.inf))

    @pytest.mark.parametrize(
        ("change", "reason"),
        [
            ({"flags": "warmup"}, "wrong_type"),
            ({"flags": ["Warm Up"]}, "bad_flag"),
            ({"flags": [1]}, "wrong_type"),
            ({"updates": -1}, "out_of_range"),
            ({"updates": 1.5}, "wrong_type"),
            ({"band": -0.1}, "out_of_range"),
            ({"sensor": 5}, "wrong_type"),
            ({"sensor": "a/b"}, "bad_sensor_id"),
        ],
    )
    def test_corrected_rejections(self, change: dict[str, object], reason: str) -> None:
        """A corrected object with a bad field fails with its reason."""
        obj = {"t": T0, "sensor": "s", "value": 1.0, "raw": 1.0, "band": 0.5, "flags": [],
               "updates": 3, **change}  # fmt: skip
        assert reason_of(self.codec.decode_corrected, json.dumps(obj).encode()) == reason


class TestSenmlResolve:
    def test_rfc_5_1_3_resolves_to_rfc_5_1_4(self) -> None:
        """RFC 8428 §5.1.3 resolves to exactly the records §5.1.4 lists (name, unit, time, v)."""
        got = [(r.name, r.unit, r.time, r.value) for r in resolve_senml(json.loads(RFC_5_1_3))]
        want = [(r["n"], r["u"], r["t"], r["v"]) for r in json.loads(RFC_5_1_4)]
        assert got == want

    def test_rfc_5_1_2_base_time_plus_time(self) -> None:
        """RFC 8428 §5.1.2 (timed): current at bt - 5 ... bt, voltage at bt, unit from bu."""
        recs = resolve_senml(json.loads(RFC_5_1_2_TIMED))
        bt = 1.276020076001e09
        assert [r.time for r in recs] == [bt, bt - 5, bt - 4, bt - 3, bt - 2, bt - 1, bt]
        assert [r.unit for r in recs] == ["V"] + ["A"] * 6
        assert recs[1].name == "urn:dev:ow:10e2073a0108006:current"
        assert [r.value for r in recs[1:]] == [1.2, 1.3, 1.4, 1.5, 1.6, 1.7]

    def test_rfc_5_1_6_base_name_changes_base_time_stays(self) -> None:
        """RFC 8428 §5.1.6: the last record takes the third's base name and the first's time."""
        recs = resolve_senml(json.loads(RFC_5_1_6))
        assert [r.name for r in recs] == [
            "2001:db8::2/temperature", "2001:db8::2/humidity",
            "2001:db8::1/temperature", "2001:db8::1/humidity",
        ]  # fmt: skip
        assert {r.time for r in recs} == {1.320078429e09}

    @pytest.mark.parametrize("example", [RFC_5_1_1, RFC_5_1_2_NOW, RFC_5_1_5])
    def test_rfc_examples_at_now_are_relative(self, example: bytes) -> None:
        """RFC 8428 §5.1.1, §5.1.2 and §5.1.5 have no time (i.e. "now"), which trimtab refuses."""
        assert reason_of(resolve_senml, json.loads(example)) == "relative_time"

    def test_other_value_kinds_resolve(self) -> None:
        """RFC 8428 §5.1.5 with a base time added resolves its string, boolean and data values."""
        pack = json.loads(RFC_5_1_5)
        pack[0]["bt"] = T0
        recs = resolve_senml(pack)
        assert recs[1:] == [
            SenmlRecord("urn:dev:ow:10e2073a01080063:label", "label", T0,
                        string_value="Machine Room"),
            SenmlRecord("urn:dev:ow:10e2073a01080063:open", "open", T0, bool_value=False),
            SenmlRecord("urn:dev:ow:10e2073a01080063:nfv-reader", "nfv-reader", T0,
                        data_value="aGkgCg"),
        ]  # fmt: skip

    def test_base_value_is_added(self) -> None:
        """RFC 8428 §4.5.4: the value is Base Value plus Value."""
        recs = resolve_senml([{"bn": "s:", "bt": T0, "bv": 100.0, "n": "raw", "v": 1.5}])
        assert recs[0].value == 101.5

    @pytest.mark.parametrize(
        ("pack", "reason", "detail"),
        [
            ({"n": "raw"}, "not_array", "got object"),
            ([1], "not_object", "record 0 must be a JSON object"),
            ([{"bt": T0, "n": "raw", "v": 1, "x_": 1}], "unsupported_field", "'x_'"),
            ([{"bt": T0, "bver": 11, "n": "raw", "v": 1}], "unsupported_version", "11"),
            ([{"bt": T0, "n": "a", "v": 1}, {"bver": 5, "n": "b", "v": 2}],
             "unsupported_version", "record 1: version 5 != 10"),
            ([{"bt": T0, "bver": 5.0, "n": "raw", "v": 1}], "wrong_type", "'bver'"),
            ([{"bt": "now", "n": "raw", "v": 1}], "wrong_type", "record 0: 'bt'"),
            ([{"bt": T0, "n": "raw", "vb": 1}], "wrong_type", "'vb'"),
            ([{"bt": T0, "n": 3, "v": 1}], "wrong_type", "'n'"),
            ([{"bt": T0, "n": "raw", "v": 1, "vs": "1"}], "bad_record", "several value fields"),
            ([{"bt": T0, "n": "a b", "v": 1}], "bad_name", "'a b'"),
            ([{"bt": T0, "v": 1}], "bad_name", "''"),
            ([{"bt": T0, "n": "raw", "t": -T0, "v": 1}], "relative_time", "record 0 ('raw')"),
            ([{"bt": 1e300, "n": "raw", "t": 1e300, "v": 1}], "bad_time", "outside"),
            ([{"bt": 1.7e308, "n": "raw", "t": 1.7e308, "v": 1}], "non_finite", "time is inf"),
            ([{"bt": T0, "bv": 1.7e308, "n": "raw", "v": 1.7e308}], "non_finite", "value"),
        ],
    )  # fmt: skip
    def test_rejections(self, pack: object, reason: str, detail: str) -> None:
        """Each malformed pack fails with its reason and a detail naming the record."""
        with pytest.raises(DecodeError) as info:
            resolve_senml(pack)
        assert info.value.reason == reason
        assert detail in info.value.detail


def pack(*records: dict[str, object]) -> bytes:
    """A SenML pack's bytes."""
    return json.dumps(list(records)).encode()


class TestSenmlCodec:
    codec = SenmlCodec(covariates={"temp": "temperature"})

    def test_rfc_5_1_2_voltage_as_reading(self) -> None:
        """RFC 8428 §5.1.2 (timed) read with value name 'voltage' gives 120.1 at the base time."""
        r = SenmlCodec(value_name="voltage").decode_reading("dev", RFC_5_1_2_TIMED)
        assert (r.t, dict(r.inputs)) == (1.276020076001e09, {"raw": 120.1})

    def test_rfc_5_1_2_several_currents_are_ambiguous(self) -> None:
        """RFC 8428 §5.1.2 (timed) holds six 'current' records: one reading a pack is refused."""
        codec = SenmlCodec(value_name="current")
        with pytest.raises(DecodeError, match=r"duplicate_name: records \[1, 2, 3, 4, 5, 6\]"):
            codec.decode_reading("dev", RFC_5_1_2_TIMED)

    def test_absent_covariate_is_left_to_the_engine(self) -> None:
        """A pack without the covariate's record decodes to the raw value alone."""
        r = self.codec.decode_reading("co2-1", pack({"bt": T0, "n": "raw", "v": 612}))
        assert dict(r.inputs) == {"raw": 612.0}
        assert self.codec.decode_reading("co2-1", self.codec.encode_reading(r)) == r

    def test_reading_with_base_name_and_covariate(self) -> None:
        """Records are matched on the part after the base name; covariates by their names."""
        r = self.codec.decode_reading("no2-07", pack(
            {"bn": "urn:dev:no2-07:", "bt": T0, "n": "raw", "u": "ppb", "v": 41.2},
            {"n": "temperature", "u": "Cel", "v": 21.4},
            {"n": "label", "vs": "roof"},
        ))  # fmt: skip
        assert (r.t, r.sensor, dict(r.inputs)) == (T0, "no2-07", {"raw": 41.2, "temp": 21.4})

    def test_resolved_names_match_on_last_segment(self) -> None:
        """A resolved pack (no base name) matches on the last ':' or '/' segment of the name."""
        r = self.codec.decode_reading("no2-07", pack(
            {"n": "site/no2-07:raw", "t": T0, "v": 1.0},
            {"n": "site/no2-07:temperature", "t": T0, "v": 2.0},
        ))  # fmt: skip
        assert dict(r.inputs) == {"raw": 1.0, "temp": 2.0}

    def test_reference_with_window(self) -> None:
        """A reference pack gives the value and the window record's value."""
        ref = self.codec.decode_reference("ref-1", pack(
            {"bn": "ref-1:", "bt": T0, "n": "value", "v": 38.9}, {"n": "window", "v": 3600},
        ))  # fmt: skip
        assert (ref.t, ref.value, ref.window) == (T0, 38.9, 3600.0)
        spot = self.codec.decode_reference("ref-1", pack({"bt": T0, "n": "value", "v": 1}))
        assert spot.window is None

    @pytest.mark.parametrize(
        ("payload", "reason", "detail"),
        [
            (pack({"bt": T0, "n": "temperature", "v": 1}), "missing_field", "'raw'"),
            (pack({"bt": T0, "n": "raw", "v": 1}, {"n": "temperature", "t": 1, "v": 2}),
             "time_mismatch", "different times"),
            (pack({"bt": T0, "n": "raw", "vs": "1"}, {"n": "temperature", "v": 2}),
             "wrong_type", "record 'raw' must carry a number"),
            (pack({"bt": T0, "n": "raw", "s": 5}, {"n": "temperature", "v": 2}),
             "missing_field", "record 'raw' has no value"),
            (pack({"bt": T0, "n": "raw", "v": -2e12}, {"n": "temperature", "v": 2}),
             "out_of_range", "record 'raw' value"),
            (b'{"bt": 1}', "not_array", "JSON array"),
            (b"[" + b" " * 70000 + b"]", "oversize", "more than the 65536"),
        ],
    )  # fmt: skip
    def test_reading_rejections(self, payload: bytes, reason: str, detail: str) -> None:
        """Each unusable reading pack fails with its reason and a detail naming the record."""
        with pytest.raises(DecodeError) as info:
            self.codec.decode_reading("no2-07", payload)
        assert info.value.reason == reason
        assert detail in info.value.detail

    def test_reference_rejects_a_bad_window(self) -> None:
        """A window record of zero seconds is refused as bad_window."""
        payload = pack({"bt": T0, "n": "value", "v": 1}, {"n": "window", "v": 0})
        assert reason_of(self.codec.decode_reference, "r", payload) == "bad_window"

    def test_corrected_pack_layout(self) -> None:
        """A corrected value is a pack with bn = sensor + ':' and bt = its time."""
        c = Corrected(T0, "no2-07", 39.4, 41.2, 1.8, ("warmup", "stale"), 57)
        assert json.loads(self.codec.encode_corrected(c)) == [
            {"bn": "no2-07:", "bt": T0, "n": "value", "v": 39.4},
            {"n": "raw", "v": 41.2},
            {"n": "band", "v": 1.8},
            {"n": "flags", "vs": "warmup,stale"},
            {"n": "updates", "v": 57},
        ]

    def test_corrected_refuses_a_relative_time(self) -> None:
        """A time below 2**28 cannot be written, since SenML would read it as relative."""
        with pytest.raises(EncodeError, match="relative"):
            self.codec.encode_corrected(Corrected(1000.0, "s", 1.0, 1.0, 0.0))

    def test_corrected_rejects_mixed_sensors(self) -> None:
        """A corrected pack whose records name two sensors is refused as bad_name."""
        payload = pack(
            {"bn": "a:", "bt": T0, "n": "value", "v": 1}, {"n": "raw", "v": 1},
            {"n": "band", "v": 1}, {"n": "flags", "vs": ""},
            {"bn": "b:", "n": "updates", "v": 1},
        )  # fmt: skip
        assert reason_of(self.codec.decode_corrected, payload) == "bad_name"

    @pytest.mark.parametrize(
        "kwargs",
        [{"value_name": "a:b"}, {"reference_name": "x/y"}, {"window_name": "value"},
         {"covariates": {"temp": "raw"}}, {"covariates": {"raw": "t"}}],
    )  # fmt: skip
    def test_refuses_inconsistent_construction(self, kwargs: dict[str, object]) -> None:
        """Names with separators or clashing names are refused at construction."""
        with pytest.raises(ArgumentError):
            SenmlCodec(**kwargs)  # type: ignore[arg-type]


CODECS: list[Codec] = [JsonCodec(), SenmlCodec()]
WITH_COVARIATES: list[Codec] = [
    JsonCodec(covariates={"temp": "temperature", "rh": "humidity"}),
    SenmlCodec(covariates={"temp": "temperature", "rh": "humidity"}),
]
readings = st.builds(
    Reading,
    t=times,
    sensor=sensors,
    inputs=st.fixed_dictionaries({"raw": finite, "temp": finite, "rh": finite}),
)
references = st.builds(
    Reference,
    t=times,
    sensor=sensors,
    value=finite,
    window=st.none() | st.floats(min_value=1e-3, max_value=1e6),
)


class TestCodecContract:
    @pytest.mark.parametrize("codec", WITH_COVARIATES, ids=["json", "senml"])
    @given(e=readings | references)
    def test_events_round_trip_bit_exactly(self, codec: Codec, e: Reading | Reference) -> None:
        """Encoding then decoding a reading or reference gives it back with identical bits."""
        if isinstance(e, Reading):
            back: Reading | Reference = codec.decode_reading(e.sensor, codec.encode_reading(e))
            assert isinstance(back, Reading)
            assert [bits(back.inputs[k]) for k in e.inputs] == [bits(v) for v in e.inputs.values()]
        else:
            back = codec.decode_reference(e.sensor, codec.encode_reference(e))
        assert back == e
        assert bits(back.t) == bits(e.t)

    @pytest.mark.parametrize("codec", WITH_COVARIATES, ids=["json", "senml"])
    def test_encode_reading_needs_the_raw_value(self, codec: Codec) -> None:
        """A reading without its raw value cannot be encoded; absent covariates are left out."""
        with pytest.raises(EncodeError, match="no input 'raw'"):
            codec.encode_reading(Reading(T0, "s", {"temp": 2.0}))
        partial = Reading(T0, "s", {"raw": 1.0, "temp": 2.0})
        assert codec.decode_reading("s", codec.encode_reading(partial)) == partial

    @pytest.mark.parametrize("codec", CODECS, ids=["json", "senml"])
    @given(c=corrected)
    def test_corrected_round_trips_bit_exactly(self, codec: Codec, c: Corrected) -> None:
        """Encoding then decoding a corrected value gives it back with identical float bits."""
        back = codec.decode_corrected(codec.encode_corrected(c))
        assert back == c
        for name in ("t", "value", "raw", "band"):
            assert bits(getattr(back, name)) == bits(getattr(c, name))

    @pytest.mark.parametrize("codec", CODECS, ids=["json", "senml"])
    @given(payload=st.binary(max_size=200))
    def test_arbitrary_bytes_only_raise_decode_error(self, codec: Codec, payload: bytes) -> None:
        """Any bytes decode or fail with a DecodeError carrying a known reason, nothing else."""
        for call in (
            lambda: codec.decode_reading("s", payload),
            lambda: codec.decode_reference("s", payload),
            lambda: codec.decode_corrected(payload),
        ):
            try:
                call()
            except DecodeError as exc:
                assert exc.reason in REASONS
                assert exc.detail

    @pytest.mark.parametrize("codec", CODECS, ids=["json", "senml"])
    @given(doc=json_values)
    def test_arbitrary_json_only_raises_decode_error(self, codec: Codec, doc: object) -> None:
        """Any JSON document decodes or fails with a DecodeError with a known reason."""
        payload = json.dumps(doc).encode()
        for call in (
            lambda: codec.decode_reading("s", payload),
            lambda: codec.decode_reference("s", payload),
            lambda: codec.decode_corrected(payload),
        ):
            try:
                call()
            except DecodeError as exc:
                assert exc.reason in REASONS

    @given(
        recs=st.lists(
            st.fixed_dictionaries(
                {},
                optional={
                    "bn": st.sampled_from(["s:", "x/", "", "a b"]),
                    "bt": st.sampled_from([T0, 0.0, -5.0, 1e300]) | st.floats(),
                    "bver": st.sampled_from([10, 5, 11, 0, True]),
                    "bv": st.floats(width=64) | st.integers(),
                    "n": st.sampled_from(["raw", "value", "window", "temperature", ""]),
                    "t": st.floats() | st.integers(min_value=-(10**400), max_value=10**400),
                    "v": st.floats() | st.integers() | st.text(max_size=3),
                    "vs": st.text(max_size=3),
                    "vb": st.booleans() | st.integers(),
                    "z_": st.none(),
                },
            ),
            max_size=5,
        )
    )
    def test_structured_senml_only_raises_decode_error(self, recs: list[dict[str, object]]) -> None:
        """Packs built from SenML fields with odd values decode or fail with a known reason."""
        payload = json.dumps(recs).encode()  # may hold NaN/Infinity literals: refused too
        codec = SenmlCodec(covariates={"temp": "temperature"})
        for call in (
            lambda: codec.decode_reading("s", payload),
            lambda: codec.decode_reference("s", payload),
        ):
            try:
                result = call()
            except DecodeError as exc:
                assert exc.reason in REASONS
            else:
                assert math.isfinite(result.t) and result.t >= 2**28
