"""Stream files: JSON Lines of readings and references, and of corrected values.

One event a line, in event-time order (the writer's duty; this module does not reorder)::

    {"t": 1767225600.0, "sensor": "no2-07", "reading": {"raw": 41.2, "temp": 21.4}}
    {"t": 1767229200.0, "sensor": "no2-07", "reference": 38.9, "window": 3600.0}

``t`` is epoch seconds (an ISO 8601 string with a zone is accepted on input); a reading may
carry ``"truth"`` (simulated streams, for scoring only) and must carry ``"raw"``; a
reference's ``window`` is optional. Fields other than these are refused (``unknown_field``),
so a misspelt ``"windw"`` cannot silently turn a window mean into a spot value. Floats are
written as Python's shortest repr, so every value reads back bit for bit.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import TypeVar

from trimtab.errors import DataError, DecodeError, EncodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.wire import codec
from trimtab.wire.jsonfields import (
    MAX_ABS,
    corrected_from_obj,
    corrected_json,
    need,
    parse_json,
    to_time,
    to_value,
    to_window,
)
from trimtab.wire.topics import validate_sensor_id

__all__ = [
    "MAX_LINE_BYTES",
    "REASONS",
    "decode_corrected_line",
    "decode_event",
    "encode_corrected_line",
    "encode_event",
    "read_corrected",
    "read_events",
    "write_corrected",
    "write_events",
]

MAX_LINE_BYTES = 65536
"""Longest line accepted; a longer one is ``oversize``."""

REASONS = codec.REASONS | {"ambiguous_event", "unknown_field"}
"""Every ``DecodeError.reason`` a stream-file line can be rejected with."""

_READING_KEYS = frozenset({"t", "sensor", "reading", "truth"})
_REFERENCE_KEYS = frozenset({"t", "sensor", "reference", "window"})

OnError = Callable[[int, DecodeError], None]
_T = TypeVar("_T")


def _object(line: str) -> dict[str, object]:
    obj = parse_json(line, MAX_LINE_BYTES)
    if not isinstance(obj, dict):
        raise DecodeError("not_object", "a stream line must be a JSON object")
    return obj


def _sensor(obj: dict[str, object]) -> str:
    sensor = need(obj, "sensor")
    if not isinstance(sensor, str):
        raise DecodeError("wrong_type", "field 'sensor' must be a string")
    return validate_sensor_id(sensor)


def _only(obj: dict[str, object], allowed: frozenset[str]) -> None:
    if obj.keys() <= allowed:
        return
    extra = sorted(set(obj) - allowed)
    if extra:
        raise DecodeError("unknown_field", f"fields {extra} are not part of a stream event")


def decode_event(line: str) -> Reading | Reference:
    """The reading or reference on one stream-file line; ``DecodeError`` if it is not one."""
    obj = _object(line)
    if ("reading" in obj) == ("reference" in obj):
        if "reading" in obj:
            raise DecodeError("ambiguous_event", "a line has 'reading' or 'reference', not both")
        raise DecodeError("missing_field", "field 'reading' or 'reference' is missing")
    t = to_time(need(obj, "t"), "field 't'")
    sensor = _sensor(obj)
    if "reference" in obj:
        _only(obj, _REFERENCE_KEYS)
        value = to_value(obj["reference"], "field 'reference'")
        window = to_window(obj.get("window"), "field 'window'")
        return Reference(t=t, sensor=sensor, value=value, window=window)
    _only(obj, _READING_KEYS)
    reading = obj["reading"]
    if not isinstance(reading, dict):
        raise DecodeError("wrong_type", "field 'reading' must be an object of input values")
    if "raw" not in reading:
        raise DecodeError("missing_field", "field 'reading.raw' is missing")
    if all(type(v) is float and -MAX_ABS <= v <= MAX_ABS for v in reading.values()):
        inputs = reading  # every value is what to_value would return: take the parsed object
    else:
        inputs = {name: to_value(v, f"field 'reading.{name[:64]}'")
                  for name, v in reading.items()}
    truth = obj.get("truth")
    return Reading(
        t=t,
        sensor=sensor,
        inputs=inputs,
        truth=None if truth is None else to_value(truth, "field 'truth'"),
    )


def _finite(value: float, what: str) -> float:
    value = float(value)
    if not math.isfinite(value):
        raise EncodeError(f"{what} is {value}; stream files hold finite numbers only")
    return value


def encode_event(e: Reading | Reference) -> str:
    """One stream-file line (no newline) for an event; ``ValueError`` if a number is not finite."""
    out: dict[str, object] = {"t": _finite(e.t, "t"), "sensor": e.sensor}
    if isinstance(e, Reading):
        out["reading"] = {k: _finite(v, f"input {k!r}") for k, v in e.inputs.items()}
        if e.truth is not None:
            out["truth"] = _finite(e.truth, "truth")
    else:
        out["reference"] = _finite(e.value, "reference")
        if e.window is not None:
            out["window"] = _finite(e.window, "window")
    return json.dumps(out, allow_nan=False)


def encode_corrected_line(c: Corrected) -> str:
    """One line (no newline) for a corrected value, in the daemon's published form."""
    return corrected_json(c)


def decode_corrected_line(line: str) -> Corrected:
    """The corrected value on one line; ``DecodeError`` if it is not one."""
    return corrected_from_obj(parse_json(line, MAX_LINE_BYTES))


def _read_lines(
    path: str | Path, decode: Callable[[str], _T], on_error: OnError | None
) -> Iterator[_T]:
    try:
        f = open(path, "rb")  # noqa: SIM115 (closed by the with below)
    except FileNotFoundError:
        raise DataError(f"{path}: stream file not found") from None
    except OSError as exc:
        raise DataError(f"{path}: cannot read the stream file: {exc.strerror}") from exc
    with f:
        for number, raw in enumerate(f, start=1):
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                err = DecodeError("bad_json", f"line is not UTF-8 (byte {exc.start})")
            else:
                if not line.strip():
                    continue
                try:
                    yield decode(line)
                    continue
                except DecodeError as exc:
                    err = exc
            if on_error is None:
                raise DataError(f"{path}:{number}: {err.reason}: {err.detail}") from err
            on_error(number, err)


def read_events(
    path: str | Path, *, on_error: OnError | None = None
) -> Iterator[Reading | Reference]:
    """The events of a stream file, in file order; blank lines are skipped.

    A bad line raises ``DataError("file:line: reason: detail")``, or, when ``on_error`` is
    given, is reported to it as ``(line_number, error)`` and skipped.
    """
    yield from _read_lines(path, decode_event, on_error)


def read_corrected(path: str | Path, *, on_error: OnError | None = None) -> Iterator[Corrected]:
    """The corrected values of a file written by ``write_corrected`` (errors as ``read_events``)."""
    yield from _read_lines(path, decode_corrected_line, on_error)


def _write(path: str | Path, lines: Iterable[str]) -> int:
    count = 0
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        for line in lines:
            f.write(line + "\n")
            count += 1
    return count


def write_events(path: str | Path, events: Iterable[Reading | Reference]) -> int:
    """Write events one a line (replacing the file); return how many were written."""
    return _write(path, (encode_event(e) for e in events))


def write_corrected(path: str | Path, items: Iterable[Corrected]) -> int:
    """Write corrected values one a line (replacing the file); return how many were written."""
    return _write(path, (encode_corrected_line(c) for c in items))
