"""Tests of the systemd notify helper against real datagram sockets."""

from __future__ import annotations

import os
import shutil
import socket
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from trimtab.service.notify import Notifier


@pytest.fixture
def path_socket() -> Iterator[tuple[str, socket.socket]]:
    """A datagram socket bound to a short path (socket paths are limited to 107 bytes)."""
    directory = tempfile.mkdtemp(prefix="tt-", dir="/tmp")
    path = str(Path(directory) / "notify")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(path)
    sock.settimeout(5)
    try:
        yield path, sock
    finally:
        sock.close()
        shutil.rmtree(directory)


@pytest.fixture
def abstract_socket() -> Iterator[tuple[str, socket.socket]]:
    """A datagram socket bound in the abstract namespace; yields its '@' name."""
    name = f"trimtab-test-{os.getpid()}-{os.urandom(4).hex()}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind("\0" + name)
    sock.settimeout(5)
    try:
        yield "@" + name, sock
    finally:
        sock.close()


class TestFromEnv:
    """Reading the service manager's environment variables."""

    def test_no_socket_is_disabled(self) -> None:
        """Without NOTIFY_SOCKET the notifier is off and sends return False."""
        notifier = Notifier.from_env({})
        assert not notifier.enabled
        assert notifier.ready() is False
        assert notifier.watchdog_interval is None

    def test_at_sign_means_abstract_namespace(self) -> None:
        """A leading '@' is replaced by a NUL byte."""
        assert Notifier.from_env({"NOTIFY_SOCKET": "@sd/notify"}).address == "\0sd/notify"

    def test_path_is_kept(self) -> None:
        """An absolute path is used as it is."""
        assert Notifier.from_env({"NOTIFY_SOCKET": "/run/sd/notify"}).address == "/run/sd/notify"

    def test_unsupported_address_is_disabled(self) -> None:
        """A vsock address, which this helper does not speak, disables notification."""
        assert not Notifier.from_env({"NOTIFY_SOCKET": "vsock:2:1234"}).enabled

    def test_watchdog_interval_is_half_the_timeout(self) -> None:
        """WATCHDOG_USEC=30000000 gives a ping every 15 seconds."""
        env = {"NOTIFY_SOCKET": "/x", "WATCHDOG_USEC": "30000000"}
        assert Notifier.from_env(env).watchdog_interval == 15.0

    def test_watchdog_for_another_pid_is_off(self) -> None:
        """WATCHDOG_PID naming another process turns our watchdog off."""
        env = {"NOTIFY_SOCKET": "/x", "WATCHDOG_USEC": "4000000", "WATCHDOG_PID": "41"}
        assert Notifier.from_env(env, pid=42).watchdog_interval is None

    def test_watchdog_for_our_pid_is_on(self) -> None:
        """WATCHDOG_PID naming this process (the default pid) keeps the watchdog on."""
        env = {"NOTIFY_SOCKET": "/x", "WATCHDOG_USEC": "4000000", "WATCHDOG_PID": str(os.getpid())}
        assert Notifier.from_env(env).watchdog_interval == 2.0

    @pytest.mark.parametrize("value", ["", "soon", "0", "-5"])
    def test_unusable_watchdog_usec_is_off(self, value: str) -> None:
        """A missing, non-numeric or non-positive WATCHDOG_USEC disables the watchdog."""
        env = {"NOTIFY_SOCKET": "/x", "WATCHDOG_USEC": value}
        assert Notifier.from_env(env).watchdog_interval is None


class TestSend:
    """Datagrams on real sockets."""

    def test_messages_on_a_path_socket(self, path_socket: tuple[str, socket.socket]) -> None:
        """ready, status, watchdog and stopping arrive as their KEY=value datagrams."""
        path, sock = path_socket
        notifier = Notifier.from_env({"NOTIFY_SOCKET": path})
        assert notifier.ready()
        assert notifier.status("subscribed\n12 sensors")
        assert notifier.watchdog()
        assert notifier.stopping()
        received = [sock.recv(4096) for _ in range(4)]
        assert received == [
            b"READY=1",
            b"STATUS=subscribed 12 sensors",
            b"WATCHDOG=1",
            b"STOPPING=1",
        ]
        notifier.close()

    def test_reloading_carries_the_monotonic_clock(
        self, path_socket: tuple[str, socket.socket]
    ) -> None:
        """RELOADING=1 comes with MONOTONIC_USEC between the clock read before and after."""
        path, sock = path_socket
        notifier = Notifier.from_env({"NOTIFY_SOCKET": path})
        before = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        assert notifier.reloading()
        after = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        first, second = sock.recv(4096).decode().split("\n")
        assert first == "RELOADING=1"
        key, value = second.split("=")
        assert key == "MONOTONIC_USEC" and before <= int(value) <= after
        notifier.close()

    def test_abstract_namespace_socket(self, abstract_socket: tuple[str, socket.socket]) -> None:
        """A notifier given '@name' reaches a socket bound to NUL + name."""
        name, sock = abstract_socket
        notifier = Notifier.from_env({"NOTIFY_SOCKET": name})
        assert notifier.ready()
        assert sock.recv(4096) == b"READY=1"
        notifier.close()

    def test_send_failure_returns_false(self) -> None:
        """With nobody listening, sends return False and raise nothing, then work once one is."""
        path = str(Path(tempfile.mkdtemp(prefix="tt-", dir="/tmp")) / "notify")
        notifier = Notifier.from_env({"NOTIFY_SOCKET": path})
        try:
            assert notifier.watchdog() is False
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
                sock.bind(path)
                assert notifier.watchdog() is True
                assert sock.recv(4096) == b"WATCHDOG=1"
        finally:
            notifier.close()
            shutil.rmtree(Path(path).parent)
