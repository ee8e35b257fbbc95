"""Strict fields over MQTT: the running daemon refuses unknown fields and counts them by reason.

A real Mosquitto and a real ``trimtab run`` process: a reference with a misspelt ``"windw"``
is refused as ``unknown_field`` (logged, counted in the stats), and the daemon goes on.
"""

from __future__ import annotations

import json
from pathlib import Path

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from trimtab.config import load_config
from trimtab.engine.wiring import status_topic
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play

from ..support import Daemon, Watcher, caught_up, synthetic_stream, write_config


class TestStrictFieldsLive:
    def test_misspelt_window_is_refused_and_counted(self, tmp_path: Path,
                                                    broker: PrivateBroker) -> None:
        """`"windw": 60` over MQTT: refused as unknown_field, counted, and the stream goes on."""
        path = write_config(tmp_path / "d", broker.port)
        cfg = load_config(path)
        daemon = Daemon(path, tmp_path / "daemon.log")
        watcher = Watcher(broker.port, status_topic(cfg))
        events = synthetic_stream(60)
        client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="strict-fields-pub")
        try:
            daemon.start()
            assert watcher.wait_online(), daemon.log()
            client.connect("127.0.0.1", broker.port)
            client.loop_start()
            bad = [client.publish("t/s1/ref", b'{"t": 1767225605, "value": 38.9, "windw": 60}',
                                  qos=1),
                   client.publish("t/s2/raw", b'{"t": 1767225605, "raw": 4.0, "tmp": 21}', qos=1)]
            for info in bad:
                info.wait_for_publish(10)
            play(events, cfg, host="127.0.0.1", port=broker.port)

            def counted(w: Watcher) -> bool:
                return caught_up(events)(w) and (w.stats or {}).get("rejected", {}).get(
                    "unknown_field") == 2

            assert watcher.wait_for(counted, timeout=60), (watcher.stats, daemon.log()[-2000:])
            assert daemon.terminate() == 0
        finally:
            client.loop_stop()
            client.disconnect()
            daemon.kill9()
            watcher.close()
        lines = [json.loads(x) for x in daemon.log().splitlines() if x.startswith("{")]
        refused = [x for x in lines if x.get("event") == "message_rejected"
                   and x.get("reason") == "unknown_field"]
        assert refused and "windw" in str(refused[0]["detail"])
