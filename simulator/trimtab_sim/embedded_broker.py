"""A pure-Python MQTT 3.1.1 broker (amqtt) for machines without Mosquitto: demo use only.

Run as ``python -m trimtab_sim.embedded_broker PORT``; it binds 127.0.0.1 only. It keeps no
persistent sessions across its own restarts, so tests that need a broker's persistence skip
when only this one is available.
"""

from __future__ import annotations

import asyncio
import importlib.util
import socket
import subprocess
import sys
import time
import warnings
from pathlib import Path
from types import TracebackType

from trimtab.errors import TrimtabError
from trimtab_sim.broker import free_port


def available() -> bool:
    """Whether amqtt (the optional ``broker`` extra) is installed."""
    return importlib.util.find_spec("amqtt") is not None


async def _serve(port: int) -> None:
    from amqtt.broker import Broker

    config = {
        "listeners": {"default": {"type": "tcp", "bind": f"127.0.0.1:{port}"}},
        "auth": {"allow-anonymous": True, "plugins": ["auth_anonymous"]},
        "topic-check": {"enabled": False},
    }
    broker = Broker(config)
    await broker.start()
    await asyncio.Event().wait()


class EmbeddedBroker:
    """The amqtt broker in a child process on a free loopback port."""

    def __init__(self, workdir: Path, port: int | None = None) -> None:
        if not available():
            raise TrimtabError("no mosquitto on PATH and amqtt is not installed "
                               "(pip install '.[broker]')")
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = port if port is not None else free_port()
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self, timeout: float = 15.0) -> EmbeddedBroker:
        with open(self.workdir / "embedded-broker.log", "ab") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "trimtab_sim.embedded_broker", str(self.port)],
                stdout=log, stderr=log,
            )
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise TrimtabError(f"embedded broker exited; see {self.workdir}")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return self
            except OSError:
                time.sleep(0.1)
        self.stop()
        raise TrimtabError(f"embedded broker did not listen on {self.port} within {timeout} s")

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None

    def __enter__(self) -> EmbeddedBroker:
        return self.start()

    def __exit__(self, t: type[BaseException] | None, e: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.stop()


def main() -> None:
    warnings.simplefilter("ignore")
    asyncio.run(_serve(int(sys.argv[1])))


if __name__ == "__main__":
    main()
