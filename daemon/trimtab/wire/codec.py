"""Payload codecs: flat JSON objects and SenML packs (RFC 8428) to and from messages.

Both codecs share one strict reading of JSON: UTF-8 only, at most ``max_bytes``, no ``NaN`` or
``Infinity`` literals, no duplicate keys, no number that overflows to infinity. Times are event
times in epoch seconds (UTC): a number, or in flat JSON also an ISO 8601 string with a zone.
Every rejection is a ``DecodeError`` whose ``reason`` is one of ``REASONS`` and whose ``detail``
names the field (and, in SenML, the record index) at fault.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Protocol

from trimtab.errors import DecodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.wire.jsonfields import (
    CORRECTED_FIELDS,
    MAX_ABS,
    MAX_TIME,
    as_object,
    check_inputs,
    check_names,
    corrected_from_obj,
    corrected_json,
    corrected_to_dict,
    input_of,
    need,
    parse_json,
    to_number,
    to_time,
    to_value,
    to_window,
)
from trimtab.wire.senml import SENML_VERSION, SenmlCodec, SenmlRecord, resolve_senml
from trimtab.wire.topics import validate_sensor_id

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

REASONS = frozenset({
    "bad_flag", "bad_json", "bad_name", "bad_record", "bad_sensor_id", "bad_time",
    "bad_window", "duplicate_field", "duplicate_name", "missing_field", "non_finite",
    "not_array", "not_object", "out_of_range", "oversize", "relative_time", "time_mismatch",
    "unknown_field", "unsupported_field", "unsupported_version", "wrong_type",
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


# --- flat JSON -------------------------------------------------------------------------------


class JsonCodec:
    """Flat JSON objects with configurable field names, e.g. ``{"t": ..., "raw": 41.2}``.

    A reading needs the time and the raw value, and carries those covariate fields it has
    (``covariates`` maps the model's input name to the payload field; the engine refuses a
    reading that lacks one its sensor's model needs); a reference needs the time and the
    value, and may carry a window (null means none). Any other field is refused
    (``unknown_field``), as in stream files: a misspelt ``"windw"`` would otherwise turn a
    window mean into a spot reference without a word. Corrected
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
        self.covariates = check_inputs(covariates or {}, max_bytes)
        check_names([time_field, value_field, *self.covariates.values()], "reading fields")
        check_names([time_field, reference_field, window_field], "reference fields")
        self.time_field = time_field
        self.value_field = value_field
        self.reference_field = reference_field
        self.window_field = window_field
        self.max_bytes = max_bytes
        self._reading_fields = frozenset([time_field, value_field, *self.covariates.values()])
        self._reference_fields = frozenset([time_field, reference_field, window_field])

    def _object(self, payload: bytes | bytearray) -> dict[str, object]:
        return as_object(parse_json(payload, self.max_bytes), "payload")

    @staticmethod
    def _only(obj: Mapping[str, object], allowed: frozenset[str], what: str) -> None:
        if obj.keys() <= allowed:
            return
        extra = sorted(set(obj) - allowed)
        raise DecodeError("unknown_field", f"fields {extra!r:.200} are not part of a {what} "
                          f"(known: {sorted(allowed)})")

    def _field(self, obj: Mapping[str, object], key: str) -> float:
        return to_value(need(obj, key), f"field {key!r}")

    def decode_reading(self, sensor: str, payload: bytes | bytearray) -> Reading:
        """The reading of ``sensor`` (from the topic) carried by ``payload``."""
        validate_sensor_id(sensor)
        obj = self._object(payload)
        self._only(obj, self._reading_fields, "reading")
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
        self._only(obj, self._reference_fields, "reference")
        return Reference(
            t=to_time(need(obj, self.time_field), f"field {self.time_field!r}"),
            sensor=sensor,
            value=self._field(obj, self.reference_field),
            window=to_window(obj.get(self.window_field), f"field {self.window_field!r}"),
        )

    def encode_reading(self, r: Reading) -> bytes:
        """The flat JSON object of a reading (for players and tests); ``ValueError`` if unfit."""
        obj: dict[str, object] = {self.time_field: float(r.t)}
        obj[self.value_field] = input_of(r, "raw")
        for name, key in self.covariates.items():
            if name in r.inputs:
                obj[key] = input_of(r, name)
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
