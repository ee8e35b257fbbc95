"""``trimtab tune``: rank candidate learning settings on a recorded stream, all at once.

Reads the stream once through the daemon's engine, evaluates every candidate the config
validator accepts (see :mod:`trimtab.tune.tuner`), prints a ranked table, the refused candidates,
the chosen candidate's per-sensor scores and its settings as a ``[learning]`` snippet.
Ctrl-C while reading stops reading and evaluates the events read so far; Ctrl-C while
evaluating stops and reports the results so far (exit status 130 either way); a further
Ctrl-C stops at once.
"""

from __future__ import annotations

import argparse
import json
import math
import signal
import sys
import tempfile
import time
import tomllib
from datetime import UTC, datetime
from pathlib import Path
from types import FrameType
from typing import Any

from trimtab.commands.replay import counted
from trimtab.config import load_config
from trimtab.config.figures import derived_figures
from trimtab.errors import DataError
from trimtab.tune.grid import (
    TUNED,
    Candidate,
    build_candidates,
    grid_settings,
    load_grid,
    search_settings,
)
from trimtab.tune.run import snippet, tune_stream
from trimtab.tune.tuner import Outcome, Score, TuneResult
from trimtab.wire.csvstream import readable_stream

DEFAULT_SEARCH = 64


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("-c", "--config", required=True, type=Path, help="config file (TOML) to tune")
    p.add_argument("stream", type=Path, help="stream file (JSON Lines, event-time order)")
    how = p.add_mutually_exclusive_group()
    how.add_argument("--grid", type=Path, default=None,
                     help="grid file (TOML [grid] table of lists of tuned settings)")
    how.add_argument("--search", type=int, default=None, metavar="N",
                     help=f"N seeded random candidates: alpha and lambda log-uniform inside the "
                          f"config's bounds (the default, with N = {DEFAULT_SEARCH})")
    p.add_argument("--seed", type=int, default=0, help="seed of --search (default 0)")
    p.add_argument("--split", type=float, default=0.7,
                   help="fraction of the stream's time span to tune on; the rest is the test "
                        "part (default 0.7; 1 = no test part)")
    p.add_argument("--against", choices=("auto", "truth", "references", "spans"),
                   default="auto",
                   help="score corrected values against the readings' truth, predictions "
                        "against the references, or against the references each counted once "
                        "per corrected value since the previous one (spans: sparse references, "
                        "no truth); auto: truth when the stream has it")
    p.add_argument("--folds", type=int, default=3, metavar="N",
                   help="consecutive blocks of the tune part scored on their own (rolling "
                        "origin: each is predicted from everything before it); their spread "
                        "and the lead over the runner-up are printed (default 3)")
    p.add_argument("--top", type=int, default=20, help="rows of the ranked table (0: all)")
    p.add_argument("--plot", type=Path, default=None, metavar="FILE.png",
                   help="write a PNG of tune RMSE against alpha and lambda (needs matplotlib)")
    p.add_argument("--config-out", type=Path, default=None, metavar="FILE",
                   help="write the whole config with the recommended settings (as trimtab "
                        "check prints it)")
    p.add_argument("--json", action="store_true", help="print the results as one JSON object")
    p.add_argument("--layout", type=Path, default=None, metavar="LAYOUT.toml",
                   help="read a CSV file (.csv) as the stream, with this column mapping "
                        "(as trimtab convert --layout takes it)")
    p.add_argument("--quiet", action="store_true", help="no progress or notes on stderr")


class _Interrupts:
    """SIGINT sets a flag the tuner polls; a second one before the flag is read stops at once."""

    def __init__(self) -> None:
        self.flag = False
        self.seen = False
        self._old: Any = None

    def __enter__(self) -> _Interrupts:
        self._old = signal.signal(signal.SIGINT, self._handle)
        return self

    def __exit__(self, *exc: object) -> None:
        signal.signal(signal.SIGINT, self._old)

    def _handle(self, signum: int, frame: FrameType | None) -> None:
        if self.flag:
            raise KeyboardInterrupt
        self.flag = self.seen = True

    def __call__(self) -> bool:
        return self.flag


def _fmt(v: float | None, digits: int = 4) -> str:
    if v is None:
        return "-"
    return f"{v:.{digits}g}"


def _settings_cells(c: Candidate) -> list[str]:
    s = c.settings
    delta = s["huber_delta"]
    scaler = ("fixed" if s["scaler"] == "fixed" else
              f"{s['scaler_width']:g}sd/{_num(s['scaler_span']) / 86400.0:.3g}d")
    step = "-" if s["step_adapt"] == "none" else f"gap {_num(s['step_gap']) / 3600.0:.3g}h"
    products, squares = s["products"], s["squares"]
    assert isinstance(products, tuple) and isinstance(squares, tuple)
    extra = [f"{a}*{b}" for a, b in products] + [f"{x}^2" for x in squares]
    top = c.config.learning.alpha_max if c.config is not None else s["alpha_max"]
    return [f"{s['alpha']:g}", f"{top:g}", f"{s['lambda']:g}", str(s["memory"]),
            "-" if delta is None else f"{delta:g}", f"{s['gate_k']:g}",
            "yes" if s["normalised"] else "no", step, scaler, f"{s['rollback_factor']:g}",
            f"{s['alpha_recovery']:g}", "+".join(extra) or "-"]


def _num(v: object) -> float:
    assert isinstance(v, int | float)
    return float(v)


def _table(result: TuneResult, top: int) -> list[str]:
    head = ["rank", "alpha", "alpha_max", "lambda", "memory", "huber", "gate_k", "norm", "step",
            "scaler", "rollback", "recovery", "terms+", "tune RMSE",
            "test RMSE", "bias", "rollbacks", "gated", "margin", "reached", ""]
    rows = [head]
    ranked = list(enumerate(result.outcomes, start=1))
    shown = ranked if top <= 0 else ranked[:top]
    hidden = len(ranked) - len(shown)
    current = [(r, o) for r, o in ranked[len(shown):] if "current" in o.candidate.labels]
    for rank, o in shown + current:
        rows.append([str(rank), *_settings_cells(o.candidate), _fmt(o.tune.rmse),
                     _fmt(o.test.rmse), _fmt(o.tune.bias, 3), str(o.rollbacks), str(o.gated),
                     _fmt(o.margin, 3), _fmt(None if math.isinf(o.reached) else o.reached, 3),
                     "current" if "current" in o.candidate.labels else ""])
    out = _columns(rows)
    if hidden:
        out.insert(len(shown) + 1, f"  … {hidden - len(current)} more (--top 0 shows all)")
    return out


def _columns(rows: list[list[str]]) -> list[str]:
    """Rows of cells as right-aligned columns (the first column left-aligned)."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return ["  ".join(cell.ljust(w) if i == 0 and not cell.isdigit() else cell.rjust(w)
                      for i, (cell, w) in enumerate(zip(r, widths, strict=True))).rstrip()
            for r in rows]


def _refused(result: TuneResult) -> list[str]:
    """Refused candidates grouped by their reasons, each group with the values it spans."""
    groups: dict[tuple[str, ...], list[Candidate]] = {}
    for c in result.refused:
        reasons = tuple(why.split(": ", 1)[1] if ": " in why else why for why in c.refused)
        groups.setdefault(reasons, []).append(c)
    out = []
    for reasons, members in groups.items():
        ids = ", ".join(str(c.index) for c in members[:12]) + (", …" if len(members) > 12 else "")
        spans = []
        for key in TUNED:
            seen = list(dict.fromkeys(c.settings[key] for c in members))
            if len(seen) == 1:
                v = seen[0]
                spans.append(f"{key} {'unset' if v is None else _cell(v)}")
            else:
                spans.append(f"{key} {'/'.join('unset' if v is None else _cell(v) for v in seen)}")
        out.append(f"  {len(members)} candidate(s) [{ids}] with {', '.join(spans)}:")
        out += [f"    {why}" for why in reasons]
    return out


def _cell(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return v
    if isinstance(v, tuple):
        return json.dumps([list(x) if isinstance(x, tuple) else x for x in v])
    assert isinstance(v, int | float)
    return f"{v:g}"


def _when(t: float | None) -> str:
    if t is None:
        return "-"
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _report(result: TuneResult, args: argparse.Namespace) -> list[str]:
    best = result.best
    lines = [f"trimtab tune: {args.shown}, {result.events} events, {len(result.sensors)} "
             f"sensor(s), scored against {result.against}"]
    if result.split_t is None:
        lines.append("split: none: every event is in the tune part")
    else:
        lines.append(f"split: tune before {_when(result.split_t)} "
                     f"({result.split:.0%} of the time span), test from then on")
    lines.append(f"candidates: {len(result.outcomes)} evaluated, {len(result.refused)} refused "
                 "by the config validator")
    if not result.complete:
        lines.append("interrupted: the results cover only the events processed so far")
    lines += ["", *_table(result, args.top)]
    if result.refused:
        lines += ["", "refused by the config validator (never evaluated):", *_refused(result)]
    if best is None:
        lines += ["", "no candidate could be scored (no truth or paired reference in the tune "
                  "part)"]
        return lines
    rows = [["sensor", "tune RMSE", "n", "test RMSE", "n"]]
    for name, (tune, test) in best.per_sensor.items():
        rows.append([name, _fmt(tune.rmse), str(tune.n), _fmt(test.rmse), str(test.n)])
    lines += ["", "per sensor, rank 1:", *("  " + line for line in _columns(rows))]
    lines += ["", *_lead(result)]
    lines += ["", "recommended settings (set these keys in the config's [learning] table, then "
              "run trimtab check):", snippet(best)]
    return lines


def lead(result: TuneResult) -> dict[str, Any] | None:
    """How far the recommendation is ahead of the runner-up, pooled and fold by fold."""
    if len(result.outcomes) < 2 or result.best is None:
        return None
    best, second = result.outcomes[0], result.outcomes[1]
    if best.tune.rmse is None or second.tune.rmse is None:
        return None
    folds = [(a.rmse, b.rmse) for a, b in zip(best.folds, second.folds, strict=True)
             if a.rmse is not None and b.rmse is not None]
    return {"runner_up": second.candidate.index,
            "ahead": (second.tune.rmse - best.tune.rmse) / second.tune.rmse,
            "folds_ahead": sum(a <= b for a, b in folds), "folds": len(folds)}


def _lead(result: TuneResult) -> list[str]:
    best = result.best
    assert best is not None
    out = []
    spread = best.fold_spread()
    if spread is not None and len(best.folds) > 1:
        out.append(f"rank 1 over {len(best.folds)} folds of the tune part: RMSE "
                   f"{_fmt(spread[0])} to {_fmt(spread[1])}")
    d = lead(result)
    if d is not None:
        out.append(f"rank 1 is {d['ahead']:.1%} below the runner-up (candidate "
                   f"{d['runner_up']}) in tune RMSE, and at or below it in {d['folds_ahead']} of "
                   f"{d['folds']} folds")
    return out


def _score_json(s: Score) -> dict[str, Any]:
    return {"rmse": s.rmse, "bias": s.bias, "n": s.n}


def _outcome_json(o: Outcome) -> dict[str, Any]:
    return {
        "candidate": o.candidate.index, "labels": list(o.candidate.labels),
        "settings": dict(o.candidate.settings),
        "tune": _score_json(o.tune), "test": _score_json(o.test),
        "rollbacks": o.rollbacks, "gated": o.gated,
        "margin": o.margin, "reached": None if o.reached == float("inf") else o.reached,
        "folds": [_score_json(f) for f in o.folds],
        "per_sensor": {k: {"tune": _score_json(a), "test": _score_json(b)}
                       for k, (a, b) in o.per_sensor.items()},
    }


def _as_json(result: TuneResult) -> str:
    best = result.best
    out = {
        "against": result.against, "split": result.split, "split_t": result.split_t,
        "events": result.events, "complete": result.complete, "sensors": result.sensors,
        "ranked": [_outcome_json(o) for o in result.outcomes],
        "refused": [{"candidate": c.index, "settings": dict(c.settings), "errors": list(c.refused)}
                    for c in result.refused],
        "recommended": None if best is None else snippet(best),
        "lead": lead(result),
    }
    return json.dumps(out, indent=2, ensure_ascii=False)


def run(args: argparse.Namespace) -> int:
    """Run on the stream file, or on a CSV file converted for the run with --layout."""
    with tempfile.TemporaryDirectory(prefix="trimtab-tune-") as tmp:
        args.shown = args.stream
        args.stream = readable_stream(args.stream, args.layout, Path(tmp))
        return _run(args)


def _run(args: argparse.Namespace) -> int:
    if not 0.0 < args.split <= 1.0:
        raise DataError(f"--split {args.split:g}: give a fraction of the stream's time span in "
                        "(0, 1]")
    cfg = load_config(args.config)
    with open(args.config, "rb") as fh:
        raw = tomllib.load(fh)
    if args.grid is not None:
        settings, label = grid_settings(cfg, load_grid(args.grid)), "grid"
    else:
        n = DEFAULT_SEARCH if args.search is None else args.search
        settings, label = search_settings(cfg, n, args.seed), "search"
    candidates = build_candidates(raw, cfg, settings, label=label)
    loud = not args.quiet
    tty = loud and sys.stderr.isatty()
    started = time.monotonic()

    def show_read(events: int) -> None:
        if tty:
            print(f"\rtune: reading, {events:,} events", end="", file=sys.stderr)

    def show_eval(fraction: float) -> None:
        if tty:
            print(f"\rtune: evaluating {sum(c.valid for c in candidates)} candidates, "
                  f"{fraction:.0%}   ", end="", file=sys.stderr)

    with _Interrupts() as stop:
        if loud:
            print(f"tune: reading {args.shown}", file=sys.stderr)
        run = tune_stream(args.stream, candidates, split=args.split, against=args.against,
                          should_stop=stop, read_progress=show_read, progress=show_eval,
                          base=cfg, folds=args.folds)
        result = run.result
        traces = [t.trace for t in run.tuners]
    if traces and traces[0].events == 0 and traces[0].complete:
        # nothing usable: a wrong or empty file must not look like a tuning run
        rejected = traces[0].rejected
        if rejected:
            raise DataError(f"{args.shown}: no usable events: all "
                            f"{sum(rejected.values()):,} lines rejected ({counted(rejected)})")
        raise DataError(f"{args.shown}: no events (an empty stream file)")
    if tty:
        print("\r" + " " * 60 + "\r", end="", file=sys.stderr)
    elapsed = time.monotonic() - started
    if loud:
        k = len(result.outcomes)
        print(f"tune: {result.events} events read {len(traces)} time(s) (once per scaler "
              f"group), {k} candidates evaluated in {elapsed:.2f} s "
              f"({k * result.events / max(elapsed, 1e-9):,.0f} candidate-events/s overall)",
              file=sys.stderr)
        if traces[0].rejected:
            print(f"tune: rejected lines: {counted(traces[0].rejected)}", file=sys.stderr)
    best = result.best
    if best is not None and best.candidate.config is not None:
        if args.config_out is not None:
            from trimtab.commands.check import render

            chosen = best.candidate.config
            args.config_out.write_text(render(chosen, derived_figures(chosen),
                                              str(args.config_out)) + "\n", encoding="utf-8")
        if args.plot is not None:
            from trimtab.tune.plot import plot_scores

            plot_scores(result, args.plot)
    print(_as_json(result) if args.json else "\n".join(_report(result, args)))
    if not result.complete or stop.seen:
        return 130
    return 0 if best is not None else 1
