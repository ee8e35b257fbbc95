"""Accuracy on a real year: the operator's workflow on the UCI Air Quality data, held in CI.

Data: tests/data/uci-air-quality (De Vito et al. 2008, UCI Machine Learning Repository,
doi:10.24432/C59K5F, CC BY 4.0; its source note sits beside it). A tin-oxide CO cell with
temperature and humidity beside a reference analyser, hourly for a year. The workflow is the
real command line (``trimtab fit`` → ``trimtab tune`` on the first 90 days, against the
references only → ``trimtab replay`` over the year), run in :mod:`trimtab_sim.realdata`; the
yardsticks are plain numpy in :mod:`trimtab_sim.baselines`, computed here on every run, so the
margin is measured, not remembered.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import pytest

from trimtab_sim.baselines import Baselines, baselines
from trimtab_sim.realdata import Result, run_workflow, table
from trimtab_sim.uci import DATA, SCHEDULES, Year, load_year

ROOT = Path(__file__).resolve().parents[2]
TARGET = {"hourly": 0.40, "weekly": 0.60, "daily": 0.62}
"""RMSE targets in mg/m³ (the issue's figures for settings chosen on the first 90 days)."""
DATA_SHA256 = "c69a00594b1ac9cf18dc62c846a8ad59fde534fdf6628c75bdea4829195df660"


@pytest.fixture(scope="module")
def year() -> Year:
    return load_year()


@pytest.fixture(scope="module")
def runs(year: Year, tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Result,
                                                                                   Result]]:
    """Each schedule's workflow with the guards on and with them off."""
    out = {}
    for schedule in SCHEDULES:
        d = tmp_path_factory.mktemp(schedule)
        out[schedule] = (run_workflow(schedule, d / "on", year),
                         run_workflow(schedule, d / "off", year, guards=False))
    return out


@pytest.fixture(scope="module")
def yardsticks(year: Year) -> dict[str, Baselines]:
    return {schedule: baselines(year, schedule) for schedule in SCHEDULES}


class TestData:
    def test_the_shipped_copy_is_the_published_file_with_its_note(self) -> None:
        """The CSV is byte for byte the copy the source note describes, and the note is there."""
        assert hashlib.sha256(DATA.read_bytes()).hexdigest() == DATA_SHA256
        note = (DATA.parent / "README.md").read_text(encoding="utf-8")
        assert "CC BY 4.0" in note and "De Vito" in note

    def test_scored_hours_are_those_with_the_analyser(self, year: Year) -> None:
        """7,344 hours have both the cell's readings and CO(GT) (the issue's count)."""
        assert sum(h.co is not None for h in year.hours) == 7344


class TestAccuracy:
    @pytest.mark.parametrize("schedule", SCHEDULES)
    def test_tuned_on_90_days_meets_the_target_over_the_year(
            self, runs: dict[str, tuple[Result, Result]], schedule: str) -> None:
        """RMSE over the year meets the target with settings chosen on the first 90 days."""
        on, _ = runs[schedule]
        assert on.scored == 7344
        assert on.rmse <= TARGET[schedule], on.config

    @pytest.mark.parametrize("schedule", SCHEDULES)
    def test_beats_every_plain_yardstick(self, runs: dict[str, tuple[Result, Result]],
                                         yardsticks: dict[str, Baselines],
                                         schedule: str) -> None:
        """Below the fixed calibration, the monthly refit and the hindsight-best plain NLMS."""
        on, _ = runs[schedule]
        b = yardsticks[schedule]
        assert on.rmse < min(b.fixed, b.monthly, b.nlms), (on.rmse, b)

    @pytest.mark.parametrize("schedule", SCHEDULES)
    def test_guards_cost_at_most_two_percent(self, runs: dict[str, tuple[Result, Result]],
                                             schedule: str) -> None:
        """With gate and rollback on, within 2 % of the same workflow with them off."""
        on, off = runs[schedule]
        assert on.rmse <= 1.02 * off.rmse, (on.rmse, off.rmse)


class TestBand:
    @pytest.mark.parametrize("schedule", SCHEDULES)
    def test_band_covers_its_nominal_share_of_references(
            self, runs: dict[str, tuple[Result, Result]], schedule: str) -> None:
        """At the references (what the daemon sees and reports) coverage is 0.9 ± 0.03."""
        on, _ = runs[schedule]
        assert 0.87 <= on.ref_coverage <= 0.93, on.ref_coverage

    def test_band_covers_every_hour_when_references_are_hourly(
            self, runs: dict[str, tuple[Result, Result]]) -> None:
        """With a reference every hour, every scored hour is covered at 0.9 ± 0.03."""
        on, _ = runs["hourly"]
        assert 0.87 <= on.coverage <= 0.93, on.coverage

    @pytest.mark.parametrize("schedule", ["weekly", "daily"])
    def test_sparse_references_cover_fewer_hours_than_they_see(
            self, runs: dict[str, tuple[Result, Result]], schedule: str) -> None:
        """Measured, not met: with sparse references every-hour coverage falls below 0.87.

        The band is calibrated where references are; the hours between them (rush hours a
        noon spot check never sees, days a weekly collocation never sees) err more. The figures
        are in the README; this pins them so a change either way is noticed.
        """
        on, _ = runs[schedule]
        assert 0.80 <= on.coverage < 0.87, on.coverage


def test_readme_shows_the_measured_table(year: Year, runs: dict[str, tuple[Result, Result]],
                                         yardsticks: dict[str, Baselines]) -> None:
    """The README's "On real data" table is what ``python -m trimtab_sim.realdata`` prints."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("<!-- realdata:table -->")[1].split("<!-- /realdata:table -->")[0]
    shown = [line for line in section.strip().splitlines() if line.startswith("|")]
    measured = {s: (yardsticks[s], *runs[s]) for s in SCHEDULES}
    assert shown == table(year, measured)
    assert re.search(r"local regulations", text)
