"""``trimtab-sim demo``: the whole loop on the embedded default scenario, then the score."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from trimtab.commands.options import DeprecatedFlag
from trimtab_sim.demo import embedded, run_demo


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-o", "--output", dest="out", type=Path, default=Path("out/demo"),
                   metavar="DIR",
                   help="directory for the stream, corrected values, state and report "
                        "(default out/demo)")
    p.add_argument("--out", dest="out", type=Path, action=DeprecatedFlag, const="--output",
                   default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    p.add_argument("--scenario", type=Path, default=None,
                   help="scenario file (default: the embedded harbour-quay PM2.5 scenario)")
    p.add_argument("-c", "--config", type=Path, default=None,
                   help="daemon config template (default: the embedded config/demo.toml)")
    p.add_argument("--seed", type=int, default=0, help="scenario seed (default 0)")
    p.add_argument("--days", type=float, default=None,
                   help="play only the first DAYS of the scenario (default: all of it)")
    p.add_argument("--broker", choices=["auto", "mosquitto", "embedded"], default="auto",
                   help="private broker to start (default: Mosquitto when on PATH)")


def run(args: argparse.Namespace) -> int:
    from trimtab_sim.cli import main as sim_main

    res = run_demo(args.out, scenario=args.scenario, config=args.config, seed=args.seed,
                   broker_kind=args.broker, days=args.days)
    scenario = args.scenario or embedded("demo-scenario.toml")
    code = sim_main(["score", str(res.out / "stream.jsonl"), str(res.out / "corrected.jsonl"),
                     "-o", str(res.report), "--scenario", str(scenario), "--check",
                     "--config", str(res.out / "daemon.toml")])
    print(f"\ndemo: report {res.report / 'report.md'} (figures beside it)", file=sys.stderr)
    if not res.identical:
        print("demo: the broker's output differs from `trimtab replay`", file=sys.stderr)
        return 1
    return code
