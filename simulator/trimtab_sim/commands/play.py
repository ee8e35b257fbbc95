"""``trimtab-sim play``: publish a stream file through a daemon config's topics and codec."""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from trimtab.commands.options import positive
from trimtab.config import load_config
from trimtab.errors import DataError
from trimtab.wire.streamfile import read_events
from trimtab_sim.mqttio import play
from trimtab_sim.progress import progress_line


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("stream", type=Path, help="stream file (JSON Lines, event-time order)")
    p.add_argument("-c", "--config", required=True, type=Path,
                   help="the daemon's config: topics, payload codec, broker address")
    p.add_argument("--host", default=None, help="broker host (default: the config's)")
    p.add_argument("--port", type=int, default=None, help="broker port (default: the config's)")
    p.add_argument("--speed", type=positive, default=None, metavar="FACTOR",
                   help="real time × this factor, > 0 (default: as fast as the broker takes it)")
    p.add_argument("--qos", type=int, choices=[0, 1, 2], default=1, help="publish QoS")


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    host = args.host or cfg.broker.host
    port = args.port or cfg.broker.port
    events = list(read_events(args.stream))
    if not events:
        raise DataError(f"{args.stream}: no events (an empty stream file)")
    shown = progress_line("play:")

    def progress(n: int, _total: int) -> None:
        shown(n, len(events))

    started = time.monotonic()
    sent = play(events, cfg, host=host, port=port, speed=args.speed, qos=args.qos,
                progress=progress)
    elapsed = time.monotonic() - started
    print(f"\rplay: {sent:,} events to {host}:{port} in {elapsed:.1f} s "
          f"({sent / max(elapsed, 1e-9):,.0f}/s)", file=sys.stderr)
    return 0
