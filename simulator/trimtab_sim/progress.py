"""A one-line progress display on a terminal (nothing when stderr is not a TTY)."""

from __future__ import annotations

import sys
import time
from collections.abc import Callable

Progress = Callable[[int, int], None]


def progress_line(label: str, every: float = 0.25) -> Progress:
    """A callback ``(done, total)`` that redraws ``label done/total`` at most every ``every`` s."""
    tty = sys.stderr.isatty()
    last = [0.0]

    def show(n: int, total: int) -> None:
        now = time.monotonic()
        if tty and now - last[0] > every:
            last[0] = now
            of = f"/{total:,}" if total else ""
            print(f"\r{label} {n:,}{of}", end="", file=sys.stderr, flush=True)

    return show
