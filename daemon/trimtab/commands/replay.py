"""``trimtab replay``: the daemon's engine over a stream file, as fast as it can be read."""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from collections import Counter
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import TextIO

from trimtab.config import load_config
from trimtab.engine.engine import Engine
from trimtab.engine.wiring import make_engine
from trimtab.errors import DataError, DecodeError
from trimtab.messages import Reading
from trimtab.wire.csvstream import readable_stream
from trimtab.wire.streamfile import encode_corrected_line, read_events


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-c", "--config", required=True, type=Path, help="config file (TOML)")
    p.add_argument("stream", type=Path, help="stream file (JSON Lines, event-time order)")
    p.add_argument("-o", "--output", type=Path, default=None,
                   help="corrected stream to write (default: standard output)")
    p.add_argument("--state-out", type=Path, default=None,
                   help="write the engine's final state (JSON) here")
    p.add_argument("--layout", type=Path, default=None, metavar="LAYOUT.toml",
                   help="read a CSV file (.csv) as the stream, with this column mapping "
                        "(as trimtab convert --layout takes it)")
    p.add_argument("--quiet", action="store_true", help="no progress or summary on stderr")
    p.add_argument("--json", action="store_true",
                   help="write the summary to stderr as one JSON object instead of lines")


def replay(engine: Engine, stream: Path, out: TextIO, *, progress: bool = False,
           on_reject: Callable[[int, DecodeError], None] | None = None,
           ) -> tuple[int, int, Counter[str]]:
    """Feed every event of a stream file to the engine; write each corrected value.

    Malformed lines are counted by reason and skipped, as the daemon does with messages
    (``on_reject``, when given, also hears each one with its line number).
    Returns (events, corrected, rejected-by-reason).
    """
    rejected: Counter[str] = Counter()

    def on_error(lineno: int, exc: DecodeError) -> None:
        rejected[exc.reason] += 1
        if on_reject is not None:
            on_reject(lineno, exc)

    events = corrected = 0
    started = last = time.monotonic()
    on_reading, on_reference = engine.on_reading, engine.on_reference
    lines: list[str] = []  # written in blocks: one write call per line costs as much as a line
    for event in read_events(stream, on_error=on_error):
        events += 1
        if isinstance(event, Reading):
            c = on_reading(event)
            if c is not None:
                lines.append(encode_corrected_line(c))
                corrected += 1
        else:
            on_reference(event)
        if events % 4096 == 0:
            if lines:
                lines.append("")
                out.write("\n".join(lines))
                lines.clear()
            if not progress:
                continue
            now = time.monotonic()
            if now - last >= 0.5:
                last = now
                rate = events / max(now - started, 1e-9)
                print(f"\rreplay: {events:,} events, {rate:,.0f}/s", end="", file=sys.stderr)
    if lines:
        lines.append("")
        out.write("\n".join(lines))
    if progress:
        print("\r", end="", file=sys.stderr)
    return events, corrected, rejected


def counted(counts: Mapping[str, int]) -> str:
    """Counts by reason as readable text: ``61 bad_json, 2 missing_field`` (largest first)."""
    items = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    return ", ".join(f"{n:,} {reason}" for reason, n in items) or "none"


def run(args: argparse.Namespace) -> int:
    """Run on the stream file, or on a CSV file converted for the run with --layout."""
    with tempfile.TemporaryDirectory(prefix="trimtab-replay-") as tmp:
        args.shown = args.stream
        args.stream = readable_stream(args.stream, args.layout, Path(tmp))
        return _run(args)


def _run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    engine = make_engine(cfg)
    started = time.monotonic()
    progress = not args.quiet and sys.stderr.isatty()
    first: list[str] = []

    def on_reject(lineno: int, exc: DecodeError) -> None:
        if not first:
            first.append(f"line {lineno}: {exc.reason}: {exc.detail}")

    if args.output is None:
        events, corrected, rejected = replay(engine, args.stream, sys.stdout, progress=progress,
                                             on_reject=on_reject)
    else:
        try:
            fh = open(args.output, "w", encoding="utf-8")  # noqa: SIM115 (closed below)
        except OSError as exc:
            raise DataError(f"{args.output}: cannot write ({exc.strerror})") from exc
        with fh:
            events, corrected, rejected = replay(engine, args.stream, fh, progress=progress,
                                                 on_reject=on_reject)
    elapsed = time.monotonic() - started
    if events == 0:
        # nothing usable: a wrong or empty file must not look like a replay that went well
        lines = sum(rejected.values())
        if not lines:
            raise DataError(f"{args.shown}: no events (an empty stream file)")
        raise DataError(f"{args.shown}: no usable events: all {lines:,} lines rejected "
                        f"({counted(rejected)}); first at {first[0]}")
    if args.state_out is not None:
        try:
            args.state_out.write_text(json.dumps(engine.state_dict(), allow_nan=False))
        except OSError as exc:
            raise DataError(f"{args.state_out}: cannot write ({exc.strerror})") from exc
    refs = {k.removeprefix("reference_"): v for k, v in sorted(engine.counts.items())
            if k.startswith("reference_")}
    reads = {k.removeprefix("reading_"): v for k, v in sorted(engine.counts.items())
             if k.startswith("reading_")}
    if corrected == 0:
        # events were read but none gave a corrected value: the stream does not fit the config
        raise DataError(f"{args.shown}: no corrected values from {events:,} events (readings: "
                        f"{counted(reads)}; references: {counted(refs)}); "
                        f"check its sensors and inputs against {args.config}")
    if args.json:
        summary = {"stream": str(args.shown), "events": events, "corrected": corrected,
                   "seconds": round(elapsed, 6), "references": refs,
                   "readings": reads,
                   "rejected_lines": dict(sorted(rejected.items()))}
        print(json.dumps(summary), file=sys.stderr)
    elif not args.quiet:
        print(f"replay: {events:,} events, {corrected:,} corrected values in {elapsed:.2f} s "
              f"({events / max(elapsed, 1e-9):,.0f} events/s)", file=sys.stderr)
        print(f"replay: readings: {counted(reads)}; references: {counted(refs)}",
              file=sys.stderr)
        if rejected:
            print(f"replay: rejected lines: {counted(rejected)} (first at {first[0]})",
                  file=sys.stderr)
    return 0
