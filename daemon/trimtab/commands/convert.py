"""``trimtab convert``: an operator's CSV or Parquet file (a logger's, a spreadsheet's) to a stream.

Columns are mapped on the command line: ``--inputs raw=no2_we,temp=T_air`` names each stream
input and the column it comes from (a bare name means the same on both sides). The result is
the JSON Lines stream that ``replay``, ``tune``, ``fit`` and ``trimtab-sim play`` read.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from trimtab.commands.options import positive
from trimtab.errors import DataError
from trimtab.messages import Reference
from trimtab.wire.csvstream import CsvLayout, describe_span, load_layout, read_csv_events
from trimtab.wire.streamfile import write_events


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The options of ``trimtab convert``."""
    p.add_argument("data", metavar="DATA.csv",
                   help="the CSV file, with a header row, or a Parquet file (.parquet; needs "
                        "the parquet extra)")
    p.add_argument("-o", "--output", required=True, metavar="STREAM.jsonl",
                   help="the stream file to write (replaced)")
    p.add_argument("--layout", type=Path, metavar="LAYOUT.toml",
                   help="the column mapping as a TOML [csv] table instead of the options below")
    who = p.add_mutually_exclusive_group()
    who.add_argument("--sensor", metavar="ID", help="the sensor every row belongs to")
    who.add_argument("--sensor-column", metavar="COL",
                     help="the column holding each row's sensor id")
    p.add_argument("--inputs", default=None, metavar="NAME=COL,…",
                   help="stream inputs and their columns, raw first (default: raw)")
    p.add_argument("--time", default=None, metavar="COL",
                   help="the column of event times (default: t): epoch seconds, ISO 8601, or "
                        "local time with --tz")
    p.add_argument("--tz", metavar="ZONE",
                   help="IANA zone of times written without one (e.g. Europe/Berlin)")
    p.add_argument("--time-format", metavar="FORMAT",
                   help="strptime layout of the time column, e.g. '%%d/%%m/%%Y %%H:%%M'")
    p.add_argument("--reference", metavar="COL",
                   help="the column of reference values, where a row has one")
    p.add_argument("--window", type=positive, metavar="SECONDS",
                   help="averaging window of the reference values (default: spot values)")
    p.add_argument("--delimiter", metavar="CHAR",
                   help="field delimiter (default: sniffed from the header: , ; tab |); "
                        "'tab' for a tab")
    p.add_argument("--decimal-comma", action="store_true",
                   help="numbers are written 12,5 (and 1.234,5)")
    p.add_argument("--quiet", action="store_true", help="no summary on stderr")


def _inputs(text: str) -> dict[str, str]:
    out: dict[str, str] = {}
    for part in (s.strip() for s in text.split(",")):
        if not part:
            continue
        name, _, column = part.partition("=")
        name, column = name.strip(), (column or name).strip()
        if not name or not column:
            raise DataError(f"--inputs: {part!r} is not NAME or NAME=COLUMN")
        if name in out:
            raise DataError(f"--inputs: input {name!r} is named twice")
        out[name] = column
    if not out:
        raise DataError("--inputs: give at least the raw value's column")
    return out


MAPPING = ("sensor", "sensor_column", "inputs", "time", "tz", "time_format", "reference",
           "window", "delimiter")


def layout_from(args: argparse.Namespace) -> CsvLayout:
    """The CSV layout: from --layout, or from the mapping options (never both)."""
    given = [f"--{k.replace('_', '-')}" for k in MAPPING if getattr(args, k) is not None]
    if args.decimal_comma:
        given.append("--decimal-comma")
    if args.layout is not None:
        if given:
            raise DataError(f"give the column mapping in {args.layout} or as options, not "
                            f"both ({', '.join(given)} given too)")
        return load_layout(args.layout)
    if args.sensor is None and args.sensor_column is None:
        raise DataError("say whose rows these are: --sensor ID or --sensor-column COL "
                        "(or give --layout)")
    delimiter = args.delimiter
    if delimiter is not None:
        delimiter = "\t" if delimiter in ("tab", "\\t") else delimiter
        if len(delimiter) != 1:
            raise DataError(f"--delimiter {args.delimiter!r}: give one character (or 'tab')")
    return CsvLayout(
        inputs=_inputs(args.inputs or "raw"), time=args.time or "t", sensor=args.sensor,
        sensor_column=args.sensor_column, reference=args.reference, window=args.window,
        tz=args.tz, time_format=args.time_format, delimiter=delimiter,
        decimal_comma=args.decimal_comma,
    )


def run(args: argparse.Namespace) -> int:
    """Read, convert, write, and say what was written."""
    layout = layout_from(args)
    source = Path(args.data)
    result = read_csv_events(source, layout)
    if not result.events:
        why = ", ".join(f"{n} {r}" for r, n in result.skipped.items()) or "no data rows"
        raise DataError(f"{source}: no events to write ({why})")
    try:
        n = write_events(args.output, result.events)
    except OSError as exc:
        raise DataError(f"{args.output}: cannot write ({exc.strerror})") from exc
    if not args.quiet:
        refs = sum(1 for e in result.events if isinstance(e, Reference))
        print(f"convert: {source}: {result.rows:,} rows (delimiter {result.delimiter!r}) → "
              f"{n - refs:,} readings, {refs:,} references, {describe_span(result)}, "
              f"to {args.output}", file=sys.stderr)
        for reason, count in sorted(result.skipped.items()):
            print(f"convert: skipped {count:,} row(s) without a reading: {reason}",
                  file=sys.stderr)
    return 0
