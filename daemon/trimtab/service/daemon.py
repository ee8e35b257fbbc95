"""The daemon's lifecycle: recover, connect, serve, reload, stop.

Threads: the transport's network thread receives messages and puts them on a bounded queue;
the main thread (this module) drains it in batches: decode → journal → engine → publish, then
makes the batch durable (fsync when it holds a reference) and only then acknowledges it to the
broker. Signals are handled on the main thread too, so stopping and reloading never race the
engine. Clocks and files live here; the engine stays pure.
"""

from __future__ import annotations

import json
import queue
import signal
import threading
import time
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from types import FrameType
from typing import TYPE_CHECKING, Any

from trimtab.config import apply_reload
from trimtab.engine.engine import Engine
from trimtab.engine.wiring import (
    engine_settings,
    make_codec,
    make_engine,
    status_topic,
    topic_templates,
)
from trimtab.errors import ConfigError, DecodeError, StateError
from trimtab.logs import configure_logging, get_logger
from trimtab.messages import Reading, Reference
from trimtab.service.endpoint import endpoint_of
from trimtab.service.intake import (
    BURST_QUIET,
    Inbound,
    Processed,
    RejectLog,
    decode,
    engine_refusals,
)
from trimtab.service.metrics import Metrics
from trimtab.service.notify import Notifier
from trimtab.service.outbox import (
    Mark,
    Outbox,
    OutboxMark,
    PublishResult,
    with_output,
)
from trimtab.service.recovery import recover_state
from trimtab.service.shards import HeldFile, SubscriptionLedger, plan_subscriptions, release
from trimtab.service.storage import StoragePause, storage_fault
from trimtab.service.transport import Transport
from trimtab.store.records import event_to_record, record_to_event
from trimtab.store.statestore import StateStore

if TYPE_CHECKING:
    from trimtab.config import Config

log = get_logger("trimtab.service")

QUEUE_LIMIT = 20000
BATCH = 512
METRICS_REFRESH = 2.0
MARK_EVERY = 0.2
"""Seconds between writes of the outbox mark (what the broker has taken)."""
STOP_DRAIN = 10.0
"""Seconds a stopping daemon waits for the broker to take the outbox's values."""
PUBLISH_OUTCOMES = {"sent": "handed_to_client", "delivered": "delivered",
                    "deferred": "publish_deferred", "failed": "publish_failed",
                    "refused": "refused_by_broker"}
"""Metrics outcome of ``trimtab_messages_published_total`` → outbox counter."""


class Service:
    """One daemon: owns the engine, the state store and the transport."""

    def __init__(self, cfg: Config, *, config_path: Path | None = None,
                 loader: Callable[[Path], Config] | None = None,
                 notifier: Notifier | None = None) -> None:
        self.cfg = cfg
        self.config_path = config_path
        self._loader = loader
        self.notifier = notifier if notifier is not None else Notifier.from_env()
        self.codec = make_codec(cfg)
        self.t_readings, self.t_references, self.t_corrected = topic_templates(cfg)
        self.engine: Engine = make_engine(cfg)
        self.store = StateStore(Path(cfg.state.dir), durability=cfg.state.durability,
                                validate=record_to_event)
        self.rejects = RejectLog()
        self.inbox: queue.Queue[Inbound] = queue.Queue(QUEUE_LIMIT)
        self.dropped = 0
        self.inbox_full = 0
        self.foreign = 0
        self._inbox_logged: dict[str, float] = {}
        self.held = HeldFile(Path(cfg.state.dir), cfg.state.durability)
        self.metrics = (Metrics(cfg.metrics, pinned=cfg.sensors.ids)
                        if cfg.metrics.enabled else None)
        self._checkpoint_at = time.monotonic()
        self._journal_since: float | None = None
        self._journal_records = 0
        self.outbox = Outbox(cfg.broker.publish_window)
        self.mark = OutboxMark(Path(cfg.state.dir))
        self._mark_at = 0.0
        self._mark_failed = False
        self._current_records = 0
        self._published_seen: dict[str, int] = {}
        self.journal_lost: dict[str, int] = {"bytes": 0, "records": 0}
        self.pause = StoragePause()
        self.recovery_differs = 0
        self._engine_logged: dict[str, int] = {}
        self.reloads: Counter[str] = Counter()
        """SIGHUP outcomes: applied, refused (a bad config), deferred (no checkpoint)."""
        self._stop = threading.Event()
        self._reload = threading.Event()
        self._dirty = False
        self.transport: Transport | None = None

    # -- network thread side -------------------------------------------------------------------

    def _enqueue(self, topic: str, payload: bytes, mid: int, qos: int) -> None:
        item = Inbound(topic, payload, mid, qos, time.monotonic())
        try:
            self.inbox.put_nowait(item)
            return
        except queue.Full:
            # Backpressure: the network thread waits, so TCP holds the backlog at the broker.
            self.inbox_full += 1
            self._note_inbox("inbox_full_wait", self.inbox_full)
        try:
            self.inbox.put(item, timeout=1.0)
        except queue.Full:
            # Not acknowledged: a QoS 1 message comes again after the next reconnect.
            self.dropped += 1
            self._note_inbox("inbox_full_dropped", self.dropped)

    def _note_inbox(self, event: str, total: int) -> None:
        """Log an inbox wait or drop at most every BURST_QUIET s (network thread; never raises)."""
        now = time.monotonic()
        if now - self._inbox_logged.get(event, -BURST_QUIET) >= BURST_QUIET:
            self._inbox_logged[event] = now
            log.warning(event, total=total, limit=QUEUE_LIMIT,
                        hint="not acknowledged: delivered again after the next reconnect"
                        if event == "inbox_full_dropped" else "the broker holds the backlog")

    # -- recovery ------------------------------------------------------------------------------

    def recover(self) -> int:
        """Load the newest good checkpoint and re-feed the journal; returns records replayed."""
        rec = recover_state(self.engine, self.store, self.mark.read(), self.outbox, self.codec,
                            self.t_corrected.format)
        self._current_records = rec.current
        self.journal_lost = rec.journal_lost
        self.recovery_differs = rec.differs
        self._journal_records = rec.records
        self._journal_since = time.monotonic() if rec.records else None
        return rec.records

    def release_held(self) -> int:
        """Feed held events of sensors served now (their state imported) first; returns how many.

        See :func:`trimtab.service.shards.release`. The events fed are journaled, each reading
        with its corrected value, and made durable before the held file lets go of them; the
        values go to the outbox like any other.
        """
        records = self.held.records()
        if not records:
            return 0
        fed: list[dict[str, Any]] = []
        out = release(records, self.cfg, self.engine, lambda r: fed.append(dict(r)))
        made = {(c.sensor, c.t): c for c in out.corrected}
        outputs: list[tuple[str, bytes]] = []
        for record in fed:
            c = made.pop((str(record["sensor"]), float(record["t"])), None) \
                if "reading" in record else None
            if c is not None:
                payload = self.codec.encode_corrected(c)
                with_output(record, payload)
                outputs.append((self.t_corrected.format(c.sensor), payload))
            self.outbox.remember(record)
        if fed:
            self.store.append_many(fed)
            self.store.sync()
            self._current_records += len(fed)
            self._dirty = True
            for topic, payload in outputs:
                self.outbox.add(topic, payload)
        self.held.keep_only(out.keep)
        log.info("held_events_released", fed=out.fed, still_held=len(out.keep),
                 values=len(outputs))
        return out.fed

    # -- message handling ----------------------------------------------------------------------

    def decode(self, msg: Inbound) -> tuple[Reading | Reference, bool, bool]:
        """Topic and payload to (event, serve it, hold it); see ``intake.decode``."""
        return decode(self.cfg, self.codec, self.t_readings, self.t_references, msg)

    def handle_batch(self, batch: list[Inbound]) -> None:
        """Decode and process a batch, journal it with its outputs, then acknowledge it.

        Order: the engine handles the batch; the batch's records, each reading with its
        corrected value, are journaled with one write (and synced when it holds a reference);
        only then are the inputs acknowledged and their values handed to the outbox. A storage
        fault leaves the batch unacknowledged and pauses intake until it can be written.
        """
        self._commit(self._process(batch))

    def _process(self, batch: list[Inbound]) -> Processed:
        work = Processed(batch, [], [], Counter())
        received = work.received
        for msg in batch:
            try:
                event, serve, hold = self.decode(msg)
            except DecodeError as exc:
                if exc.reason == "foreign":  # another daemon's sensor: counted, never logged
                    self.foreign += 1
                    received["foreign"] += 1
                else:
                    self.rejects.reject(exc.reason, exc.detail, msg.topic)
                    received["rejected"] += 1
                continue
            record = event_to_record(event)
            if hold:
                work.held.append(dict(record))
            if not serve:
                received["held"] += 1
                continue
            if self.outbox.seen(record):
                # Journaled and processed before; its acknowledgement did not reach the broker.
                # Its value is in the outbox or delivered: acknowledged, never recomputed.
                received["redelivered"] += 1
                continue
            self.outbox.remember(record)
            received["processed"] += 1
            if isinstance(event, Reference):
                work.has_reference = True
                outcomes = self.engine.on_reference(event)
                if self.metrics is not None:
                    self.metrics.references(outcomes)
            else:
                c = self.engine.on_reading(event)
                if c is not None:
                    payload = self.codec.encode_corrected(c)
                    with_output(record, payload)
                    work.outputs.append((self.t_corrected.format(c.sensor), payload))
            work.records.append(record)
        return work

    def _commit(self, work: Processed) -> bool:
        """Make ``work`` durable, then acknowledge and publish it; False if storage failed."""
        assert self.transport is not None
        try:
            if work.held and not work.held_written:
                self.held.append_many(work.held)
                work.held_written = True
            if work.records and not work.journaled:
                self.store.append_many(work.records)
                work.journaled = True
                self._journal_records += len(work.records)
                self._current_records += len(work.records)
                if self._journal_since is None:
                    self._journal_since = time.monotonic()
                self._dirty = True
            if work.has_reference:
                self.store.sync()
            if work.held:
                self.held.sync()
        except StateError as exc:
            fault = storage_fault(exc)
            if fault is None:
                raise
            self.pause.begin(work, fault, str(exc), str(self.cfg.state.dir))
            return False
        if self.pause.work is not None:
            self.pause.end(str(self.cfg.state.dir))
        for msg in work.batch:
            self.transport.ack(msg.mid, msg.qos)
        # Acknowledgements are queued before the values: once the broker has acknowledged a
        # value, it has every acknowledgement sent before it (one TCP stream, in order).
        for topic, payload in work.outputs:
            self.outbox.add(topic, payload)
        self.outbox.pump()
        if self.metrics is not None:
            now = time.monotonic()
            self.metrics.batch(work.received, self._published_delta(),
                               (now - m.arrived for m in work.batch))
        return True

    def _published_delta(self) -> dict[str, int]:
        """What the outbox did since the last call, by metrics outcome."""
        counts = self.outbox.stats()
        delta: dict[str, int] = {}
        for outcome, key in PUBLISH_OUTCOMES.items():
            value = int(counts.get(key, 0))
            if value != self._published_seen.get(outcome, 0):
                delta[outcome] = value - self._published_seen.get(outcome, 0)
                self._published_seen[outcome] = value
        return delta


    def _drain(self) -> list[Inbound]:
        try:
            first = self.inbox.get(timeout=0.2)
        except queue.Empty:
            return []
        batch = [first]
        while len(batch) < BATCH:
            try:
                batch.append(self.inbox.get_nowait())
            except queue.Empty:
                break
        return batch

    # -- periodic work -------------------------------------------------------------------------

    def checkpoint(self) -> bool:
        """Write a checkpoint of the engine's whole state (and start a new journal).

        Only with the outbox empty: the values of the journal it ends must all be delivered
        (its records are no longer replayed). Returns False when storage refused it (logged;
        the journal still holds everything, and it is tried again later).
        """
        if self.pause.work is not None or self.outbox.pending():
            return False
        try:
            gen = self.store.checkpoint(self.engine.state_dict())
        except StateError as exc:
            fault = storage_fault(exc)
            if fault is None:
                raise
            log.error("checkpoint_not_written", path=fault.filename or str(self.cfg.state.dir),
                      error=fault.strerror)
            self._checkpoint_at = time.monotonic()
            return False
        self.outbox.reset(gen)
        self._current_records = 0
        self._write_mark(force=True)
        self._dirty = False
        self._checkpoint_at = time.monotonic()
        self._journal_since = None
        self._journal_records = 0
        log.info("checkpoint_written", generation=gen)
        return True

    def _write_mark(self, *, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self._mark_at < MARK_EVERY:
            return
        self._mark_at = now
        try:
            self.mark.write(Mark(self.outbox.generation, self.outbox.done(),
                                 self.store.journal_size, self._current_records))
        except OSError as exc:  # only costs values published twice after a restart
            if not self._mark_failed:
                log.warning("outbox_mark_not_written", path=str(self.mark.path), error=str(exc))
            self._mark_failed = True
        else:
            self._mark_failed = False

    def publish_stats(self) -> None:
        """Retained per-daemon statistics beside the status topic."""
        assert self.transport is not None
        stats = self.engine.stats()
        stats["rejected"] = dict(self.rejects.total)
        stats["dropped"] = self.dropped
        stats["inbox_full"] = self.inbox_full
        stats["reconnects"] = self.transport.reconnects
        stats["foreign"] = self.foreign
        stats["held"] = {"count": self.held.count, "first_t": dict(self.held.first_t)}
        stats["outbox"] = self.outbox.stats()
        stats["storage"] = {"pauses": self.pause.pauses, "paused": self.pause.work is not None}
        stats["recovery_output_differs"] = self.recovery_differs
        stats["journal_lost"] = dict(self.journal_lost)
        stats["reloads"] = dict(self.reloads)
        payload = json.dumps(stats, separators=(",", ":"), allow_nan=False).encode()
        self.transport.publish(status_topic(self.cfg) + "/stats", payload, qos=1, retain=True)

    def reload(self) -> bool:
        """Re-validate the config file and apply what reloads live (see ``apply_reload``).

        The engine is reconfigured and checkpointed at once, so the journal after the reload
        holds only what the new settings processed, and a crash after it recovers exactly what
        the running daemon held. When that checkpoint cannot be written the engine is put back
        as it was, under the old config, and False is returned (the reload is tried again);
        True when the reload was applied, refused or changed nothing.
        """
        if self.config_path is None or self._loader is None:
            return True
        self.notifier.reloading()
        try:
            return self._reload_from(self._loader(self.config_path))
        except ConfigError as exc:
            self.reloads["refused"] += 1
            log.error("config_reload_failed", errors=exc.errors)
            return True
        finally:
            self.notifier.ready()

    def _reload_from(self, new: Config) -> bool:
        applied, live, later = apply_reload(self.cfg, new)
        if later:
            log.warning("config_reload_needs_restart", paths=list(later))
        if not live:
            log.info("config_reload_nothing_live", path=str(self.config_path))
            return True
        old = self.cfg
        saved = self.engine.state_dict()
        self.engine.reconfigure(engine_settings(applied))
        if not self.checkpoint():
            self.engine.rewind(engine_settings(old), saved)
            self.reloads["deferred"] += 1
            log.warning("config_reload_deferred", reason="checkpoint_not_written",
                        deferred=self.reloads["deferred"])
            return False
        self.cfg = applied
        added = sorted(set(applied.sensors.ids) - set(old.sensors.ids))
        removed = [s for s in self.engine.sensors()
                   if old.sensor_allowed(s) and not applied.sensor_allowed(s)]
        if added:
            log.info("sensors_added", sensors=added)
        if removed:
            stats = self.engine.stats()["sensors"]
            log.warning("sensors_removed", sensors=removed, state_kept=True,
                        updates={s: stats[s]["updates"] for s in removed})
        configure_logging(self.cfg.logging.level, self.cfg.logging.format)
        self.reloads["applied"] += 1
        log.info("config_reloaded", path=str(self.config_path), applied=list(live))
        return True

    # -- lifecycle -----------------------------------------------------------------------------

    def request_stop(self) -> None:
        self._stop.set()

    def _signal(self, signum: int, frame: FrameType | None) -> None:
        if signum == signal.SIGHUP:
            self._reload.set()
        else:
            self._stop.set()

    def serve(self, *, install_signals: bool = True) -> None:
        """Run until SIGTERM/SIGINT or :meth:`request_stop`; checkpoint and go offline."""
        previous: dict[signal.Signals, Any] = {}
        if install_signals:
            for sig in (signal.SIGHUP, signal.SIGTERM, signal.SIGINT):
                previous[sig] = signal.signal(sig, self._signal)
        try:
            self._serve()
        finally:
            for sig, handler in previous.items():
                signal.signal(sig, handler)

    def _stale_filters(self, ledger: SubscriptionLedger, wanted: list[str]) -> list[str]:
        try:
            return ledger.stale(wanted)
        except StateError as exc:  # worst case an old filter stays: its messages are dropped
            log.warning("subscription_ledger_unreadable", error=str(exc))
            return []

    def refresh_metrics(self) -> None:
        """Give the metrics endpoint a fresh snapshot (main thread)."""
        if self.metrics is None or self.transport is None:
            return
        delta = self._published_delta()
        if delta:
            self.metrics.batch({}, delta, ())
        now = time.monotonic()
        self.metrics.refresh(
            self.engine, connected=self.transport.connected.is_set(),
            reconnects=self.transport.reconnects, checkpoint_age=now - self._checkpoint_at,
            journal_age=0.0 if self._journal_since is None else now - self._journal_since,
            journal_records=self._journal_records, held=self.held.count,
            rejected=self.rejects.total,
        )

    def _serve(self) -> None:
        self.recover()
        self.release_held()
        self.held.open()
        if self.metrics is not None:
            self.metrics.start()  # before connecting: a port in use stops the start
        qos = self.cfg.topics.qos
        wanted = plan_subscriptions(self.cfg)
        ledger = SubscriptionLedger(Path(self.cfg.state.dir))
        stale = self._stale_filters(ledger, wanted)
        self.transport = Transport(endpoint_of(self.cfg), [(f, qos) for f in wanted],
                                   self._enqueue, status_topic=status_topic(self.cfg),
                                   unsubscribe=stale, on_published=self.outbox.on_published)
        self.outbox.attach(self.outbox_publisher())
        self.transport.start()
        log.info("service_started", client_id=self.cfg.broker.client_id,
                 state_dir=str(self.cfg.state.dir), filters=len(wanted))
        now = time.monotonic()
        next_checkpoint = now + self.cfg.state.checkpoint_every
        next_stats = now + self.cfg.status.interval
        next_metrics = now
        wd_interval = self.notifier.watchdog_interval
        next_watchdog = now
        ready = False
        checkpoint_due = False
        reload_due = False
        reload_retry = 0.0
        while not self._stop.is_set():
            now = time.monotonic()
            if self.pause.work is not None:
                held = self.pause.due(now)
                if held is not None:
                    self._commit(held)
                self._stop.wait(0.05)
            elif (self.outbox.full() or ((checkpoint_due or reload_due)
                                         and self.outbox.pending())) \
                    and not self.inbox.full():
                # Back-pressure: nothing more is taken in (so nothing more acknowledged) until
                # the broker has taken values; the backlog waits at the broker. A broker that
                # sends past our Receive Maximum fills the inbox; then the network thread,
                # which also reads the PUBACKs, would wait on it, so intake goes on.
                if not (checkpoint_due or reload_due):
                    self.outbox.note_wait()
                self.outbox.wait(0.05)
            else:
                batch = self._drain()
                if batch:
                    self.handle_batch(batch)
                else:
                    self.outbox.pump()
            # one wake-up for everything this turn queued: the batch's acks and values
            self.transport.wake()
            self._write_mark()
            now = time.monotonic()
            if not ready and self.transport.subscribed.is_set():
                ready = True
                receive_max = self.transport.server_receive_maximum
                if receive_max is not None:
                    self.outbox.attach(self.outbox_publisher(), receive_max)
                self.notifier.ready()
                try:
                    ledger.write(wanted)
                except OSError as exc:
                    log.warning("subscription_ledger_not_written", error=str(exc))
                if stale:
                    log.info("subscriptions_removed", filters=stale)
            if self.metrics is not None and now >= next_metrics:
                next_metrics = now + METRICS_REFRESH
                self.refresh_metrics()
            if self._reload.is_set():
                self._reload.clear()
                reload_due = True
            if reload_due and now >= reload_retry and self.pause.work is None \
                    and not self.outbox.pending():
                # applied with the outbox empty, so the checkpoint before it can be written
                reload_due = not self.reload()
                reload_retry = now + 5.0
            if now >= next_checkpoint and self._dirty:
                checkpoint_due = True
            if checkpoint_due and self.pause.work is None and not self.outbox.pending():
                checkpoint_due = False
                next_checkpoint = now + self.cfg.state.checkpoint_every
                self.checkpoint()
            if now >= next_stats:
                next_stats = now + self.cfg.status.interval
                self.rejects.flush()
                grown = engine_refusals(self._engine_logged, self.engine.counts)
                if grown:
                    # the engine is pure; its refusals and guard actions are logged here, once
                    # per status interval, with what grew since the last line
                    log.warning("engine_refusals", counts=grown)
                    self._engine_logged = dict(self.engine.counts)
                if self.transport.connected.is_set():
                    self.publish_stats()
            if wd_interval is not None and now >= next_watchdog and self.transport.alive():
                next_watchdog = now + wd_interval
                self.notifier.watchdog()
        self._shutdown()

    def outbox_publisher(self) -> Callable[[str, bytes], PublishResult]:
        """The outbox's way to hand a value to the transport."""
        transport = self.transport
        assert transport is not None
        qos = self.cfg.topics.qos
        return lambda topic, payload: transport.publish_value(topic, payload, qos)

    def _drain_outbox(self, timeout: float) -> int:
        """Wait up to ``timeout`` s for the broker to take the outbox's values; what is left."""
        deadline = time.monotonic() + timeout
        while self.outbox.pending() and time.monotonic() < deadline:
            if self.transport is None or not self.transport.connected.is_set():
                break
            self.outbox.wait(0.05)
        return self.outbox.pending()

    def _shutdown(self) -> None:
        log.info("service_stopping")
        self.notifier.stopping()
        left = self._drain_outbox(STOP_DRAIN) if self.pause.work is None else 0
        if self.pause.work is not None:
            # The engine holds a batch that is not on disk and not acknowledged: no checkpoint
            # (it would record events the broker will deliver again).
            log.warning("checkpoint_skipped_storage_unavailable", path=str(self.cfg.state.dir))
        elif left:
            log.warning("outbox_pending_at_stop", values=left,
                        hint="kept in the journal; published after the next start")
            self._write_mark(force=True)
        else:
            self.checkpoint()
        if self.transport is not None:
            if self.transport.connected.is_set():
                self.publish_stats()
            self.transport.stop(offline=True)
        if self.metrics is not None:
            self.metrics.stop()
        self.held.close()
        self.mark.close()
        self.store.close()
        log.info("service_stopped")
