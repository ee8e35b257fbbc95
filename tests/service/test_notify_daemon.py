"""The daemon under a service manager: the notify protocol on a real socket, and the unit file."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from trimtab.config import load_config
from trimtab.engine.wiring import status_topic
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play

from ..support import BIN, Daemon, Watcher, caught_up, synthetic_stream, write_config

ROOT = Path(__file__).resolve().parents[2]
UNIT = ROOT / "config" / "trimtab.service"
WATCHDOG_USEC = 400_000  # 0.4 s: the daemon should ping every 0.2 s


class NotifyDaemon(Daemon):
    """``trimtab run`` as a child process with a service manager's environment."""

    def __init__(self, config: Path, log: Path, env: dict[str, str]) -> None:
        super().__init__(config, log)
        self.env = env

    def start(self) -> NotifyDaemon:
        with open(self.log_path, "ab") as fh:
            self.proc = subprocess.Popen([str(BIN / "trimtab"), "run", "-c", str(self.config)],
                                         stdout=fh, stderr=fh, env={**os.environ, **self.env})
        return self


class Listener:
    """The service manager's side: a datagram socket that records every notification."""

    def __init__(self, path: Path) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(str(path))
        self.seen: list[tuple[float, list[str]]] = []

    def wait_for(self, line: str, timeout: float = 30.0) -> float:
        """Receive until a datagram holds ``line``; its receipt time (monotonic)."""
        deadline = time.monotonic() + timeout
        while (left := deadline - time.monotonic()) > 0:
            self.sock.settimeout(left)
            try:
                data = self.sock.recv(4096)
            except TimeoutError:
                break
            now = time.monotonic()
            lines = data.decode().split("\n")
            self.seen.append((now, lines))
            if line in lines:
                return now
        raise AssertionError(f"no {line} within {timeout} s; seen {self.seen[-5:]}")

    def drain(self) -> None:
        """Record every datagram already waiting."""
        self.sock.settimeout(0.05)
        while True:
            try:
                data = self.sock.recv(4096)
            except TimeoutError:
                return
            self.seen.append((time.monotonic(), data.decode().split("\n")))

    def count(self, line: str) -> int:
        """Datagrams seen so far that hold ``line``."""
        return sum(1 for _, lines in self.seen if line in lines)

    def close(self) -> None:
        self.sock.close()


@pytest.fixture
def listener() -> Iterator[Listener]:
    """A notify socket in a short temporary directory (AF_UNIX paths are limited to 108 bytes)."""
    d = Path(tempfile.mkdtemp(prefix="tt-notify-"))
    lst = Listener(d / "notify.sock")
    try:
        yield lst
    finally:
        lst.close()
        shutil.rmtree(d, ignore_errors=True)


class TestNotifyProtocol:
    def test_ready_watchdog_reload_stop(self, tmp_path: Path, broker: PrivateBroker,
                                        listener: Listener) -> None:
        """READY once subscribed, WATCHDOG repeatedly, RELOADING then READY on SIGHUP, STOPPING."""
        cfg_path = write_config(tmp_path / "d", broker.port)
        cfg = load_config(cfg_path)
        env = {"NOTIFY_SOCKET": listener.sock.getsockname(), "WATCHDOG_USEC": str(WATCHDOG_USEC)}
        watcher = Watcher(broker.port, status_topic(cfg))
        daemon = NotifyDaemon(cfg_path, tmp_path / "daemon.log", env).start()
        try:
            listener.wait_for("READY=1")
            log = daemon.log()
            assert "mqtt_subscribed" in log, log  # READY comes only once subscribed
            # Subscribed on a brand-new session: what is published now is delivered.
            events = synthetic_stream(30)
            play(events, cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events)), daemon.log()
            listener.wait_for("WATCHDOG=1")
            time.sleep(1.5)
            listener.drain()
            # One every 0.2 s is due; on a busy two-core machine at least a few must arrive.
            assert listener.count("WATCHDOG=1") >= 4
            daemon.signal(signal.SIGHUP)
            reloading = listener.wait_for("RELOADING=1")
            assert any(x.startswith("MONOTONIC_USEC=") for t, lines in listener.seen
                       if t == reloading for x in lines)
            listener.wait_for("READY=1")
            assert daemon.proc is not None
            daemon.proc.send_signal(signal.SIGTERM)
            listener.wait_for("STOPPING=1")
            assert daemon.proc.wait(20) == 0
        finally:
            daemon.kill9()
            watcher.close()

    def test_no_notifications_without_socket(self, tmp_path: Path, broker: PrivateBroker,
                                             listener: Listener) -> None:
        """Without NOTIFY_SOCKET the daemon runs as usual and sends nothing."""
        cfg_path = write_config(tmp_path / "d", broker.port)
        cfg = load_config(cfg_path)
        watcher = Watcher(broker.port, status_topic(cfg))
        env = {"WATCHDOG_USEC": str(WATCHDOG_USEC)}
        daemon = NotifyDaemon(cfg_path, tmp_path / "daemon.log", env).start()
        try:
            assert watcher.wait_for(lambda w: w.status == "online"), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        listener.sock.settimeout(0.2)
        with pytest.raises(TimeoutError):
            listener.sock.recv(4096)


def unit_settings() -> dict[str, list[str]]:
    """``Key=value`` lines of the example unit file, by key (comments and sections dropped)."""
    out: dict[str, list[str]] = {}
    for line in UNIT.read_text().splitlines():
        line = line.strip()
        if line and not line.startswith(("#", ";", "[")):
            key, _, value = line.partition("=")
            out.setdefault(key, []).append(value)
    return out


class TestUnitFile:
    def test_notify_type_watchdog_and_reload(self) -> None:
        """The unit uses Type=notify, a watchdog, SIGHUP for reload and SIGTERM to stop."""
        s = unit_settings()
        assert s["Type"] == ["notify"]
        assert s["NotifyAccess"] == ["main"]
        assert s["ExecReload"] == ["/bin/kill -HUP $MAINPID"]
        assert s["KillSignal"] == ["SIGTERM"]
        assert int(s["WatchdogSec"][0]) >= 10
        assert s["ExecStart"][0].split()[1:] == ["run", "-c", "/etc/trimtab/trimtab.toml"]
        assert s["StateDirectory"] == ["trimtab"]  # matches state.dir = "/var/lib/trimtab"

    def test_systemd_analyze_verify(self, tmp_path: Path) -> None:
        """`systemd-analyze verify` accepts the unit (with ExecStart pointed at this venv)."""
        tool = shutil.which("systemd-analyze")
        if tool is None:
            print("skipped: systemd-analyze is not installed on this machine")
            pytest.skip("systemd-analyze not installed (package systemd); unit not verified")
        text = UNIT.read_text().replace("/opt/trimtab/.venv/bin/trimtab", str(BIN / "trimtab"))
        unit = tmp_path / "trimtab.service"
        unit.write_text(text)
        proc = subprocess.run([tool, "verify", str(unit)], capture_output=True, text=True,
                              timeout=60)
        ours = [x for x in (proc.stdout + proc.stderr).splitlines() if "trimtab" in x]
        assert proc.returncode == 0 and not ours, proc.stdout + proc.stderr
