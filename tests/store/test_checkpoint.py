"""Tests of generational checkpoints: format, atomic write, pruning, corruption, kill -9."""

from __future__ import annotations

import hashlib
import json
import os
import signal
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from trimtab.config import load_config
from trimtab.engine.wiring import make_engine
from trimtab.errors import ArgumentError, StateError
from trimtab.messages import Reference
from trimtab.store.checkpoint import CheckpointStore, checkpoint_name

from ..support import synthetic_stream, write_config

# A child that writes checkpoint 1, arms a counter over the file-system calls a checkpoint
# write makes, and SIGKILLs itself just before the call numbered `kill_at` while writing
# checkpoint 2. Exit code 0 means `kill_at` was past the last call.
CHILD = r"""
import json, os, signal, sys
from pathlib import Path
from trimtab.store.checkpoint import CheckpointStore
from trimtab.logs import configure_logging
configure_logging("warning", "json", sys.stderr)
args = json.loads(sys.argv[1])
store = CheckpointStore(Path(args["dir"]), keep=1)
store.write({"n": 1, "pad": "x" * 5000}, 1)
count = [0]
def trap(name):
    real = getattr(os, name)
    def call(*a, **k):
        count[0] += 1
        if count[0] == args["kill_at"]:
            os.kill(os.getpid(), signal.SIGKILL)
        return real(*a, **k)
    setattr(os, name, call)
for name in ("open", "write", "fsync", "close", "replace", "unlink", "listdir"):
    trap(name)
store.write({"n": 2, "pad": "y" * 5000}, 2)
"""


def _corrupt(path: Path, offset: int = -3) -> None:
    data = bytearray(path.read_bytes())
    data[offset] ^= 0x01  # a bit flip inside the state line
    path.write_bytes(bytes(data))


class TestCheckpointWrite:
    """Writing checkpoints."""

    def test_round_trip_keeps_key_order(self, tmp_path: Path) -> None:
        """The loaded state equals the written one, keys in the same order."""
        store = CheckpointStore(tmp_path)
        state = {"z": 1, "a": [1.5, None, "s"], "m": {"y": 2, "b": 3}}
        path = store.write(state, 1)
        assert path == tmp_path / "checkpoint-00000001.json"
        loaded = store.load()
        assert loaded == (1, state)
        assert loaded is not None and list(loaded[1]) == ["z", "a", "m"]

    def test_file_format_header_and_digest(self, tmp_path: Path) -> None:
        """Line 1 is a header with generation, byte length and SHA-256 of line 2, the state."""
        path = CheckpointStore(tmp_path).write({"k": "v"}, 7)
        header_line, body, rest = path.read_bytes().split(b"\n")
        header = json.loads(header_line)
        assert rest == b""
        assert header == {
            "format": "trimtab-checkpoint",
            "version": 1,
            "generation": 7,
            "bytes": len(body),
            "sha256": hashlib.sha256(body).hexdigest(),
        }
        assert json.loads(body) == {"k": "v"}

    def test_file_mode_is_0600(self, tmp_path: Path) -> None:
        """A checkpoint file is readable and writable by its owner only."""
        path = CheckpointStore(tmp_path).write({}, 1)
        assert stat.S_IMODE(path.stat().st_mode) == 0o600

    def test_keeps_the_newest_generations(self, tmp_path: Path) -> None:
        """After five writes with keep=2 only the two newest generations remain."""
        store = CheckpointStore(tmp_path, keep=2)
        for generation in range(1, 6):
            store.write({"g": generation}, generation)
        assert store.generations() == [4, 5]
        assert sorted(os.listdir(tmp_path)) == [checkpoint_name(4), checkpoint_name(5)]

    def test_generation_must_be_newer(self, tmp_path: Path) -> None:
        """Writing a generation not newer than the newest existing one is refused."""
        store = CheckpointStore(tmp_path)
        store.write({}, 3)
        with pytest.raises(StateError, match=r"generation 3 is not newer than .*00000003"):
            store.write({}, 3)

    def test_non_json_state_leaves_nothing_behind(self, tmp_path: Path) -> None:
        """A state holding infinity is refused and no file, temporary or final, is left."""
        with pytest.raises(StateError, match="checkpoint 1: state is not strict JSON"):
            CheckpointStore(tmp_path).write({"x": float("inf")}, 1)
        assert os.listdir(tmp_path) == []

    def test_leftover_temp_file_is_ignored_then_removed(self, tmp_path: Path) -> None:
        """A temp file from a crashed write is not loaded, and the next write removes it."""
        store = CheckpointStore(tmp_path)
        store.write({"n": 1}, 1)
        (tmp_path / ".checkpoint-00000002.tmp").write_bytes(b'{"format":')
        assert store.load() == (1, {"n": 1})
        store.write({"n": 3}, 3)
        assert ".checkpoint-00000002.tmp" not in os.listdir(tmp_path)

    def test_keep_below_one_is_refused(self, tmp_path: Path) -> None:
        """keep=0 would delete every checkpoint and is refused at construction."""
        with pytest.raises(ArgumentError, match="keep must be at least 1"):
            CheckpointStore(tmp_path, keep=0)


class TestCheckpointLoad:
    """Loading the newest good checkpoint."""

    def test_no_checkpoint_is_none(self, tmp_path: Path) -> None:
        """An empty directory has no checkpoint: load returns None."""
        assert CheckpointStore(tmp_path).load() is None

    def test_corrupt_newest_falls_back_and_says_why(self, tmp_path: Path) -> None:
        """A bit flip in the newest checkpoint makes load return the previous generation."""
        store = CheckpointStore(tmp_path)
        store.write({"n": 1}, 1)
        store.write({"n": 2}, 2)
        _corrupt(store.path(2))
        loaded = store.load_detailed()
        assert loaded is not None
        assert (loaded.generation, loaded.state) == (1, {"n": 1})
        assert len(loaded.skipped) == 1
        assert "checkpoint-00000002.json" in loaded.skipped[0]
        assert "sha256 mismatch" in loaded.skipped[0]

    def test_truncated_newest_is_detected(self, tmp_path: Path) -> None:
        """A checkpoint cut short is skipped with a message giving both lengths."""
        store = CheckpointStore(tmp_path)
        store.write({"n": 1}, 1)
        path = store.write({"n": 2, "pad": "p" * 100}, 2)
        path.write_bytes(path.read_bytes()[:-30])
        loaded = store.load_detailed()
        assert loaded is not None and loaded.generation == 1
        assert "truncated or extended" in loaded.skipped[0]

    def test_renamed_file_is_detected(self, tmp_path: Path) -> None:
        """A checkpoint copied under another generation's name fails its generation check."""
        store = CheckpointStore(tmp_path)
        store.write({"n": 1}, 1)
        store.path(1).rename(store.path(5))
        with pytest.raises(StateError, match="header says generation 1, file name says 5"):
            store.load()

    def test_all_corrupt_lists_every_file(self, tmp_path: Path) -> None:
        """When no checkpoint verifies, StateError names each file and its fault."""
        store = CheckpointStore(tmp_path)
        store.write({"n": 1}, 1)
        store.write({"n": 2}, 2)
        _corrupt(store.path(2))
        store.path(1).write_bytes(b"")
        with pytest.raises(StateError) as info:
            store.load()
        message = str(info.value)
        assert "refusing to start from empty state" in message
        assert "checkpoint-00000002.json: sha256 mismatch" in message
        assert "checkpoint-00000001.json: empty file" in message

    def test_quarantine_moves_a_bad_file_aside(self, tmp_path: Path) -> None:
        """A quarantined checkpoint keeps its bytes under a new name and leaves generations."""
        store = CheckpointStore(tmp_path)
        store.write({"n": 1}, 1)
        target = store.quarantine(1)
        assert target.name == "checkpoint-00000001.json.corrupt"
        assert store.generations() == []


class TestCheckpointKill:
    """A real process killed at every step of a checkpoint write."""

    def test_every_crash_point_leaves_a_loadable_store(self, tmp_path: Path) -> None:
        """Killed before each file-system call of write(), load gives generation 1 or 2 intact."""
        seen = set()
        kill_at = 1
        while True:
            directory = tmp_path / f"k{kill_at}"
            directory.mkdir()
            args = json.dumps({"dir": str(directory), "kill_at": kill_at})
            child = subprocess.run([sys.executable, "-c", CHILD, args], check=False)
            loaded = CheckpointStore(directory).load()
            assert loaded is not None
            generation, state = loaded
            assert state == {"n": generation, "pad": ("x" if generation == 1 else "y") * 5000}
            seen.add(generation)
            if child.returncode == 0:
                break
            assert child.returncode == -signal.SIGKILL
            kill_at += 1
            assert kill_at < 100, "the write never finished"
        assert seen == {1, 2}
        assert kill_at > 5  # the calls of a write were each a crash point


class TestOlderState:
    def test_a_version_1_state_loads_and_keeps_learning(self, tmp_path: Path) -> None:
        """A state written before the followed scaler and calibrated band loads: models and
        buffers as they were, the new parts at their starting values, learning goes on."""
        data = Path(__file__).resolve().parents[1] / "data" / "state-v1" / "engine-state-v1.json"
        old = json.loads(data.read_text(encoding="utf-8"))
        assert old["version"] == 1
        engine = make_engine(load_config(write_config(tmp_path, 1883)))
        engine.load_state(old)
        for sensor in ("s1", "s2"):
            model = engine.model(sensor)
            assert model is not None
            assert list(model.theta) == old["sensors"][sensor]["model"]["theta"]
        later = [e for e in synthetic_stream(400) if e.t > max(
            s["last_reading_t"] for s in old["sensors"].values())]
        before = {s: engine.model(s).updates for s in ("s1", "s2")}  # type: ignore[union-attr]
        for e in later:
            engine.process(e)
        assert any(isinstance(e, Reference) for e in later)
        for sensor in ("s1", "s2"):
            model = engine.model(sensor)
            assert model is not None and model.updates > before[sensor]
        assert engine.state_dict()["version"] == 2
