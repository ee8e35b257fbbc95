"""Tell systemd how the daemon is doing (``Type=notify``), with no extra package.

systemd passes ``$NOTIFY_SOCKET``: a filesystem path, or a name in Linux's abstract socket
namespace written with a leading ``@`` (sent as a leading NUL byte). Each notification is one
datagram of newline-separated ``KEY=value`` lines on an ``AF_UNIX``/``SOCK_DGRAM`` socket.

The watchdog is on when ``$WATCHDOG_USEC`` is a positive number and ``$WATCHDOG_PID`` is unset
or names this process; the daemon should then send ``WATCHDOG=1`` every ``watchdog_interval``
seconds (half the timeout) while it is healthy.

Sending never raises: a failed send returns ``False`` and the caller decides whether to log it.
Without ``$NOTIFY_SOCKET`` (not under systemd) every method is a no-op that returns ``False``.
"""

from __future__ import annotations

import os
import socket
import time
from collections.abc import Mapping

__all__ = ["Notifier"]

_SEND_TIMEOUT_S = 1.0  # a full receive queue must not stall the daemon for long


class Notifier:
    """Sends state changes and watchdog pings to the service manager."""

    def __init__(self, address: str | None, watchdog_usec: int | None = None) -> None:
        """``address`` as the socket wants it (abstract names start with NUL), or ``None``."""
        self._address = address or None
        self._watchdog_usec = watchdog_usec if watchdog_usec and watchdog_usec > 0 else None
        self._sock: socket.socket | None = None

    @classmethod
    def from_env(cls, environ: Mapping[str, str] = os.environ, pid: int | None = None) -> Notifier:
        """A notifier set up from ``NOTIFY_SOCKET``, ``WATCHDOG_USEC`` and ``WATCHDOG_PID``.

        ``pid`` is this process's id (default ``os.getpid()``). Unusable values disable the
        part they belong to rather than raise: the daemon runs the same outside systemd.
        """
        raw = environ.get("NOTIFY_SOCKET", "")
        address: str | None
        if raw.startswith("@") and len(raw) > 1:
            address = "\0" + raw[1:]
        elif raw.startswith("/"):
            address = raw
        else:
            address = None  # unset, empty, or a kind we do not speak (vsock:…)
        usec: int | None = None
        try:
            usec = int(environ.get("WATCHDOG_USEC", ""))
        except ValueError:
            usec = None
        owner = environ.get("WATCHDOG_PID", "")
        if owner:
            me = os.getpid() if pid is None else pid
            try:
                if int(owner) != me:
                    usec = None  # the watchdog belongs to another process (e.g. a wrapper)
            except ValueError:
                usec = None
        return cls(address, usec)

    @property
    def enabled(self) -> bool:
        """True when there is a socket to notify."""
        return self._address is not None

    @property
    def address(self) -> str | None:
        """The socket address notifications go to (abstract names begin with NUL)."""
        return self._address

    @property
    def watchdog_interval(self) -> float | None:
        """Seconds between ``watchdog()`` pings (half of ``WATCHDOG_USEC``), or ``None``."""
        if self._address is None or self._watchdog_usec is None:
            return None
        return self._watchdog_usec / 2_000_000

    def notify(self, *assignments: str) -> bool:
        """Send ``KEY=value`` lines as one datagram; ``True`` if it was sent."""
        if self._address is None:
            return False
        data = "\n".join(assignments).encode("utf-8", errors="replace")
        try:
            if self._sock is None:
                sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
                sock.settimeout(_SEND_TIMEOUT_S)
                self._sock = sock
            self._sock.sendto(data, self._address)
        except OSError:
            self._drop_socket()  # start afresh next time (the manager may have restarted)
            return False
        return True

    def ready(self) -> bool:
        """``READY=1``: start-up is done (subscribed and serving)."""
        return self.notify("READY=1")

    def reloading(self) -> bool:
        """``RELOADING=1`` with the monotonic clock in µs; send ``ready()`` when done."""
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self.notify("RELOADING=1", f"MONOTONIC_USEC={usec}")

    def stopping(self) -> bool:
        """``STOPPING=1``: shutting down."""
        return self.notify("STOPPING=1")

    def status(self, text: str) -> bool:
        """``STATUS=…``: one line for ``systemctl status`` (newlines become spaces)."""
        return self.notify("STATUS=" + " ".join(text.splitlines()))

    def watchdog(self) -> bool:
        """``WATCHDOG=1``: still healthy."""
        return self.notify("WATCHDOG=1")

    def _drop_socket(self) -> None:
        if self._sock is not None:
            sock, self._sock = self._sock, None
            sock.close()

    def close(self) -> None:
        """Release the sending socket (it is reopened if used again)."""
        self._drop_socket()
