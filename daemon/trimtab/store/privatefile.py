"""Writing a small file atomically and readable by its owner only (state, models, exports)."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_private(path: str | os.PathLike[str], text: str) -> None:
    """Write ``text`` to ``path``: a temp file (mode 0600) in the same directory, fsync, rename,
    fsync of the directory. A reader sees the old file or the new one, never a torn one.

    Raises OSError; callers turn it into the error of their own kind.
    """
    target = Path(path)
    directory = target.parent if str(target.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=directory)
    try:
        os.fchmod(fd, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    try:
        dfd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)
