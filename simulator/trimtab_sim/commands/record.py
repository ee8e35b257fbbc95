"""``trimtab-sim record``: write the corrected values a daemon publishes to a stream file."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from trimtab.config import load_config
from trimtab.options import positive
from trimtab.streamfile import write_corrected
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


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    host, port = args.host or cfg.broker.host, args.port or cfg.broker.port
    rec = Recorder(cfg, host, port).start()
    if not args.quiet:
        print(f"record: subscribed to {host}:{port}", file=sys.stderr, flush=True)
    try:
        got = rec.wait(count=args.count, quiet=args.idle, timeout=args.timeout)
    finally:
        rec.stop()
    n = write_corrected(args.output, got)
    if not args.quiet:
        print(f"record: {n:,} corrected values to {args.output}"
              f"{f' ({rec.rejected} undecodable)' if rec.rejected else ''}", file=sys.stderr)
    if args.count is not None and n < args.count:
        print(f"record: {n:,} of the {args.count:,} values asked for arrived; "
              f"{args.count - n:,} missing", file=sys.stderr)
        return 1
    return 0
