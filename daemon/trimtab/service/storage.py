"""Storage faults: a full, read-only or failing state directory pauses the daemon.

The batch that could not be made durable waits, unacknowledged (so its inputs wait at the
broker), and is written again with capped backoff; nothing more is taken in meanwhile.
"""

from __future__ import annotations

import errno
import time
from typing import TYPE_CHECKING

from trimtab.logs import get_logger
from trimtab.service.endpoint import Backoff

if TYPE_CHECKING:
    from trimtab.service.intake import Processed

__all__ = ["STORAGE_ERRNOS", "StoragePause", "storage_fault"]

log = get_logger("trimtab.service")

STORAGE_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EIO, errno.EACCES,
                            errno.EPERM})
"""Errors of the state directory that pause the daemon (they can clear) instead of ending it."""


def storage_fault(exc: BaseException) -> OSError | None:
    """The OSError of a full, read-only or failing file system behind ``exc``, if that is it."""
    seen: BaseException | None = exc
    while seen is not None:
        if isinstance(seen, OSError) and seen.errno in STORAGE_ERRNOS:
            return seen
        seen = seen.__cause__
    return None




class StoragePause:
    """The batch storage refused, if any, and when to write it again."""

    def __init__(self) -> None:
        self.work: Processed | None = None
        self.since = 0.0
        self.retry_at = 0.0
        self.backoff = Backoff(first=0.5, cap=30.0)
        self.pauses = 0
        """How many times storage paused the daemon."""

    def begin(self, work: Processed, fault: OSError, detail: str, path: str) -> None:
        """Hold ``work`` after ``fault``; the first fault of a pause is logged."""
        now = time.monotonic()
        if self.work is None:
            self.pauses += 1
            self.since = now
            self.backoff.reset()
            log.error("storage_unavailable", path=fault.filename or path,
                      error=fault.strerror, errno=errno.errorcode.get(fault.errno or 0, "?"),
                      detail=detail[:300], waiting=len(work.batch),
                      hint="inputs are not acknowledged and wait at the broker; retrying")
        self.work = work
        self.retry_at = now + self.backoff.next()

    def end(self, path: str) -> None:
        """Storage took the held batch: the pause is over."""
        log.info("storage_available", path=path, paused_s=round(time.monotonic() - self.since, 3))
        self.work = None

    def due(self, now: float) -> Processed | None:
        """The held batch when it is time to try it again."""
        return self.work if self.work is not None and now >= self.retry_at else None
