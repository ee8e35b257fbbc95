"""The simulator's whole loop: scenarios through the engine and through a real broker."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from trimtab.commands.check import to_toml
from trimtab.config import load_config
from trimtab.engine.wiring import make_engine
from trimtab.wire.streamfile import read_corrected, read_events, write_events
from trimtab_sim.broker import mosquitto_path
from trimtab_sim.demo import embedded, run_demo
from trimtab_sim.embedded_broker import available as embedded_available
from trimtab_sim.generate import write_stream
from trimtab_sim.scenario import load_scenario
from trimtab_sim.score import Settings, join, score

ROOT = Path(__file__).resolve().parents[2]
SCENARIOS = sorted((ROOT / "config" / "scenarios").glob("*.toml"))
BIN = Path(sys.executable).parent


def _demo_config(tmp_path: Path, port: int = 1) -> Path:
    """config/demo.toml with its state under tmp_path and the broker on a private port."""
    data = tomllib.loads((ROOT / "config" / "demo.toml").read_text())
    data["state"]["dir"] = str(tmp_path / "state")
    data["broker"]["port"] = port
    path = tmp_path / "daemon.toml"
    path.write_text("\n".join(to_toml(data)) + "\n")
    return path


class TestEmbeddedDefaults:
    def test_embedded_files_are_the_repository_examples(self) -> None:
        """The demo's embedded scenario and config are config/'s own files, not copies."""
        assert embedded("demo-daemon.toml").read_bytes() == \
            (ROOT / "config" / "demo.toml").read_bytes()
        assert embedded("demo-scenario.toml").read_bytes() == \
            (ROOT / "config" / "scenarios" / "pm25-quay.toml").read_bytes()


class TestScenarioMargins:
    @pytest.mark.parametrize("scenario", SCENARIOS, ids=lambda p: p.stem)
    def test_corrected_beats_raw_by_the_scenario_margin(self, tmp_path: Path,
                                                        scenario: Path) -> None:
        """On each example scenario the replayed correction beats raw by the file's margin."""
        sc = load_scenario(scenario)
        stream = tmp_path / "stream.jsonl"
        write_stream(sc, stream, 0)
        engine = make_engine(load_config(_demo_config(tmp_path)))
        events = list(read_events(stream))
        corrected = [c for e in events for c in engine.process(e)]
        settings = Settings(min_improvement=sc.score.min_improvement)
        res = score(join(events, corrected), settings, {})
        raw = res.overall.metrics["raw"].rmse
        fixed = res.overall.metrics["corrected"].rmse
        assert fixed <= (1.0 - sc.score.min_improvement) * raw, (scenario.stem, raw, fixed)


@pytest.mark.skipif(mosquitto_path() is None, reason="mosquitto binary not found on PATH")
class TestThroughTheBroker:
    @pytest.mark.parametrize("scenario", SCENARIOS, ids=lambda p: p.stem)
    def test_broker_output_equals_replay(self, tmp_path: Path, scenario: Path) -> None:
        """Each scenario played through Mosquitto and the daemon gives replay's values exactly."""
        res = run_demo(tmp_path / "out", scenario=scenario, broker_kind="mosquitto", days=4)
        assert res.received == res.readings
        assert res.identical
        replayed = list(read_corrected(tmp_path / "out" / "replayed.jsonl"))
        got = list(read_corrected(tmp_path / "out" / "corrected.jsonl"))
        assert got == replayed


@pytest.mark.skipif(not embedded_available(), reason="amqtt (the 'broker' extra) not installed")
class TestWithoutMosquitto:
    def test_demo_runs_on_the_embedded_broker_when_mosquitto_is_absent(
            self, tmp_path: Path) -> None:
        """With no mosquitto on PATH, `trimtab-sim demo` uses the embedded broker end to end."""
        path_dirs = [d for d in os.environ["PATH"].split(os.pathsep)
                     if d and not (Path(d) / "mosquitto").exists()]
        env = {**os.environ, "PATH": os.pathsep.join([str(BIN), *path_dirs])}
        assert shutil.which("mosquitto", path=env["PATH"]) is None
        proc = subprocess.run(
            [str(BIN / "trimtab-sim"), "demo", "-o", str(tmp_path / "out"),
             "--days", "2"],
            env=env, capture_output=True, text=True, timeout=300, cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr[-3000:]
        assert "broker: embedded (amqtt)" in proc.stderr
        assert "identical to `trimtab replay`: yes" in proc.stderr
        assert (tmp_path / "out" / "report" / "report.md").exists()


@pytest.mark.skipif(mosquitto_path() is None, reason="mosquitto binary not found on PATH")
class TestPlayRecordCommands:
    def test_play_and_record_around_a_running_daemon(self, tmp_path: Path) -> None:
        """`trimtab-sim play` feeds a daemon; `record` writes exactly what replay gives."""
        from trimtab_sim.broker import PrivateBroker
        from trimtab_sim.mqttio import wait_status

        scenario = load_scenario(ROOT / "config" / "scenarios" / "no2-school-roof.toml")
        stream = tmp_path / "s.jsonl"
        write_stream(scenario, stream, 1)
        cut = [e for e in read_events(stream) if e.t < scenario.start.timestamp() + 2 * 86400.0]
        write_events(stream, cut)
        out = tmp_path / "rec.jsonl"
        with PrivateBroker(tmp_path / "b") as broker:
            conf = _demo_config(tmp_path, broker.port)
            cfg = load_config(conf)
            events = list(read_events(stream))
            engine = make_engine(cfg)
            expected = [c for e in events for c in engine.process(e)]
            port = str(broker.port)
            daemon = subprocess.Popen([str(BIN / "trimtab"), "run", "-c", str(conf)],
                                      stderr=subprocess.DEVNULL, cwd=tmp_path)
            rec = subprocess.Popen(
                [str(BIN / "trimtab-sim"), "record", "-c", str(conf), "--port", port,
                 "-o", str(out), "--count", str(len(expected)), "--timeout", "120"],
                stderr=subprocess.PIPE, text=True)
            try:
                assert rec.stderr is not None
                assert rec.stderr.readline().startswith("record: subscribed")
                assert wait_status(cfg, "127.0.0.1", broker.port, "online", timeout=30)
                play = subprocess.run(
                    [str(BIN / "trimtab-sim"), "play", str(stream), "-c", str(conf),
                     "--port", port], capture_output=True, text=True, timeout=120)
                assert play.returncode == 0, play.stderr
                assert rec.wait(150) == 0
            finally:
                rec.kill()
                rec.wait()
                if rec.stderr is not None:
                    rec.stderr.close()
                daemon.terminate()
                daemon.wait(30)
        assert list(read_corrected(out)) == expected


class TestTrajectories:
    def test_trajectory_ends_at_the_replayed_model_and_is_drawn(self, tmp_path: Path) -> None:
        """Weights traced per reference end at replay's final model; score --config draws them."""
        from trimtab_sim.cli import main as sim_main
        from trimtab_sim.trajectory import trace

        scenario = load_scenario(ROOT / "config" / "scenarios" / "no2-school-roof.toml")
        stream = tmp_path / "s.jsonl"
        write_stream(scenario, stream, 2)
        cut = [e for e in read_events(stream) if e.t < scenario.start.timestamp() + 3 * 86400.0]
        write_events(stream, cut)
        conf = _demo_config(tmp_path)
        engine = make_engine(load_config(conf))
        corrected = [c for e in cut for c in engine.process(e)]
        traj = trace(load_config(conf), cut)
        for sensor, tr in traj.items():
            model = engine.model(sensor)
            assert model is not None
            assert dict(zip(tr.names, tr.weights[-1], strict=True)) == model.coefficients()
        out = tmp_path / "corrected.jsonl"
        from trimtab.wire.streamfile import write_corrected

        write_corrected(out, corrected)
        assert sim_main(["score", str(stream), str(out), "-o", str(tmp_path / "rep"),
                         "--config", str(conf)]) == 0
        assert (tmp_path / "rep" / "no2-roof-01-weights.png").stat().st_size > 0
        report = (tmp_path / "rep" / "report.md").read_text()
        assert "no2-roof-01-weights.png" in report
        # the guards' counts are in the report, equal to the engine's own
        guards = report.split("## Guards")[1].split("\n## ")[0]
        stats = engine.stats()["sensors"]["no2-roof-01"]
        row = next(line for line in guards.splitlines() if line.startswith("| no2-roof-01 |"))
        cells = [c.strip() for c in row.strip("|").split("|")]
        assert cells[5] == str(stats["rollbacks"]) and cells[6] == str(stats["recoveries"])
