"""Operators' CSV files turned into stream events: any delimiter, a byte-order mark, local time.

A spreadsheet export or a logger's file holds one row per time stamp, with a column for the
sensor's raw value, columns for covariates and perhaps one for the co-located reference. Each
row with a raw value gives a reading; each row with a reference value gives a reference (with
the stated averaging window). Time is epoch seconds, ISO 8601 with a zone, or local wall-clock
time in a named zone (``tz``); a local time the zone skips or repeats at a clock change is
refused, since no one instant is meant. Errors name the file, the line and the column.
"""

from __future__ import annotations

import csv
import math
from collections import Counter
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Annotated
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from trimtab.errors import ConfigError, DataError, DecodeError
from trimtab.messages import Reading, Reference
from trimtab.wire.fielderrors import dotted, expand_errors
from trimtab.wire.streamfile import write_events
from trimtab.wire.tomlfile import read_toml
from trimtab.wire.topics import validate_sensor_id

__all__ = [
    "CsvLayout", "CsvResult", "csv_as_stream", "describe_span", "load_layout", "local_zone",
    "read_csv_events", "readable_stream",
]

DELIMITERS = ",;\t|"
"""What a delimiter may be when it is sniffed from the header line."""


@dataclass(frozen=True, slots=True)
class CsvLayout:
    """Which columns mean what.

    ``inputs`` maps each stream input name (``raw`` first) to its CSV column; ``sensor`` is a
    fixed sensor id, or ``sensor_column`` names a column holding it; ``reference`` the column
    of reference values (optional) with ``window`` seconds of averaging (None: spot values).
    ``delimiter`` None sniffs it from the header line; ``decimal_comma`` reads ``12,5``.
    """

    inputs: Mapping[str, str]
    time: str = "t"
    sensor: str | None = None
    sensor_column: str | None = None
    reference: str | None = None
    window: float | None = None
    tz: str | None = None
    time_format: str | None = None
    delimiter: str | None = None
    decimal_comma: bool = False


@dataclass(slots=True)
class CsvResult:
    """The events of a CSV file in event-time order, and what was skipped, by reason."""

    events: list[Reading | Reference]
    rows: int
    delimiter: str
    skipped: Counter[str] = field(default_factory=Counter)


class _LayoutFile(BaseModel):
    """The ``[csv]`` table of a layout file: the same keys as ``trimtab convert``'s options."""

    model_config = ConfigDict(extra="forbid", strict=True)

    inputs: dict[str, str] = Field(min_length=1)
    time: str = "t"
    sensor: str | None = None
    sensor_column: str | None = None
    reference: str | None = None
    window: Annotated[float, Field(gt=0, allow_inf_nan=False)] | None = None
    tz: str | None = None
    time_format: str | None = None
    delimiter: Annotated[str, Field(min_length=1, max_length=1)] | None = None
    decimal_comma: bool = False


class _Layout(BaseModel):
    model_config = ConfigDict(extra="forbid")

    csv: _LayoutFile


def load_layout(path: str | Path) -> CsvLayout:
    """A CSV layout from a TOML file's ``[csv]`` table; ConfigError lines name file and key.

    ``[csv.inputs]`` maps each stream input to its column, ``raw`` first::

        [csv]
        time = "Datum"
        tz = "Europe/Berlin"
        sensor = "no2-07"
        [csv.inputs]
        raw = "NO2 WE"
        temp = "T Luft"
    """
    source = str(path)
    data = read_toml(path, "layout file")
    try:
        table = _Layout.model_validate(data).csv
    except ValidationError as exc:
        lines = [f"{source}: {dotted(loc)}: {msg}" for loc, msg in expand_errors(exc, _Layout)]
        raise ConfigError(f"{source}: {len(lines)} problem(s) in the layout", lines) from None
    return CsvLayout(**table.model_dump())


def local_zone(name: str) -> ZoneInfo:
    """The IANA time zone ``name`` (``Europe/Berlin``); DataError if it is unknown."""
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise DataError(f"--tz {name!r}: not a known IANA time zone (e.g. Europe/Berlin, "
                        "America/New_York, UTC)") from None


def _sniff(header: str, path: Path) -> str:
    counts = {d: header.count(d) for d in DELIMITERS}
    best = max(counts, key=lambda d: counts[d])
    if counts[best] == 0:
        raise DataError(f"{path}:1: cannot tell the delimiter from the header line (none of "
                        "',', ';', tab or '|' occurs); give --delimiter")
    return best


def parse_number(text: str, where: str, decimal_comma: bool = False) -> float:
    """A finite number from a cell; DataError names ``where`` (file, line and column)."""
    s = text.strip()
    if decimal_comma:
        s = s.replace(".", "").replace(",", ".") if "," in s else s
    try:
        value = float(s)
    except ValueError:
        raise DataError(f"{where}: {text.strip()!r} is not a number") from None
    if not math.isfinite(value):
        raise DataError(f"{where}: {text.strip()!r} is not a finite number")
    return value


def _instant(text: str, layout: CsvLayout, zone: ZoneInfo | None, where: str) -> float:
    s = text.strip()
    if layout.time_format is None:
        try:
            return _finite_time(float(s), where)
        except ValueError:
            pass
    try:
        stamp = (datetime.strptime(s, layout.time_format) if layout.time_format
                 else datetime.fromisoformat(s))
    except ValueError:
        how = (f"the format {layout.time_format!r}" if layout.time_format
               else "epoch seconds or ISO 8601 (give --time-format for other layouts)")
        raise DataError(f"{where}: time {s!r} does not match {how}") from None
    if stamp.tzinfo is not None:
        return _finite_time(stamp.timestamp(), where)
    if zone is None:
        raise DataError(f"{where}: time {s!r} has no zone; say which with --tz (e.g. "
                        "--tz Europe/Berlin) or write it with Z or ±hh:mm")
    first, second = stamp.replace(tzinfo=zone), stamp.replace(tzinfo=zone, fold=1)
    if first.astimezone(UTC).astimezone(zone).replace(tzinfo=None) != stamp:
        raise DataError(f"{where}: local time {s!r} does not exist in {zone.key} (the clocks "
                        "went forward)")
    if first.utcoffset() != second.utcoffset():
        raise DataError(f"{where}: local time {s!r} occurs twice in {zone.key} (the clocks "
                        "went back); no one instant is meant: use a column with a zone")
    return _finite_time(first.timestamp(), where)


def _finite_time(value: float, where: str) -> float:
    if not math.isfinite(value) or abs(value) > 1e11:
        raise DataError(f"{where}: time {value!r} is not a plausible epoch second")
    return value


def read_csv_events(path: Path, layout: CsvLayout) -> CsvResult:
    """Read a CSV file into stream events; DataError names the file, line and column."""
    if (layout.sensor is None) == (layout.sensor_column is None):
        raise DataError("give the sensor id (--sensor) or the column that holds it "
                        "(--sensor-column), one of them")
    if not layout.inputs or next(iter(layout.inputs)) != "raw":
        raise DataError("the first input must be raw (the sensor's own value)")
    zone = None if layout.tz is None else local_zone(layout.tz)
    fixed = None
    if layout.sensor is not None:
        try:
            fixed = validate_sensor_id(layout.sensor)
        except DecodeError as exc:
            raise DataError(f"--sensor {layout.sensor!r}: {exc.detail or exc.reason}") from None
    header, rows_of, delim = _table(path, layout)
    try:
        wanted = [layout.time, *layout.inputs.values()]
        wanted += [c for c in (layout.sensor_column, layout.reference) if c is not None]
        col: dict[str, int] = {}
        for name in wanted:
            if name not in header:
                raise DataError(f"{path}:1: no column {name!r} in the header (have "
                                f"{', '.join(repr(h) for h in header)}"
                                + ("" if delim is None else f"; delimiter {delim!r}") + ")")
            col[name] = header.index(name)
        events: list[tuple[float, int, Reading | Reference]] = []
        skipped: Counter[str] = Counter()
        rows = 0
        for line, row in rows_of:
            if not row or all(not c.strip() for c in row):
                continue
            rows += 1
            if len(row) != len(header):
                raise DataError(f"{path}:{line}: {len(row)} fields, the header has "
                                f"{len(header)} (delimiter {delim!r})")

            def at(name: str, line: int = line) -> str:
                return f"{path}:{line}: column {col[name] + 1} ({name!r})"

            t = _instant(row[col[layout.time]], layout, zone, at(layout.time))
            sensor = fixed
            if sensor is None:
                assert layout.sensor_column is not None
                raw_id = row[col[layout.sensor_column]].strip()
                try:
                    sensor = validate_sensor_id(raw_id)
                except DecodeError as exc:
                    raise DataError(f"{at(layout.sensor_column)}: sensor id {raw_id!r}: "
                                    f"{exc.detail or exc.reason}") from None
            cells = {name: row[col[c]] for name, c in layout.inputs.items()}
            if not cells["raw"].strip():
                skipped["no raw value"] += 1
            elif blank := [n for n, v in cells.items() if not v.strip()]:
                skipped[f"no {layout.inputs[blank[0]]!r} value"] += 1
            else:
                inputs = {n: parse_number(v, at(layout.inputs[n]), layout.decimal_comma)
                          for n, v in cells.items()}
                events.append((t, 0, Reading(t=t, sensor=sensor, inputs=inputs)))
            if layout.reference is not None and row[col[layout.reference]].strip():
                value = parse_number(row[col[layout.reference]], at(layout.reference),
                                     layout.decimal_comma)
                events.append((t, 1, Reference(t=t, sensor=sensor, value=value,
                                               window=layout.window)))
    except csv.Error as exc:
        raise DataError(f"{path}: unreadable CSV ({exc})") from exc
    events.sort(key=lambda e: (e[0], e[1]))  # event-time order; a reading before its reference
    return CsvResult([e for _, _, e in events], rows, delim or "parquet", skipped)


Rows = Iterator[tuple[int, list[str]]]


def _table(path: Path, layout: CsvLayout) -> tuple[list[str], Rows, str | None]:
    """The header and the numbered rows of a CSV file, or of a Parquet file (``.parquet``).

    Parquet cells become the text the CSV path reads, so both go through one set of checks:
    numbers as Python writes them, time stamps as ISO 8601 (with their zone when the column
    has one; without, ``--tz`` says which), nulls as empty cells. The delimiter is None for
    Parquet. Needs pyarrow (the ``parquet`` extra) for Parquet only.
    """
    if path.suffix.lower() == ".parquet":
        return (*parquet_rows(path), None)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise DataError(f"{path}: file not found") from None
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from exc
    except UnicodeDecodeError as exc:
        raise DataError(f"{path}: not UTF-8 text (byte {exc.start}); save it as UTF-8 CSV") \
            from None
    lines = text.splitlines(keepends=True)
    if not lines or not lines[0].strip():
        raise DataError(f"{path}:1: empty file; expected a header row")
    delim = layout.delimiter or _sniff(lines[0], path)
    reader = csv.reader(lines, delimiter=delim)
    try:
        header = [h.strip() for h in next(reader)]
    except csv.Error as exc:
        raise DataError(f"{path}:1: unreadable CSV header ({exc})") from exc

    def rows() -> Rows:
        for row in reader:
            yield reader.line_num, row

    return header, rows(), delim


def parquet_rows(path: Path) -> tuple[list[str], Rows]:
    """The header and numbered rows of a Parquet file, as text cells (see :func:`_table`)."""
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise DataError(f"{path}: reading Parquet needs pyarrow: pip install "
                        "'trimtab[parquet]'") from None
    try:
        table = pq.read_table(path)
    except FileNotFoundError:
        raise DataError(f"{path}: file not found") from None
    except OSError as exc:
        raise DataError(f"{path}: cannot read as Parquet ({exc})") from exc
    except ValueError as exc:  # pyarrow's ArrowInvalid: not Parquet at all
        raise DataError(f"{path}: not a Parquet file ({exc})") from exc
    header = [str(n) for n in table.column_names]
    columns = [table.column(i).to_pylist() for i in range(table.num_columns)]

    def cell(v: object) -> str:
        if v is None:
            return ""
        if isinstance(v, datetime):
            return v.isoformat()
        if isinstance(v, float):
            return repr(v)
        return str(v)

    def rows() -> Rows:
        for i in range(table.num_rows):
            yield i + 2, [cell(c[i]) for c in columns]  # "line" 1 is the header, as in CSV

    return header, rows()


def describe_span(result: CsvResult) -> str:
    """First and last event time of a result as UTC ISO 8601 (for the summary line)."""
    if not result.events:
        return "no events"
    first = datetime(1970, 1, 1, tzinfo=UTC) + timedelta(seconds=result.events[0].t)
    last = datetime(1970, 1, 1, tzinfo=UTC) + timedelta(seconds=result.events[-1].t)
    return f"{first:%Y-%m-%dT%H:%M:%SZ} to {last:%Y-%m-%dT%H:%M:%SZ}"


def csv_as_stream(path: Path, layout: CsvLayout, directory: Path) -> Path:
    """The events of a CSV file written as a stream file in ``directory`` (for commands that
    read stream files by path); DataError if the file gives no event."""
    result = read_csv_events(path, layout)
    if not result.events:
        raise DataError(f"{path}: no events ({sum(result.skipped.values())} rows without one)")
    out = directory / (path.stem + ".jsonl")
    write_events(out, result.events)
    return out


def readable_stream(path: Path, layout_file: Path | None, directory: Path) -> Path:
    """The stream file a command reads: ``path`` itself, or a CSV file (``.csv``) converted
    into ``directory`` with the layout in ``layout_file``."""
    if path.suffix.lower() not in (".csv", ".parquet"):
        if layout_file is not None:
            raise DataError(f"--layout is for CSV and Parquet files; {path} is read as a "
                            "stream file")
        return path
    if layout_file is None:
        kind = "Parquet" if path.suffix.lower() == ".parquet" else "CSV"
        raise DataError(f"{path}: a {kind} file needs --layout LAYOUT.toml to say which column "
                        "is what (or convert it first with trimtab convert)")
    return csv_as_stream(path, load_layout(layout_file), directory)
