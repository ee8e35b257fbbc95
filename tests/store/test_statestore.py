"""Tests of the state store: recovery from checkpoint + journals, fallbacks, real kill -9."""

from __future__ import annotations

import json
import os
import random
import signal
import stat
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from trimtab.errors import StateError
from trimtab.store.statestore import Recovery, StateStore

# The "engine" of these tests: deterministic, and it notices a missing or repeated event.
# Event i is {"seq": i, "v": i % 7}; the state counts events and sums v.
APPLY = r"""
def apply(state, record):
    if record["seq"] != state["next"]:
        raise AssertionError(f"expected event {state['next']}, got {record['seq']}")
    return {"next": state["next"] + 1, "total": state["total"] + record["v"]}
"""

# A child daemon: recovers, replays, then appends events, syncing every 5 (printing
# "synced <n>" after each sync) and checkpointing every `every` events. Once `arm_at` events
# are applied (before the next append or checkpoint), it arms a trap that SIGKILLs it before
# the `kill_at`-th file-system call, or tears the `tear_at`-th os.write after `tear_keep`
# bytes. With `wait` it then waits on stdin to be killed.
CHILD = (
    APPLY
    + r"""
import json, os, signal, sys
from pathlib import Path
from trimtab.store.statestore import StateStore
from trimtab.logs import configure_logging
configure_logging("warning", "json", sys.stderr)
args = json.loads(sys.argv[1])
store = StateStore(Path(args["dir"]), durability="fsync")
recovery = store.recover()
state = recovery.state or {"next": 0, "total": 0}
for record in recovery.records:
    state = apply(state, record)
count = [0]
def trap(name):
    real = getattr(os, name)
    def call(*a, **k):
        count[0] += 1
        if count[0] == args.get("tear_at") and name == "write":
            real(a[0], bytes(a[1])[: args["tear_keep"]])
            os.kill(os.getpid(), signal.SIGKILL)
        if count[0] == args.get("kill_at"):
            os.kill(os.getpid(), signal.SIGKILL)
        return real(*a, **k)
    setattr(os, name, call)
armed = [False]
def arm_at(n):
    if n == args.get("arm_at") and not armed[0]:
        armed[0] = True
        for name in ("open", "write", "fsync", "fdatasync", "close", "replace", "unlink",
                     "listdir", "ftruncate"):
            trap(name)
for step in range(args["steps"]):
    arm_at(state["next"])
    n = state["next"]
    record = {"seq": n, "v": n % 7}
    store.append(record)
    state = apply(state, record)
    if state["next"] % 5 == 0:
        store.sync()
        sys.stdout.write(f"synced {state['next']}\n")
        sys.stdout.flush()
    arm_at(state["next"])
    if state["next"] % args["every"] == 0:
        store.checkpoint(state)
store.sync()
sys.stdout.write("done\n")
sys.stdout.flush()
if args.get("wait"):
    sys.stdin.read()
"""
)

_namespace: dict[str, Any] = {}
exec(APPLY, _namespace)


def apply(state: dict[str, Any], record: dict[str, Any]) -> dict[str, Any]:
    """The test engine's step (the same code the child runs)."""
    result: dict[str, Any] = _namespace["apply"](state, record)
    return result


def replay(recovery: Recovery) -> dict[str, Any]:
    """The state a recovered daemon reaches: checkpoint, then every journaled event."""
    state = recovery.state or {"next": 0, "total": 0}
    for record in recovery.records:
        state = apply(state, record)
    return state


def expected_total(count: int) -> int:
    """The total after events 0..count-1."""
    return sum(i % 7 for i in range(count))


def run_child(directory: Path, **args: Any) -> subprocess.CompletedProcess[str]:
    """Run the child daemon to completion or to its self-inflicted SIGKILL."""
    payload = json.dumps({"dir": str(directory), **args})
    return subprocess.run(
        [sys.executable, "-c", CHILD, payload], capture_output=True, text=True, check=False
    )


def recover_once(directory: Path) -> Recovery:
    """Recover the store at ``directory`` and close it again."""
    with StateStore(directory) as store:
        return store.recover()


def build_three_generations(directory: Path) -> dict[str, Any]:
    """Events 0..12 with checkpoints after 5 and 10 events; returns the final state."""
    state = {"next": 0, "total": 0}
    with StateStore(directory) as store:
        store.recover()
        for i in range(13):
            record = {"seq": i, "v": i % 7}
            store.append(record)
            state = apply(state, record)
            if i in (4, 9):
                store.checkpoint(state)
        store.sync()
    return state


class TestStateStoreBasics:
    """Layout, modes, locking and the order of calls."""

    def test_fresh_store_recovers_empty(self, tmp_path: Path) -> None:
        """A new directory recovers to no state, generation 0 and no events."""
        with StateStore(tmp_path / "state") as store:
            recovery = store.recover()
        assert recovery == Recovery(None, 0, [], 0, [])

    def test_modes(self, tmp_path: Path) -> None:
        """The directory is created 0700; journal, checkpoint and lock files are 0600."""
        directory = tmp_path / "a" / "state"
        old = os.umask(0o022)
        try:
            with StateStore(directory) as store:
                store.recover()
                store.append({"seq": 0})
                store.checkpoint({"n": 1})
        finally:
            os.umask(old)
        assert stat.S_IMODE(directory.stat().st_mode) == 0o700
        names = sorted(os.listdir(directory))
        assert names == ["checkpoint-00000001.json", "journal-00000001.log", "store.lock"]
        for name in names:
            assert stat.S_IMODE((directory / name).stat().st_mode) == 0o600, name

    def test_append_before_recover_is_an_error(self, tmp_path: Path) -> None:
        """append() without recover() raises StateError naming the directory."""
        with StateStore(tmp_path) as store, pytest.raises(StateError, match="recover"):
            store.append({"seq": 0})

    def test_second_process_is_locked_out(self, tmp_path: Path) -> None:
        """A second store on a directory in use fails to recover, naming the lock."""
        with StateStore(tmp_path) as first:
            first.recover()
            with pytest.raises(StateError, match="in use by another process"):
                StateStore(tmp_path).recover()

    def test_checkpoint_carries_state_and_later_events(self, tmp_path: Path) -> None:
        """Recovery returns the last checkpoint and only the events appended after it."""
        final = build_three_generations(tmp_path)
        recovery = recover_once(tmp_path)
        assert recovery.generation == 2
        assert recovery.state == {"next": 10, "total": expected_total(10)}
        assert [r["seq"] for r in recovery.records] == [10, 11, 12]
        assert replay(recovery) == final

    def test_old_journals_and_checkpoints_are_deleted(self, tmp_path: Path) -> None:
        """With keep=2, journals older than the oldest kept checkpoint are removed."""
        with StateStore(tmp_path, keep=2) as store:
            store.recover()
            for generation in range(1, 5):
                store.append({"seq": generation})
                assert store.checkpoint({"g": generation}) == generation
        names = sorted(n for n in os.listdir(tmp_path) if n != "store.lock")
        assert names == [
            "checkpoint-00000003.json",
            "checkpoint-00000004.json",
            "journal-00000003.log",
            "journal-00000004.log",
        ]

    def test_missing_newest_journal_is_a_crash_not_a_loss(self, tmp_path: Path) -> None:
        """A checkpoint whose journal was never created (crash in between) recovers cleanly."""
        final = build_three_generations(tmp_path)
        (tmp_path / "journal-00000002.log").unlink()
        recovery = recover_once(tmp_path)
        assert (recovery.generation, recovery.records) == (2, [])
        assert recovery.state == {"next": 10, "total": expected_total(10)}
        assert final["next"] == 13


class TestStateStoreFallback:
    """Damaged checkpoints and journals."""

    def test_corrupt_newest_checkpoint_replays_from_the_previous(self, tmp_path: Path) -> None:
        """A damaged newest checkpoint falls back one generation and replays to the same state."""
        final = build_three_generations(tmp_path)
        path = tmp_path / "checkpoint-00000002.json"
        path.write_bytes(path.read_bytes().replace(b'"next":10', b'"next":11'))
        recovery = recover_once(tmp_path)
        assert recovery.generation == 1
        assert [r["seq"] for r in recovery.records] == list(range(5, 13))
        assert replay(recovery) == final
        assert len(recovery.skipped) == 1 and "sha256 mismatch" in recovery.skipped[0]
        assert (tmp_path / "checkpoint-00000002.json.corrupt").exists()

    def test_store_keeps_working_after_a_fallback(self, tmp_path: Path) -> None:
        """After falling back, new events and a new checkpoint recover to the right state."""
        build_three_generations(tmp_path)
        (tmp_path / "checkpoint-00000002.json").write_bytes(b"")
        with StateStore(tmp_path) as store:
            state = replay(store.recover())
            record = {"seq": 13, "v": 13 % 7}
            store.append(record)
            state = apply(state, record)
            assert store.checkpoint(state) == 3
        recovery = recover_once(tmp_path)
        assert (recovery.generation, recovery.state, recovery.records) == (3, state, [])

    def test_all_checkpoints_corrupt_is_refused(self, tmp_path: Path) -> None:
        """With every checkpoint damaged, recover raises StateError and renames nothing."""
        build_three_generations(tmp_path)
        for name in ("checkpoint-00000001.json", "checkpoint-00000002.json"):
            (tmp_path / name).write_bytes(b"{}\n")
        with pytest.raises(StateError, match="no valid checkpoint") as info:
            recover_once(tmp_path)
        assert "checkpoint-00000001.json" in str(info.value)
        assert not any(n.endswith(".corrupt") for n in os.listdir(tmp_path))

    def test_missing_journal_needed_for_fallback_is_refused(self, tmp_path: Path) -> None:
        """Falling back to a checkpoint whose journal is gone raises instead of losing events."""
        build_three_generations(tmp_path)
        (tmp_path / "checkpoint-00000002.json").write_bytes(b"")
        (tmp_path / "journal-00000001.log").unlink()
        with pytest.raises(StateError, match=r"journal-00000001\.log is missing"):
            recover_once(tmp_path)

    def test_journals_without_their_start_are_refused(self, tmp_path: Path) -> None:
        """Journals from generation 3 on with no checkpoint at all are not a fresh start."""
        (tmp_path / "journal-00000003.log").write_bytes(b"")
        with pytest.raises(StateError, match=r"journal-00000000\.log is missing"):
            recover_once(tmp_path)

    def test_torn_tail_in_an_older_journal_is_refused(self, tmp_path: Path) -> None:
        """A torn line at the end of a journal that newer ones follow is a hole: refused."""
        build_three_generations(tmp_path)
        (tmp_path / "checkpoint-00000002.json").write_bytes(b"")
        with (tmp_path / "journal-00000001.log").open("ab") as handle:
            handle.write(b"00000000 {")
        with pytest.raises(StateError, match=r"journal-00000001\.log: torn final line"):
            recover_once(tmp_path)


class TestStateStoreKill:
    """Real child processes killed with SIGKILL while appending and checkpointing."""

    @pytest.mark.parametrize("seed", [11, 12, 13])
    def test_random_kills_lose_no_synced_event(self, tmp_path: Path, seed: int) -> None:
        """Killed at seeded moments in three lives, recovery is a gap-free prefix of all synced."""
        rng = random.Random(seed)
        synced = 0
        for _life in range(3):
            payload = json.dumps({"dir": str(tmp_path), "steps": 600, "every": 37, "wait": True})
            child = subprocess.Popen(
                [sys.executable, "-c", CHILD, payload],
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                text=True,
            )
            assert child.stdout is not None and child.stdin is not None
            try:
                for _ in range(rng.randrange(1, 110)):
                    line = child.stdout.readline()
                    assert line.startswith("synced"), line
                    synced = int(line.split()[1])
            finally:
                os.kill(child.pid, signal.SIGKILL)
                child.wait()
                child.stdout.close()
                child.stdin.close()
            recovery = recover_once(tmp_path)
            state = replay(recovery)  # raises on a missing or repeated event
            assert state["next"] >= synced
            assert state["total"] == expected_total(state["next"])

    @pytest.mark.parametrize("seed", [21, 22])
    def test_torn_append_is_cut_and_reported(self, tmp_path: Path, seed: int) -> None:
        """A journal line torn by the kill is reported in torn_bytes and the rest replays."""
        rng = random.Random(seed)
        keep = rng.randrange(1, 18)
        child = run_child(
            tmp_path, steps=40, every=1000, arm_at=rng.randrange(5, 30), tear_at=1, tear_keep=keep
        )
        assert child.returncode == -signal.SIGKILL
        recovery = recover_once(tmp_path)
        assert recovery.torn_bytes == keep
        synced = int(child.stdout.split()[-1]) if "synced" in child.stdout else 0
        assert replay(recovery)["next"] >= synced

    def test_kill_at_every_step_of_a_checkpoint(self, tmp_path: Path) -> None:
        """Killed before each file-system call of checkpoint(), every synced event recovers."""
        kill_at = 1
        generations = set()
        while True:
            directory = tmp_path / f"k{kill_at}"
            # 10 events synced, then checkpoint() with the trap armed, then 3 more events.
            child = run_child(directory, steps=13, every=10, arm_at=10, kill_at=kill_at)
            recovery = recover_once(directory)
            generations.add(recovery.generation)
            state = replay(recovery)
            assert state["next"] >= 10
            assert state["total"] == expected_total(state["next"])
            if child.returncode == 0:
                assert state["next"] == 13
                break
            assert child.returncode == -signal.SIGKILL, child.stderr
            with StateStore(directory) as store:  # still usable: a new checkpoint recovers
                store.recover()
                store.checkpoint(state)
            assert replay(recover_once(directory)) == state
            kill_at += 1
            assert kill_at < 200, "checkpoint never finished"
        assert kill_at > 8
        assert generations == {0, 1}  # crash points fell both before and after the rename


class TestStateStoreValidation:
    """A record the checksum accepts but the reader cannot use is named by file and offset."""

    def test_wrong_shape_names_file_record_and_offset(self, tmp_path: Path) -> None:
        """A CRC-valid record of the wrong shape: StateError with the journal, index and offset."""
        from trimtab.store.journal import encode_record
        from trimtab.store.records import record_to_event

        directory = tmp_path / "state"
        with StateStore(directory) as store:
            store.recover()
            store.append({"t": 1.0, "sensor": "s1", "reading": {"raw": 2.0}})
        journal = directory / "journal-00000000.log"
        first = journal.stat().st_size
        with open(journal, "ab") as fh:
            fh.write(encode_record({"t": "soon", "sensor": "s1", "reference": 3.0}))
        with pytest.raises(StateError) as info, \
                StateStore(directory, validate=record_to_event) as store:
            store.recover()
        text = str(info.value)
        assert str(journal) in text and f"record 2 at byte offset {first}" in text
