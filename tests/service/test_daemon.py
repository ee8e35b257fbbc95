"""The daemon end to end: a real Mosquitto, real `trimtab run` processes, real signals."""

from __future__ import annotations

import json
import random
import signal
import threading
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from trimtab.config import load_config
from trimtab.engine.wiring import status_topic
from trimtab.messages import Reference
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import Recorder, play

from ..support import (
    Daemon,
    Watcher,
    assert_matches_replay,
    caught_up,
    model_states,
    recovered_engine,
    replay_engine,
    synthetic_stream,
    write_config,
)


def _setup(tmp_path: Path, broker: PrivateBroker, **kw: str) -> tuple[Path, Daemon, Watcher]:
    cfg_path = write_config(tmp_path / "d", broker.port, **kw)
    cfg = load_config(cfg_path)
    watcher = Watcher(broker.port, status_topic(cfg))
    return cfg_path, Daemon(cfg_path, tmp_path / "daemon.log"), watcher


class TestEndToEnd:
    def test_broker_output_equals_replay(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """A stream published to the broker yields exactly the corrected values of replay."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(300)
        recorder = Recorder(cfg, "127.0.0.1", broker.port).start()
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            play(events, cfg, host="127.0.0.1", port=broker.port)
            n_readings = sum(1 for e in events if not isinstance(e, Reference))
            got = recorder.wait(count=n_readings, timeout=60)
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            recorder.stop()
            watcher.close()
        engine, expected = replay_engine(cfg, events)
        assert len(got) == len(expected)
        key = lambda c: (c.sensor, c.t)  # noqa: E731
        assert sorted(got, key=key) == sorted(expected, key=key)
        assert model_states(recovered_engine(cfg)) == model_states(engine)
        assert engine.counts["reference_applied"] > 50

    @pytest.mark.persistence
    def test_persistent_session_delivers_what_was_missed(self, tmp_path: Path,
                                                          broker: PrivateBroker) -> None:
        """Messages published while the daemon is stopped are processed after it starts, once."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(240)
        half = len(events) // 2
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            play(events[:half], cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events[:half])), daemon.log()
            assert daemon.terminate() == 0
            assert watcher.wait_for(lambda w: w.status == "offline")
            play(events[half:], cfg, host="127.0.0.1", port=broker.port)
            daemon.start()
            assert watcher.wait_for(caught_up(events), timeout=60), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        _, recovered = assert_matches_replay(cfg, events)
        assert recovered.counts["reference_duplicate"] == 0


class TestCrashAndBrokerLoss:
    @pytest.mark.persistence
    def test_kill9_at_random_points_gives_the_uninterrupted_state(
            self, tmp_path: Path, broker: PrivateBroker) -> None:
        """kill -9 at 5 random points of a QoS 1 stream: final state equals an uninterrupted run."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(900)
        rng = random.Random(2026)
        daemon.start()
        assert watcher.wait_online(), daemon.log()
        player = threading.Thread(
            target=play, args=(events, cfg),
            kwargs={"host": "127.0.0.1", "port": broker.port, "speed": None, "inflight": 20})
        try:
            player.start()
            for _ in range(5):
                time.sleep(rng.uniform(0.05, 0.6))
                daemon.kill9()
                daemon.start()
            player.join(120)
            assert watcher.wait_for(caught_up(events), timeout=90), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        assert_matches_replay(cfg, events)

    @pytest.mark.persistence
    def test_broker_restart_mid_stream(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """Broker restarted mid-stream: the daemon reconnects and ends in the same state."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(300)
        third = len(events) // 3
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            play(events[:third], cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events[:third])), daemon.log()
            watcher.close()
            broker.restart()
            watcher = Watcher(broker.port, status_topic(cfg))
            assert watcher.wait_for(lambda w: w.status == "online", timeout=60), daemon.log()
            play(events[third:], cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events), timeout=60), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        assert_matches_replay(cfg, events)


class TestHostileInput:
    def test_flood_of_malformed_payloads(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """Malformed messages on the same topics are counted by reason; good output is unchanged."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(120)
        bad = [
            ("t/s1/raw", b"{not json"),
            ("t/s1/raw", b'{"t": 1767225600, "raw": "x", "temp": 1}'),
            ("t/s1/raw", b'{"t": 1767225600, "raw": NaN, "temp": 1}'),
            ("t/s1/raw", b'{"t": 1767225600, "raw": 1e400, "temp": 1}'),
            ("t/s1/raw", b'{"t": 1767225600, "raw": 1e300, "temp": 1}'),
            ("t/s1/raw", b"[1, 2]"),
            ("t/zz/raw", b'{"t": 1767225600, "raw": 1, "temp": 1}'),
            ("t/s1/raw", b"x" * 70000),
            ("t/..%2F/raw", b'{"t": 1767225600, "raw": 1, "temp": 1}'),
            ("t/s1/ref", b'{"t": "yesterday", "value": 3}'),
        ]
        recorder = Recorder(cfg, "127.0.0.1", broker.port).start()
        daemon.start()
        client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="flood")
        client.connect("127.0.0.1", broker.port)
        client.loop_start()
        try:
            assert watcher.wait_online(), daemon.log()
            for topic, payload in bad * 20:
                client.publish(topic, payload, qos=1).wait_for_publish(10)
            play(events, cfg, host="127.0.0.1", port=broker.port)
            n_readings = sum(1 for e in events if not isinstance(e, Reference))
            got = recorder.wait(count=n_readings, timeout=60)
            assert watcher.wait_for(lambda w: sum((w.stats or {}).get("rejected", {}).values())
                                    >= 200, timeout=30)
            rejected = (watcher.stats or {})["rejected"]
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            client.disconnect()
            client.loop_stop()
            daemon.kill9()
            recorder.stop()
            watcher.close()
        _, expected = replay_engine(cfg, events)
        key = lambda c: (c.sensor, c.t)  # noqa: E731
        assert sorted(got, key=key) == sorted(expected, key=key)
        assert rejected == {"bad_json": 20, "wrong_type": 20, "out_of_range": 20,
                            "non_finite": 40, "not_object": 20, "unknown_sensor": 20,
                            "oversize": 20, "bad_sensor_id": 20, "bad_time": 20}


class TestSignals:
    def test_sigterm_checkpoints_and_goes_offline(self, tmp_path: Path,
                                                  broker: PrivateBroker) -> None:
        """SIGTERM exits 0 with a checkpoint written and `offline` retained."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(60)
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            play(events, cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events)), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        state_dir = Path(cfg.state.dir)
        assert sorted(p.name for p in state_dir.glob("checkpoint-*.json"))
        late = Watcher(broker.port, status_topic(cfg))
        try:
            assert late.wait_for(lambda w: w.status == "offline", timeout=10)
        finally:
            late.close()
        log_lines = [json.loads(x) for x in daemon.log().splitlines() if x.startswith("{")]
        assert any(x["event"] == "service_stopped" for x in log_lines)

    def test_sighup_with_broken_config_keeps_running(self, tmp_path: Path,
                                                     broker: PrivateBroker) -> None:
        """SIGHUP with a broken config logs why and keeps running on the old one."""
        cfg_path, daemon, watcher = _setup(tmp_path, broker)
        cfg = load_config(cfg_path)
        events = synthetic_stream(60)
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            good = cfg_path.read_text()
            cfg_path.write_text(good.replace("alpha = 0.1", "alpha = 5.0"))
            daemon.signal(signal.SIGHUP)
            deadline = time.monotonic() + 10
            while "config_reload_failed" not in daemon.log() and time.monotonic() < deadline:
                time.sleep(0.1)
            assert "config_reload_failed" in daemon.log()
            play(events, cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events)), daemon.log()
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        assert_matches_replay(cfg, events)

