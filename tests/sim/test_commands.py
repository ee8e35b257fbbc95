"""Subprocess runs of ``trimtab-sim make`` and ``trimtab-sim score`` in a temporary directory."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from trimtab.messages import Corrected, Reading
from trimtab.wire.streamfile import read_events, write_corrected
from trimtab_sim.score import Settings, join, oracle

SCENARIO = """
name = "cli-test"
days = 2
step = 60

[signal]
base = 12.0
daily_amplitude = 4.0
wander = 1.0

[[sensors]]
id = "pm-a"
gain = 1.3
offset = 2.0
cross = { kappa = 0.1 }
faults = { noise = 0.5 }
steps = [{ day = 1.0, offset = 4.0 }]

[[references]]
serves = ["pm-a"]
every = 3600
window = 3600

[score]
min_improvement = 0.3
targets = "pm25"
"""


def sim(*args: str | Path) -> subprocess.CompletedProcess[str]:
    """Run trimtab-sim with ``args`` and capture its output."""
    return subprocess.run(
        [sys.executable, "-m", "trimtab_sim.cli", *map(str, args)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


@pytest.fixture
def scenario_file(tmp_path: Path) -> Path:
    """A two-day one-sensor scenario file."""
    p = tmp_path / "scenario.toml"
    p.write_text(SCENARIO, encoding="utf-8")
    return p


def oracle_corrected(stream: Path, out: Path) -> None:
    """Write a corrected file holding the oracle's own predictions for the stream."""
    ev = list(read_events(stream))
    placeholder = [
        Corrected(e.t, e.sensor, 0.0, e.inputs["raw"], 0.0) for e in ev if isinstance(e, Reading)
    ]
    items: list[Corrected] = []
    for j in join(ev, placeholder):
        pred = oracle(j, Settings())
        assert pred is not None
        items += [
            Corrected(float(t), j.sensor, float(v), float(r), 1.5, (), 1)
            for t, v, r in zip(j.t, pred, j.inputs["raw"], strict=True)
        ]
    write_corrected(out, items)


class TestMake:
    def test_same_seed_identical_files(self, tmp_path: Path, scenario_file: Path) -> None:
        """Two runs with the same seed write the same bytes; another seed differs."""
        for name, seed in (("a", "5"), ("b", "5"), ("c", "6")):
            r = sim("make", scenario_file, "-o", tmp_path / f"{name}.jsonl", "--seed", seed)
            assert r.returncode == 0, r.stderr
            assert "wrote" in r.stdout
        a, b, c = (tmp_path / f"{n}.jsonl" for n in "abc")
        assert a.read_bytes() == b.read_bytes() != c.read_bytes()

    def test_bad_scenario_names_field(self, tmp_path: Path) -> None:
        """A bad scenario exits 2 and names the field path and rule on stderr."""
        p = tmp_path / "bad.toml"
        p.write_text(SCENARIO.replace("gain = 1.3", "gain = 1.3\nspeed = 4"), encoding="utf-8")
        r = sim("make", p, "-o", tmp_path / "x.jsonl")
        assert r.returncode == 2
        assert f"{p}: sensors[0].speed: unknown key; allowed: id, interval, " in r.stderr
        assert not (tmp_path / "x.jsonl").exists()

    def test_missing_scenario(self, tmp_path: Path) -> None:
        """A missing scenario file exits 2 with a message."""
        r = sim("make", tmp_path / "none.toml", "-o", tmp_path / "x.jsonl")
        assert r.returncode == 2 and "scenario file not found" in r.stderr


class TestScore:
    def test_report_and_json(self, tmp_path: Path, scenario_file: Path) -> None:
        """Score writes report.md, score.json and figures, and --json prints the same figures."""
        stream, corrected = tmp_path / "s.jsonl", tmp_path / "c.jsonl"
        assert sim("make", scenario_file, "-o", stream).returncode == 0
        oracle_corrected(stream, corrected)
        out = tmp_path / "report"
        r = sim(
            "score", stream, corrected, "-o", out, "--json", "--scenario", scenario_file, "--check"
        )
        assert r.returncode == 0, r.stderr
        doc = json.loads(r.stdout)
        assert doc == json.loads((out / "score.json").read_text(encoding="utf-8"))
        m = doc["overall"]["metrics"]
        assert m["corrected"]["rmse"] == pytest.approx(m["oracle"]["rmse"])
        assert m["corrected"]["rmse"] < 0.7 * m["raw"]["rmse"]
        assert doc["settings"]["min_improvement"] == 0.3
        assert [x["series"] for x in doc["sensors"][0]["recovery"]] == [
            "raw",
            "corrected",
            "oracle",
        ]
        assert doc["targets"][0]["key"] == "pm25"
        names = sorted(p.name for p in out.iterdir())
        assert names == [
            "pm-a-error.png",
            "pm-a-scatter.png",
            "pm-a-series.png",
            "report.md",
            "score.json",
        ]
        assert "EPA/600/R-20/280" in (out / "report.md").read_text(encoding="utf-8")

    def test_table_and_check_failure(self, tmp_path: Path, scenario_file: Path) -> None:
        """The summary table prints per series; --check exits 1 when corrected equals raw."""
        stream, corrected = tmp_path / "s.jsonl", tmp_path / "c.jsonl"
        assert sim("make", scenario_file, "-o", stream).returncode == 0
        write_corrected(
            corrected,
            [
                Corrected(e.t, e.sensor, e.inputs["raw"], e.inputs["raw"], 1.0)
                for e in read_events(stream)
                if isinstance(e, Reading)
            ],
        )
        r = sim("score", stream, corrected, "--check")
        assert r.returncode == 1
        rows = [line.split()[:2] for line in r.stdout.splitlines()]
        assert ["pm-a", "corrected"] in rows and ["*", "oracle"] in rows
        assert "misses the required 20%" in r.stdout

    def test_unreadable_corrected(self, tmp_path: Path, scenario_file: Path) -> None:
        """A corrected file with a bad line exits 2 naming the file and line."""
        stream, corrected = tmp_path / "s.jsonl", tmp_path / "c.jsonl"
        assert sim("make", scenario_file, "-o", stream).returncode == 0
        corrected.write_text("{not json\n", encoding="utf-8")
        r = sim("score", stream, corrected)
        assert r.returncode == 2 and "c.jsonl:1" in r.stderr
