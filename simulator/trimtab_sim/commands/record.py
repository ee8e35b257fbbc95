"""``trimtab-sim record``: write the corrected values a daemon publishes to a stream file."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from trimtab.commands.options import positive
from trimtab.config import Config, load_config
from trimtab.errors import DataError
from trimtab.messages import Corrected, Reading
from trimtab.wire.streamfile import read_events, write_corrected
from trimtab_sim.mqttio import Recorder


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-c", "--config", required=True, type=Path,
                   help="the daemon's config: corrected topic, payload codec, broker address")
    p.add_argument("-o", "--output", required=True, type=Path, help="corrected stream to write")
    p.add_argument("--host", default=None, help="broker host (default: the config's)")
    p.add_argument("--port", type=int, default=None, help="broker port (default: the config's)")
    p.add_argument("--count", type=int, default=None, help="stop after this many messages")
    p.add_argument("--idle", type=positive, default=5.0, metavar="SECONDS",
                   help="stop after this many seconds without a message (default 5)")
    p.add_argument("--timeout", type=positive, default=3600.0, metavar="SECONDS",
                   help="stop after this many seconds in any case (default 3600)")
    p.add_argument("--quiet", action="store_true", help="no progress or summary on stderr")
    p.add_argument("--expect", type=Path, default=None, metavar="STREAM",
                   help="the stream being played: stop once every reading of a sensor the "
                        "config serves has its corrected value, and count the ones missing")
    p.add_argument("--client-id", default="trimtab-sim-record", metavar="ID",
                   help="MQTT client id of the persistent session (default trimtab-sim-record)")
    p.add_argument("--fresh", action="store_true",
                   help="start and end with a clean session: drop what the broker queued for "
                        "this client id since its last run")


BROKER_HINT = ("a broker drops QoS 1 messages it cannot queue for a client: for Mosquitto, "
               "raise max_queued_messages (default 1000) and set max_queued_bytes 0, as "
               "config/mosquitto.conf does")


@dataclass(frozen=True, slots=True)
class Gaps:
    """What arrived against what was expected: counts, and the first value that is missing."""

    expected: int
    arrived: int
    missing: int
    duplicates: int
    unexpected: int
    first_missing: tuple[str, float] | None


def count_gaps(expected: Iterable[tuple[str, float]], received: Iterable[Corrected]) -> Gaps:
    """Compare the (sensor, t) of the corrected values that arrived with those expected."""
    want = list(dict.fromkeys(expected))
    wanted = set(want)
    seen: set[tuple[str, float]] = set()
    duplicates = unexpected = 0
    for c in received:
        k = (c.sensor, c.t)
        if k not in wanted:
            unexpected += 1
        elif k in seen:
            duplicates += 1
        else:
            seen.add(k)
    absent = [k for k in want if k not in seen]
    return Gaps(len(want), len(seen), len(absent), duplicates, unexpected,
                absent[0] if absent else None)


def _expected(cfg: Config, stream: Path) -> list[tuple[str, float]]:
    """(sensor, t) of every reading in the stream that the daemon would correct."""
    return [(e.sensor, e.t) for e in read_events(stream)
            if isinstance(e, Reading) and cfg.sensor_allowed(e.sensor)]


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    expected = None if args.expect is None else _expected(cfg, args.expect)
    if expected is not None and not expected:
        raise DataError(f"{args.expect}: no reading of a sensor {args.config} serves")
    count = args.count if expected is None or args.count is not None else len(expected)
    host, port = args.host or cfg.broker.host, args.port or cfg.broker.port
    rec = Recorder(cfg, host, port, client_id=args.client_id, persistent=not args.fresh).start()
    if not args.quiet:
        print(f"record: subscribed to {host}:{port} as {args.client_id}"
              f"{'' if args.fresh else ' (persistent session, QoS 1)'}", file=sys.stderr,
              flush=True)
    try:
        got = rec.wait(count=count, quiet=args.idle, timeout=args.timeout,
                       idle_ends_count=True)
    finally:
        rec.stop()
    n = write_corrected(args.output, got)
    if not args.quiet:
        print(f"record: {n:,} corrected values to {args.output}"
              f"{f' ({rec.rejected} undecodable)' if rec.rejected else ''}", file=sys.stderr)
    code = 0
    if expected is not None:
        gaps = count_gaps(expected, got)
        if gaps.missing:
            assert gaps.first_missing is not None
            sensor, t = gaps.first_missing
            print(f"record: {gaps.missing:,} of {gaps.expected:,} expected corrected values did "
                  f"not arrive (the first: {sensor} at t = {t!r}); {BROKER_HINT}",
                  file=sys.stderr)
            code = 1
        if gaps.duplicates or gaps.unexpected:
            print(f"record: {gaps.duplicates:,} duplicates, {gaps.unexpected:,} values not in "
                  f"{args.expect}", file=sys.stderr)
    if args.count is not None and n < args.count:
        print(f"record: {n:,} of the {args.count:,} values asked for arrived; "
              f"{args.count - n:,} missing; {BROKER_HINT}", file=sys.stderr)
        code = 1
    return code
