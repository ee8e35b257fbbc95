"""`trimtab state` on a real state directory: show, export (owner-only file) and import."""

from __future__ import annotations

import json
import stat
from pathlib import Path

import pytest

from trimtab.cli import main
from trimtab.config import load_config
from trimtab.engine.wiring import make_engine
from trimtab.store.statestore import StateStore

from ..support import model_states, recovered_engine, synthetic_stream, write_config


def _daemon_state(directory: Path, n: int = 200) -> Path:
    """A config whose state directory holds a checkpoint of an engine fed a short stream."""
    path = write_config(directory, 1)
    cfg = load_config(path)
    engine = make_engine(cfg)
    for e in synthetic_stream(n):
        engine.process(e)
    store = StateStore(Path(cfg.state.dir))
    store.recover()
    store.checkpoint(engine.state_dict())
    store.close()
    return path


class TestStateCommand:
    def test_show_prints_one_line_per_sensor(self, tmp_path: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
        """`state show` prints each sensor's updates and weights as a JSON line."""
        conf = _daemon_state(tmp_path / "a")
        capsys.readouterr()
        assert main(["state", "show", "-c", str(conf)]) == 0
        lines = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
        assert [x["sensor"] for x in lines] == ["s1", "s2"]
        assert all(x["updates"] > 0 and len(x["theta"]) == 3 for x in lines)

    def test_export_is_owner_only_and_import_moves_the_sensor(self, tmp_path: Path) -> None:
        """An export file is 0600; importing it elsewhere reproduces the sensor's state exactly."""
        src = _daemon_state(tmp_path / "a")
        dst = _daemon_state(tmp_path / "b", n=10)
        out = tmp_path / "s1.json"
        assert main(["state", "export", "-c", str(src), "s1", "-o", str(out), "--drop"]) == 0
        assert stat.S_IMODE(out.stat().st_mode) == 0o600
        assert "s1" not in model_states(recovered_engine(load_config(src)))
        assert main(["state", "import", "-c", str(dst), str(out)]) == 0
        moved = model_states(recovered_engine(load_config(dst)))["s1"]
        exported = json.loads(out.read_text())["state"]
        assert moved == json.loads(json.dumps(exported))

    def test_import_of_a_non_export_is_refused(self, tmp_path: Path) -> None:
        """A file that is not a sensor-state export exits 2 and changes nothing."""
        conf = _daemon_state(tmp_path / "a")
        bad = tmp_path / "bad.json"
        bad.write_text('{"hello": 1}')
        before = model_states(recovered_engine(load_config(conf)))
        assert main(["state", "import", "-c", str(conf), str(bad)]) == 2
        assert model_states(recovered_engine(load_config(conf))) == before


class TestStateSaysWhatHappened:
    def test_show_of_an_unknown_sensor_exits_2(self, tmp_path: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
        """`state show` of a sensor not in the state exits 2 and names the sensors there."""
        conf = _daemon_state(tmp_path / "a")
        capsys.readouterr()
        assert main(["state", "show", "-c", str(conf), "nope"]) == 2
        captured = capsys.readouterr()
        assert captured.out == ""
        assert "sensor 'nope': not in the state at " in captured.err
        assert "(sensors there: s1, s2)" in captured.err

    def test_show_never_creates_the_state_directory(self, tmp_path: Path,
                                                    capsys: pytest.CaptureFixture[str]) -> None:
        """`state show` with a state directory that does not exist exits 2 and leaves it absent."""
        conf = write_config(tmp_path / "fresh", 1)
        state_dir = Path(load_config(conf).state.dir)
        assert not state_dir.exists()
        assert main(["state", "show", "-c", str(conf), "s1"]) == 2
        assert not state_dir.exists()
        assert f"{state_dir}: no state directory" in capsys.readouterr().err

    def test_a_second_import_of_the_same_file_says_so(self, tmp_path: Path,
                                                     capsys: pytest.CaptureFixture[str]) -> None:
        """Importing the same export twice: the second time says nothing changed."""
        src = _daemon_state(tmp_path / "a")
        dst = _daemon_state(tmp_path / "b", n=10)
        out = tmp_path / "s1.json"
        assert main(["state", "export", "-c", str(src), "s1", "-o", str(out)]) == 0
        capsys.readouterr()
        assert main(["state", "import", "-c", str(dst), str(out)]) == 0
        first = capsys.readouterr().err
        assert first.startswith("state import: replaced the state of sensor s1 in ")
        store = Path(load_config(dst).state.dir)
        before = sorted((p.name, p.stat().st_mtime_ns) for p in store.iterdir())
        assert main(["state", "import", "-c", str(dst), str(out)]) == 0
        second = capsys.readouterr().err
        assert "sensor s1 is already in" in second and "nothing changed" in second
        assert sorted((p.name, p.stat().st_mtime_ns) for p in store.iterdir()) == before

    def test_a_fit_file_is_refused_naming_the_file_and_where_it_loads(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        """A model-state file from `trimtab fit` given to `state import` names the file and
        says it belongs in initial_state."""
        conf = _daemon_state(tmp_path / "a")
        csv = tmp_path / "c.csv"
        csv.write_text("t,raw,ref\n" + "".join(f"{i},{i},{2 * i + 1}\n" for i in range(10)))
        fitted = tmp_path / "fitted.json"
        assert main(["fit", str(csv), "--lambda", "0", "-o", str(fitted)]) == 0
        capsys.readouterr()
        assert main(["state", "import", "-c", str(conf), str(fitted)]) == 2
        err = capsys.readouterr().err
        assert err.startswith(f"trimtab state: {fitted}: a model-state file from `trimtab fit`")
        assert "initial_state" in err
