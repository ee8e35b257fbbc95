"""The example broker config (config/mosquitto.conf) runs, and its queue limit is needed.

Mosquitto's documented default for ``max_queued_messages`` is 1000: beyond it, QoS 1 messages
for a subscriber that is away are dropped without a trace. These tests run the example file
(with a private port and directory) and the same file without its queue lines, and count what
reaches a persistent subscriber that was away while 2,500 messages were published.
"""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from trimtab_sim.broker import PrivateBroker, mosquitto_path
from trimtab_sim.soak import Publisher

EXAMPLE_CONF = Path(__file__).resolve().parents[2] / "config" / "mosquitto.conf"


class FileBroker(PrivateBroker):
    """A private Mosquitto run from given config text (its listener and paths made private)."""

    def __init__(self, workdir: Path, text: str) -> None:
        super().__init__(workdir)
        self.text = text

    def _write_config(self) -> None:
        lines = []
        for line in self.text.splitlines():
            key = line.split(" ", 1)[0]
            if key == "listener":
                line = f"listener {self.port} 127.0.0.1"
            elif key == "persistence_location":
                line = f"persistence_location {self.workdir}/"
            elif key == "log_dest":
                line = f"log_dest file {self.log_path}"
            lines.append(line)
        if os.geteuid() == 0:
            lines.append("user root")  # see PrivateBroker
        self.conf_path.write_text("\n".join(lines) + "\n")


def _absent(port: int, on_message: Any = None) -> tuple[mqtt.Client, threading.Event]:
    """The persistent session "absent", connected, subscribed to q/# at QoS 1."""
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="absent", clean_session=False,
                         protocol=mqtt.MQTTv311)
    subscribed = threading.Event()
    client.on_connect = lambda c, u, f, rc, p: c.subscribe("q/#", qos=1)
    client.on_subscribe = lambda *a: subscribed.set()
    if on_message is not None:
        client.on_message = on_message
    client.connect("127.0.0.1", port)
    client.loop_start()
    return client, subscribed


def _queued_for_absent_subscriber(broker: PrivateBroker, n: int) -> int:
    """Publish ``n`` QoS 1 messages while a persistent subscriber is away; how many reach it."""
    first, subscribed = _absent(broker.port)
    assert subscribed.wait(10)
    first.disconnect()
    first.loop_stop()
    publisher = Publisher(broker.port, "queue-publish", window=500)
    try:
        for i in range(n):
            publisher.publish("q/x", str(i).encode())
        publisher.flush()
    finally:
        publisher.close()
    got: list[int] = []
    back, _ = _absent(broker.port, lambda c, u, m: got.append(1))
    last, deadline = -1, time.monotonic() + 60
    while time.monotonic() < deadline and len(got) != last:
        last = len(got)
        time.sleep(1.0)
    back.disconnect()
    back.loop_stop()
    return len(got)


class TestExampleBrokerConfig:
    def test_example_config_runs_and_queues_for_an_absent_daemon(self, tmp_path: Path) -> None:
        """config/mosquitto.conf starts, and queues 2,500 QoS 1 messages for an absent session."""
        if mosquitto_path() is None:
            pytest.skip("mosquitto binary not found on PATH")
        with FileBroker(tmp_path / "example", EXAMPLE_CONF.read_text()) as broker:
            assert _queued_for_absent_subscriber(broker, 2500) == 2500

    def test_mosquitto_default_queue_drops_beyond_1000(self, tmp_path: Path) -> None:
        """Without the raised limit Mosquitto keeps 1,000 (its default) and drops the rest."""
        if mosquitto_path() is None:
            pytest.skip("mosquitto binary not found on PATH")
        text = "\n".join(line for line in EXAMPLE_CONF.read_text().splitlines()
                         if not line.startswith("max_queued"))
        with FileBroker(tmp_path / "default", text) as broker:
            assert _queued_for_absent_subscriber(broker, 2500) == 1000
