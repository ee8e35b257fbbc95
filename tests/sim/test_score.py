"""Tests of the scorer and its report (trimtab_sim.score, trimtab_sim.report)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.stats import linregress
from sklearn.metrics import mean_absolute_error, mean_squared_error, r2_score

from trimtab.errors import DataError
from trimtab.messages import Corrected, Reading, Reference
from trimtab_sim import report
from trimtab_sim.generate import generate
from trimtab_sim.scenario import load_scenario, parse_scenario
from trimtab_sim.score import Joined, Result, Settings, join, metrics, oracle, recovery, score

SCENARIOS = sorted((Path(__file__).resolve().parents[2] / "config" / "scenarios").glob("*.toml"))
T0 = 1767225600.0

finite = st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False)


def joined_from(
    truth: np.ndarray, raw: np.ndarray, corrected: np.ndarray, band: float = 1.0, step: float = 60.0
) -> Joined:
    """A one-sensor Joined with readings a ``step`` apart."""
    t = T0 + step * np.arange(truth.size)
    return Joined("s1", t, truth, {"raw": raw}, corrected, np.full(truth.size, band))


def as_corrected(
    events: list[Reading | Reference], value: dict[tuple[str, float], float], band: float = 1.0
) -> list[Corrected]:
    """Corrected values for the readings found in ``value``, keyed by (sensor, t)."""
    return [
        Corrected(e.t, e.sensor, value[(e.sensor, e.t)], e.inputs["raw"], band)
        for e in events
        if isinstance(e, Reading) and (e.sensor, e.t) in value
    ]


class TestMetrics:
    @settings(max_examples=40, deadline=None)
    @given(arrays(np.float64, st.integers(3, 40), elements=finite), st.data())
    def test_match_sklearn_and_scipy(self, truth: np.ndarray, data: st.DataObject) -> None:
        """RMSE, MAE, R², slope, intercept, r² match sklearn.metrics and scipy.stats.linregress."""
        value = data.draw(arrays(np.float64, truth.size, elements=finite))
        assume(np.ptp(truth) > 1e-3 and np.ptp(value) > 1e-3)
        m = metrics(value, truth)
        fit = linregress(truth, value)
        assert m.rmse == pytest.approx(np.sqrt(mean_squared_error(truth, value)), rel=1e-9)
        assert m.mae == pytest.approx(mean_absolute_error(truth, value), rel=1e-9)
        assert m.r2 == pytest.approx(r2_score(truth, value), rel=1e-7, abs=1e-9)
        assert m.slope == pytest.approx(fit.slope, rel=1e-7, abs=1e-9)
        assert m.intercept == pytest.approx(fit.intercept, rel=1e-7, abs=1e-6)
        assert m.fit_r2 == pytest.approx(fit.rvalue**2, rel=1e-7, abs=1e-9)

    def test_bias_and_nrmse(self) -> None:
        """Bias is mean(value − truth) and NRMSE is RMSE over the mean truth."""
        truth = np.array([10.0, 20.0, 30.0, 40.0])
        value = np.array([12.0, 21.0, 33.0, 40.0])
        m = metrics(value, truth)
        assert m.bias == pytest.approx(1.5)
        assert m.nrmse == pytest.approx(np.sqrt((4 + 1 + 9) / 4) / 25.0)

    def test_refuses_mismatched_arrays(self) -> None:
        """Arrays of different lengths are a DataError."""
        with pytest.raises(DataError):
            metrics([1.0, 2.0, 3.0], [1.0, 2.0])


class TestJoin:
    def test_join_by_sensor_and_time(self) -> None:
        """Corrected values join their readings by (sensor, t); unmatched readings are counted."""
        ev: list[Reading | Reference] = [
            Reading(T0 + 60 * k, s, {"raw": float(k), "temp": 1.0}, float(k) + 0.5)
            for k in range(5)
            for s in ("a", "b")
        ]
        ev.append(Reference(T0 + 240, "a", 3.0, 120.0))
        values = {("a", T0 + 60 * k): 10.0 * k for k in range(4)}
        values.update({("b", T0 + 60 * k): -1.0 for k in range(5)})
        js = {j.sensor: j for j in join(ev, as_corrected(ev, values))}
        assert js["a"].missing == 1 and js["b"].missing == 0
        assert list(js["a"].corrected) == [0.0, 10.0, 20.0, 30.0]
        assert list(js["a"].truth) == [0.5, 1.5, 2.5, 3.5]
        assert list(js["a"].inputs) == ["raw", "temp"]
        assert list(js["a"].ref_w) == [120.0] and js["b"].ref_t.size == 0

    def test_reading_without_truth(self) -> None:
        """A stream whose readings carry no truth cannot be scored."""
        ev: list[Reading | Reference] = [Reading(T0, "a", {"raw": 1.0})]
        with pytest.raises(DataError, match="no truth"):
            join(ev, [])


class TestOracle:
    def test_recovers_a_linear_calibration(self) -> None:
        """With exact references the oracle undoes a fixed gain and offset."""
        sc = parse_scenario(
            {
                "name": "lin",
                "days": 2,
                "step": 60,
                "signal": {"base": 20.0, "daily_amplitude": 8.0, "wander": 2.0},
                "sensors": [
                    {"id": "s1", "gain": 2.0, "offset": 3.0, "decimals": 6, "covariates": []}
                ],
                "references": [{"serves": ["s1"], "every": 3600, "window": 0}],
            }
        )
        ev = generate(sc, 0).events
        j = join(
            ev, as_corrected(ev, {(e.sensor, e.t): 0.0 for e in ev if isinstance(e, Reading)})
        )[0]
        pred = oracle(j, Settings(oracle_lambda=1e-6))
        assert pred is not None
        assert np.max(np.abs(pred - j.truth)) < 1e-3

    @pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
    def test_beats_raw_on_examples(self, path: Path) -> None:
        """On every example scenario the hindsight oracle beats the raw RMSE of each sensor."""
        sc = load_scenario(path)
        ev = generate(sc, 1).events
        j_all = join(
            ev,
            as_corrected(
                ev, {(e.sensor, e.t): e.inputs["raw"] for e in ev if isinstance(e, Reading)}
            ),
        )
        s = Settings(oracle_days=sc.score.oracle_days, oracle_lambda=sc.score.oracle_lambda)
        res = score(j_all, s)
        for ss in res.sensors:
            assert (
                ss.metrics["oracle"].rmse < (1 - sc.score.min_improvement) * ss.metrics["raw"].rmse
            )

    def test_none_without_references(self) -> None:
        """A sensor with no references has no oracle."""
        j = joined_from(np.arange(10.0), np.arange(10.0), np.arange(10.0))
        assert oracle(j, Settings()) is None


class TestRecovery:
    def test_time_to_recover(self) -> None:
        """After two hours of error the 1-h rolling error is clean one window later."""
        t = T0 + 60.0 * np.arange(600)
        err = np.where((t >= T0 + 7200) & (t < T0 + 14400), 10.0, 0.0)
        tol, sec = recovery(t, err, T0 + 7200, 3600.0, 0.5)
        # Error samples run to T0+14340; the first window (t−3600, t] free of them ends at
        # T0+17940, i.e. 10740 s after the step.
        assert (tol, sec) == (0.5, 10740.0)

    def test_never_recovers(self) -> None:
        """A lasting error never recovers."""
        t = T0 + 60.0 * np.arange(600)
        err = np.where(t >= T0 + 7200, 3.0, 0.1)
        tol, sec = recovery(t, err, T0 + 7200, 3600.0, None)
        assert tol == pytest.approx(0.15) and sec is None

    def test_score_reports_recovery_per_series(self) -> None:
        """score() reports one recovery per step and series."""
        truth = np.full(600, 10.0)
        raw = truth + np.where(np.arange(600) >= 120, 5.0, 0.0)
        corrected = truth + np.where((np.arange(600) >= 120) & (np.arange(600) < 180), 5.0, 0.1)
        j = joined_from(truth, raw, corrected)
        res = score([j], Settings(recovery_window=600.0), {"s1": [T0 + 7200]})
        recs = {r.series: r.seconds for r in res.sensors[0].recovery}
        assert recs == {"raw": None, "corrected": 4140.0}


class TestTargets:
    def test_block_means_need_completeness(self) -> None:
        """A block mean needs at least 75% of its expected readings."""
        t = T0 + 600.0 * np.arange(24 * 6 * 2)
        keep = np.ones(t.size, bool)
        keep[:50] = False  # day one keeps 94 of its 144 readings (65%)
        v = np.arange(t.size, dtype=float)
        (means,) = report.block_means(t[keep], [v[keep]], 86400.0)
        assert means.tolist() == [v[144:].mean()]

    def test_perfect_series_meets_pm25_targets(self) -> None:
        """A corrected series equal to truth meets every PM2.5 target; a biased raw one fails."""
        rng = np.random.default_rng(0)
        n = 10 * 24 * 60
        truth = 10 + 5 * rng.random(n).cumsum() / np.arange(1, n + 1) + rng.random(n)
        j = joined_from(truth, truth * 1.6 + 9, truth.copy())
        tc = report.check_targets(j, "pm25")
        met = {r.metric: r.met for r in tc.rows}
        assert tc.periods == 10
        assert all(met[m]["corrected"] for m in ("R²", "slope", "intercept", "RMSE"))
        assert not met["slope"]["raw"] and not met["RMSE"]["raw"]


class TestReport:
    def _result(self) -> tuple[list[Joined], Result]:
        truth = 10 + np.sin(np.arange(300) / 20.0)
        j = joined_from(truth, truth + 2.0, truth + 0.1)
        return [j], score([j], Settings())

    def test_markdown_carries_caution(self, tmp_path: Path) -> None:
        """The report's target section says the values are from memory and certify nothing."""
        js, res = self._result()
        tc = [report.check_targets(js[0], "o3")]
        md = report.markdown(res, tc, {}, {"stream": "s.jsonl"}, None)
        assert "quoted from memory" in md and "no certification" in md
        assert "EPA/600/R-20/279" in md and "| RMSE | RMSE ≤ 5 |" in md

    def test_figures_written(self, tmp_path: Path) -> None:
        """With matplotlib the report has three PNGs per sensor linked from report.md."""
        js, res = self._result()
        files = report.write_report(res, js, [], tmp_path, {})
        names = sorted(p.name for p in files)
        assert names == ["report.md", "s1-error.png", "s1-scatter.png", "s1-series.png"]
        assert all(p.stat().st_size > 1000 for p in files)
        assert "![s1-scatter.png](s1-scatter.png)" in (tmp_path / "report.md").read_text()

    def test_markdown_only_without_matplotlib(
        self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """Without matplotlib only report.md is written and it says why."""
        monkeypatch.setattr(report, "plots_available", lambda: False)
        js, res = self._result()
        files = report.write_report(res, js, [], tmp_path, {})
        assert [p.name for p in files] == ["report.md"]
        assert "matplotlib is not installed" in files[0].read_text()

    def test_figures_carry_units_and_dates(self) -> None:
        """Value axes name the scenario's unit; time axes are dates (UTC), not day counts;
        the series plot draws truth and corrected in front of raw, with the band shaded."""
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.dates as mdates
        import matplotlib.pyplot as plt

        js, _ = self._result()
        j = js[0]
        series = report.series_figure(j, "µg/m³")
        ax = series.axes[0]
        assert ax.get_ylabel() == "value (µg/m³)" and ax.get_xlabel() == "time (UTC)"
        assert isinstance(ax.xaxis.get_major_formatter(), mdates.ConciseDateFormatter)
        start = mdates.num2date(ax.get_lines()[0].get_xdata(orig=False)[0])
        assert start.timestamp() == pytest.approx(T0)
        order = {line.get_label(): line.get_zorder() for line in ax.get_lines()}
        assert order["truth"] > order["raw"] and order["corrected"] > order["raw"]
        assert "oracle" not in order
        assert any(c.get_label() == "± band" for c in ax.collections)
        scatter = report.scatter_figure(j, "ppb").axes[0]
        assert (scatter.get_xlabel(), scatter.get_ylabel()) == ("truth (ppb)", "value (ppb)")
        error = report.error_figure(j, "ppb").axes[0]
        assert error.get_ylabel() == "error (ppb)"
        plt.close("all")

    def test_markdown_states_both_r2_definitions(self) -> None:
        """The report says which R² each table uses, so −1.45 and 0.958 are not a riddle."""
        _, res = self._result()
        md = report.markdown(res, [], {}, {}, None)
        assert "1 − Σ(value − truth)² / Σ(truth − mean truth)²" in md
        assert "the squared correlation" in md
