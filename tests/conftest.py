"""Shared fixtures: a private broker and a temporary state directory.

The broker is a private Mosquitto on a free loopback port. On a machine without the
``mosquitto`` binary the broker tests run on the embedded pure-Python broker (amqtt, MQTT
3.1.1) instead, and the tests marked ``persistence`` — which need Mosquitto's own persistent
sessions, restarts or TLS — skip with that reason.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from trimtab.logs import reset_logging
from trimtab_sim.broker import PrivateBroker, mosquitto_path
from trimtab_sim.embedded_broker import EmbeddedBroker
from trimtab_sim.embedded_broker import available as embedded_available

from . import support


@pytest.fixture
def broker(tmp_path: Path, request: pytest.FixtureRequest) -> Iterator[PrivateBroker]:
    """A private broker on a free loopback port, stopped after the test."""
    if mosquitto_path() is not None:
        b = PrivateBroker(tmp_path / "broker").start()
        try:
            yield b
        finally:
            b.kill()
        return
    if request.node.get_closest_marker("persistence") is not None:
        pytest.skip("needs Mosquitto's own persistence, restarts or TLS: mosquitto is not on "
                    "PATH, and the embedded broker keeps no sessions")
    if not embedded_available():
        pytest.skip("no mosquitto on PATH and amqtt (the 'broker' extra) is not installed")
    embedded = EmbeddedBroker(tmp_path / "broker").start()
    support.PROTOCOL = "3.1.1"
    try:
        yield embedded  # type: ignore[misc]  # same port/stop face as PrivateBroker
    finally:
        support.PROTOCOL = "5"
        embedded.stop()


@pytest.fixture(autouse=True)
def _fresh_logging() -> Iterator[None]:
    """Each test starts and ends with logging as an unconfigured process has it."""
    yield
    reset_logging()


@pytest.fixture
def state_dir(tmp_path: Path) -> Path:
    """An empty directory for a daemon's state."""
    d = tmp_path / "state"
    d.mkdir()
    return d
