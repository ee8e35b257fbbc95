"""Every documented command of both CLIs meets a bad file with a line naming it and exit 2."""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from trimtab.cli import main as trimtab_main
from trimtab.wire.streamfile import write_events
from trimtab_sim.cli import main as sim_main

from ..support import synthetic_stream, write_config

ROOT = Path(__file__).resolve().parents[2]
DEMO_CONFIG = ROOT / "config" / "demo.toml"
SCENARIO = ROOT / "config" / "scenarios" / "pm25-quay.toml"

KINDS = ("missing", "empty", "binary", "wrong_kind", "directory")


def bad_file(directory: Path, kind: str, suffix: str) -> Path:
    """A file of the given kind of badness, with the suffix the command expects."""
    path = directory / f"{kind}{suffix}"
    if kind == "empty":
        path.write_bytes(b"")
    elif kind == "binary":
        path.write_bytes(bytes(range(256)) * 4)
    elif kind == "wrong_kind":
        # each file holds what another command wants: TOML where JSON Lines or CSV is
        # expected, JSON Lines where TOML or a state export is expected
        if suffix in (".toml",):
            path.write_text('{"t": 1, "sensor": "a", "reading": {"raw": 1.0}}\n')
        elif suffix == ".json":
            path.write_text('{"t": 1, "sensor": "a", "reading": {"raw": 1.0}}\n{"t": 2}\n')
        else:
            path.write_text('[broker]\nhost = "localhost"\n')
    elif kind == "directory":
        path.mkdir()
    return path


# (label, which CLI, suffix of the bad file, argv builder given the bad file and a tmp dir)
Argv = Callable[[Path, Path], list[str]]
CASES: list[tuple[str, str, str, Argv]] = [
    ("run -c", "trimtab", ".toml", lambda f, d: ["run", "-c", str(f)]),
    ("check -c", "trimtab", ".toml", lambda f, d: ["check", "-c", str(f)]),
    ("fit DATA", "trimtab", ".csv", lambda f, d: ["fit", str(f), "-o", str(d / "m.json")]),
    ("fit DATA.jsonl", "trimtab", ".jsonl",
     lambda f, d: ["fit", str(f), "-o", str(d / "m.json")]),
    ("convert DATA", "trimtab", ".csv",
     lambda f, d: ["convert", str(f), "-o", str(d / "s.jsonl"), "--sensor", "a"]),
    ("replay STREAM", "trimtab", ".jsonl",
     lambda f, d: ["replay", "-c", str(DEMO_CONFIG), str(f), "-o", str(d / "o.jsonl")]),
    ("replay -c", "trimtab", ".toml",
     lambda f, d: ["replay", "-c", str(f), str(d / "none.jsonl")]),
    ("tune STREAM", "trimtab", ".jsonl",
     lambda f, d: ["tune", "-c", str(DEMO_CONFIG), str(f), "--quiet"]),
    ("tune --grid", "trimtab", ".toml",
     lambda f, d: ["tune", "-c", str(DEMO_CONFIG), str(d / "none.jsonl"), "--grid", str(f)]),
    ("state show -c", "trimtab", ".toml", lambda f, d: ["state", "show", "-c", str(f)]),
    ("state import FILE", "trimtab", ".json",
     lambda f, d: ["state", "import", "-c", str(_state_config(d)), str(f)]),
    ("make SCENARIO", "trimtab-sim", ".toml",
     lambda f, d: ["make", str(f), "-o", str(d / "s.jsonl")]),
    ("play STREAM", "trimtab-sim", ".jsonl",
     lambda f, d: ["play", str(f), "-c", str(DEMO_CONFIG), "--port", "1"]),
    ("play -c", "trimtab-sim", ".toml",
     lambda f, d: ["play", str(d / "none.jsonl"), "-c", str(f)]),
    ("record -c", "trimtab-sim", ".toml",
     lambda f, d: ["record", "-c", str(f), "-o", str(d / "r.jsonl")]),
    ("score STREAM", "trimtab-sim", ".jsonl",
     lambda f, d: ["score", str(f), str(f)]),
    ("score --scenario", "trimtab-sim", ".toml",
     lambda f, d: ["score", str(d / "none.jsonl"), str(d / "none.jsonl"), "--scenario", str(f)]),
    ("demo --scenario", "trimtab-sim", ".toml",
     lambda f, d: ["demo", "--scenario", str(f), "-o", str(d / "demo")]),
    ("demo -c", "trimtab-sim", ".toml",
     lambda f, d: ["demo", "-c", str(f), "-o", str(d / "demo")]),
]


def _state_config(directory: Path) -> Path:
    """A valid config whose state directory lies under ``directory``."""
    return write_config(directory / "conf", 1)


class TestBadFiles:
    @pytest.mark.parametrize("kind", KINDS)
    @pytest.mark.parametrize(("label", "cli", "suffix", "argv"), CASES,
                             ids=[c[0] for c in CASES])
    def test_one_line_naming_the_file_and_exit_2(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str], label: str, cli: str,
        suffix: str, argv: Argv, kind: str,
    ) -> None:
        """A missing, empty, binary, wrong-kind file or a directory: lines naming it, exit 2."""
        bad = bad_file(tmp_path, kind, suffix)
        args = argv(bad, tmp_path)
        capsys.readouterr()
        code = (trimtab_main if cli == "trimtab" else sim_main)(args)
        err = capsys.readouterr().err
        lines = [line for line in err.splitlines() if line.strip()]
        assert code == 2, (args, err)
        assert "Traceback" not in err
        # one line (a config's validation gives one line per problem, each naming the file)
        assert lines, err
        assert all(str(bad) in line and line.startswith(f"{cli} ") for line in lines), err


class TestConsoleScripts:
    @pytest.mark.parametrize("argv", [
        ["trimtab", "replay", "-c", str(DEMO_CONFIG), "{missing}"],
        ["trimtab", "tune", "-c", str(DEMO_CONFIG), "{missing}"],
        ["trimtab-sim", "score", "{missing}", "{missing}"],
        ["trimtab-sim", "play", "{missing}", "-c", str(DEMO_CONFIG)],
    ], ids=["replay", "tune", "score", "play"])
    def test_no_traceback_from_the_installed_command(self, tmp_path: Path,
                                                      argv: list[str]) -> None:
        """The console scripts the README documents print no traceback for a missing file."""
        missing = str(tmp_path / "nope.jsonl")
        script = Path(sys.executable).parent / argv[0]
        cmd = [str(script), *(a.replace("{missing}", missing) for a in argv[1:])]
        env = {k: v for k, v in os.environ.items() if k != "TRIMTAB_TRACEBACK"}
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120, env=env)
        assert proc.returncode == 2, proc.stderr
        assert "Traceback" not in proc.stderr + proc.stdout
        last = proc.stderr.strip().splitlines()[-1]  # tune first says what it reads
        assert last == f"{argv[0]} {argv[1]}: {missing}: stream file not found"


class TestClosedPipe:
    def test_reader_going_away_is_no_error(self, tmp_path: Path) -> None:
        """`trimtab replay … | head -1`: the closed pipe ends the command quietly, no traceback."""
        conf = write_config(tmp_path / "conf", 1)
        stream = tmp_path / "s.jsonl"
        write_events(stream, synthetic_stream(3000))
        proc = subprocess.Popen(
            [str(Path(sys.executable).parent / "trimtab"), "replay", "-c", str(conf),
             str(stream), "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        assert proc.stdout is not None and proc.stderr is not None
        assert proc.stdout.readline().startswith(b"{")
        proc.stdout.close()
        with proc.stderr:
            err = proc.stderr.read().decode()
        assert proc.wait(timeout=120) == 141
        assert err == ""
