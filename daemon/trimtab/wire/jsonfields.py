"""Strict JSON and field checks shared by the payload codecs and the stream files.

UTF-8 only, at most ``max_bytes``, no ``NaN`` or ``Infinity`` literals, no duplicate keys, no
number that overflows to infinity; times are epoch seconds (UTC) or ISO 8601 with a zone.
Every rejection is a ``DecodeError`` with a stable reason and a detail naming the field.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from datetime import datetime
from typing import Any

from trimtab.errors import ArgumentError, DecodeError, EncodeError
from trimtab.messages import Corrected, Reading
from trimtab.wire.topics import validate_sensor_id

MAX_ABS = 1e12
"""Largest magnitude accepted for a value; beyond it a payload is ``out_of_range``."""

MAX_TIME = 253402300800.0
"""Event times must be below this (year 10000) and not negative."""

FLAG = re.compile(r"[a-z][a-z0-9_]*")
"""A corrected value's flag: a snake_case word."""

CORRECTED_FIELDS = ("t", "sensor", "value", "raw", "band", "flags", "updates")
"""The fields of a corrected value, in the order they are written."""


def kind(x: object) -> str:
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
        raise DecodeError("wrong_type", f"{where} must be a number, got {kind(x)}")
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


def check_time(t: float, where: str) -> float:
    if not 0.0 <= t < MAX_TIME:
        raise DecodeError("bad_time", f"{where} = {t!r} is outside [0, {MAX_TIME:.0f}) seconds")
    return t


def to_time(x: object, where: str) -> float:
    """Event time in epoch seconds from a number or an ISO 8601 string with a zone."""
    if not isinstance(x, str):
        return check_time(to_number(x, where), where)
    if len(x) > 64 or not x.isascii():
        raise DecodeError("bad_time", f"{where} {x[:64]!r} is not an ISO 8601 time")
    try:
        stamp = datetime.fromisoformat(x)
    except ValueError:
        raise DecodeError("bad_time", f"{where} {x!r} is not an ISO 8601 time") from None
    if stamp.tzinfo is None or stamp.utcoffset() is None:
        raise DecodeError("bad_time", f"{where} {x!r} has no zone; add 'Z' or an offset")
    try:
        return check_time(stamp.timestamp(), where)
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


def as_object(x: object, what: str) -> dict[str, object]:
    if not isinstance(x, dict):
        raise DecodeError("not_object", f"{what} must be a JSON object, got {kind(x)}")
    return x


def _check_flag(flag: object, where: str) -> str:
    if not isinstance(flag, str):
        raise DecodeError("wrong_type", f"{where} must be a string, got {kind(flag)}")
    if FLAG.fullmatch(flag) is None:
        raise DecodeError("bad_flag", f"{where} {flag[:64]!r} is not a snake_case word")
    return flag


def _to_count(x: object, where: str) -> int:
    if isinstance(x, float) and x.is_integer():
        x = int(x)
    if isinstance(x, bool) or not isinstance(x, int):
        raise DecodeError("wrong_type", f"{where} must be a whole number, got {kind(x)}")
    if not 0 <= x <= 2**53:
        raise DecodeError("out_of_range", f"{where} = {x} is outside [0, 2**53]")
    return x


def corrected_to_dict(c: Corrected) -> dict[str, object]:
    """The flat form of a corrected value; ``ValueError`` if a number is not finite."""
    for name in ("t", "value", "raw", "band"):
        if not math.isfinite(getattr(c, name)):
            raise EncodeError(f"corrected {name} for {c.sensor!r} is not finite; not encodable")
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
    obj = as_object(x, "corrected value")
    flags = need(obj, "flags")
    if not isinstance(flags, list):
        raise DecodeError("wrong_type", f"field 'flags' must be an array, got {kind(flags)}")
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
        raise DecodeError("wrong_type", f"field 'sensor' must be a string, got {kind(x)}")
    return validate_sensor_id(x)


def check_names(names: list[str], what: str, pattern: re.Pattern[str] | None = None) -> None:
    for name in names:
        if not isinstance(name, str) or not name:
            raise ArgumentError(f"{what}: every name must be a non-empty string, got {name!r}")
        if pattern is not None and pattern.fullmatch(name) is None:
            raise ArgumentError(f"{what}: {name!r} must match {pattern.pattern}")
    if len(set(names)) != len(names):
        raise ArgumentError(f"{what}: names must be distinct, got {names}")


def input_of(r: Reading, name: str) -> float:
    try:
        return float(r.inputs[name])
    except KeyError:
        raise EncodeError(f"reading of {r.sensor!r} has no input {name!r}") from None


def check_inputs(covariates: Mapping[str, str], max_bytes: int) -> dict[str, str]:
    check_names(["raw", *covariates], "covariate input names (and 'raw')")
    if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 2:
        raise ArgumentError(f"max_bytes must be an integer >= 2, got {max_bytes!r}")
    return dict(covariates)
