"""The bench's ceiling: a bare paho-mqtt echo process on the daemon's topics and payloads.

It does the least a Python MQTT process must do for each reading: receive it, decode the
JSON, add a constant to the raw value, encode JSON and publish it on the corrected topic, at
the QoS it was given (paho acknowledges QoS 1 messages when the callback returns).
References are received and decoded but produce nothing, as in the daemon. No engine, no
journal, no checks: whatever the daemon does beyond this is its own cost.

Run as ``python -m trimtab_sim.bench_echo PORT QOS PREFIX``; it prints ``ready`` once
subscribed and stops on SIGTERM or SIGINT.
"""

from __future__ import annotations

import json
import signal
import socket
import sys
import threading
from types import FrameType
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.subscribeoptions import SubscribeOptions

OFFSET = 1.0
"""The constant the echo adds to each raw value."""


def main(argv: list[str]) -> int:
    port, qos, prefix = int(argv[0]), int(argv[1]), argv[2]
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"{prefix}-echo",
                         protocol=mqtt.MQTTv5)
    client.max_queued_messages_set(0)
    client.max_inflight_messages_set(1000)
    subscribed = threading.Event()
    reading_suffix = "/raw"

    def on_connect(c: mqtt.Client, u: Any, flags: Any, reason: Any, props: Any) -> None:
        sock = c.socket()
        if isinstance(sock, socket.socket):  # as the daemon does: no Nagle delay on replies
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        c.subscribe([(f"{prefix}/+/raw", SubscribeOptions(qos=qos)),
                     (f"{prefix}/+/ref", SubscribeOptions(qos=qos))])

    def on_subscribe(c: mqtt.Client, u: Any, mid: int, reasons: Any, props: Any) -> None:
        subscribed.set()
        print("ready", flush=True)

    def on_message(c: mqtt.Client, u: Any, msg: mqtt.MQTTMessage) -> None:
        obj = json.loads(msg.payload)
        topic = msg.topic
        if not topic.endswith(reading_suffix):
            return
        sensor = topic.split("/")[1]
        out = {"t": obj["t"], "sensor": sensor, "value": obj["raw"] + OFFSET}
        c.publish(f"{prefix}/{sensor}/corrected", json.dumps(out).encode(), qos=qos)

    def stop(signum: int, frame: FrameType | None) -> None:
        client.disconnect()

    client.on_connect = on_connect
    client.on_subscribe = on_subscribe
    client.on_message = on_message
    signal.signal(signal.SIGTERM, stop)
    signal.signal(signal.SIGINT, stop)
    client.connect("127.0.0.1", port, keepalive=30)
    client.loop_forever()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
