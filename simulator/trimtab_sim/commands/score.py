"""``trimtab-sim score``: score a corrected stream against the truth in its source stream."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from trimtab.commands.options import DeprecatedFlag
from trimtab.errors import DataError
from trimtab_sim.report import EPA_TARGETS, TargetCheck, check_targets, summary_table, write_report
from trimtab_sim.scenario import load_scenario
from trimtab_sim.score import DAY, Joined, Result, Settings, join, score, to_jsonable


def add_arguments(p: argparse.ArgumentParser) -> None:
    """Arguments of ``score``."""
    p.add_argument("stream", metavar="STREAM", help="the simulated stream (readings carry truth)")
    p.add_argument("corrected", metavar="CORRECTED", help="corrected values (JSON Lines)")
    p.add_argument("-o", "--output", dest="report_dir", metavar="DIR",
                   help="write report.md, score.json and PNG figures to this directory")
    p.add_argument("--report-dir", dest="report_dir", action=DeprecatedFlag, const="--output",
                   default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    p.add_argument(
        "--json", action="store_true", help="print the figures as JSON instead of the table"
    )
    p.add_argument(
        "--scenario",
        metavar="SCENARIO.toml",
        help="the stream's scenario: supplies [score] settings and drift-step times",
    )
    p.add_argument(
        "--targets",
        choices=[*EPA_TARGETS, "none"],
        help="EPA target set to compare against (default: the scenario's, else none)",
    )
    p.add_argument("--oracle-days", type=float, help="oracle refit block, days")
    p.add_argument("--oracle-lambda", type=float, help="oracle ridge penalty λ")
    p.add_argument(
        "--stamp",
        choices=["end", "start"],
        help="whether a reference's t marks its window's end (default) or start",
    )
    p.add_argument(
        "-c",
        "--config",
        metavar="CONFIG",
        help="the daemon's config: replay the stream through its engine to draw each sensor's "
        "coefficient trajectory, with rollbacks and level shifts marked",
    )
    p.add_argument(
        "--check",
        action="store_true",
        help="exit 1 when corrected RMSE does not beat raw by min_improvement",
    )


def _settings(args: argparse.Namespace) -> tuple[Settings, dict[str, list[float]], str]:
    steps: dict[str, list[float]] = {}
    values: dict[str, Any] = {}
    targets = "none"
    if args.scenario:
        sc = load_scenario(args.scenario)
        spec = sc.score
        values = {
            "oracle_days": spec.oracle_days,
            "oracle_lambda": spec.oracle_lambda,
            "recovery_window": spec.recovery_window,
            "recovery_tolerance": spec.recovery_tolerance,
            "min_improvement": spec.min_improvement,
        }
        stamps = {r.stamp for r in sc.references} | {c.stamp for c in sc.checks}
        if len(stamps) == 1:
            values["stamp"] = stamps.pop()
        targets = spec.targets
        steps = {s.id: [sc.t0 + st.day * DAY for st in s.steps] for s in sc.sensors if s.steps}
    for name in ("oracle_days", "oracle_lambda", "stamp"):
        if getattr(args, name) is not None:
            values[name] = getattr(args, name)
    if args.targets is not None:
        targets = args.targets
    return Settings(**values), steps, targets


def run(args: argparse.Namespace) -> int:
    """Join, score, print, and write the report when asked."""
    from trimtab.wire.streamfile import read_corrected, read_events

    settings, steps, targets = _settings(args)
    try:
        joined: list[Joined] = join(read_events(args.stream), read_corrected(args.corrected))
        res: Result = score(joined, settings, steps)
    except DataError as exc:
        text = str(exc)
        if text.startswith((f"{args.stream}:", f"{args.corrected}:")):
            raise  # already names its file and line
        raise DataError(f"{args.stream} with {args.corrected}: {text}") from exc
    checks: list[TargetCheck] = (
        [check_targets(j, targets) for j in joined] if targets != "none" else []
    )
    doc = to_jsonable(
        {
            "sensors": res.sensors,
            "overall": res.overall,
            "settings": res.settings,
            "targets": checks,
        }
    )
    trajectories = None
    if args.config:
        from trimtab.config import load_config
        from trimtab_sim.trajectory import summary, trace

        trajectories = trace(load_config(args.config), read_events(args.stream))
        doc["trajectories"] = summary(trajectories)
    if args.json:
        print(json.dumps(doc, indent=2, ensure_ascii=False))
    else:
        print(summary_table(res))
    if args.report_dir:
        out = Path(args.report_dir)
        sources = {"stream": str(args.stream), "corrected": str(args.corrected)}
        if args.scenario:
            sources["scenario"] = str(args.scenario)
        if args.config:
            sources["config"] = str(args.config)
        unit = load_scenario(args.scenario).signal.unit if args.scenario else ""
        written = write_report(res, joined, checks, out, sources, trajectories, unit=unit)
        (out / "score.json").write_text(
            json.dumps(doc, indent=2, ensure_ascii=False) + "\n", encoding="utf-8"
        )
        print(
            f"wrote {len(written) + 1} files to {out}", file=sys.stderr if args.json else sys.stdout
        )
    if args.check:
        m = res.overall.metrics
        if m["corrected"].rmse > (1.0 - settings.min_improvement) * m["raw"].rmse:
            print(
                "trimtab-sim score: corrected RMSE misses the required improvement", file=sys.stderr
            )
            return 1
    return 0
