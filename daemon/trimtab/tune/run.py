"""A tuning run over a stream file: candidates grouped by what their record depends on, one
record pass a group, the results merged and ranked as one; the recommended settings as TOML.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from trimtab.config import Config
from trimtab.errors import DataError
from trimtab.tune.grid import TERMS, TUNED, Candidate
from trimtab.tune.trace import record
from trimtab.tune.tuner import Against, Outcome, Tuner, TuneResult

__all__ = ["GroupedRun", "scaler_group", "snippet", "tune_stream"]


def _toml_value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return f'"{v}"'
    return repr(v)


def snippet(outcome: Outcome) -> str:
    """The recommended settings as ``[learning]`` (and ``[sensors.defaults]`` terms) tables."""
    s = outcome.candidate.settings
    lines = ["[learning]"]
    for key in TUNED:
        if key in TERMS:
            continue
        v = s[key]
        if v is None:
            lines.append(f"# {key} unset (squared loss)")
        else:
            lines.append(f"{key} = {_toml_value(v)}")
    lines.append("[sensors.defaults]")
    for key in TERMS:
        v = s[key]
        assert isinstance(v, tuple)
        lines.append(f"{key} = {json.dumps([list(x) if isinstance(x, tuple) else x for x in v])}")
    return "\n".join(lines)


def scaler_group(cfg: Config) -> tuple[Any, ...]:
    """What a candidate's recorded pass depends on beyond pairing: its terms and how its
    scaler moves."""
    lc = cfg.learning
    d = cfg.sensors.defaults
    terms = (tuple(tuple(p) for p in d.products), tuple(d.squares))
    return (terms, "fixed") if lc.scaler == "fixed" else (
        terms, "follow", lc.scaler_span, lc.scaler_width)


@dataclass(slots=True)
class GroupedRun:
    """One tuning run over candidates whose scalers move differently: one record pass each."""

    result: TuneResult
    tuners: list[Tuner]

    def engine_state(self, index: int) -> dict[str, Any]:
        """The engine state ``trimtab replay --state-out`` leaves with candidate ``index``."""
        for tuner in self.tuners:
            if any(c.index == index for c in tuner.valid):
                return tuner.engine_state(index)
        raise DataError(f"candidate {index} was not evaluated")


def tune_stream(stream: str | Path, candidates: Sequence[Candidate], *, split: float = 0.7,
                against: Against | Literal["auto"] = "auto",
                should_stop: Callable[[], bool] | None = None,
                read_progress: Callable[[int], None] | None = None,
                progress: Callable[[float], None] | None = None,
                base: Config | None = None, folds: int = 3) -> GroupedRun:
    """Record the stream once per scaler group and evaluate each group's candidates on it.

    Pairing, buffers and the moves of a followed scaler depend on no other tuned setting, so
    candidates of one group share one record (:func:`trimtab.tune.trace.record`) and advance
    together; the results are merged and ranked as one.
    """
    groups: dict[tuple[Any, ...], list[Candidate]] = {}
    for c in candidates:
        if c.config is not None:
            groups.setdefault(scaler_group(c.config), []).append(c)
    refused = [c for c in candidates if not c.valid]
    if not groups:
        if base is None:
            raise DataError("no candidate was valid and no config was given to read the stream")
        trace = record(base, stream, should_stop=should_stop, progress=read_progress)
        tuner = Tuner(trace, refused, split=split, against=against, folds=folds)
        return GroupedRun(tuner.run(should_stop=should_stop), [tuner])
    tuners: list[Tuner] = []
    results: list[TuneResult] = []
    for i, members in enumerate(groups.values()):
        assert members[0].config is not None
        trace = record(members[0].config, stream, should_stop=should_stop,
                       progress=read_progress)
        tuner = Tuner(trace, members + (refused if i == 0 else []), split=split,
                      against=against, folds=folds)
        tuners.append(tuner)
        done = len(results)

        def part(f: float, done: int = done) -> None:
            if progress is not None:
                progress((done + f) / len(groups))

        results.append(tuner.run(should_stop=should_stop, progress=part))
        if not results[-1].complete:
            break
    first = results[0]
    outcomes = [o for r in results for o in r.outcomes]
    outcomes.sort(key=lambda o: (o.tune.rmse is None, o.tune.rmse or 0.0, o.candidate.index))
    merged = TuneResult(first.against, first.split, first.split_t, outcomes, refused,
                        first.events, all(r.complete for r in results) and
                        len(results) == len(groups), first.sensors)
    return GroupedRun(merged, tuners)
