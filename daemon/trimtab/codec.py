"""Payload codecs: flat JSON objects and SenML packs (RFC 8428) to and from messages.

Both codecs share one strict reading of JSON: UTF-8 only, at most ``max_bytes``, no ``NaN`` or
``Infinity`` literals, no duplicate keys, no number that overflows to infinity. Times are event
times in epoch seconds (UTC): a number, or in flat JSON also an ISO 8601 string with a zone.
Every rejection is a ``DecodeError`` whose ``reason`` is one of ``REASONS`` and whose ``detail``
names the field (and, in SenML, the record index) at fault.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Protocol

from trimtab.errors import DecodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.topics import validate_sensor_id

__all__ = [
    "CORRECTED_FIELDS",
    "MAX_ABS",
    "MAX_TIME",
    "REASONS",
    "SENML_VERSION",
    "Codec",
    "JsonCodec",
    "SenmlCodec",
    "SenmlRecord",
    "corrected_from_obj",
    "corrected_json",
    "corrected_to_dict",
    "need",
    "parse_json",
    "resolve_senml",
    "to_number",
    "to_time",
    "to_value",
    "to_window",
]

MAX_ABS = 1e12
"""Largest magnitude accepted for a value; beyond it a payload is ``out_of_range``."""

MAX_TIME = 253402300800.0
"""Event times must be below this (year 10000) and not negative."""

SENML_VERSION = 10
"""The SenML version this decoder understands (RFC 8428 §4.1: the default when absent)."""

_SENML_RELATIVE = 2.0**28  # RFC 8428 §4.5.3: resolved times below this are relative to "now"
_SENML_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9:./_-]*")  # RFC 8428 §4.5.1
_FLAG = re.compile(r"[a-z][a-z0-9_]*")

CORRECTED_FIELDS = ("t", "sensor", "value", "raw", "band", "flags", "updates")
"""The fields of a corrected value, in the order they are written."""

REASONS = frozenset({
    "bad_flag", "bad_json", "bad_name", "bad_record", "bad_sensor_id", "bad_time",
    "bad_window", "duplicate_field", "duplicate_name", "missing_field", "non_finite",
    "not_array", "not_object", "out_of_range", "oversize", "relative_time", "time_mismatch",
    "unsupported_field", "unsupported_version", "wrong_type",
})  # fmt: skip
"""Every ``DecodeError.reason`` the codecs raise (``bad_sensor_id`` comes from ``topics``)."""


class Codec(Protocol):
    """What the service needs of a payload codec; JSON and SenML are interchangeable."""

    def decode_reading(self, sensor: str, payload: bytes | bytearray) -> Reading: ...
    def decode_reference(self, sensor: str, payload: bytes | bytearray) -> Reference: ...
    def encode_corrected(self, c: Corrected) -> bytes: ...
    def decode_corrected(self, payload: bytes | bytearray) -> Corrected: ...
    def encode_reading(self, r: Reading) -> bytes: ...
    def encode_reference(self, ref: Reference) -> bytes: ...


# --- strict JSON and field checks (shared with the stream files) --------------------------


def _kind(x: object) -> str:
    """The JSON name of a parsed value's type, for error details."""
    if x is None:
        return "null"
    if isinstance(x, bool):
        return "boolean"
    if isinstance(x, int | float):
        return "number"
    if isinstance(x, str):
        return "string"
    return "array" if isinstance(x, list) else "object" if isinstance(x, dict) else "value"


def _reject_constant(name: str) -> object:
    raise DecodeError("non_finite", f"the literal {name} is not a JSON number")


def _unique_keys(pairs: list[tuple[str, object]]) -> dict[str, object]:
    obj = dict(pairs)
    if len(obj) != len(pairs):  # a key came twice: name the first repeated one
        seen: set[str] = set()
        for key, _ in pairs:
            if key in seen:
                raise DecodeError("duplicate_field", f"field {key!r} appears more than once")
            seen.add(key)
    return obj


# Built once: json.loads() with hooks would build a new decoder for every payload.
_DECODER = json.JSONDecoder(parse_constant=_reject_constant, object_pairs_hook=_unique_keys)
_ENCODER = json.JSONEncoder(allow_nan=False)


def parse_json(payload: bytes | bytearray | str, max_bytes: int) -> object:
    """Parse one JSON text strictly; raise ``DecodeError`` (oversize, bad_json, ...) if not."""
    if isinstance(payload, bytearray):
        payload = bytes(payload)
    if isinstance(payload, bytes) or 4 * len(payload) <= max_bytes:
        size = len(payload)  # a str of n characters is at most 4n bytes of UTF-8
    else:
        size = len(payload.encode("utf-8", "replace"))
    if size > max_bytes:
        raise DecodeError("oversize", f"payload is {size} bytes, more than the {max_bytes} allowed")
    if isinstance(payload, bytes):
        try:
            payload = payload.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise DecodeError("bad_json", f"payload is not UTF-8 (byte {exc.start})") from exc
    try:
        return _DECODER.decode(payload)
    except RecursionError as exc:
        raise DecodeError("bad_json", "payload is nested too deeply") from exc
    except ValueError as exc:  # JSONDecodeError, and integers with too many digits
        raise DecodeError("bad_json", str(exc)) from exc


def need(obj: Mapping[str, object], key: str, where: str = "") -> object:
    """``obj[key]``, or ``DecodeError("missing_field")`` naming it."""
    try:
        return obj[key]
    except KeyError:
        raise DecodeError("missing_field", f"{where}field {key!r} is missing") from None


def to_number(x: object, where: str) -> float:
    """A finite float from a JSON number (not a boolean); ``where`` names it in errors."""
    if type(x) is float and x - x == 0.0:  # the common case: a finite float, as it is
        return x
    if isinstance(x, bool) or not isinstance(x, int | float):
        raise DecodeError("wrong_type", f"{where} must be a number, got {_kind(x)}")
    try:
        value = float(x)
    except OverflowError:
        raise DecodeError("out_of_range", f"{where} is too large for a float") from None
    if not math.isfinite(value):
        raise DecodeError("non_finite", f"{where} is {value}")
    return value


def to_value(x: object, where: str) -> float:
    """A measured value: a finite number with magnitude at most ``MAX_ABS``."""
    if type(x) is float and -MAX_ABS <= x <= MAX_ABS:  # finite and in range, as it is
        return x
    value = to_number(x, where)
    if abs(value) > MAX_ABS:
        raise DecodeError("out_of_range", f"{where} = {value!r} exceeds ±{MAX_ABS:g}")
    return value


def _check_time(t: float, where: str) -> float:
    if not 0.0 <= t < MAX_TIME:
        raise DecodeError("bad_time", f"{where} = {t!r} is outside [0, {MAX_TIME:.0f}) seconds")
    return t


def to_time(x: object, where: str) -> float:
    """Event time in epoch seconds from a number or an ISO 8601 string with a zone."""
    if not isinstance(x, str):
        return _check_time(to_number(x, where), where)
    if len(x) > 64 or not x.isascii():
        raise DecodeError("bad_time", f"{where} {x[:64]!r} is not an ISO 8601 time")
    try:
        stamp = datetime.fromisoformat(x)
    except ValueError:
        raise DecodeError("bad_time", f"{where} {x!r} is not an ISO 8601 time") from None
    if stamp.tzinfo is None or stamp.utcoffset() is None:
        raise DecodeError("bad_time", f"{where} {x!r} has no zone; add 'Z' or an offset")
    try:
        return _check_time(stamp.timestamp(), where)
    except (OverflowError, ValueError):
        raise DecodeError("bad_time", f"{where} {x!r} is outside the epoch range") from None


def to_window(x: object, where: str) -> float | None:
    """An averaging window in seconds: ``None`` for JSON null, else a finite number > 0."""
    if x is None:
        return None
    window = to_value(x, where)
    if window <= 0.0:
        raise DecodeError("bad_window", f"{where} = {window!r} must be > 0 seconds")
    return window


def _as_object(x: object, what: str) -> dict[str, object]:
    if not isinstance(x, dict):
        raise DecodeError("not_object", f"{what} must be a JSON object, got {_kind(x)}")
    return x


def _check_flag(flag: object, where: str) -> str:
    if not isinstance(flag, str):
        raise DecodeError("wrong_type", f"{where} must be a string, got {_kind(flag)}")
    if _FLAG.fullmatch(flag) is None:
        raise DecodeError("bad_flag", f"{where} {flag[:64]!r} is not a snake_case word")
    return flag


def _to_count(x: object, where: str) -> int:
    if isinstance(x, float) and x.is_integer():
        x = int(x)
    if isinstance(x, bool) or not isinstance(x, int):
        raise DecodeError("wrong_type", f"{where} must be a whole number, got {_kind(x)}")
    if not 0 <= x <= 2**53:
        raise DecodeError("out_of_range", f"{where} = {x} is outside [0, 2**53]")
    return x


def corrected_to_dict(c: Corrected) -> dict[str, object]:
    """The flat form of a corrected value; ``ValueError`` if a number is not finite."""
    for name in ("t", "value", "raw", "band"):
        if not math.isfinite(getattr(c, name)):
            raise ValueError(f"corrected {name} for {c.sensor!r} is not finite; not encodable")
    return {
        "t": float(c.t), "sensor": c.sensor, "value": float(c.value), "raw": float(c.raw),
        "band": float(c.band), "flags": list(c.flags), "updates": int(c.updates),
    }  # fmt: skip


_JSON_STRINGS: dict[str, str] = {}
_JSON_FLAGS: dict[tuple[str, ...], str] = {}
_MEMO_LIMIT = 4096


def _memo_json(memo: dict[Any, str], key: Any, value: object) -> str:
    text = memo.get(key)
    if text is None:
        text = _ENCODER.encode(value)
        if len(memo) < _MEMO_LIMIT:
            memo[key] = text
    return text


def corrected_json(c: Corrected) -> str:
    """``json.dumps(corrected_to_dict(c), allow_nan=False)``, the same text, made faster.

    json writes a float as ``float.__repr__`` and an int as ``int.__repr__``; for exact
    floats and ints this formats them the same way and caches the encoded sensor id and
    flags. Anything else (a non-finite number, a subclass) takes the ``json`` path.
    """
    t, value, raw, band, updates = c.t, c.value, c.raw, c.band, c.updates
    if (type(t) is float and type(value) is float and type(raw) is float
            and type(band) is float and type(updates) is int
            and t - t == 0.0 and value - value == 0.0 and raw - raw == 0.0
            and band - band == 0.0 and type(c.flags) is tuple):
        sensor = _memo_json(_JSON_STRINGS, c.sensor, c.sensor)
        flags = _memo_json(_JSON_FLAGS, c.flags, list(c.flags))
        return (f'{{"t": {t!r}, "sensor": {sensor}, "value": {value!r}, "raw": {raw!r}, '
                f'"band": {band!r}, "flags": {flags}, "updates": {updates!r}}}')
    return _ENCODER.encode(corrected_to_dict(c))


def corrected_from_obj(x: object) -> Corrected:
    """A ``Corrected`` from its parsed flat form, with every field checked."""
    obj = _as_object(x, "corrected value")
    flags = need(obj, "flags")
    if not isinstance(flags, list):
        raise DecodeError("wrong_type", f"field 'flags' must be an array, got {_kind(flags)}")
    band = to_value(need(obj, "band"), "field 'band'")
    if band < 0.0:
        raise DecodeError("out_of_range", f"field 'band' = {band!r} must be >= 0")
    return Corrected(
        t=to_time(need(obj, "t"), "field 't'"),
        sensor=_sensor_field(need(obj, "sensor")),
        value=to_value(need(obj, "value"), "field 'value'"),
        raw=to_value(need(obj, "raw"), "field 'raw'"),
        band=band,
        flags=tuple(_check_flag(f, f"flags[{i}]") for i, f in enumerate(flags)),
        updates=_to_count(need(obj, "updates"), "field 'updates'"),
    )


def _sensor_field(x: object) -> str:
    if not isinstance(x, str):
        raise DecodeError("wrong_type", f"field 'sensor' must be a string, got {_kind(x)}")
    return validate_sensor_id(x)


def _check_names(names: list[str], what: str, pattern: re.Pattern[str] | None = None) -> None:
    for name in names:
        if not isinstance(name, str) or not name:
            raise ValueError(f"{what}: every name must be a non-empty string, got {name!r}")
        if pattern is not None and pattern.fullmatch(name) is None:
            raise ValueError(f"{what}: {name!r} must match {pattern.pattern}")
    if len(set(names)) != len(names):
        raise ValueError(f"{what}: names must be distinct, got {names}")


def _input_of(r: Reading, name: str) -> float:
    try:
        return float(r.inputs[name])
    except KeyError:
        raise ValueError(f"reading of {r.sensor!r} has no input {name!r}") from None


def _check_inputs(covariates: Mapping[str, str], max_bytes: int) -> dict[str, str]:
    _check_names(["raw", *covariates], "covariate input names (and 'raw')")
    if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 2:
        raise ValueError(f"max_bytes must be an integer >= 2, got {max_bytes!r}")
    return dict(covariates)


# --- flat JSON -------------------------------------------------------------------------------


class JsonCodec:
    """Flat JSON objects with configurable field names, e.g. ``{"t": ..., "raw": 41.2}``.

    A reading needs the time and the raw value, and carries those covariate fields it has
    (``covariates`` maps the model's input name to the payload field; the engine refuses a
    reading that lacks one its sensor's model needs); a reference needs the time and the
    value, and may carry a window (null means none). Other fields are ignored. Corrected
    values are written with the fixed names of ``CORRECTED_FIELDS`` and repr floats, so they
    decode bit for bit.
    """

    def __init__(
        self,
        *,
        time_field: str = "t",
        value_field: str = "raw",
        reference_field: str = "value",
        window_field: str = "window",
        covariates: Mapping[str, str] | None = None,
        max_bytes: int = 65536,
    ) -> None:
        self.covariates = _check_inputs(covariates or {}, max_bytes)
        _check_names([time_field, value_field, *self.covariates.values()], "reading fields")
        _check_names([time_field, reference_field, window_field], "reference fields")
        self.time_field = time_field
        self.value_field = value_field
        self.reference_field = reference_field
        self.window_field = window_field
        self.max_bytes = max_bytes

    def _object(self, payload: bytes | bytearray) -> dict[str, object]:
        return _as_object(parse_json(payload, self.max_bytes), "payload")

    def _field(self, obj: Mapping[str, object], key: str) -> float:
        return to_value(need(obj, key), f"field {key!r}")

    def decode_reading(self, sensor: str, payload: bytes | bytearray) -> Reading:
        """The reading of ``sensor`` (from the topic) carried by ``payload``."""
        validate_sensor_id(sensor)
        obj = self._object(payload)
        t = to_time(need(obj, self.time_field), f"field {self.time_field!r}")
        inputs = {"raw": self._field(obj, self.value_field)}
        for name, key in self.covariates.items():
            if key in obj:  # sensors differ in covariates: the engine checks what each needs
                inputs[name] = self._field(obj, key)
        return Reading(t=t, sensor=sensor, inputs=inputs)

    def decode_reference(self, sensor: str, payload: bytes | bytearray) -> Reference:
        """The reference value for ``sensor`` carried by ``payload``."""
        validate_sensor_id(sensor)
        obj = self._object(payload)
        return Reference(
            t=to_time(need(obj, self.time_field), f"field {self.time_field!r}"),
            sensor=sensor,
            value=self._field(obj, self.reference_field),
            window=to_window(obj.get(self.window_field), f"field {self.window_field!r}"),
        )

    def encode_reading(self, r: Reading) -> bytes:
        """The flat JSON object of a reading (for players and tests); ``ValueError`` if unfit."""
        obj: dict[str, object] = {self.time_field: float(r.t)}
        obj[self.value_field] = _input_of(r, "raw")
        for name, key in self.covariates.items():
            if name in r.inputs:
                obj[key] = _input_of(r, name)
        return json.dumps(obj, allow_nan=False).encode("utf-8")

    def encode_reference(self, ref: Reference) -> bytes:
        """The flat JSON object of a reference (for players and tests)."""
        obj: dict[str, object] = {self.time_field: float(ref.t), self.reference_field: ref.value}
        if ref.window is not None:
            obj[self.window_field] = float(ref.window)
        return json.dumps(obj, allow_nan=False).encode("utf-8")

    def encode_corrected(self, c: Corrected) -> bytes:
        """The flat JSON object of a corrected value, UTF-8 encoded."""
        return corrected_json(c).encode("utf-8")

    def decode_corrected(self, payload: bytes | bytearray) -> Corrected:
        """The corrected value written by ``encode_corrected``."""
        return corrected_from_obj(parse_json(payload, self.max_bytes))


# --- SenML (RFC 8428) ------------------------------------------------------------------------

_SENML_STR = ("bn", "bu", "n", "u", "vs", "vd")
_SENML_NUM = ("bt", "bv", "bs", "v", "s", "t", "ut")
_SENML_VALUES = ("v", "vs", "vb", "vd")


@dataclass(frozen=True, slots=True)
class SenmlRecord:
    """One resolved SenML record (RFC 8428 §4.6): base fields applied, absolute time.

    ``local`` is the record's own ``n`` (the part after the base name); ``value`` is the
    numeric value (Base Value + ``v``), ``None`` when the record has no ``v``.
    """

    name: str
    local: str
    time: float
    unit: str | None = None
    value: float | None = None
    string_value: str | None = None
    bool_value: bool | None = None
    data_value: str | None = None

    def matches(self, want: str) -> bool:
        """Whether this record is named ``want`` after its base name or last ':'/'/'."""
        return self.local == want or re.split(r"[:/]", self.name)[-1] == want


def _senml_fields(rec: dict[str, object], where: str) -> None:
    for key, val in rec.items():
        if key.endswith("_"):  # RFC 8428 §4.4: must-understand labels end with '_'
            raise DecodeError("unsupported_field", f"{where}: label {key!r} is not understood")
        if key in _SENML_STR and not isinstance(val, str):
            raise DecodeError("wrong_type", f"{where}: {key!r} must be a string, got {_kind(val)}")
        if key in _SENML_NUM:
            to_number(val, f"{where}: {key!r}")
        if key == "vb" and not isinstance(val, bool):
            raise DecodeError("wrong_type", f"{where}: 'vb' must be a boolean, got {_kind(val)}")
        if key == "bver" and (isinstance(val, bool) or not isinstance(val, int)):
            raise DecodeError("wrong_type", f"{where}: 'bver' must be an integer, got {_kind(val)}")
    present = [k for k in _SENML_VALUES if k in rec]
    if len(present) > 1:
        raise DecodeError("bad_record", f"{where} has several value fields {present}")


def _str(rec: Mapping[str, object], key: str, default: str | None = None) -> str | None:
    val = rec.get(key, default)
    return val if isinstance(val, str) else None


def _num(rec: Mapping[str, object], key: str, default: float) -> float:
    return to_number(rec[key], key) if key in rec else default


def resolve_senml(pack: object) -> list[SenmlRecord]:
    """Resolve a parsed SenML pack (RFC 8428 §4.1, §4.5, §4.6) into absolute records.

    Base fields apply to their record and every later one until replaced; time is Base Time +
    Time; a numeric value is Base Value + ``v``. trimtab works in event time only, so a resolved
    time below 2**28 (relative to "now", §4.5.3) is rejected as ``relative_time`` rather than
    guessed from the arrival time. Records without a value (§5.1.7) resolve with none.
    """
    if not isinstance(pack, list):
        raise DecodeError("not_array", f"a SenML pack must be a JSON array, got {_kind(pack)}")
    bn: str = ""
    bu: str | None = None
    bt = 0.0
    bv: float | None = None  # absent, not 0.0: 0.0 + -0.0 would lose the sign of a zero
    version: int | None = None
    out: list[SenmlRecord] = []
    for i, item in enumerate(pack):
        where = f"record {i}"
        rec = _as_object(item, where)
        _senml_fields(rec, where)
        ver = rec.get("bver", SENML_VERSION if version is None else version)
        if not isinstance(ver, int) or not 1 <= ver <= SENML_VERSION:
            raise DecodeError("unsupported_version", f"{where}: version {ver} is not 1-10")
        if version is not None and ver != version:
            raise DecodeError("unsupported_version", f"{where}: version {ver} != {version}")
        version = ver
        bn = _str(rec, "bn", bn) or ""
        bu = _str(rec, "bu", bu)
        bt = _num(rec, "bt", bt)
        bv = _num(rec, "bv", 0.0) if "bv" in rec else bv
        local = _str(rec, "n", "") or ""
        name = bn + local
        if _SENML_NAME.fullmatch(name) is None:
            raise DecodeError("bad_name", f"{where}: name {name[:80]!r} breaks RFC 8428 §4.5.1")
        time = bt + _num(rec, "t", 0.0)
        if not math.isfinite(time):
            raise DecodeError("non_finite", f"{where} ({name!r}): time is {time}")
        if time < _SENML_RELATIVE:
            raise DecodeError("relative_time", f"{where} ({name!r}): time {time!r} is relative")
        _check_time(time, f"{where} ({name!r}): time")
        value = _num(rec, "v", 0.0) if "v" in rec else None
        if value is not None and bv is not None:
            value += bv
        if value is not None and not math.isfinite(value):
            raise DecodeError("non_finite", f"{where} ({name!r}): value is {value}")
        vb = rec.get("vb")
        out.append(SenmlRecord(
            name=name, local=local, time=time, unit=_str(rec, "u", bu), value=value,
            string_value=_str(rec, "vs"), bool_value=vb if isinstance(vb, bool) else None,
            data_value=_str(rec, "vd"),
        ))  # fmt: skip
    return out


def _find(records: list[SenmlRecord], want: str) -> SenmlRecord | None:
    found = [i for i, r in enumerate(records) if r.matches(want)]
    if len(found) > 1:
        raise DecodeError("duplicate_name", f"records {found} are all named {want!r}")
    return records[found[0]] if found else None


def _pick(records: list[SenmlRecord], want: str) -> SenmlRecord:
    rec = _find(records, want)
    if rec is None:
        raise DecodeError("missing_field", f"pack has no record named {want!r}")
    return rec


def _number_of(rec: SenmlRecord, want: str, *, bounded: bool = True) -> float:
    if rec.value is None:
        if rec.string_value is None and rec.bool_value is None and rec.data_value is None:
            raise DecodeError("missing_field", f"record {want!r} has no value 'v'")
        raise DecodeError("wrong_type", f"record {want!r} must carry a number in 'v'")
    return to_value(rec.value, f"record {want!r} value") if bounded else rec.value


def _same_time(picked: list[SenmlRecord]) -> float:
    times = {r.time for r in picked}
    if len(times) > 1:
        names = [r.name for r in picked]
        raise DecodeError("time_mismatch", f"records {names} have different times {sorted(times)}")
    return picked[0].time


class SenmlCodec:
    """SenML packs (RFC 8428, JSON form) for readings, references and corrected values.

    A reading is one record named ``value_name`` plus one per covariate, all at the same
    resolved time; a reference is a record named ``reference_name`` and optionally one named
    ``window_name`` at its time. Names match on the part after the base name (or the last
    ':'/'/' segment of a resolved name). The sensor comes from the topic, not from ``bn``.

    A corrected value is written as a pack with ``bn`` = sensor + ":" and ``bt`` = its time:
    records ``value``, ``raw``, ``band`` (``v``), ``flags`` (``vs``, comma-separated, empty when
    none) and ``updates`` (``v``, a whole number). No units are written: trimtab does not know
    them. Times below 2**28 cannot be written, since SenML would read them as relative.
    """

    def __init__(
        self,
        *,
        value_name: str = "raw",
        reference_name: str = "value",
        window_name: str = "window",
        covariates: Mapping[str, str] | None = None,
        max_bytes: int = 65536,
    ) -> None:
        self.covariates = _check_inputs(covariates or {}, max_bytes)
        local = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
        _check_names([value_name, *self.covariates.values()], "reading record names", local)
        _check_names([reference_name, window_name], "reference record names", local)
        self.value_name = value_name
        self.reference_name = reference_name
        self.window_name = window_name
        self.max_bytes = max_bytes

    def _records(self, payload: bytes | bytearray) -> list[SenmlRecord]:
        return resolve_senml(parse_json(payload, self.max_bytes))

    def decode_reading(self, sensor: str, payload: bytes | bytearray) -> Reading:
        """The reading of ``sensor`` (from the topic) carried by a SenML pack."""
        validate_sensor_id(sensor)
        records = self._records(payload)
        wanted = {"raw": self.value_name, **self.covariates}
        picked = {"raw": _pick(records, self.value_name)}
        for name, want in self.covariates.items():
            found = _find(records, want)
            if found is not None:  # the engine checks which covariates each sensor needs
                picked[name] = found
        t = _same_time(list(picked.values()))
        inputs = {name: _number_of(rec, wanted[name]) for name, rec in picked.items()}
        return Reading(t=t, sensor=sensor, inputs=inputs)

    def decode_reference(self, sensor: str, payload: bytes | bytearray) -> Reference:
        """The reference value for ``sensor`` carried by a SenML pack."""
        validate_sensor_id(sensor)
        records = self._records(payload)
        ref = _pick(records, self.reference_name)
        win = _find(records, self.window_name)
        t = _same_time([ref] if win is None else [ref, win])
        window = None
        if win is not None:
            window = to_window(_number_of(win, self.window_name), f"record {self.window_name!r}")
        value = _number_of(ref, self.reference_name)
        return Reference(t=t, sensor=sensor, value=value, window=window)

    def _pack(self, t: float, sensor: str, records: list[tuple[str, object]]) -> bytes:
        if not t >= _SENML_RELATIVE:
            raise ValueError(f"time {t!r} of {sensor!r} is below 2**28: SenML reads it as relative")
        pack: list[dict[str, object]] = [
            {"n": name, "vs" if isinstance(v, str) else "v": v} for name, v in records
        ]
        pack[0] = {"bn": f"{sensor}:", "bt": float(t), **pack[0]}
        return json.dumps(pack, allow_nan=False).encode("utf-8")

    def encode_reading(self, r: Reading) -> bytes:
        """The SenML pack of a reading (for players and tests); ``ValueError`` if unfit."""
        wanted = {"raw": self.value_name, **self.covariates}
        return self._pack(r.t, r.sensor, [(n, _input_of(r, k)) for k, n in wanted.items()
                                          if k == "raw" or k in r.inputs])

    def encode_reference(self, ref: Reference) -> bytes:
        """The SenML pack of a reference (for players and tests)."""
        records: list[tuple[str, object]] = [(self.reference_name, ref.value)]
        if ref.window is not None:
            records.append((self.window_name, float(ref.window)))
        return self._pack(ref.t, ref.sensor, records)

    def encode_corrected(self, c: Corrected) -> bytes:
        """The SenML pack of a corrected value, UTF-8 encoded."""
        flat = corrected_to_dict(c)
        for flag in c.flags:
            if _FLAG.fullmatch(flag) is None:
                raise ValueError(f"flag {flag!r} of {c.sensor!r} is not a snake_case word")
        fields = ("value", "raw", "band")
        records: list[tuple[str, object]] = [(f, flat[f]) for f in fields]
        records += [("flags", ",".join(c.flags)), ("updates", flat["updates"])]
        return self._pack(c.t, c.sensor, records)

    def decode_corrected(self, payload: bytes | bytearray) -> Corrected:
        """The corrected value written by ``encode_corrected``."""
        records = self._records(payload)
        picked = {f: _pick(records, f) for f in CORRECTED_FIELDS[2:]}
        t = _same_time(list(picked.values()))
        prefixes = {rec.name[: -len(f)] for f, rec in picked.items()}
        prefix = prefixes.pop()
        if prefixes or not prefix.endswith(":"):
            raise DecodeError("bad_name", "records must be named '<sensor>:<field>' of one sensor")
        text = picked["flags"].string_value
        if text is None:
            raise DecodeError("wrong_type", "record 'flags' must carry a string in 'vs'")
        obj: dict[str, object] = {f: _number_of(picked[f], f) for f in ("value", "raw", "band")}
        obj["updates"] = _number_of(picked["updates"], "updates", bounded=False)
        obj.update(t=t, sensor=prefix[:-1], flags=text.split(",") if text else [])
        return corrected_from_obj(obj)
