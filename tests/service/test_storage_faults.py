"""Storage faults pause the daemon instead of ending it; an unusable state directory is one line.

Real faults only: the state directory is a real tmpfs of its own, mounted in a private mount
namespace (``unshare -m``) that the daemon runs in, filled to ENOSPC from outside through
``/proc/<pid>/root`` and freed again; a read-only tmpfs gives EROFS. Where the machine does not
allow private mounts (no root, no user namespaces) these tests skip and say so.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from trimtab.config import load_config
from trimtab.engine.wiring import make_codec, status_topic
from trimtab.messages import Reading
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play
from trimtab_sim.soak import Collector, record

from ..support import BIN, Watcher, caught_up, replay_engine, synthetic_stream, write_config


def _private_mounts() -> str | None:
    """None when ``unshare -m`` with a tmpfs mount works here, otherwise why not."""
    if shutil.which("unshare") is None:
        return "unshare (util-linux) is not installed"
    args = ["unshare", "-m", "--propagation", "private", "sh", "-c",
            "mount -t tmpfs -o size=64k tmpfs /mnt"]
    if os.geteuid() != 0:
        args.insert(1, "-r")
    probe = subprocess.run(args, capture_output=True, timeout=20, check=False)
    if probe.returncode != 0:
        return f"private tmpfs mounts are not allowed here: {probe.stderr.decode()[:200]}"
    return None


NO_MOUNTS = _private_mounts()
needs_mounts = pytest.mark.skipif(NO_MOUNTS is not None, reason=str(NO_MOUNTS))


def _in_tmpfs(command: list[str], mount_point: Path, options: str) -> list[str]:
    """``command`` run in a private mount namespace with a tmpfs at ``mount_point``."""
    script = f'mount -t tmpfs -o {options} trimtab-test "{mount_point}" && exec "$@"'
    args = ["unshare", "-m", "--propagation", "private", "sh", "-c", script, "sh", *command]
    if os.geteuid() != 0:
        args.insert(1, "-r")
    return args


def _fill(path: Path) -> int:
    """Write ``path`` until the file system is full; returns the bytes written."""
    written = 0
    chunk = b"\0" * 65536
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        while True:
            try:
                written += os.write(fd, chunk[: max(512, len(chunk))])
            except OSError as exc:
                if exc.errno != errno.ENOSPC:
                    raise
                if len(chunk) == 512:
                    return written
                chunk = chunk[: len(chunk) // 2]
    finally:
        os.close(fd)


def _events(log: Path, name: str) -> list[dict[str, Any]]:
    lines = (json.loads(x) for x in log.read_text(errors="replace").splitlines()
             if x.startswith("{"))
    return [x for x in lines if x.get("event") == name]


def _wait_log(log: Path, name: str, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if _events(log, name):
            return True
        time.sleep(0.1)
    return False


@needs_mounts
class TestFullDisk:
    def test_full_tmpfs_pauses_then_resumes_equal_to_replay(self, tmp_path: Path,
                                                            broker: PrivateBroker) -> None:
        """A tmpfs filled mid-stream then freed: the daemon pauses, resumes, outputs = replay."""
        mount_point = tmp_path / "d" / "state"
        mount_point.mkdir(parents=True)
        config = write_config(tmp_path / "d", broker.port)
        cfg = load_config(config)
        assert Path(cfg.state.dir) == mount_point
        events = synthetic_stream(900, sensors=("s1", "s2"))
        n_readings = sum(1 for e in events if isinstance(e, Reading))
        collector = Collector(broker.port, "storage-collector", "t/+/corrected", make_codec(cfg))
        watcher = Watcher(broker.port, status_topic(cfg))
        log = tmp_path / "daemon.log"
        with open(log, "ab") as fh:
            proc = subprocess.Popen(
                _in_tmpfs([str(BIN / "trimtab"), "run", "-c", str(config)], mount_point,
                          "size=4m,mode=0700"), stdout=fh, stderr=fh)
        half = len(events) // 2
        try:
            assert watcher.wait_online(), log.read_text()
            play(events[:half], cfg, host="127.0.0.1", port=broker.port, speed=None,
                 timeout=60.0)
            assert watcher.wait_for(caught_up(events[:half]), timeout=60), log.read_text()
            filler = Path(f"/proc/{proc.pid}/root") / str(mount_point).lstrip("/") / "filler"
            filled = _fill(filler)
            player = threading.Thread(target=play, args=(events[half:], cfg), kwargs={
                "host": "127.0.0.1", "port": broker.port, "speed": 500.0, "timeout": 60.0})
            player.start()
            assert _wait_log(log, "storage_unavailable", 60), log.read_text()[-3000:]
            time.sleep(1.0)  # paused a while: it must stay up and keep the inputs waiting
            assert proc.poll() is None, log.read_text()[-3000:]
            paused_at = collector.count()
            filler.unlink()
            player.join(120)
            assert not player.is_alive()
            assert watcher.wait_for(caught_up(events), timeout=120), log.read_text()[-3000:]
            got = collector.wait(n_readings, timeout=60)
            proc.terminate()
            assert proc.wait(30) == 0
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
            watcher.close()
            collector.close()
        unavailable = _events(log, "storage_unavailable")
        assert len(unavailable) == 1
        assert unavailable[0]["errno"] == "ENOSPC" and str(mount_point) in unavailable[0]["path"]
        assert _events(log, "storage_available")
        codec = make_codec(cfg)
        _, outs = replay_engine(cfg, events)
        expected = {(c.sensor, c.t): codec.encode_corrected(c) for c in outs}
        missing = sum(1 for k in expected if k not in collector.unique)
        different = sum(1 for k, v in expected.items()
                        if k in collector.unique and collector.unique[k] != v)
        assert (got, missing, different) == (n_readings, 0, 0)
        record("storage: tmpfs filled (bytes)", filled)
        record("storage: pauses, missing, different", 1)
        print(f"\nfull tmpfs: filled {filled} bytes, {paused_at} values out when paused, "
              f"{got} delivered of {n_readings}, {missing} missing, {different} different")


@needs_mounts
class TestReadOnly:
    def test_read_only_state_directory_is_one_line_and_exit_3(self, tmp_path: Path) -> None:
        """A state directory on a read-only file system: one clear line, exit 3, no traceback."""
        mount_point = tmp_path / "d" / "state"
        mount_point.mkdir(parents=True)
        config = write_config(tmp_path / "d", 1)  # never reaches the broker
        done = subprocess.run(
            _in_tmpfs([str(BIN / "trimtab"), "run", "-c", str(config)], mount_point, "ro"),
            capture_output=True, timeout=60, check=False)
        err = done.stderr.decode()
        lines = [x for x in err.splitlines() if x.strip() and not x.startswith("{")]
        assert done.returncode == 3, err
        assert "Traceback" not in err
        assert len(lines) == 1, err
        assert lines[0].startswith("trimtab run: ") and str(mount_point) in lines[0]
        assert "Read-only file system" in lines[0]


class TestUnitExitCodes:
    def test_unit_restarts_on_state_faults_but_not_on_bad_config(self) -> None:
        """The unit restarts after exit 3 (a state fault can clear) but not after exit 2."""
        from trimtab.cli import EXIT_STATE

        unit = Path(__file__).resolve().parents[2] / "config" / "trimtab.service"
        settings: dict[str, str] = {}
        for line in unit.read_text().splitlines():
            if line and not line.startswith(("#", "[")):
                key, _, value = line.partition("=")
                settings[key] = value
        assert settings["Restart"] == "on-failure"
        assert settings["RestartPreventExitStatus"].split() == ["2"]
        assert EXIT_STATE == 3 and str(EXIT_STATE) not in settings["RestartPreventExitStatus"]


class TestStorageFaultKinds:
    def test_only_errors_of_the_file_system_pause(self, tmp_path: Path) -> None:
        """ENOSPC/EROFS/EIO behind a StateError pause; damaged state is no storage fault."""
        from trimtab.errors import StateError
        from trimtab.service.storage import storage_fault

        for code in (errno.ENOSPC, errno.EROFS, errno.EIO, errno.EDQUOT):
            try:
                try:
                    raise OSError(code, os.strerror(code), str(tmp_path))
                except OSError as exc:
                    raise StateError("journal: cannot append") from exc
            except StateError as wrapped:
                fault = storage_fault(wrapped)
                assert fault is not None and fault.errno == code
        assert storage_fault(StateError("journal x: line 3: checksum mismatch")) is None
        assert storage_fault(OSError(errno.ECONNREFUSED, "refused")) is None
