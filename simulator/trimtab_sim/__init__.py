"""trimtab-sim: generate, play, record and score sensor streams for trimtab."""

from __future__ import annotations

__all__: list[str] = []
