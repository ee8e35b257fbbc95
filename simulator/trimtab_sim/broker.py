"""A private Mosquitto broker on a free loopback port, for tests, the demo and the bench.

It never touches the machine's shared broker: it binds 127.0.0.1 on a port the kernel hands
out, keeps its persistence file in its own directory and is stopped (or killed) by its owner.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

from trimtab.errors import TrimtabError

# Queue limits high enough that a slow or absent subscriber loses no QoS 1 message in our
# runs; Mosquitto's own default for max_queued_messages is 1000 (its documented default).
BROKER_LIMITS = """\
max_queued_messages 1000000
max_queued_bytes 0
max_inflight_messages 100
set_tcp_nodelay true
"""


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def mosquitto_path() -> str | None:
    """The mosquitto binary on PATH, or None."""
    return shutil.which("mosquitto")


class PrivateBroker:
    """One Mosquitto process owned by the caller; restartable on the same port and store."""

    def __init__(self, workdir: Path, *, port: int | None = None, persistence: bool = True,
                 extra_config: str = "") -> None:
        binary = mosquitto_path()
        if binary is None:
            raise TrimtabError("mosquitto binary not found on PATH")
        self.binary = binary
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = port if port is not None else free_port()
        self.persistence = persistence
        self.extra_config = extra_config
        self.log_path = self.workdir / "mosquitto.log"
        self.conf_path = self.workdir / "mosquitto.conf"
        self.proc: subprocess.Popen[bytes] | None = None

    def _write_config(self) -> None:
        lines = [
            f"listener {self.port} 127.0.0.1",
            "allow_anonymous true",
            f"persistence {'true' if self.persistence else 'false'}",
            f"persistence_location {self.workdir}/",
            "autosave_interval 1",
            "autosave_on_changes false",
            f"log_dest file {self.log_path}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            BROKER_LIMITS,
            self.extra_config,
        ]
        if os.geteuid() == 0:
            # Started as root, Mosquitto drops to the user 'mosquitto', which cannot write this
            # directory: no log and, worse, no persistence file, so a restart loses sessions.
            lines.append("user root")
        self.conf_path.write_text("\n".join(lines) + "\n")

    def start(self, timeout: float = 10.0) -> PrivateBroker:
        """Start the broker and wait until it accepts TCP connections."""
        self._write_config()
        self.proc = subprocess.Popen(
            [self.binary, "-c", str(self.conf_path)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise TrimtabError(
                    f"mosquitto exited with {self.proc.returncode}; see {self.log_path}"
                )
            with contextlib.suppress(OSError), socket.create_connection(
                ("127.0.0.1", self.port), timeout=0.2
            ):
                return self
            time.sleep(0.05)
        self.kill()
        raise TrimtabError(f"mosquitto did not listen on port {self.port} within {timeout} s")

    def stop(self, timeout: float = 10.0) -> None:
        """Stop cleanly (SIGTERM), so the broker saves its persistence file."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None

    def kill(self) -> None:
        """Kill -9: the broker keeps only what its last autosave wrote."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
        self.proc = None

    def restart(self) -> None:
        """Stop cleanly and start again on the same port with the same store."""
        self.stop()
        self.start()

    def __enter__(self) -> PrivateBroker:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()
