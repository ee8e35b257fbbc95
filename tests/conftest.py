"""Shared fixtures: a private Mosquitto broker and a temporary state directory."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from trimtab_sim.broker import PrivateBroker, mosquitto_path


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[PrivateBroker]:
    """A private Mosquitto on a free loopback port with persistence, stopped after the test."""
    if mosquitto_path() is None:
        pytest.skip("mosquitto binary not found on PATH")
    b = PrivateBroker(tmp_path / "broker").start()
    try:
        yield b
    finally:
        b.kill()


@pytest.fixture
def state_dir(tmp_path: Path) -> Path:
    """An empty directory for a daemon's state."""
    d = tmp_path / "state"
    d.mkdir()
    return d
