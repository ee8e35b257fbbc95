"""Tests of the journal: line format, torn tails, damage in the middle, real kill -9."""

from __future__ import annotations

import json
import os
import random
import re
import signal
import stat
import subprocess
import sys
import tempfile
import zlib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from trimtab.errors import StateError
from trimtab.store.journal import Journal, encode_record, read_journal

# A child that appends records 0..N-1, printing "ack <i>" after each append returns, then
# waits to be killed. With "cut" set, its os.write writes only part of record `cut` and the
# process SIGKILLs itself: the torn write a crash leaves behind.
CHILD = r"""
import json, os, signal, sys
from pathlib import Path
from trimtab.store.journal import Journal
from trimtab.logs import configure_logging
configure_logging("warning", "json", sys.stderr)
args = json.loads(sys.argv[1])
cut = args.get("cut")
if cut is not None:
    real_write, calls = os.write, [0]
    def torn_write(fd, data):
        calls[0] += 1
        if calls[0] == cut["call"] + 1:
            real_write(fd, bytes(data)[: cut["keep"]])
            os.kill(os.getpid(), signal.SIGKILL)
        return real_write(fd, data)
    os.write = torn_write
journal = Journal.open(Path(args["path"]), "flush")
for i in range(args["count"]):
    journal.append({"seq": i, "sensor": "no2-07", "raw": i * 0.5})
    sys.stdout.write(f"ack {i}\n")
    sys.stdout.flush()
sys.stdin.read()
"""


def _expected(count: int) -> list[dict[str, Any]]:
    return [{"seq": i, "sensor": "no2-07", "raw": i * 0.5} for i in range(count)]


def _write_lines(path: Path, records: list[dict[str, Any]]) -> bytes:
    data = b"".join(encode_record(r) for r in records)
    path.write_bytes(data)
    return data


class TestJournalAppend:
    """Appending records and reading them back."""

    def test_round_trip(self, tmp_path: Path) -> None:
        """Records appended come back equal and in order."""
        records: list[dict[str, Any]] = [
            {"t": 1.5, "sensor": "a", "reading": {"raw": 2.0}},
            {"reference": 3, "x": None},
        ]
        with Journal.open(tmp_path / "j.log", "fsync") as journal:
            for record in records:
                journal.append(record)
            journal.sync()
        found, tail = read_journal(tmp_path / "j.log")
        assert found == records
        assert tail.torn_bytes == 0
        assert tail.good_bytes == (tmp_path / "j.log").stat().st_size

    def test_line_format(self, tmp_path: Path) -> None:
        """Each line is the CRC-32 of the JSON in 8 hex digits, a space, the JSON, a newline."""
        with Journal.open(tmp_path / "j.log", "flush") as journal:
            journal.append({"sensor": "ö", "v": 1})
        line = (tmp_path / "j.log").read_bytes()
        match = re.fullmatch(rb"([0-9a-f]{8}) (\{.*\})\n", line)
        assert match is not None
        assert int(match.group(1), 16) == zlib.crc32(match.group(2))
        assert json.loads(match.group(2)) == {"sensor": "ö", "v": 1}

    def test_file_mode_is_0600(self, tmp_path: Path) -> None:
        """A new journal file is readable and writable by its owner only."""
        Journal.open(tmp_path / "j.log", "fsync").close()
        assert stat.S_IMODE((tmp_path / "j.log").stat().st_mode) == 0o600

    def test_append_reaches_the_kernel_at_once(self, tmp_path: Path) -> None:
        """An appended record is in the file before sync or close (no user-space buffer)."""
        journal = Journal.open(tmp_path / "j.log", "fsync")
        journal.append({"seq": 1})
        assert read_journal(tmp_path / "j.log")[0] == [{"seq": 1}]
        journal.close()

    def test_not_strict_json_is_refused(self, tmp_path: Path) -> None:
        """A record holding NaN is refused with StateError and nothing is written."""
        with (
            Journal.open(tmp_path / "j.log", "flush") as journal,
            pytest.raises(StateError, match="not strict JSON"),
        ):
            journal.append({"raw": float("nan")})
        assert (tmp_path / "j.log").read_bytes() == b""

    def test_append_after_close_is_an_error(self, tmp_path: Path) -> None:
        """Appending to a closed journal raises StateError naming the file."""
        journal = Journal.open(tmp_path / "j.log", "flush")
        journal.close()
        with pytest.raises(StateError, match=r"j\.log is closed"):
            journal.append({"seq": 1})

    def test_reopen_appends_after_existing_records(self, tmp_path: Path) -> None:
        """Reopening a clean journal keeps its records and appends after them."""
        with Journal.open(tmp_path / "j.log", "flush") as journal:
            journal.append({"seq": 0})
        with Journal.open(tmp_path / "j.log", "flush") as journal:
            assert journal.torn_bytes == 0
            journal.append({"seq": 1})
        assert read_journal(tmp_path / "j.log")[0] == [{"seq": 0}, {"seq": 1}]


class TestReadJournal:
    """Reading a journal that a crash or damage left behind."""

    def test_missing_newline_on_last_line_is_torn(self, tmp_path: Path) -> None:
        """A final line without its newline is ignored and its length reported."""
        data = _write_lines(tmp_path / "j.log", _expected(3))
        (tmp_path / "j.log").write_bytes(data + b'0123abcd {"seq":')
        found, tail = read_journal(tmp_path / "j.log")
        assert found == _expected(3)
        assert (tail.good_bytes, tail.torn_bytes) == (len(data), 16)
        assert tail.reason is not None and "line 4" in tail.reason

    def test_bad_checksum_on_last_line_is_torn(self, tmp_path: Path) -> None:
        """A complete final line whose CRC fails (zero-filled by power loss) is torn, not fatal."""
        data = _write_lines(tmp_path / "j.log", _expected(2))
        (tmp_path / "j.log").write_bytes(data + b"\0" * 40 + b"\n")
        found, tail = read_journal(tmp_path / "j.log")
        assert found == _expected(2)
        assert tail.torn_bytes == 41

    def test_damage_in_the_middle_names_file_and_line(self, tmp_path: Path) -> None:
        """A bad CRC before the last line raises StateError with path, line and byte offset."""
        data = bytearray(_write_lines(tmp_path / "j.log", _expected(4)))
        second = data.index(b"\n") + 1
        data[second + 12] ^= 0x01  # a bit flip inside line 2's JSON
        (tmp_path / "j.log").write_bytes(bytes(data))
        with pytest.raises(StateError) as info:
            read_journal(tmp_path / "j.log")
        message = str(info.value)
        assert str(tmp_path / "j.log") in message
        assert f"line 2 (byte offset {second})" in message
        assert "checksum mismatch" in message

    def test_valid_checksum_over_non_object_is_not_torn(self, tmp_path: Path) -> None:
        """A last line whose CRC matches but whose JSON is a list is damage, not a torn write."""
        payload = b"[1,2]"
        (tmp_path / "j.log").write_bytes(b"%08x %s\n" % (zlib.crc32(payload), payload))
        with pytest.raises(StateError, match=r"line 1 .*JSON is a list"):
            read_journal(tmp_path / "j.log")

    def test_missing_file_is_an_error(self, tmp_path: Path) -> None:
        """Reading a journal that does not exist raises StateError naming it."""
        with pytest.raises(StateError, match=r"nope\.log: cannot read"):
            read_journal(tmp_path / "nope.log")

    def test_open_cuts_the_torn_tail_before_appending(self, tmp_path: Path) -> None:
        """Journal.open truncates a torn tail, so the next record follows the last good one."""
        data = _write_lines(tmp_path / "j.log", _expected(2))
        (tmp_path / "j.log").write_bytes(data + b'deadbeef {"se')
        with Journal.open(tmp_path / "j.log", "fsync") as journal:
            assert journal.torn_bytes == 13
            journal.append({"seq": 2})
        found, tail = read_journal(tmp_path / "j.log")
        assert found == [*_expected(2), {"seq": 2}]
        assert tail.torn_bytes == 0

    def test_open_refuses_a_journal_damaged_in_the_middle(self, tmp_path: Path) -> None:
        """Journal.open raises StateError instead of appending after damage."""
        data = _write_lines(tmp_path / "j.log", _expected(3))
        (tmp_path / "j.log").write_bytes(b"x" + data[1:])
        with pytest.raises(StateError, match="line 1"):
            Journal.open(tmp_path / "j.log", "flush")

    @settings(max_examples=60, deadline=None)
    @given(
        records=st.lists(
            st.dictionaries(
                st.text(max_size=5),
                st.none()
                | st.booleans()
                | st.integers()
                | st.floats(allow_nan=False, allow_infinity=False)
                | st.text(max_size=8),
                max_size=4,
            ),
            min_size=1,
            max_size=8,
        ),
        fraction=st.floats(min_value=0.0, max_value=1.0),
    )
    def test_any_cut_yields_a_prefix(self, records: list[dict[str, Any]], fraction: float) -> None:
        """Cutting the file at any byte gives exactly the records wholly before the cut."""
        lines = [encode_record(r) for r in records]
        data = b"".join(lines)
        cut = int(len(data) * fraction)
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "j.log"
            path.write_bytes(data[:cut])
            found, tail = read_journal(path)
        whole = 0
        while whole < len(lines) and sum(map(len, lines[: whole + 1])) <= cut:
            whole += 1
        assert found == records[:whole]
        assert tail.good_bytes + tail.torn_bytes == cut


class TestJournalKill:
    """A real child process appending to a journal is killed with SIGKILL."""

    def _spawn(
        self, path: Path, count: int, cut: dict[str, int] | None = None
    ) -> subprocess.Popen[str]:
        args = json.dumps({"path": str(path), "count": count, "cut": cut})
        return subprocess.Popen(
            [sys.executable, "-c", CHILD, args],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )

    @pytest.mark.parametrize("seed", [1, 2, 3])
    def test_kill_at_a_random_moment_keeps_every_acked_record(
        self, tmp_path: Path, seed: int
    ) -> None:
        """After SIGKILL at a seeded point of the loop, the journal is a prefix with all acked."""
        path = tmp_path / "j.log"
        acked = random.Random(seed).randrange(50, 1500)
        child = self._spawn(path, 2000)
        assert child.stdout is not None and child.stdin is not None
        try:
            for _ in range(acked):
                assert child.stdout.readline().startswith("ack")
        finally:
            os.kill(child.pid, signal.SIGKILL)
            child.wait()
            child.stdout.close()
            child.stdin.close()
        assert child.returncode == -signal.SIGKILL
        found, _tail = read_journal(path)
        assert acked <= len(found) <= 2000
        assert found == _expected(len(found))

    @pytest.mark.parametrize("seed", [4, 5, 6])
    def test_torn_write_at_kill_is_cut_and_reported(self, tmp_path: Path, seed: int) -> None:
        """A record half-written when the process died is ignored, reported and cut on reopen."""
        rng = random.Random(seed)
        call = rng.randrange(1, 40)
        line_length = len(encode_record(_expected(call + 1)[call]))
        keep = rng.randrange(1, line_length)
        child = self._spawn(tmp_path / "j.log", 50, {"call": call, "keep": keep})
        child.communicate()
        assert child.returncode == -signal.SIGKILL
        found, tail = read_journal(tmp_path / "j.log")
        assert found == _expected(call)
        assert tail.torn_bytes == keep
        with Journal.open(tmp_path / "j.log", "flush") as journal:
            journal.append({"seq": "after"})
        assert read_journal(tmp_path / "j.log")[0] == [*_expected(call), {"seq": "after"}]
