"""Outputs are never lost: the outbox's window, its mark, a backlog after downtime, kill -9.

The real-process tests use a private Mosquitto, ``trimtab run`` child processes and kill -9;
their sizes come from the soak scale (``TRIMTAB_SOAK_SCALE``: ``ci`` by default, ``full`` under
``make soak``). Every wait is bounded and every loop counted. The stream is invented for
consistency checks: what comes out must equal an uninterrupted offline replay of what went in.
"""

from __future__ import annotations

import json
import random
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

from trimtab.config import Config, load_config
from trimtab.engine.wiring import make_codec, status_topic, topic_templates
from trimtab.messages import Reading, Reference
from trimtab.service.outbox import MARK_NAME, Mark, Outbox, OutboxMark, PublishResult
from trimtab.wire.codec import JsonCodec, SenmlCodec
from trimtab.wire.streamfile import decode_corrected_line, write_events
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.mqttio import play
from trimtab_sim.soak import Collector, Publisher, current_scale, record

from ..support import (
    BIN,
    Daemon,
    Watcher,
    assert_matches_replay,
    caught_up,
    replay_engine,
    synthetic_stream,
    write_config,
)

SCALE = current_scale()


# -- the outbox on its own --------------------------------------------------------------------


class FakeClient:
    """Stands in for the MQTT client in the pure tests: hands out ids, keeps what it got."""

    def __init__(self, refuse: int = 0) -> None:
        self.sent: list[tuple[int, str, bytes]] = []
        self.refuse = refuse
        self._mid = 0

    def __call__(self, topic: str, payload: bytes) -> PublishResult:
        if self.refuse:
            self.refuse -= 1
            return PublishResult(None, "out of message ids", retry=True)
        self._mid += 1
        self.sent.append((self._mid, topic, payload))
        return PublishResult(self._mid)


def _outbox(window: int, values: int, client: FakeClient | None = None
            ) -> tuple[Outbox, FakeClient]:
    """An outbox of ``window`` attached to a stand-in client, holding values b"0", b"1", …."""
    client = FakeClient() if client is None else client
    box = Outbox(window)
    box.attach(client)
    for i in range(values):
        box.add("t", b"%d" % i)
    return box, client


class TestOutbox:
    def test_never_more_than_the_window_in_flight(self) -> None:
        """With a window of 3, a fourth value waits until a PUBACK frees a place."""
        box, client = _outbox(3, 5)
        assert box.pump() == 3
        assert [p for _, _, p in client.sent] == [b"0", b"1", b"2"]
        box.on_published(2, None)
        assert box.pump() == 1
        assert box.pending() == 4
        assert box.done() == 0  # value 0 is not acknowledged yet: nothing done from the start

    def test_done_counts_only_an_unbroken_run_from_the_start(self) -> None:
        """PUBACKs out of order: done advances only over values all acknowledged."""
        box, _ = _outbox(10, 4)
        box.pump()
        box.on_published(2, None)
        box.on_published(3, None)
        assert box.done() == 0
        box.on_published(1, None)
        assert box.done() == 3
        assert box.stats()["delivered"] == 3

    def test_a_refusal_is_retried_and_counted(self) -> None:
        """A value the client cannot take now stays first in line and is counted, not lost."""
        client = FakeClient(refuse=2)
        box = Outbox(10)
        box.attach(client)
        box.add("t", b"a")
        box.add("t", b"b")
        assert box.pump() == 0
        assert box.pump() == 0
        assert box.pump() == 2
        assert [p for _, _, p in client.sent] == [b"a", b"b"]
        assert box.stats()["publish_deferred"] == 2

    def test_a_broker_refusal_is_counted_and_logged(self) -> None:
        """A PUBACK with a failure reason is counted as refused, and not retried forever."""
        client = FakeClient()
        box = Outbox(10)
        box.attach(client)
        box.add("t", b"a")
        box.pump()
        box.on_published(1, "Not authorized")
        assert box.pending() == 0
        assert box.stats()["refused_by_broker"] == 1
        assert box.done() == 1

    def test_restore_queues_only_what_the_mark_does_not_cover(self) -> None:
        """After a restart, values past the mark of the same generation are published again."""
        records: list[dict[str, Any]] = [
            {"t": float(i), "sensor": "s1", "reading": {"raw": 1.0}, "out": f"v{i}"}
            for i in range(5)
        ]
        records.insert(2, {"t": 1.5, "sensor": "s1", "reference": 3.0})
        box = Outbox(10)
        assert box.restore(7, records, (7, 3), lambda s: f"t/{s}") == 2
        client = FakeClient()
        box.attach(client)
        box.pump()
        assert [p for _, _, p in client.sent] == [b"v3", b"v4"]
        assert box.seen({"t": 1.5, "sensor": "s1", "reference": 3.0})
        other = Outbox(10)
        assert other.restore(8, records, (7, 3), lambda s: f"t/{s}") == 5  # older mark

    def test_redelivered_inputs_are_recognised_within_the_bound(self) -> None:
        """A journaled input is recognised when it comes again; the memory of them is bounded."""
        box = Outbox(10, keep=2)
        recs = [{"t": float(i), "sensor": "s1", "reading": {"raw": 1.0}} for i in range(3)]
        for r in recs:
            box.remember(r)
        assert not box.seen(recs[0])
        assert box.seen(recs[1]) and box.seen(recs[2])
        assert box.stats()["redelivered_inputs"] == 2


class TestOutboxMark:
    def test_round_trip_and_damage(self, tmp_path: Path) -> None:
        """The mark reads back what was written; a damaged one reads as nothing done."""
        mark = OutboxMark(tmp_path)
        assert mark.read() == Mark()
        mark.write(Mark(4, 123, 123456, 1000))
        mark.write(Mark(4, 9, 77, 5))  # rewritten in place, shorter
        mark.close()
        assert OutboxMark(tmp_path).read() == Mark(4, 9, 77, 5)
        raw = (tmp_path / MARK_NAME).read_bytes()
        (tmp_path / MARK_NAME).write_bytes(raw.replace(b"9", b"8", 1))
        assert OutboxMark(tmp_path).read() == Mark()


# -- real processes ---------------------------------------------------------------------------


def _setup(tmp_path: Path, broker: PrivateBroker, *, checkpoint_every: float = 0.5,
           extra: str = "") -> tuple[Config, Daemon]:
    path = write_config(tmp_path / "d", broker.port, extra=extra)
    text = path.read_text()
    path.write_text(text.replace("checkpoint_every = 0.5",
                                 f"checkpoint_every = {checkpoint_every}"))
    return load_config(path), Daemon(path, tmp_path / "daemon.log")


def _publish_all(broker: PrivateBroker, cfg: Config, events: list[Reading | Reference],
                 client_id: str) -> None:
    codec = make_codec(cfg)
    t_read, t_ref, _ = topic_templates(cfg)
    pub = Publisher(broker.port, client_id, window=1000, timeout=120.0)
    try:
        for e in events:
            if isinstance(e, Reading):
                pub.publish(t_read.format(e.sensor), codec.encode_reading(e))
            else:
                pub.publish(t_ref.format(e.sensor), codec.encode_reference(e))
        pub.flush()
    finally:
        pub.close()


def _replayed(daemon: Daemon, events: list[Reading | Reference],
              tmp_path: Path) -> dict[tuple[str, float], bytes]:
    """What ``trimtab replay`` (a real process) writes for ``events``, keyed by (sensor, t).

    Its lines are the daemon's published form, so they compare byte for byte.
    """
    stream, out = tmp_path / "replay-in.jsonl", tmp_path / "replay-out.jsonl"
    write_events(stream, events)
    done = subprocess.run([str(BIN / "trimtab"), "replay", "-c", str(daemon.config), str(stream),
                           "-o", str(out), "--quiet"], capture_output=True, timeout=300,
                          check=False)
    assert done.returncode == 0, done.stderr.decode()
    lines = out.read_text(encoding="utf-8").splitlines()
    return {(c.sensor, c.t): line.encode("utf-8")
            for line, c in ((x, decode_corrected_line(x)) for x in lines)}


def _compare(cfg: Config, events: list[Reading | Reference], collector: Collector,
             daemon: Daemon, tmp_path: Path) -> tuple[int, int, int]:
    """(expected, missing, different): the collected values against ``trimtab replay``."""
    codec: JsonCodec | SenmlCodec = make_codec(cfg)
    _, outs = replay_engine(cfg, events)
    expected = _replayed(daemon, events, tmp_path)
    assert expected == {(c.sensor, c.t): codec.encode_corrected(c) for c in outs}
    got = dict(collector.unique)
    missing = sum(1 for k in expected if k not in got)
    different = sum(1 for k, v in expected.items() if k in got and got[k] != v)
    return len(expected), missing, different


def _stats(watcher: Watcher) -> dict[str, Any]:
    assert watcher.stats is not None
    return watcher.stats


class TestBacklog:
    def test_backlog_queued_while_down_is_all_delivered(self, tmp_path: Path,
                                                        broker: PrivateBroker) -> None:
        """A backlog far beyond 65,535 published while the daemon is down: every value arrives."""
        readings = 100_000 if SCALE.name == "ci" else 200_000
        events = synthetic_stream(readings // 2, sensors=("s1", "s2"), every=30)
        cfg, daemon = _setup(tmp_path, broker, checkpoint_every=5.0)
        codec = make_codec(cfg)
        collector = Collector(broker.port, "backlog-collector", "t/+/corrected", codec)
        watcher = Watcher(broker.port, status_topic(cfg))
        try:
            daemon.start()  # once, to make the persistent session and its subscriptions
            assert watcher.wait_online(), daemon.log()
            assert daemon.terminate() == 0
            _publish_all(broker, cfg, events, "backlog-publisher")
            started = time.monotonic()
            daemon.start()
            got = collector.wait(readings, timeout=150.0)
            seconds = time.monotonic() - started
            assert got == readings, (got, daemon.log()[-3000:])
            assert watcher.wait_for(caught_up(events), timeout=60), daemon.log()[-3000:]
            stats = _stats(watcher)
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
            collector.close()
        expected, missing, different = _compare(cfg, events, collector, daemon, tmp_path)
        assert (expected, missing, different) == (readings, 0, 0)
        outbox = stats["outbox"]
        assert outbox.get("publish_failed", 0) == 0
        assert outbox.get("refused_by_broker", 0) == 0
        assert stats["dropped"] == 0
        waits = [x for x in _log_lines(daemon) if x.get("event") == "outbox_intake_waited"]
        assert outbox.get("intake_waited", 0) > 0 and waits  # the window did hold intake back
        record("backlog: readings queued while down", readings)
        record("backlog: corrected values delivered / missing / different", got)
        record("backlog: missing", missing)
        record("backlog: different", different)
        record("backlog: catch-up rate", round(readings / seconds), "values/s")
        record("backlog: intake waits for the outbox", outbox.get("intake_waited", 0))
        print(f"\nbacklog: {readings} readings, {got} delivered, {missing} missing, "
              f"{different} different, {seconds:.1f} s, intake waits "
              f"{outbox.get('intake_waited', 0)}, duplicates {collector.duplicates}")


def _log_lines(daemon: Daemon) -> list[dict[str, Any]]:
    return [json.loads(x) for x in daemon.log().splitlines() if x.startswith("{")]


class TestKillUnderLoad:
    def test_kill9_under_load_every_output_arrives_equal_to_replay(
            self, tmp_path: Path, broker: PrivateBroker) -> None:
        """kill -9 at random points while input streams in unpaced: 0 missing, 0 different."""
        kills = SCALE.kills
        events = synthetic_stream(2500 * kills, sensors=("s1", "s2"))
        cfg, daemon = _setup(tmp_path, broker, checkpoint_every=0.2)
        codec = make_codec(cfg)
        collector = Collector(broker.port, "kill-collector", "t/+/corrected", codec)
        watcher = Watcher(broker.port, status_topic(cfg))
        rng = random.Random(20261202)
        publisher = threading.Thread(target=_publish_all,
                                     args=(broker, cfg, events, "kill-publisher"))
        try:
            daemon.start()
            assert watcher.wait_online(), daemon.log()
            started = time.monotonic()
            publisher.start()
            for _ in range(kills):
                time.sleep(rng.uniform(0.1, 0.8))
                daemon.kill9()
                daemon.start()
            publisher.join(180)
            assert not publisher.is_alive()
            seconds = time.monotonic() - started
            assert watcher.wait_for(caught_up(events), timeout=180), daemon.log()[-3000:]
            n_readings = sum(1 for e in events if isinstance(e, Reading))
            collector.wait(n_readings, timeout=120.0)
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
            collector.close()
        expected, missing, different = _compare(cfg, events, collector, daemon, tmp_path)
        print(f"\nkill -9 under load: {kills} kills, {len(events)} messages in {seconds:.1f} s, "
              f"{expected} values expected, {missing} missing, {different} different, "
              f"{collector.duplicates} delivered twice")
        assert (missing, different) == (0, 0)
        assert expected == n_readings
        assert_matches_replay(cfg, events)
        record("kill -9 under load: kills", kills)
        record("kill -9 under load: values expected", expected)
        record("kill -9 under load: missing", missing)
        record("kill -9 under load: different", different)
        record("kill -9 under load: delivered twice (at least once)", collector.duplicates)


class TestJournalCut:
    def test_journal_cut_in_half_reports_the_bytes_and_records_lost(
            self, tmp_path: Path, broker: PrivateBroker) -> None:
        """A journal cut in half while the daemon is down: file, offset, bytes, records named."""
        cfg, daemon = _setup(tmp_path, broker, checkpoint_every=3600.0)
        events = synthetic_stream(300)
        watcher = Watcher(broker.port, status_topic(cfg))
        state = Path(cfg.state.dir)
        try:
            daemon.start()
            assert watcher.wait_online(), daemon.log()
            play(events, cfg, host="127.0.0.1", port=broker.port)
            assert watcher.wait_for(caught_up(events), timeout=60), daemon.log()
            journal = max(state.glob("journal-*.log"))
            deadline = time.monotonic() + 30
            while OutboxMark(state).read().journal_bytes != journal.stat().st_size:
                assert time.monotonic() < deadline, "the outbox mark never caught up"
                time.sleep(0.05)
            daemon.kill9()
            data = journal.read_bytes()
            cut = len(data) // 2
            good_end = data.rfind(b"\n", 0, cut) + 1
            journal.write_bytes(data[:cut])
            daemon.start()
            assert watcher.wait_online(), daemon.log()
            assert daemon.terminate() == 0
        finally:
            daemon.kill9()
            watcher.close()
        lost = [x for x in _log_lines(daemon) if x.get("event") == "journal_data_lost"]
        assert len(lost) == 1, daemon.log()[-3000:]
        assert lost[0]["path"] == str(journal)
        assert lost[0]["offset"] == good_end
        assert lost[0]["bytes_lost"] == len(data) - good_end
        assert lost[0]["records_lost"] == data.count(b"\n") - data[:good_end].count(b"\n")
        assert lost[0]["torn_bytes_cut"] == cut - good_end
        print(f"\njournal cut at {cut} of {len(data)} bytes: reported {lost[0]['bytes_lost']} "
              f"bytes and {lost[0]['records_lost']} records lost from offset {good_end}")


class TestRedeliveryInProcess:
    def test_redelivered_inputs_keep_their_output_and_restart_republishes_it(
            self, tmp_path: Path, broker: PrivateBroker) -> None:
        """The same batch delivered twice changes nothing; a restart queues identical values."""
        from trimtab.service.daemon import Service
        from trimtab.service.intake import Inbound
        from trimtab.service.transport import Transport

        cfg, _ = _setup(tmp_path, broker)
        codec = make_codec(cfg)
        t_read, t_ref, _ = topic_templates(cfg)
        events = synthetic_stream(90)
        batch = [Inbound(t_read.format(e.sensor) if isinstance(e, Reading)
                         else t_ref.format(e.sensor),
                         codec.encode_reading(e) if isinstance(e, Reading)
                         else codec.encode_reference(e), i + 1, 1)
                 for i, e in enumerate(events)]
        # the port is closed: nothing is acknowledged by a broker, so every value stays waiting
        svc = Service(cfg)
        try:
            svc.recover()
            svc.transport = Transport(endpoint_with_port(cfg, 1), [], svc._enqueue,
                                      on_published=svc.outbox.on_published)
            svc.outbox.attach(svc.outbox_publisher())
            svc.handle_batch(batch[:100])
            svc.handle_batch(batch[100:])
            state = json.dumps(svc.engine.state_dict(), sort_keys=True)
            first = svc.outbox.waiting()
            assert len(batch) > 200
            svc.handle_batch(batch[:150])  # a redelivery, older readings included
            assert json.dumps(svc.engine.state_dict(), sort_keys=True) == state
            assert svc.outbox.waiting() == first
            assert svc.outbox.stats()["redelivered_inputs"] == 150
        finally:
            svc.store.close()
        _, outs = replay_engine(cfg, events)
        assert [p for _, p in first] == [codec.encode_corrected(c) for c in outs]
        again = Service(cfg)
        try:
            again.recover()
            assert again.outbox.waiting() == first  # read back from the journal, byte for byte
        finally:
            again.store.close()


def endpoint_with_port(cfg: Config, port: int) -> Any:
    """The daemon's endpoint with another port (one where no broker listens)."""
    from dataclasses import replace

    from trimtab.service.endpoint import endpoint_of

    return replace(endpoint_of(cfg), port=port)
