"""Nothing lost: kill -9 at random points, broker restarts, a malformed flood, and overload.

Real parts only: a private Mosquitto, ``trimtab run`` child processes, real files. The counts
(kills, restarts, malformed messages, overload seconds) come from the soak scale
(``TRIMTAB_SOAK_SCALE``: small in CI, large under ``make soak``); every loop is bounded in count
and time. The stream is invented for consistency checks: what comes out must equal an
uninterrupted offline replay of what went in.
"""

from __future__ import annotations

import json
import math
import random
import threading
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

from trimtab.config import Config, load_config
from trimtab.engine.wiring import make_codec, status_topic, topic_templates
from trimtab.errors import DecodeError
from trimtab.messages import Corrected, Reading, Reference
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play
from trimtab_sim.soak import Collector, Publisher, current_scale, memory_kib, record

from ..support import (
    Daemon,
    Watcher,
    assert_matches_replay,
    caught_up,
    replay_engine,
    synthetic_stream,
    write_config,
)

SCALE = current_scale()


def _setup(tmp_path: Path, broker: PrivateBroker, *, checkpoint_every: float = 0.5,
           client_id: str = "trimtab-test") -> tuple[Config, Daemon]:
    path = write_config(tmp_path / "d", broker.port, client_id=client_id)
    text = path.read_text()
    path.write_text(text.replace("checkpoint_every = 0.5",
                                 f"checkpoint_every = {checkpoint_every}"))
    return load_config(path), Daemon(path, tmp_path / "daemon.log")


def _payloads(cfg: Config, events: list[Reading | Reference]) -> Iterator[tuple[str, bytes]]:
    codec = make_codec(cfg)
    t_read, t_ref, _ = topic_templates(cfg)
    for e in events:
        if isinstance(e, Reading):
            yield t_read.format(e.sensor), codec.encode_reading(e)
        else:
            yield t_ref.format(e.sensor), codec.encode_reference(e)


def _corrected(cfg: Config, collector: Collector) -> list[Corrected]:
    codec = make_codec(cfg)
    return sorted((codec.decode_corrected(p) for p in collector.unique.values()),
                  key=lambda c: (c.sensor, c.t))


def _expected(cfg: Config, events: list[Reading | Reference]) -> list[Corrected]:
    _, outs = replay_engine(cfg, events)
    return sorted(outs, key=lambda c: (c.sensor, c.t))


def _log_events(daemon: Daemon, name: str) -> list[dict[str, object]]:
    lines = (json.loads(x) for x in daemon.log().splitlines() if x.startswith("{"))
    return [x for x in lines if x.get("event") == name]


class TestCrash:
    def test_kill9_at_random_points_ends_bit_identical(self, tmp_path: Path,
                                                       broker: PrivateBroker) -> None:
        """kill -9 at random points of a paced QoS 1 stream: same state, references applied once."""
        cfg, daemon = _setup(tmp_path, broker, checkpoint_every=0.05)
        kills = SCALE.kills
        events = synthetic_stream(120 * kills, sensors=("s1", "s2"))
        duration = 0.6 * kills
        speed = 10.0 * 120 * kills / duration  # event seconds per wall second
        rng = random.Random(20260101)
        watcher = Watcher(broker.port, status_topic(cfg))
        daemon.start()
        assert watcher.wait_online(), daemon.log()
        player = threading.Thread(target=play, args=(events, cfg), kwargs={
            "host": "127.0.0.1", "port": broker.port, "speed": speed, "timeout": 120.0})
        mid_checkpoint = 0
        state_dir = Path(cfg.state.dir)
        try:
            player.start()
            for _ in range(kills):
                time.sleep(rng.uniform(0.1, 1.2))
                daemon.kill9()
                if any(p.name.endswith(".tmp") for p in state_dir.iterdir()):
                    mid_checkpoint += 1
                daemon.start()
            player.join(duration + 120)
            assert not player.is_alive()
            assert watcher.wait_for(caught_up(events), timeout=120), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        engine, recovered = assert_matches_replay(cfg, events)
        assert recovered.counts["reference_applied"] == engine.counts["reference_applied"] > 0
        # the scaler followed the sensors' range all along: the kills fell across its moves
        assert engine.counts["scaler_moved"] > kills
        recoveries = [x for x in _log_events(daemon, "state_recovered")
                      if x.get("logger") == "trimtab.service"]
        assert recoveries  # the last start at least recovered; earlier kills may beat it
        record("crash: kill -9 survived", kills)
        record("crash: kills that left a checkpoint half written", mid_checkpoint)
        record("crash: kills before recovery had finished", kills + 1 - len(recoveries))
        models = [engine.model(s) for s in engine.sensors()]
        applied = sum(m.updates for m in models if m is not None)  # equal in both, checked above
        record("crash: references applied exactly once", applied)
        record("crash: redelivered references skipped", recovered.counts["reference_duplicate"])


class TestBrokerLoss:
    def test_broker_restarts_lose_nothing(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """The broker restarted mid-stream: the daemon reconnects each time; 0 messages lost."""
        cfg, daemon = _setup(tmp_path, broker)
        restarts = SCALE.broker_restarts
        events = synthetic_stream(300 * restarts + 300)
        messages = list(_payloads(cfg, events))
        n_readings = sum(1 for e in events if isinstance(e, Reading))
        _, _, t_out = topic_templates(cfg)
        collector = Collector(broker.port, "soak-collect", t_out.filter, make_codec(cfg))
        publisher = Publisher(broker.port, "soak-publish", window=200)
        daemon.start()
        rng = random.Random(7)
        pace = 1.2 * (restarts + 1) / len(messages)  # wall seconds per message

        def publish_all() -> None:
            for i, (topic, payload) in enumerate(messages):
                publisher.publish(topic, payload)
                if i % 20 == 19:
                    time.sleep(20 * pace)

        player = threading.Thread(target=publish_all)
        done = 0
        first = Watcher(broker.port, status_topic(cfg))
        try:
            assert first.wait_online(), daemon.log()
            first.close()
            player.start()
            for _ in range(restarts):
                time.sleep(rng.uniform(0.3, 0.9))
                broker.restart()
                done += 1
                deadline = time.monotonic() + 30
                while (len(_log_events(daemon, "mqtt_connected")) < done + 1
                       and time.monotonic() < deadline):
                    time.sleep(0.05)
            player.join(120)
            assert not player.is_alive()
            publisher.flush()
            got = collector.wait(n_readings, timeout=120)
            watcher = Watcher(broker.port, status_topic(cfg))
            assert watcher.wait_for(caught_up(events), timeout=60), daemon.log()
            assert watcher.wait_for(lambda w: (w.stats or {}).get("reconnects", 0) >= restarts,
                                    timeout=30), watcher.stats
            reconnects = (watcher.stats or {})["reconnects"]
            watcher.close()
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            publisher.close()
            collector.close()
            first.close()
        assert "mqtt_session_lost" not in daemon.log()
        assert done == restarts
        assert publisher.sent == len(messages)
        assert got == n_readings
        assert _corrected(cfg, collector) == _expected(cfg, events)
        assert_matches_replay(cfg, events)
        record("broker loss: broker restarts", restarts)
        record("broker loss: daemon reconnections", reconnects)
        record("broker loss: messages in", len(messages))
        record("broker loss: corrected values out", got)
        record("broker loss: messages lost", n_readings - got)


def _bad_messages(n: int, rng: random.Random) -> Iterator[tuple[str, bytes]]:
    """``n`` malformed messages: known kinds of damage, hostile topics and random bytes.

    No control characters in topics: Mosquitto itself disconnects a client that publishes
    one ("malformed packet", seen with 2.0.11), so they are tested at the decoder instead.
    """
    good = b'{"t": 1767225600.0, "raw": 41.0, "temp": 20.0}'
    kinds: list[tuple[str, bytes]] = [
        ("t/s1/raw", b"{not json"),
        ("t/s1/raw", b'{"t": 1767225600, "raw": "x", "temp": 1}'),
        ("t/s1/raw", b'{"t": 1767225600, "raw": NaN, "temp": 1}'),
        ("t/s1/raw", b'{"t": 1767225600, "raw": 1e400, "temp": 1}'),
        ("t/s1/raw", b'{"t": 1767225600, "raw": 1e300, "temp": 1}'),
        ("t/s1/raw", b'{"t": 1767225600, "raw": 1, "raw": 2, "temp": 1}'),
        ("t/s1/raw", b'{"t": 1767225600, "temp": 1}'),
        ("t/s1/raw", b"[1, 2]"),
        ("t/s1/raw", b"\xff\xfe"),
        ("t/zz/raw", good),
        ("t/..x/raw", good),
        ("t/" + "a" * 300 + "/raw", good),
        ("t/s1/ref", b'{"t": "yesterday", "value": 3}'),
        ("t/s1/ref", b'{"t": 1767225600, "value": 3, "window": -5}'),
    ]
    for i in range(n):
        if i % 3 == 2:  # random damage to a good payload: cut, flipped bytes, or noise
            data = bytearray(good)
            for _ in range(rng.randint(1, 4)):
                data[rng.randrange(len(data))] = rng.randrange(256)
            yield "t/s2/raw", bytes(data[: rng.randint(1, len(data))])
        else:
            yield kinds[i % len(kinds)]


def _reason(cfg: Config, topic: str, payload: bytes) -> str | None:
    """Why the daemon must reject this message (its own decode path), or None if it is good."""
    codec = make_codec(cfg)
    t_read, t_ref, _ = topic_templates(cfg)
    try:
        sensor = t_read.match(topic)
        if sensor is not None:
            if not cfg.sensor_allowed(sensor):
                return "unknown_sensor"
            codec.decode_reading(sensor, payload)
            return None
        source = t_ref.match(topic)
        if source is None:
            return "unknown_topic"
        codec.decode_reference(source, payload)
        return None
    except DecodeError as exc:
        return exc.reason


class TestHostileFlood:
    def test_malformed_flood_is_counted_and_harmless(self, tmp_path: Path,
                                                     broker: PrivateBroker) -> None:
        """Malformed messages interleaved with a good stream: counted by reason, output intact."""
        cfg, daemon = _setup(tmp_path, broker)
        events = synthetic_stream(600)
        good = list(_payloads(cfg, events))
        rng = random.Random(99)
        bad = [(t, p) for t, p in _bad_messages(SCALE.malformed, rng)
               if _reason(cfg, t, p) is not None]  # random damage can leave a payload valid
        expected = Counter(_reason(cfg, t, p) for t, p in bad)
        n_readings = sum(1 for e in events if isinstance(e, Reading))
        _, _, t_out = topic_templates(cfg)
        collector = Collector(broker.port, "flood-collect", t_out.filter, make_codec(cfg))
        publisher = Publisher(broker.port, "flood-publish", window=500)
        daemon.start()
        watcher = Watcher(broker.port, status_topic(cfg))
        per_good = math.ceil(len(bad) / len(good))
        try:
            assert watcher.wait_online(), daemon.log()
            pending = iter(bad)
            for topic, payload in good:
                publisher.publish(topic, payload)
                for _, (bad_topic, bad_payload) in zip(range(per_good), pending, strict=False):
                    publisher.publish(bad_topic, bad_payload)
            for topic, payload in pending:
                publisher.publish(topic, payload)
            publisher.flush()
            got = collector.wait(n_readings, timeout=120)
            total = len(bad)
            assert watcher.wait_for(
                lambda w: sum((w.stats or {}).get("rejected", {}).values()) >= total
                and caught_up(events)(w), timeout=120), watcher.stats
            rejected = (watcher.stats or {})["rejected"]
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            publisher.close()
            collector.close()
            watcher.close()
        assert rejected == dict(expected)
        assert got == n_readings
        assert _corrected(cfg, collector) == _expected(cfg, events)
        record("hostile: malformed messages rejected", len(bad), "messages")
        record("hostile: rejection reasons seen", len(expected))


def _paced_stream(t0: float, start: int) -> Iterator[Reading | Reference]:
    """An endless drifting stream of two sensors, built lazily (no list held in memory)."""
    i = start
    while True:
        t = t0 + 10.0 * i
        truth = 40.0 + 15.0 * math.sin(2 * math.pi * i / 360.0)
        temp = 15.0 + 8.0 * math.sin(2 * math.pi * i / 500.0 + 1.0)
        for k, s in enumerate(("s1", "s2")):
            raw = (1.1 + 0.1 * k) * truth + 0.4 * (temp - 15.0) + 2.0 * k + 0.1 * ((i * 7) % 5)
            yield Reading(t, s, {"raw": raw, "temp": temp})
        if i % 6 == 5:
            for s in ("s1", "s2"):
                yield Reference(t, s, truth)
        i += 1


class TestOverload:
    def test_twice_the_sustained_rate(self, tmp_path: Path, broker: PrivateBroker) -> None:
        """Load at 2x the measured sustained rate: memory bounded, backlog counted, caught up."""
        cfg, daemon = _setup(tmp_path, broker)
        codec = make_codec(cfg)
        t_read, t_ref, _ = topic_templates(cfg)
        stream = _paced_stream(1_767_225_600.0, 0)
        last: dict[str, float] = {}
        readings = [0]

        def send(publisher: Publisher, n: int) -> None:
            for _ in range(n):
                e = next(stream)
                if isinstance(e, Reading):
                    last[e.sensor] = e.t
                    readings[0] += 1
                    publisher.publish(t_read.format(e.sensor), codec.encode_reading(e))
                else:
                    publisher.publish(t_ref.format(e.sensor), codec.encode_reference(e))

        def processed(w: Watcher) -> bool:
            sensors = (w.stats or {}).get("sensors", {})
            return all(sensors.get(s, {}).get("last_reading_t") == t for s, t in last.items())

        publisher = Publisher(broker.port, "overload-publish", window=1000)
        watcher = Watcher(broker.port, status_topic(cfg))
        daemon.start()
        try:
            assert watcher.wait_online(), daemon.log()
            assert daemon.proc is not None
            pid = daemon.proc.pid
            # 1. The sustained rate: a burst, timed from its first message to the last output.
            burst = 4000 if SCALE.name == "ci" else 20000
            started = time.monotonic()
            send(publisher, burst)
            assert watcher.wait_for(processed, timeout=120), daemon.log()
            sustained = burst / (time.monotonic() - started)
            # 2. Twice that, for the scale's duration, paced in 20 ms steps.
            target = 2.0 * sustained
            samples: list[tuple[float, int]] = []
            offered = 0
            started = time.monotonic()
            next_sample = started
            while (now := time.monotonic()) - started < SCALE.overload_seconds:
                due = int(target * (now - started)) - offered
                if due > 0:
                    send(publisher, due)
                    offered += due
                if now >= next_sample:
                    samples.append((now - started, memory_kib(pid)[0]))
                    next_sample = now + 0.5
                time.sleep(0.02)
            elapsed = time.monotonic() - started
            publisher.flush()
            counts = (watcher.stats or {}).get("counts", {})
            # Readings the daemon's retained stats did not yet confirm. The stats queue behind
            # the corrected values in the daemon's outgoing queue, so this is the lag as seen
            # downstream, not only the part still waiting at the broker.
            backlog = readings[0] - counts.get("reading_accepted", 0)
            # 3. Load falls to nothing: the daemon works off the backlog the broker held.
            fallen = time.monotonic()
            assert watcher.wait_for(processed, timeout=60 + 3 * SCALE.overload_seconds), \
                daemon.log()[-2000:]
            catch_up = time.monotonic() - fallen
            _, peak = memory_kib(pid)
            stats = watcher.stats or {}
            assert daemon.alive()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            publisher.close()
            watcher.close()
        offered_rate = offered / elapsed
        span = SCALE.overload_seconds
        middle = [kib for t, kib in samples if span / 3 <= t < 2 * span / 3]
        last_third = [kib for t, kib in samples if t >= 2 * span / 3]
        # The target is 2x; on a busy 2-core machine the publisher (sharing the cores with the
        # daemon and the broker) may fall short of it, so what is required is a clear overload
        # (the backlog grows) and what was reached is reported.
        assert offered_rate > 1.2 * sustained, (offered_rate, sustained)
        # Bounded: the bounded inbox fills within ~20 s at twice the rate; after that, the last
        # third of the overload holds no more than the middle third plus a margin for allocator
        # noise (a queue that grew with the backlog would fail this). Short runs are still
        # filling the inbox, so they are held to the absolute ceiling only.
        if span >= 30:
            assert max(last_third) <= 1.25 * max(middle) + 20_000, samples
        assert peak < 400_000, peak
        assert backlog > 0.1 * (offered_rate - sustained) * elapsed  # the daemon fell behind
        assert stats["dropped"] == 0  # backpressure holds the backlog at the broker instead
        record("overload: sustained rate", round(sustained), "messages/s")
        record("overload: offered rate", round(offered_rate), "messages/s")
        record("overload: offered over sustained (max)", round(offered_rate / sustained, 2), "x")
        record("overload: seconds at twice the sustained rate", round(elapsed, 1), "s")
        record("overload: catch-up after the load fell", round(catch_up, 1), "s")
        record("overload: peak resident memory (VmHWM)", peak, "KiB")
        record("overload: messages dropped by the daemon", stats["dropped"])
        record("overload: readings not yet confirmed downstream when the load fell (max)",
               backlog, "readings")
        record("overload: times the full inbox pushed back", stats["inbox_full"])
        record("overload: messages in", burst + offered)

