"""SenML packs (RFC 8428, JSON form) to and from readings, references and corrected values."""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass

from trimtab.errors import DecodeError, EncodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab.wire.jsonfields import (
    CORRECTED_FIELDS,
    FLAG,
    as_object,
    check_inputs,
    check_names,
    check_time,
    corrected_from_obj,
    corrected_to_dict,
    input_of,
    kind,
    parse_json,
    to_number,
    to_value,
    to_window,
)
from trimtab.wire.topics import validate_sensor_id

SENML_VERSION = 10
"""The SenML version this decoder understands (RFC 8428 §4.1: the default when absent)."""

_SENML_RELATIVE = 2.0**28  # RFC 8428 §4.5.3: resolved times below this are relative to "now"
_SENML_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9:./_-]*")  # RFC 8428 §4.5.1


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
            raise DecodeError("wrong_type", f"{where}: {key!r} must be a string, got {kind(val)}")
        if key in _SENML_NUM:
            to_number(val, f"{where}: {key!r}")
        if key == "vb" and not isinstance(val, bool):
            raise DecodeError("wrong_type", f"{where}: 'vb' must be a boolean, got {kind(val)}")
        if key == "bver" and (isinstance(val, bool) or not isinstance(val, int)):
            raise DecodeError("wrong_type", f"{where}: 'bver' must be an integer, got {kind(val)}")
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
        raise DecodeError("not_array", f"a SenML pack must be a JSON array, got {kind(pack)}")
    bn: str = ""
    bu: str | None = None
    bt = 0.0
    bv: float | None = None  # absent, not 0.0: 0.0 + -0.0 would lose the sign of a zero
    version: int | None = None
    out: list[SenmlRecord] = []
    for i, item in enumerate(pack):
        where = f"record {i}"
        rec = as_object(item, where)
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
        check_time(time, f"{where} ({name!r}): time")
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
        self.covariates = check_inputs(covariates or {}, max_bytes)
        local = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
        check_names([value_name, *self.covariates.values()], "reading record names", local)
        check_names([reference_name, window_name], "reference record names", local)
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
            raise EncodeError(f"time {t!r} of {sensor!r} is below 2**28: SenML reads it as "
                              "relative")
        pack: list[dict[str, object]] = [
            {"n": name, "vs" if isinstance(v, str) else "v": v} for name, v in records
        ]
        pack[0] = {"bn": f"{sensor}:", "bt": float(t), **pack[0]}
        return json.dumps(pack, allow_nan=False).encode("utf-8")

    def encode_reading(self, r: Reading) -> bytes:
        """The SenML pack of a reading (for players and tests); ``ValueError`` if unfit."""
        wanted = {"raw": self.value_name, **self.covariates}
        return self._pack(r.t, r.sensor, [(n, input_of(r, k)) for k, n in wanted.items()
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
            if FLAG.fullmatch(flag) is None:
                raise EncodeError(f"flag {flag!r} of {c.sensor!r} is not a snake_case word")
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
