"""The tuner: exact agreement with replay, the pick on a scenario with a known best region,
refused candidates, grid files, the command line and Ctrl-C.

Streams come from the simulator's scenarios (config/scenarios), cut short; some have their
references perturbed (an invented level shift and outliers) so that the gate, level shifts and
rollbacks all happen. Nothing here is timed: throughput lives in trimtab_sim.bench_tune.
"""

from __future__ import annotations

import io
import json
import math
import random
import signal
import subprocess
import sys
import tomllib
from collections import defaultdict
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from trimtab.cli import main as cli_main
from trimtab.commands.check import to_toml
from trimtab.commands.replay import replay
from trimtab.config import Config, load_config, parse_config
from trimtab.engine.wiring import make_engine
from trimtab.errors import ConfigError, DataError
from trimtab.messages import Reading, Reference
from trimtab.model.online import RidgeModel, dot
from trimtab.model.stability import step_check
from trimtab.model.terms import Scaler, TermSpec
from trimtab.tune.grid import (
    TUNED,
    Candidate,
    Value,
    build_candidates,
    candidate_document,
    current_settings,
    grid_settings,
    load_grid,
    search_settings,
)
from trimtab.tune.lanes import phi_block
from trimtab.tune.run import GroupedRun, tune_stream
from trimtab.tune.scores import seq_add
from trimtab.tune.trace import Trace, record
from trimtab.tune.tuner import Tuner, TuneResult
from trimtab.wire.streamfile import read_events, write_events
from trimtab_sim.generate import write_stream
from trimtab_sim.scenario import parse_scenario

ROOT = Path(__file__).resolve().parents[2]
BIN = Path(sys.executable).parent

# A grid that reaches every branch: plain and normalised steps, both loss functions, two
# memories (two elapsed-term scales, so two feature groups), a tight and a loose gate.
GRID: dict[str, list[Value]] = {
    "alpha": [0.002, 0.013], "lambda": [0.0, 5.0], "memory": [50, 400],
    "huber_delta": [None, 3.0], "gate_k": [1.0, 12.0], "normalised": [True, False],
}
PICKS = [  # candidates replayed one by one (settings in TUNED order)
    (0.013, 5.0, 50, None, 1.0, False),
    (0.013, 0.0, 400, 3.0, 12.0, True),
    (0.002, 5.0, 400, None, 12.0, False),
    (0.013, 5.0, 50, 3.0, 1.0, True),
]
KEYS = ("alpha", "lambda", "memory", "huber_delta", "gate_k", "normalised")


def _scenario_stream(name: str, days: float, path: Path, seed: int) -> Path:
    """A scenario from config/scenarios cut to ``days``, written as a stream file."""
    with open(ROOT / "config" / "scenarios" / f"{name}.toml", "rb") as fh:
        data = tomllib.load(fh)
    data["days"] = days
    write_stream(parse_scenario(data), path, seed)
    return path


def _perturb(src: Path, dst: Path) -> Path:
    """Invented test data: references read 0.0 (stuck) over 30–35 % of the span, shift by +25
    after 60 %, and 8 % are outliers."""
    rng = random.Random(7)
    events = list(read_events(src))
    t0, t1 = events[0].t, events[-1].t
    out: list[Reading | Reference] = []
    for e in events:
        if isinstance(e, Reference):
            frac = (e.t - t0) / (t1 - t0)
            v = e.value + (25.0 if frac > 0.6 else 0.0)
            if rng.random() < 0.08:
                v += rng.choice([-1.0, 1.0]) * rng.uniform(15.0, 60.0)
            if 0.3 < frac < 0.35:
                v = 0.0
            e = Reference(e.t, e.sensor, v, e.window)
        out.append(e)
    write_events(dst, out)
    return dst


def _config_dict(state_dir: Path, **learning: Any) -> dict[str, Any]:
    """config/demo.toml with its state under ``state_dir`` and the given learning keys."""
    with open(ROOT / "config" / "demo.toml", "rb") as fh:
        data = tomllib.load(fh)
    data["state"]["dir"] = str(state_dir)
    data["learning"].update(learning)
    return data


def _write_config(data: Mapping[str, Any], path: Path) -> Path:
    path.write_text("\n".join(to_toml(dict(data))) + "\n", encoding="utf-8")
    return path


def _merged(data: Mapping[str, Any], settings: Mapping[str, Value]) -> dict[str, Any]:
    out = json.loads(json.dumps(data))
    for k, v in settings.items():
        if v is None:
            out["learning"].pop(k, None)
        else:
            out["learning"][k] = v
    return out


def _settings(values: tuple[Value, ...]) -> dict[str, Value]:
    return dict(zip(KEYS, values, strict=True))


def _trimtab(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(BIN / "trimtab"), *args], cwd=cwd, capture_output=True,
                          text=True, timeout=300, check=False)


def _replay_scores(stream: Path, out: str, split_t: float | None
                   ) -> list[tuple[float, float, int]]:
    """Tune and test (sse, sum, n) recomputed from a replay's output with plain loops."""
    readings = [e for e in read_events(stream) if isinstance(e, Reading)]
    values = [json.loads(line)["value"] for line in out.splitlines()]
    assert len(values) == len(readings)
    acc: dict[str, list[list[float]]] = defaultdict(lambda: [[0.0, 0.0, 0], [0.0, 0.0, 0]])
    for v, r in zip(values, readings, strict=True):
        if r.truth is None:
            continue
        a = acc[r.sensor][0 if split_t is None or r.t < split_t else 1]
        e = v - r.truth
        a[0] += e * e
        a[1] += e
        a[2] += 1
    pooled = []
    for p in (0, 1):
        sse = total = 0.0
        n = 0
        for name in sorted(acc):
            sse += acc[name][p][0]
            total += acc[name][p][1]
            n += int(acc[name][p][2])
        pooled.append((sse, total, n))
    return pooled


def _replay(cfg: Config, stream: Path) -> tuple[dict[str, Any], str]:
    engine = make_engine(cfg)
    out = io.StringIO()
    replay(engine, stream, out)
    return json.loads(json.dumps(engine.state_dict())), out.getvalue()


def _equals_replay(run: GroupedRun, cand: Candidate, stream: Path) -> dict[str, Any]:
    """Assert a tuned candidate's state and tune/test scores are replay's; replay's state."""
    assert cand.config is not None
    state, out = _replay(cand.config, stream)
    assert json.loads(json.dumps(run.engine_state(cand.index))) == state, cand.settings
    o = next(o for o in run.result.outcomes if o.candidate.index == cand.index)
    got = [(o.tune.sse, o.tune.total, o.tune.n), (o.test.sse, o.test.total, o.test.n)]
    assert got == _replay_scores(stream, out, run.tuners[0].split_t)
    return state


@dataclass
class Run:
    """A tuned stream shared by a module's tests."""

    stream: Path
    base: dict[str, Any]
    trace: Trace
    candidates: list[Candidate]
    tuner: Tuner
    result: TuneResult

    def index(self, settings: Mapping[str, Value]) -> int:
        return next(c.index for c in self.candidates
                    if all(c.settings[k] == v for k, v in settings.items()))


@pytest.fixture(scope="module")
def perturbed(tmp_path_factory: pytest.TempPathFactory) -> Run:
    """pm25-quay (two monitors, one shared reference) for 5 days, perturbed, tuned on GRID."""
    d = tmp_path_factory.mktemp("tune")
    stream = _perturb(_scenario_stream("pm25-quay", 5, d / "raw.jsonl", 3), d / "quay.jsonl")
    base = _config_dict(d / "state", alpha=0.01, alpha_min=0.001, alpha_max=0.013,
                        rollback_factor=2.0, alpha_recovery=0.2)
    cfg = parse_config(base)
    trace = record(cfg, stream)
    cands = build_candidates(base, cfg, grid_settings(cfg, GRID), label="grid")
    tuner = Tuner(trace, cands, split=0.7)
    return Run(stream, base, trace, cands, tuner, tuner.run())


class TestVectorisedArithmetic:
    """The building blocks repeat the scalar code's operations in its order."""

    def test_dot_adds_left_to_right(self) -> None:
        """model.dot rounds as a left-to-right loop, not as an exactly rounded sum."""
        assert dot([1e16, 1.0, -1e16], [1.0, 1.0, 1.0]) == 0.0
        assert math.fsum([1e16, 1.0, -1e16]) == 1.0

    def test_phi_rows_equal_model_phi_bit_for_bit(self) -> None:
        """Standardising many readings at once gives exactly RidgeModel.phi's rows, clipped too."""
        spec = TermSpec(("raw", "temp"), products=(("raw", "temp"),), squares=("temp",),
                        elapsed=True)
        model = RidgeModel(spec, Scaler((30.0, 12.0, 360.0, 170.0, 0.0), (7.0, 5.0, 90.0, 80.0,
                                                                         3.3)),
                           origin=1.7e9, clip=4.0)
        rng = np.random.default_rng(5)
        X = np.column_stack((rng.normal(30, 20, 300), rng.normal(12, 9, 300)))
        t = 1.7e9 + np.sort(rng.uniform(0, 40 * 86400.0, 300))
        rows = np.column_stack(phi_block(model, X, t))
        for i in range(300):
            expected, _ = model.phi({"raw": float(X[i, 0]), "temp": float(X[i, 1])}, float(t[i]))
            assert rows[i].tolist() == expected
        assert (np.abs(rows[:, 1:]) == 4.0).any()

    def test_running_sums_are_sequential(self) -> None:
        """Block sums add one term after another, as a scalar loop over the stream does."""
        rng = np.random.default_rng(9)
        parts = rng.normal(0, 1, (3, 500)) * 10.0 ** rng.integers(-8, 8, (3, 500))
        acc = np.array([1.0, -2.0, 3e7])
        got = seq_add(acc, parts)
        for k in range(3):
            s = float(acc[k])
            for v in parts[k].tolist():
                s += v
            assert float(got[k]) == s


class TestEqualsReplay:
    """For any candidate, the tuner's score and final state are trimtab replay's, exactly."""

    def test_picked_candidates_equal_replay_state_and_score(self, perturbed: Run) -> None:
        """Four candidates covering every branch end with replay's state and truth score."""
        seen: set[str] = set()
        by_index = {o.candidate.index: o for o in perturbed.result.outcomes}
        for values in PICKS:
            settings = _settings(values)
            i = perturbed.index(settings)
            cfg = perturbed.candidates[i].config
            assert cfg is not None
            state, out = _replay(cfg, perturbed.stream)
            assert json.loads(json.dumps(perturbed.tuner.engine_state(i))) == state
            o = by_index[i]
            got = [(o.tune.sse, o.tune.total, o.tune.n), (o.test.sse, o.test.total, o.test.n)]
            assert got == _replay_scores(perturbed.stream, out, perturbed.tuner.split_t)
            seen |= {k for k, v in state["counts"].items() if v}
        for status in ("reference_gated", "reference_level_shift", "reference_rolled_back",
                       "reference_stuck", "reference_pending", "reference_applied"):
            assert status in seen, f"the picked candidates never reached {status}"

    def test_drift_settings_equal_replay_state_and_score(self, perturbed: Run) -> None:
        """Scaler modes, widths and spans, the gap lift, α recovery, the rollback factor and
        the band: every combination ends with replay's state and score, over one record pass
        per scaler group."""
        cfg = parse_config(perturbed.base)
        grid: dict[str, list[Value]] = {
            "alpha": [0.013], "alpha_max": [0.013, 0.05], "gate_k": [1.0],
            "step_adapt": ["gap", "none"], "step_gap": [3600.0],
            "scaler": ["follow", "fixed"], "scaler_width": [1.0, 3.0],
            "scaler_span": [86400.0, 2592000.0], "rollback_factor": [2.0, 8.0],
            "alpha_recovery": [0.0, 0.5],
        }
        cands = build_candidates(perturbed.base, cfg, grid_settings(cfg, grid), label="grid",
                                 include_current=False)
        assert all(c.valid for c in cands)
        run = tune_stream(perturbed.stream, cands, split=0.7)
        assert len(run.tuners) == 5  # fixed, and follow at 2 widths × 2 spans
        seen: set[str] = set()
        for cand in cands[::3]:
            state = _equals_replay(run, cand, perturbed.stream)
            seen |= {k for k, v in state["counts"].items() if v}
        assert {"scaler_moved", "reference_rolled_back", "reference_level_shift"} <= seen

    def test_terms_equal_replay_state_and_score(self, perturbed: Run) -> None:
        """Candidates that add products and squares (one record pass each) equal replay."""
        cfg = parse_config(perturbed.base)
        grid: dict[str, list[Value]] = {"products": [(), (("raw", "temp"),)],
                                        "squares": [(), ("temp",)]}
        cands = build_candidates(perturbed.base, cfg, grid_settings(cfg, grid), label="grid",
                                 include_current=False)
        assert len(cands) == 4 and all(c.valid for c in cands)
        run = tune_stream(perturbed.stream, cands, split=0.7)
        assert len(run.tuners) == 4
        for cand in cands:
            _equals_replay(run, cand, perturbed.stream)
        names = {tuple(json.loads(json.dumps(run.engine_state(c.index)))["sensors"][
            "pm25-quay-01"]["model"]["spec"]["squares"]) for c in cands}
        assert names == {(), ("temp",)}

    def test_terms_that_do_not_fit_the_initial_state_are_refused(self, tmp_path: Path) -> None:
        """With an initial_state, a candidate with other terms is refused with the reason."""
        data = tmp_path / "fit.csv"
        data.write_text("t,raw,temp,ref\n" + "".join(
            f"{1767225600 + 3600 * i},{40 + i % 7},{10 + i % 5},{41 + i % 7}\n"
            for i in range(30)))
        model = tmp_path / "m.json"
        assert cli_main(["fit", str(data), "--inputs", "raw,temp", "-o", str(model)]) == 0
        base = _config_dict(tmp_path / "state")
        base["sensors"] = {"ids": ["s1"], "defaults": {"inputs": ["raw", "temp"],
                                                        "initial_state": str(model)}}
        cfg = parse_config(base)
        cands = build_candidates(base, cfg, grid_settings(cfg, {"squares": [(), ("temp",)]}),
                                 label="grid", include_current=False)
        plain, squared = cands
        assert plain.valid and not squared.valid
        assert any("has terms ['raw', 'temp']" in why for why in squared.refused)

    def test_replay_command_gives_the_same_state(self, perturbed: Run, tmp_path: Path) -> None:
        """`trimtab replay --state-out` as a real process leaves the tuner's state, bit for bit."""
        settings = _settings(PICKS[0])
        cfg_path = _write_config(_merged(perturbed.base, settings), tmp_path / "cand.toml")
        proc = _trimtab("replay", "-c", str(cfg_path), str(perturbed.stream), "-o",
                        str(tmp_path / "out.jsonl"), "--state-out", str(tmp_path / "st.json"),
                        "--quiet", cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr
        state = json.loads((tmp_path / "st.json").read_text())
        mine = perturbed.tuner.engine_state(perturbed.index(settings))
        assert json.loads(json.dumps(mine)) == state

    def test_single_candidate_run_equals_replay(self, tmp_path: Path) -> None:
        """The config's own settings alone (K = 1) equal replay on co2-greenhouse (3 terms)."""
        stream = _scenario_stream("co2-greenhouse", 9, tmp_path / "co2.jsonl", 2)
        base = _config_dict(tmp_path / "state")
        cfg = parse_config(base)
        cands = build_candidates(base, cfg, [], label="grid")
        assert len(cands) == 1 and cands[0].labels == ("current",)
        tuner = Tuner(record(cfg, stream), cands, split=0.5)
        result = tuner.run()
        state, out = _replay(cfg, stream)
        assert json.loads(json.dumps(tuner.engine_state(0))) == state
        o = result.outcomes[0]
        got = [(o.tune.sse, o.tune.total, o.tune.n), (o.test.sse, o.test.total, o.test.n)]
        assert got == _replay_scores(stream, out, tuner.split_t)

    def test_reference_score_is_the_engine_prequential_error(self, perturbed: Run) -> None:
        """Against references with no test part, each sensor's sum is the engine's sq_preq."""
        tuner = Tuner(perturbed.trace, perturbed.candidates, split=1.0, against="references")
        result = tuner.run()
        pick = perturbed.index(_settings(PICKS[1]))
        o = next(o for o in result.outcomes if o.candidate.index == pick)
        state = tuner.engine_state(o.candidate.index)
        for name, (tune, test) in o.per_sensor.items():
            d = state["sensors"][name]
            assert (tune.sse, tune.n) == (d["sq_preq"], d["n_preq"])
            assert test.n == 0

    def test_split_parts_cover_every_scored_reading(self, perturbed: Run) -> None:
        """The tune and test parts split the truth-carrying readings at 70 % of the span."""
        tr = perturbed.trace
        assert tr.t_first is not None and tr.t_last is not None
        split_t = perturbed.tuner.split_t
        assert split_t == tr.t_first + 0.7 * (tr.t_last - tr.t_first)
        times = [e.t for e in read_events(perturbed.stream)
                 if isinstance(e, Reading) and e.truth is not None]
        o = perturbed.result.outcomes[0]
        assert o.tune.n == sum(t < split_t for t in times)
        assert o.test.n == sum(t >= split_t for t in times)
        assert sum(a.n for a, _ in o.per_sensor.values()) == o.tune.n


class TestRefused:
    """Candidates the validator refuses are reported with its reasons and never evaluated."""

    def test_refused_are_not_evaluated_and_say_why(self, perturbed: Run) -> None:
        """An unstable candidate is refused with the validator's line; only valid ones advance."""
        cfg = parse_config(perturbed.base)
        grid: dict[str, list[Value]] = {"alpha": [0.005, 0.5], "memory": [0, 1, 100],
                                        "lambda": [5.0]}
        cands = build_candidates(perturbed.base, cfg, grid_settings(cfg, grid), label="grid")
        tuner = Tuner(perturbed.trace, cands)
        result = tuner.run()
        refused = {c.index for c in result.refused}
        assert refused == {c.index for c in cands if c.settings["memory"] == 0
                           or (c.settings["alpha"] == 0.5 and c.settings["memory"] == 1)}
        assert not refused & {o.candidate.index for o in result.outcomes}
        for engines in tuner.engines.values():
            assert sum(len(ve) for ve, _ in engines) == len(result.outcomes)
        bad = next(c for c in result.refused
                   if c.settings["alpha"] == 0.5 and c.settings["memory"] == 1)
        assert any("alpha_max·lambda_max/memory = 0.5·5/1 = 2.5 ≥ 1" in why
                   for why in bad.refused)

    def test_a_candidate_is_checked_at_its_own_bounds(self, perturbed: Run) -> None:
        """α above the config's alpha_max is not refused: the candidate's α is its own bound."""
        cfg = parse_config(perturbed.base)
        assert cfg.learning.alpha_max < 0.5
        (cand,) = build_candidates(perturbed.base, cfg, grid_settings(cfg, {"alpha": [0.5]}),
                                   label="grid", include_current=False)
        assert cand.config is not None
        assert cand.config.learning.alpha == cand.config.learning.alpha_max == 0.5

    def test_refusal_is_what_check_says(self, perturbed: Run, tmp_path: Path) -> None:
        """The reasons given are exactly `trimtab check`'s error lines for that config."""
        cfg = parse_config(perturbed.base)
        settings = {**grid_settings(cfg, {"memory": [1], "alpha": [0.5], "lambda": [5.0]})[0]}
        (cand,) = [c for c in build_candidates(perturbed.base, cfg, [settings], label="grid",
                                               include_current=False)]
        assert not cand.valid
        path = _write_config(candidate_document(perturbed.base, settings), tmp_path / "bad.toml")
        proc = _trimtab("check", "--no-files", "-c", str(path), cwd=tmp_path)
        assert proc.returncode == 2
        expected = [line.split(f"{path}: ", 1)[1] for line in proc.stderr.splitlines()]
        assert [why.split("candidate 0: ", 1)[1] for why in cand.refused] == expected


class TestFolds:
    """Rolling-origin folds of the tune part: their scores add up to the tune score."""

    def test_folds_partition_the_tune_part(self, perturbed: Run) -> None:
        """Fold counts add up to the tune count; one fold is the tune score bit for bit."""
        for folds in (1, 4):
            tuner = Tuner(perturbed.trace, perturbed.candidates, split=0.7, folds=folds)
            result = tuner.run()
            for o in result.outcomes[:5]:
                assert len(o.folds) == folds
                assert sum(f.n for f in o.folds) == o.tune.n
                if folds == 1:
                    assert o.folds[0].sse == o.tune.sse
                else:
                    assert math.isclose(sum(f.sse for f in o.folds), o.tune.sse, rel_tol=1e-9)

    def test_the_report_says_the_lead_over_the_runner_up(self, perturbed: Run,
                                                         tmp_path: Path) -> None:
        """`trimtab tune` prints the folds' spread and how far rank 1 is ahead of rank 2."""
        cfg_path, stream = _stream_copy(perturbed, tmp_path)
        grid = tmp_path / "grid.toml"
        grid.write_text("[grid]\nalpha = [0.002, 0.013]\nlambda = [0.0, 5.0]\n")
        proc = _trimtab("tune", "-c", str(cfg_path), str(stream), "--grid", str(grid),
                        "--folds", "4", "--json", cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr
        doc = json.loads(proc.stdout)
        ranked = doc["ranked"]
        assert all(len(o["folds"]) == 4 for o in ranked)
        lead = doc["lead"]
        assert lead["runner_up"] == ranked[1]["candidate"] and lead["folds"] == 4
        r1, r2 = ranked[0]["tune"]["rmse"], ranked[1]["tune"]["rmse"]
        assert math.isclose(lead["ahead"], (r2 - r1) / r2)


class TestOwnBounds:
    """Every accepted candidate is stable at the bounds it actually uses."""

    @settings(max_examples=80, deadline=None)
    @given(alpha=st.floats(1e-3, 3.0), alpha_max=st.floats(1e-3, 3.0),
           lam=st.floats(0.0, 50.0), memory=st.integers(1, 400),
           adapt=st.sampled_from(["gap", "none"]), normalised=st.booleans())
    def test_accepted_candidates_are_stable_at_their_own_bounds(
            self, alpha: float, alpha_max: float, lam: float, memory: int, adapt: str,
            normalised: bool) -> None:
        """α ≤ alpha_max (= α without the gap lift), λ = lambda_max, and the proofs hold there."""
        base = _config_dict(Path("/tmp/unused-state"))
        cfg = parse_config(base)
        settings_ = {**current_settings(cfg), "alpha": alpha, "alpha_max": alpha_max,
                     "lambda": lam, "memory": memory, "step_adapt": adapt,
                     "normalised": normalised}
        (cand,) = build_candidates(base, cfg, [settings_], label="grid", include_current=False)
        if cand.config is None:
            return
        lc = cand.config.learning
        assert lc.alpha <= lc.alpha_max and lc.lam == lc.lambda_max
        if adapt == "none":
            assert lc.alpha_max == lc.alpha
        assert lc.alpha_max * lc.lambda_max / lc.memory < 1.0
        for label, group in cand.config.settings_groups().items():
            check = step_check(label, terms=group.term_count(), alpha_max=lc.alpha_max,
                               lambda_max=lc.lambda_max, memory=lc.memory,
                               clip=lc.feature_clip, normalised=lc.normalised)
            assert check.margin > 1.0


class TestCandidates:
    """Grid files and the seeded search."""

    @pytest.mark.parametrize(("text", "message"), [
        ("[grid]\nalfa = [0.1]\n", "grid.alfa: unknown key"),
        ("[grid]\nalpha = 0.1\n", "grid.alpha: expected a non-empty list"),
        ("[grid]\nalpha = [0.1, \"x\"]\n", "grid.alpha[1]: expected a finite number"),
        ("[grid]\nmemory = [1.5]\n", "grid.memory[0]: expected an integer"),
        ("[grid]\nhuber_delta = [\"off\"]\n", "grid.huber_delta[0]: expected a finite number"),
        ("[grid]\nnormalised = [1]\n", "grid.normalised[0]: expected true or false"),
        ("[other]\nalpha = [0.1]\n", "other: unknown table"),
        ("alpha = [\n", "TOML syntax error"),
    ])
    def test_bad_grid_file_names_file_and_key(self, tmp_path: Path, text: str,
                                              message: str) -> None:
        """A malformed grid file is one error naming the file and the key."""
        path = tmp_path / "g.toml"
        path.write_text(text)
        with pytest.raises(DataError) as err:
            load_grid(path)
        assert str(err.value).startswith(f"{path}: ")
        assert message in str(err.value)

    def test_grid_is_every_combination(self, tmp_path: Path) -> None:
        """Each combination once, the config's values for keys the grid leaves out."""
        path = tmp_path / "g.toml"
        path.write_text('[grid]\nalpha = [0.1, 0.2, 0.1]\nhuber_delta = ["none", 2]\n')
        cfg = parse_config(_config_dict(tmp_path))
        grid = load_grid(path)
        settings = grid_settings(cfg, grid)
        assert [(s["alpha"], s["huber_delta"]) for s in settings] == [
            (0.1, None), (0.1, 2.0), (0.2, None), (0.2, 2.0)]
        assert all(s["memory"] == cfg.learning.memory for s in settings)

    def test_search_is_seeded_and_inside_the_bounds(self, tmp_path: Path) -> None:
        """The same seed gives the same candidates, all within alpha and lambda bounds."""
        cfg = parse_config(_config_dict(tmp_path, alpha_min=0.002, alpha_max=0.8,
                                        lambda_min=0.0, lambda_max=10.0))
        a = search_settings(cfg, 40, seed=3)
        assert a == search_settings(cfg, 40, seed=3)
        assert a != search_settings(cfg, 40, seed=4)
        for s in a:
            assert isinstance(s["alpha"], float) and isinstance(s["lambda"], float)
            assert 0.002 <= s["alpha"] <= 0.8 and 0.01 <= s["lambda"] <= 10.0
        assert min(float(s["alpha"] or 0) for s in a) < 0.02 < 0.2 < max(
            float(s["alpha"] or 0) for s in a)


REGION_SCENARIO: dict[str, Any] = {
    "name": "offset-walk", "days": 14, "step": 60,
    "signal": {"base": 30.0, "daily_amplitude": 10.0, "wander": 4.0},
    "sensors": [{"id": "walk-01", "interval": 300, "gain": 1.0, "offset": 0.0, "decimals": 3,
                 "drift": {"offset_walk": 3.0}, "faults": {"noise": 0.5}}],
    "references": [{"id": "ref", "serves": ["walk-01"], "every": 3600, "window": 0,
                    "noise": 3.0}],
}
REGION_CONFIG = """
[broker]
client_id = "tune-region"
[sensors]
ids = ["walk-01"]
[sensors.defaults]
inputs = ["raw"]
scaler_readings = 50
[learning]
alpha = 0.1
alpha_min = 0.005
alpha_max = 1.9
lambda = 0.0
lambda_max = 0.0
memory = 200
warmup = 3
[pairing]
tolerance = 200.0
"""


class TestBestRegion:
    """On a scenario built with an interior optimum, the tuner's pick lies inside it."""

    def test_pick_lies_in_the_brute_force_best_region(self, tmp_path: Path) -> None:
        """Offset random walk seen through noisy spot references: α must neither lag nor chase.

        The sensor's offset walks (3 per √day, so ≈ 0.6 per hourly reference) and each hourly
        reference carries noise of sd 3. Tracking a random walk through white noise with a
        constant step has an interior best step, about σ_walk/σ_noise ≈ 0.2 per reference
        (the LMS tracking trade-off; common practice, from memory); the normalised step
        divides α by 1 + ‖φ‖² ≈ 3, so the best α is near 0.6. Scalar replays through the
        daemon's own engine on a fine α grid locate the region exactly (RMSE against truth
        within 5 % of the best, whole stream); a seeded search tuned on the first 70 % must
        pick inside it.
        """
        stream = tmp_path / "walk.jsonl"
        write_stream(parse_scenario(REGION_SCENARIO), stream, 5)
        raw = tomllib.loads(REGION_CONFIG)
        cfg = parse_config(raw)
        alphas = [float(a) for a in np.geomspace(0.005, 1.9, 12)]
        rmse = []
        for a in alphas:
            _, out = _replay(parse_config(_merged(raw, {"alpha": a})), stream)
            (s0, _, n0), (s1, _, n1) = _replay_scores(stream, out, None)
            rmse.append(math.sqrt((s0 + s1) / (n0 + n1)))
        best = min(rmse)
        inside = [i for i, r in enumerate(rmse) if r <= 1.05 * best]
        assert inside[0] > 0 and inside[-1] < len(alphas) - 1, "no interior optimum"
        lo, hi = alphas[inside[0] - 1], alphas[inside[-1] + 1]
        cands = build_candidates(raw, cfg, search_settings(cfg, 24, seed=1), label="search")
        result = Tuner(record(cfg, stream), cands, split=0.7).run()
        assert result.best is not None
        pick = result.best.candidate.settings["alpha"]
        assert isinstance(pick, float)
        assert lo < pick < hi, (pick, lo, hi, list(zip(alphas, rmse, strict=True)))


def _stream_copy(perturbed: Run, tmp_path: Path) -> tuple[Path, Path]:
    cfg_path = _write_config(perturbed.base, tmp_path / "base.toml")
    return cfg_path, perturbed.stream


class TestTuneCommand:
    """`trimtab tune` as a real process."""

    def test_end_to_end_outputs_check_accepts(self, perturbed: Run, tmp_path: Path) -> None:
        """Table, refused list, snippet, whole config and PNG; check accepts what it recommends."""
        cfg_path, stream = _stream_copy(perturbed, tmp_path)
        grid = tmp_path / "grid.toml"
        grid.write_text("[grid]\nalpha = [0.002, 0.013, 0.5]\nlambda = [0.0, 5.0]\n"
                        "memory = [1, 50]\n")
        proc = _trimtab("tune", "-c", str(cfg_path), str(stream), "--grid", str(grid),
                        "--plot", str(tmp_path / "p.png"), "--config-out",
                        str(tmp_path / "best.toml"), cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr
        out = proc.stdout
        assert "rank" in out and "tune RMSE" in out and "test RMSE" in out
        assert "refused by the config validator" in out and "0.5·5/1 = 2.5 ≥ 1" in out
        snippet = out.split("run trimtab check):\n", 1)[1]
        chosen = tomllib.loads(snippet)["learning"]
        merged = candidate_document(perturbed.base, {k: chosen.get(k) for k in TUNED})
        path = _write_config(merged, tmp_path / "with-snippet.toml")
        for p in (path, tmp_path / "best.toml"):
            check = _trimtab("check", "--no-files", "-c", str(p), cwd=tmp_path)
            assert check.returncode == 0, check.stderr
        loaded = load_config(tmp_path / "best.toml").learning
        assert (loaded.alpha, loaded.lam) == (chosen["alpha"], chosen["lambda"])
        png = (tmp_path / "p.png").read_bytes()
        assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 5000

    def test_json_ranks_by_tune_score(self, perturbed: Run, tmp_path: Path) -> None:
        """--json lists candidates best first by tune RMSE, with the refused ones apart."""
        cfg_path, stream = _stream_copy(perturbed, tmp_path)
        proc = _trimtab("tune", "-c", str(cfg_path), str(stream), "--search", "6", "--json",
                        "--quiet", cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr
        data = json.loads(proc.stdout)
        scores = [r["tune"]["rmse"] for r in data["ranked"]]
        assert scores == sorted(scores) and len(scores) == 7
        assert data["against"] == "truth" and data["complete"] is True
        assert data["recommended"].startswith("[learning]")

    @pytest.mark.parametrize(("extra", "message"), [
        (["--grid", "missing.toml"], "missing.toml: grid file not found"),
        (["--split", "0"], "--split 0: give a fraction"),
        (["--search", "0"], "--search 0"),
    ])
    def test_bad_input_exits_two_with_one_line(self, perturbed: Run, tmp_path: Path,
                                               extra: list[str], message: str) -> None:
        """A bad option or file is one line on stderr and exit status 2."""
        cfg_path, stream = _stream_copy(perturbed, tmp_path)
        proc = _trimtab("tune", "-c", str(cfg_path), str(stream), *extra, cwd=tmp_path)
        assert proc.returncode == 2
        assert message in proc.stderr and len(proc.stderr.strip().splitlines()) == 1

    def test_bad_config_is_refused_before_reading(self, tmp_path: Path) -> None:
        """A config that fails validation is never tuned: exit 2, its error lines."""
        bad = _config_dict(tmp_path, alpha=5.0)
        path = _write_config(bad, tmp_path / "bad.toml")
        stream = tmp_path / "none.jsonl"
        stream.write_text("")
        proc = _trimtab("tune", "-c", str(path), str(stream), cwd=tmp_path)
        assert proc.returncode == 2
        assert "learning.alpha: 5 is outside" in proc.stderr

    def test_nothing_to_score_exits_one(self, tmp_path: Path) -> None:
        """A stream with nothing to score gives the table, no recommendation and status 1."""
        path = _write_config(_config_dict(tmp_path / "state"), tmp_path / "c.toml")
        stream = tmp_path / "untrue.jsonl"  # readings without truth, and no reference
        stream.write_text('{"t": 1767225600.0, "sensor": "s1", "reading": {"raw": 4.0}}\n')
        proc = _trimtab("tune", "-c", str(path), str(stream), "--search", "2", "--quiet",
                        cwd=tmp_path)
        assert proc.returncode == 1, proc.stderr
        assert "no candidate could be scored" in proc.stdout and "[learning]" not in proc.stdout

    def test_ctrl_c_reports_results_so_far(self, perturbed: Run, tmp_path: Path) -> None:
        """SIGINT while reading stops cleanly: results on the events read, exit status 130."""
        cfg_path, stream = _stream_copy(perturbed, tmp_path)
        big = tmp_path / "big.jsonl"
        with open(big, "w") as fh:  # the stream three times over, shifted in time each pass
            events = list(read_events(stream))
            span = events[-1].t - events[0].t + 60.0
            for k in range(3):
                for e in events:
                    moved: Reading | Reference = (
                        Reading(e.t + k * span, e.sensor, e.inputs, e.truth)
                        if isinstance(e, Reading) else
                        Reference(e.t + k * span, e.sensor, e.value, e.window))
                    fh.write(_encode(moved) + "\n")
        proc = subprocess.Popen([str(BIN / "trimtab"), "tune", "-c", str(cfg_path), str(big),
                                 "--search", "4"], cwd=tmp_path, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        assert proc.stderr is not None
        line = proc.stderr.readline()
        assert line.startswith("tune: reading"), line
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=120)
        assert proc.returncode == 130, err
        assert "interrupted" in out and "rank" in out
        events_line = out.splitlines()[0]
        assert int(events_line.split(", ")[1].split()[0]) < 3 * len(events)


def _encode(e: Reading | Reference) -> str:
    from trimtab.wire.streamfile import encode_event

    return encode_event(e)


class TestStopping:
    """The library stops when asked and keeps what it has."""

    def test_should_stop_ends_early_with_partial_results(self, perturbed: Run) -> None:
        """Asked to stop after a few blocks, the run is incomplete and scored on fewer readings."""
        calls = iter(range(10**9))
        stop: Callable[[], bool] = lambda: next(calls) >= 5  # noqa: E731
        tuner = Tuner(perturbed.trace, perturbed.candidates[:3])
        result = tuner.run(should_stop=stop)
        assert not result.complete
        full = perturbed.result.outcomes[0].tune.n + perturbed.result.outcomes[0].test.n
        assert 0 < result.outcomes[0].tune.n + result.outcomes[0].test.n < full

    def test_config_error_lines_name_the_candidate(self, perturbed: Run) -> None:
        """Each refusal line starts with the candidate it belongs to."""
        cfg = parse_config(perturbed.base)
        cands = build_candidates(perturbed.base, cfg, grid_settings(cfg, {"alpha": [9.0]}),
                                 label="grid", include_current=False)
        assert cands[0].refused and all(w.startswith("candidate 0: ") for w in cands[0].refused)
        with pytest.raises(ConfigError):
            parse_config(_merged(perturbed.base, {"alpha": 9.0}))


# Every key of [learning] and [output], and the sensor settings the learning reads, set away
# from its default in one variant of the perturbed run's config; each variant is tuned on a
# grid of two candidates, and each candidate must equal `trimtab replay` with its config.
VARIANTS: dict[str, dict[str, dict[str, Any]]] = {
    "guards": {"learning": {"gate_k": 2.5, "gate_run": 2, "shift_after": 7200.0, "warmup": 3,
                            "snapshot_every": 6, "rollback_factor": 1.5, "error_window": 40,
                            "alpha_recovery": 0.5, "alpha_min": 0.002, "max_references": 1,
                            "reference_interval": 7200.0}},
    "step": {"learning": {"lambda": 3.0, "lambda_min": 0.5, "lambda_max": 6.0, "memory": 120,
                          "normalised": False, "huber_delta": 2.0, "step_gap": 5400.0,
                          "alpha_max": 0.05, "feature_clip": 3.0}},
    "scaler": {"learning": {"scaler_span": 172800.0, "scaler_width": 3.0}},
    "fixed": {"learning": {"scaler": "fixed", "step_adapt": "none", "alpha": 0.013}},
    "output": {"output": {"band_coverage": 0.8, "band_gain": 0.2, "cap": 0.5,
                          "stale_after": 900.0, "extrapolation": 1.5}},
    "intercept": {"sensors.defaults": {"penalise_intercept": True}},
    # one of the two monitors starts from a fitted state, the other from its first readings
    "initial": {"sensors.overrides.pm25-quay-01": {"initial_state": "<fit>"}},
}
EVIDENCE: dict[str, Callable[[dict[str, Any], str], bool]] = {
    "guards": lambda state, out: state["counts"].get("reference_rate_limited", 0) > 0,
    "output": lambda state, out: '"capped"' in out and '"stale"' in out,
    "fixed": lambda state, out: "scaler_moved" not in state["counts"],
    "scaler": lambda state, out: state["counts"].get("scaler_moved", 0) > 0,
    "initial": lambda state, out: state["sensors"]["pm25-quay-01"]["warm"]
    and not state["sensors"]["pm25-quay-02"]["warm"],
}
"""What shows that a variant's keys were in force in the replay, beyond changing it."""
VARIANT_GRIDS: dict[str, dict[str, list[Value]]] = {
    "fixed": {"lambda": [0.5, 5.0]},
    "intercept": {"lambda": [0.5, 5.0]},
}


def _initial_state(stream: Path, path: Path) -> Path:
    """A model-state file fitted by `trimtab fit` on the stream's first day of one monitor
    (every tenth reading against its simulated truth): raw, temp, rh and elapsed days."""
    rows = ["t,raw,temp,rh,ref"]
    events = [e for e in read_events(stream)
              if isinstance(e, Reading) and e.sensor == "pm25-quay-01" and e.truth is not None]
    for e in events[: 1440 : 10]:
        rows.append(f"{e.t},{e.inputs['raw']},{e.inputs['temp']},{e.inputs['rh']},{e.truth}")
    csv = path.with_suffix(".csv")
    csv.write_text("\n".join(rows) + "\n")
    assert cli_main(["fit", str(csv), "--inputs", "raw,temp,rh", "--elapsed", "--lambda", "1",
                     "-o", str(path)]) == 0
    return path


def _variant(base: Mapping[str, Any], name: str, fit: Path) -> dict[str, Any]:
    data = json.loads(json.dumps(base))
    for where, keys in VARIANTS[name].items():
        section = data
        for part in where.split("."):
            section = section.setdefault(part, {})
        section.update({k: str(fit) if v == "<fit>" else v for k, v in keys.items()})
    return data


class TestEveryKeyEqualsReplay:
    """Whatever the config sets, a tuned candidate ends with replay's state and score."""

    def test_every_learning_and_output_key_is_covered(self) -> None:
        """The variants set every key of [learning] and [output] (so a new key needs one)."""
        from trimtab.config import LearningSettings, OutputSettings

        set_here = {(where, k) for v in VARIANTS.values() for where, keys in v.items()
                    for k in keys}
        for where, model in (("learning", LearningSettings), ("output", OutputSettings)):
            for name, field in model.model_fields.items():
                assert (where, field.alias or name) in set_here, f"{where}.{name} not covered"
        assert {("sensors.overrides.pm25-quay-01", "initial_state"),
                ("sensors.defaults", "penalise_intercept")} <= set_here

    @pytest.mark.parametrize("name", sorted(VARIANTS))
    def test_variant_candidates_equal_replay(self, perturbed: Run, tmp_path: Path,
                                             name: str) -> None:
        """Each variant's keys are away from their defaults and change what replay gives; each
        of its two candidates then equals replay in state and score, bit for bit."""
        fit = _initial_state(perturbed.stream, tmp_path / "fit.json")
        data = _variant(perturbed.base, name, fit)
        cfg = parse_config(data)
        default = parse_config({"broker": {"client_id": "x"}, "sensors": {"ids": ["s"]}})
        for where, keys in VARIANTS[name].items():
            for key, _ in keys.items():
                attr = "lam" if key == "lambda" else key
                ours = (cfg.sensor_settings(where.split(".")[-1]) if where.startswith("sensors")
                        else getattr(cfg, where))
                theirs = (default.sensors.defaults if where.startswith("sensors")
                          else getattr(default, where))
                assert getattr(ours, attr) != getattr(theirs, attr), f"{where}.{key} is default"
        grid = VARIANT_GRIDS.get(name, {"alpha": [0.004, 0.013]})
        cands = build_candidates(data, cfg, grid_settings(cfg, grid), label="grid",
                                 include_current=False)
        assert len(cands) == 2 and all(c.valid for c in cands), [c.refused for c in cands]
        run = tune_stream(perturbed.stream, cands, split=0.7)
        for cand in cands:
            _equals_replay(run, cand, perturbed.stream)
        # the variant's keys matter: without them the same candidate replays differently
        plain = parse_config(candidate_document(perturbed.base,
                                                {k: cands[0].settings[k] for k in grid}))
        plain_state, plain_out = _replay(plain, perturbed.stream)
        state, out = _replay(cands[0].config, perturbed.stream)  # type: ignore[arg-type]
        assert (plain_state, plain_out) != (state, out)
        assert EVIDENCE.get(name, lambda state, out: True)(state, out)
