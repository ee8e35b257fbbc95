"""``trimtab-sim make``: generate a seeded stream file from a scenario."""

from __future__ import annotations

import argparse
import sys

from trimtab.messages import Reference
from trimtab_sim.generate import generate
from trimtab_sim.scenario import load_scenario


def add_arguments(p: argparse.ArgumentParser) -> None:
    """Arguments of ``make``."""
    p.add_argument("scenario", metavar="SCENARIO.toml", help="scenario file")
    p.add_argument(
        "-o",
        "--output",
        required=True,
        metavar="STREAM.jsonl",
        help="stream file to write (JSON Lines, event-time order)",
    )
    p.add_argument(
        "--seed",
        type=int,
        default=0,
        help="random seed (>= 0); the same scenario and seed give the same file",
    )


def run(args: argparse.Namespace) -> int:
    """Generate the stream and write it; prints what was written."""
    from trimtab.wire.streamfile import write_events

    if args.seed < 0:
        print("trimtab-sim make: --seed must be >= 0", file=sys.stderr)
        return 2
    sc = load_scenario(args.scenario)
    stream = generate(sc, args.seed)
    n = write_events(args.output, stream.events)
    refs = sum(1 for e in stream.events if isinstance(e, Reference))
    print(
        f"wrote {n} events ({n - refs} readings, {refs} references) for "
        f"{len(sc.sensors)} sensors over {sc.days:g} days to {args.output}"
    )
    return 0
