"""``trimtab replay``: the daemon's engine over a stream file, as fast as it can be read."""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections import Counter
from pathlib import Path
from typing import TextIO

from trimtab.config import load_config
from trimtab.engine import Engine
from trimtab.errors import DecodeError
from trimtab.messages import Reading
from trimtab.streamfile import encode_corrected_line, read_events
from trimtab.wiring import make_engine


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-c", "--config", required=True, type=Path, help="config file (TOML)")
    p.add_argument("stream", type=Path, help="stream file (JSON Lines, event-time order)")
    p.add_argument("-o", "--output", type=Path, default=None,
                   help="corrected stream to write (default: standard output)")
    p.add_argument("--state-out", type=Path, default=None,
                   help="write the engine's final state (JSON) here")
    p.add_argument("--quiet", action="store_true", help="no progress or summary on stderr")


def replay(engine: Engine, stream: Path, out: TextIO, *, progress: bool = False
           ) -> tuple[int, int, Counter[str]]:
    """Feed every event of a stream file to the engine; write each corrected value.

    Malformed lines are counted by reason and skipped, as the daemon does with messages.
    Returns (events, corrected, rejected-by-reason).
    """
    rejected: Counter[str] = Counter()

    def on_error(lineno: int, exc: DecodeError) -> None:
        rejected[exc.reason] += 1

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


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    engine = make_engine(cfg)
    started = time.monotonic()
    progress = not args.quiet and sys.stderr.isatty()
    if args.output is None:
        events, corrected, rejected = replay(engine, args.stream, sys.stdout, progress=progress)
    else:
        with open(args.output, "w", encoding="utf-8") as fh:
            events, corrected, rejected = replay(engine, args.stream, fh, progress=progress)
    elapsed = time.monotonic() - started
    if args.state_out is not None:
        args.state_out.write_text(json.dumps(engine.state_dict(), allow_nan=False))
    if not args.quiet:
        refs = {k.removeprefix("reference_"): v for k, v in sorted(engine.counts.items())
                if k.startswith("reference_")}
        print(f"replay: {events} events, {corrected} corrected values in {elapsed:.2f} s "
              f"({events / max(elapsed, 1e-9):,.0f} events/s)", file=sys.stderr)
        print(f"replay: references {refs}", file=sys.stderr)
        if rejected:
            print(f"replay: rejected lines {dict(rejected)}", file=sys.stderr)
    return 0
