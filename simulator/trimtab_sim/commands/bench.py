"""``trimtab-sim bench``: throughput, latency, engine, replay, memory and restart figures."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from trimtab.errors import TrimtabError
from trimtab_sim.bench import format_table, run_bench
from trimtab_sim.broker import mosquitto_path


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--quick", action="store_true",
                   help="a short run that proves the bench works and nothing is lost "
                        "(figures too small to quote)")
    p.add_argument("-o", "--output", type=Path, default=None, metavar="FILE",
                   help="also write every figure, verdict and the machine as JSON to FILE")
    p.add_argument("--json", action="store_true",
                   help="print every figure as JSON instead of the table")
    p.add_argument("--workdir", type=Path, default=None,
                   help="keep the broker, daemon logs and state here (default: a temp dir, "
                        "removed afterwards)")


def run(args: argparse.Namespace) -> int:
    if mosquitto_path() is None:
        raise TrimtabError("the bench needs the mosquitto binary on PATH "
                           "(Debian/Ubuntu: apt-get install mosquitto)")
    result = run_bench(quick=args.quick, workdir=args.workdir)
    text = json.dumps(result, indent=1, allow_nan=True)
    if args.output is not None:
        args.output.write_text(text + "\n")
    print(text if args.json else format_table(result))
    if not result["engine"]["river"]:
        print("\nriver not installed: its row was skipped (pip install -e '.[bench]')",
              file=sys.stderr)
    lost = result["transport"]["lost"] + result["transport"]["duplicates"]
    if lost:
        print(f"\nbench: {lost} messages lost or duplicated", file=sys.stderr)
        return 1
    return 0
