"""Tests of the scenario model and the stream generator (trimtab_sim.scenario, .generate)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from trimtab.errors import ConfigError
from trimtab.messages import Reading, Reference
from trimtab_sim.generate import generate, write_stream
from trimtab_sim.scenario import Scenario, load_scenario, parse_scenario

SCENARIOS = sorted((Path(__file__).resolve().parents[2] / "config" / "scenarios").glob("*.toml"))
DAY = 86400.0


def scenario(days: float = 2.0, sensor: dict[str, Any] | None = None, **top: Any) -> Scenario:
    """A short, quiet one-sensor scenario with a reading a minute; overrides merged in."""
    s: dict[str, Any] = {
        "id": "s1",
        "interval": 60,
        "decimals": 6,
        "temp_noise": 0.0,
        "rh_noise": 0.0,
    }
    s.update(sensor or {})
    data: dict[str, Any] = {
        "name": "test",
        "days": days,
        "step": 60,
        "signal": {"base": 20.0, "daily_amplitude": 5.0, "wander": 1.0},
        "sensors": [s],
    }
    data.update(top)
    return parse_scenario(data)


def readings(sc: Scenario, seed: int = 0) -> tuple[np.ndarray, ...]:
    """Times (days from start), raw, truth, temp and rh of the scenario's readings."""
    rs = [e for e in generate(sc, seed).events if isinstance(e, Reading)]
    t = (np.array([r.t for r in rs]) - sc.t0) / DAY
    raw = np.array([r.inputs["raw"] for r in rs])
    truth = np.array([r.truth for r in rs], dtype=float)
    temp = np.array([r.inputs.get("temp", np.nan) for r in rs])
    rh = np.array([r.inputs.get("rh", np.nan) for r in rs])
    return t, raw, truth, temp, rh


class TestDeterminism:
    def test_same_seed_same_bytes(self, tmp_path: Path) -> None:
        """The same scenario and seed write byte-identical stream files."""
        sc = load_scenario(SCENARIOS[0])
        sc = sc.model_copy(update={"days": 1.0})
        a, b = tmp_path / "a.jsonl", tmp_path / "b.jsonl"
        write_stream(sc, a, seed=7)
        write_stream(sc, b, seed=7)
        assert a.read_bytes() == b.read_bytes()

    def test_different_seeds_differ(self, tmp_path: Path) -> None:
        """Different seeds give different streams."""
        sc = scenario(days=1.0)
        a, b = tmp_path / "a.jsonl", tmp_path / "b.jsonl"
        write_stream(sc, a, seed=1)
        write_stream(sc, b, seed=2)
        assert a.read_bytes() != b.read_bytes()

    def test_events_in_time_order(self) -> None:
        """Events come out sorted by t, with a reading before a reference at the same t."""
        sc = scenario(references=[{"serves": ["s1"], "every": 3600, "window": 3600}])
        ev = generate(sc, 0).events
        keys = [(e.t, isinstance(e, Reference)) for e in ev]
        assert keys == sorted(keys)

    def test_mechanism_leaves_others_unchanged(self) -> None:
        """Switching spikes on does not change the noise draws of the other readings."""
        base = scenario(sensor={"faults": {"noise": 1.0}})
        spiky = scenario(sensor={"faults": {"noise": 1.0, "spike_prob": 0.05, "spike_size": 50}})
        _, raw_a, *_ = readings(base)
        _, raw_b, *_ = readings(spiky)
        same = np.isclose(raw_a, raw_b)
        assert 0.9 < same.mean() < 0.99


class TestDrift:
    def test_linear_offset_drift_slope(self) -> None:
        """A fit of raw − truth against days recovers offset_per_day."""
        t, raw, truth, *_ = readings(scenario(sensor={"drift": {"offset_per_day": 2.5}}))
        slope, _ = np.polyfit(t, raw - truth, 1)
        assert slope == pytest.approx(2.5, abs=1e-4)

    def test_linear_gain_drift_slope(self) -> None:
        """A fit of raw / truth against days recovers gain_per_day."""
        t, raw, truth, *_ = readings(scenario(sensor={"drift": {"gain_per_day": -0.04}}))
        slope, icpt = np.polyfit(t, raw / truth, 1)
        assert (slope, icpt) == (pytest.approx(-0.04, abs=1e-5), pytest.approx(1.0, abs=1e-5))

    def test_maintenance_step_size(self) -> None:
        """A step adds its offset to every reading from its day on, and nothing before."""
        sc = scenario(sensor={"steps": [{"day": 1.0, "offset": 5.0}], "faults": {"noise": 0.3}})
        t, raw, truth, *_ = readings(sc)
        err = raw - truth
        jump = err[t >= 1.0].mean() - err[t < 1.0].mean()
        assert jump == pytest.approx(5.0, abs=0.05)

    def test_reset_step_undoes_drift(self) -> None:
        """A reset step returns the offset to its start value plus the step's delta."""
        sc = scenario(
            sensor={
                "offset": 1.0,
                "drift": {"offset_per_day": 3.0},
                "steps": [{"day": 1.0, "offset": 0.5, "reset": True}],
            }
        )
        t, raw, truth, *_ = readings(sc)
        err = raw - truth
        k = int(np.searchsorted(t, 1.0))
        assert err[k - 1] == pytest.approx(4.0, abs=0.01)
        assert err[k] == pytest.approx(1.5, abs=0.01)

    def test_offset_random_walk_spread(self) -> None:
        """Daily increments of an offset random walk have the configured spread per √day."""
        sc = parse_scenario(
            {
                "name": "walk",
                "days": 200,
                "step": 600,
                "sensors": [
                    {"id": "s1", "interval": 600, "decimals": 6, "drift": {"offset_walk": 2.0}}
                ],
            }
        )
        _, raw, truth, *_ = readings(sc, seed=3)
        err = (raw - truth)[:: int(DAY / 600)]
        assert np.std(np.diff(err)) == pytest.approx(2.0, rel=0.2)

    def test_humidity_growth_factor(self) -> None:
        """raw / truth − 1 is linear in rh / (100 − rh) with slope κ (κ-Köhler growth)."""
        sc = scenario(sensor={"cross": {"kappa": 0.2}}, weather={"rh_mean": 80, "rh_max": 97})
        _, raw, truth, _, rh = readings(sc)
        slope, icpt = np.polyfit(rh / (100 - rh), raw / truth - 1, 1)
        assert slope == pytest.approx(0.2, rel=0.01)
        assert icpt == pytest.approx(0.0, abs=0.01)

    def test_temperature_cross_sensitivity(self) -> None:
        """raw − truth is c·(T − T_ref) for a temperature coefficient c."""
        sc = scenario(sensor={"cross": {"temp": 0.7, "temp_ref": 15.0}})
        _, raw, truth, temp, _ = readings(sc)
        slope, icpt = np.polyfit(temp - 15.0, raw - truth, 1)
        assert (slope, icpt) == (pytest.approx(0.7, abs=0.01), pytest.approx(0.0, abs=0.02))

    def test_seasonal_trend_moves_the_operating_range(self) -> None:
        """temp_trend_per_day and rh_trend_per_day shift the daily means by trend × days."""
        sc = scenario(days=30.0, weather={"temp_wander": 0.0, "rh_wander": 0.0,
                                          "temp_trend_per_day": 0.5, "rh_trend_per_day": -0.4})
        t, _, _, temp, rh = readings(sc)
        first, last = t < 1.0, t >= 29.0
        assert temp[last].mean() - temp[first].mean() == pytest.approx(0.5 * 29.0, abs=0.05)
        assert rh[last].mean() - rh[first].mean() == pytest.approx(-0.4 * 29.0, abs=0.05)

    def test_noise_spread(self) -> None:
        """With only noise on, raw − truth has the configured standard deviation."""
        _, raw, truth, *_ = readings(scenario(sensor={"faults": {"noise": 1.5}}))
        assert np.std(raw - truth) == pytest.approx(1.5, rel=0.06)

    def test_spike_rate(self) -> None:
        """Spikes hit about spike_prob of the readings, with sizes of 0.5-1.5 × spike_size."""
        sc = scenario(days=4, sensor={"faults": {"spike_prob": 0.02, "spike_size": 40.0}})
        _, raw, truth, *_ = readings(sc)
        err = raw - truth
        hit = err > 1.0
        assert hit.mean() == pytest.approx(0.02, abs=0.006)
        assert err[hit].min() >= 20.0 - 1e-6 and err[hit].max() <= 60.0 + 1e-6

    def test_stuck_and_dropouts(self) -> None:
        """Stuck spans repeat one raw value; dropouts remove readings."""
        sc = scenario(
            days=4, sensor={"faults": {"noise": 1.0, "stuck_per_day": 1.0, "dropout_per_day": 1.0}}
        )
        t, raw, *_ = readings(sc)
        assert t.size < 4 * 1440
        assert np.max(np.diff(t)) > 10 / 1440
        assert np.sum(np.diff(raw) == 0) > 10


class TestReferences:
    def test_window_mean_of_truth(self) -> None:
        """A windowed reference is the true mean over (t − window, t]."""
        sc = scenario(references=[{"serves": ["s1"], "every": 3600, "window": 1800}])
        ev = generate(sc, 0).events
        rs = [e for e in ev if isinstance(e, Reading)]
        t = np.array([r.t for r in rs])
        truth = np.array([r.truth for r in rs], dtype=float)
        refs = [e for e in ev if isinstance(e, Reference)]
        assert len(refs) == 47
        for ref in refs:
            inside = (t > ref.t - 1800) & (t <= ref.t)
            assert ref.window == 1800
            assert ref.value == pytest.approx(truth[inside].mean(), abs=1e-3)

    def test_one_event_per_served_sensor(self) -> None:
        """A reference serving two sensors writes the same value once for each."""
        sc = scenario(
            sensors=[{"id": "a"}, {"id": "b"}],
            references=[{"serves": ["a", "b"], "every": 3600, "window": 0, "noise": 1.0}],
        )
        refs = [e for e in generate(sc, 0).events if isinstance(e, Reference)]
        by_t: dict[float, list[Reference]] = {}
        for r in refs:
            by_t.setdefault(r.t, []).append(r)
        assert all(sorted(x.sensor for x in g) == ["a", "b"] for g in by_t.values())
        assert all(len({x.value for x in g}) == 1 and g[0].window is None for g in by_t.values())

    def test_colocation_periods(self) -> None:
        """References appear only inside their co-location periods."""
        sc = scenario(
            days=4, references=[{"serves": ["s1"], "periods": [{"start_day": 1, "end_day": 2}]}]
        )
        refs = [e for e in generate(sc, 0).events if isinstance(e, Reference)]
        days = [(r.t - sc.t0) / DAY for r in refs]
        assert len(refs) == 24 and min(days) > 1.0 and max(days) <= 2.0

    def test_zero_span_check(self) -> None:
        """During a check the sensor sees each gas level and the reference reports it."""
        sc = scenario(
            sensor={"offset": 4.0},
            checks=[
                {
                    "serves": ["s1"],
                    "every_days": 1,
                    "at_hour": 10,
                    "levels": [0.0, 100.0],
                    "duration": 600,
                    "settle": 120,
                }
            ],
        )
        ev = generate(sc, 0).events
        refs = [e for e in ev if isinstance(e, Reference)]
        assert [r.value for r in refs] == [0.0, 100.0, 0.0, 100.0]
        assert all(r.window == 360 for r in refs)
        start = sc.t0 + 10 * 3600
        during = [e for e in ev if isinstance(e, Reading) and start <= e.t < start + 600]
        assert {r.truth for r in during} == {0.0}
        assert {r.inputs["raw"] for r in during} == {4.0}

    def test_lag_sets_arrival_not_order(self) -> None:
        """A reporting lag delays the arrival time and leaves the event at its t."""
        sc = scenario(references=[{"serves": ["s1"], "every": 3600, "window": 3600, "lag": 900}])
        st = generate(sc, 0)
        pairs = [
            (e, a) for e, a in zip(st.events, st.arrival, strict=True) if isinstance(e, Reference)
        ]
        assert all(a == e.t + 900 for e, a in pairs)
        assert [e.t for e in st.events] == sorted(e.t for e in st.events)


class TestScenario:
    @pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
    def test_examples_load(self, path: Path) -> None:
        """Every example scenario validates."""
        assert load_scenario(path).sensors

    def test_at_least_three_examples(self) -> None:
        """The examples cover particulate, NO2 and CO2 sensors."""
        stems = {p.stem.split("-")[0] for p in SCENARIOS}
        assert {"pm25", "no2", "co2"} <= stems

    def test_missing_file(self, tmp_path: Path) -> None:
        """A missing scenario file is an error, never an empty scenario."""
        with pytest.raises(ConfigError, match=r"nope\.toml: scenario file not found"):
            load_scenario(tmp_path / "nope.toml")

    def test_bad_toml(self, tmp_path: Path) -> None:
        """A file that is not TOML is refused with a ConfigError."""
        p = tmp_path / "bad.toml"
        p.write_text("name = \n")
        with pytest.raises(ConfigError, match="line 1, column 8: TOML syntax error"):
            load_scenario(p)

    def test_errors_name_field_and_rule(self) -> None:
        """Every problem is listed with its field path and rule."""
        with pytest.raises(ConfigError) as info:
            parse_scenario(
                {
                    "name": "x",
                    "sensors": [{"id": "a", "faults": {"noise": -1}, "colour": "red"}],
                    "references": [{"serves": ["b"]}],
                }
            )
        errors = info.value.errors
        assert (
            "scenario: sensors[0].faults.noise: Input should be greater than or equal to 0 "
            "(got -1)" in errors
        )
        assert any(e.startswith("scenario: sensors[0].colour: unknown key; allowed: id, ")
                   for e in errors)

    def test_unknown_key_names_file_and_suggests(self, tmp_path: Path) -> None:
        """A misspelt key is named with its file and path and the closest allowed key."""
        p = tmp_path / "quay.toml"
        p.write_text('name = "x"\n[signal]\ndaily_amplitud = 3\n[[sensors]]\nid = "a"\n')
        with pytest.raises(ConfigError) as info:
            load_scenario(p)
        assert info.value.errors == [
            f"{p}: signal.daily_amplitud: unknown key; did you mean 'daily_amplitude'? allowed: "
            "unit, base, daily_amplitude, daily_peak_hour, weekly, wander, wander_hours, floor, "
            "episodes"
        ]
        assert "[extra_forbidden]" not in str(info.value.errors)

    def test_cross_field_errors(self) -> None:
        """Cross-field rules report each problem under its own field path."""
        with pytest.raises(ConfigError) as info:
            parse_scenario(
                {
                    "name": "x",
                    "step": 60,
                    "sensors": [{"id": "a", "interval": 90}, {"id": "a"}],
                    "references": [{"serves": ["b"]}],
                }
            )
        assert info.value.errors == [
            "scenario: sensors[0].interval: must be a whole multiple of step (60.0 s)",
            "scenario: sensors[1].id: duplicate sensor id 'a'",
            "scenario: references[0].serves: unknown sensor 'b'",
        ]
