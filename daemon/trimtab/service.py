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
from dataclasses import dataclass
from pathlib import Path
from types import FrameType
from typing import TYPE_CHECKING, Any

from trimtab.engine import Engine
from trimtab.errors import ConfigError, DecodeError
from trimtab.logs import configure_logging, get_logger
from trimtab.messages import Reading, Reference
from trimtab.notify import Notifier
from trimtab.records import event_to_record, record_to_event
from trimtab.statestore import StateStore
from trimtab.transport import Endpoint, Transport, read_password
from trimtab.wiring import make_codec, make_engine, status_topic, topic_templates

if TYPE_CHECKING:
    from trimtab.config import Config

log = get_logger("trimtab.service")

QUEUE_LIMIT = 20000
BATCH = 512
BURST_QUIET = 10.0


@dataclass(frozen=True, slots=True)
class Inbound:
    """One received MQTT message, as the network thread hands it on."""

    topic: str
    payload: bytes
    mid: int
    qos: int


class RejectLog:
    """Counts rejected messages by reason; logs a reason once per burst, then a summary."""

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.total: Counter[str] = Counter()
        self._since: Counter[str] = Counter()
        self._last: dict[str, float] = {}
        self._clock = clock

    def reject(self, reason: str, detail: str, topic: str) -> None:
        self.total[reason] += 1
        now = self._clock()
        last = self._last.get(reason)
        if last is None or now - last > BURST_QUIET:
            self._last[reason] = now
            log.warning("message_rejected", reason=reason, detail=detail[:200], topic=topic[:200])
        else:
            self._since[reason] += 1

    def flush(self) -> None:
        if self._since:
            log.warning("messages_rejected_burst", counts=dict(self._since))
            self._since.clear()


def endpoint_of(cfg: Config) -> Endpoint:
    """The transport endpoint the ``[broker]`` section describes."""
    b = cfg.broker
    tls = b.tls
    return Endpoint(
        host=b.host, port=b.port, client_id=b.client_id, protocol=b.protocol,
        keepalive=b.keepalive, session_expiry=b.session_expiry, username=b.username,
        password=read_password(b.password_env, b.password_file),
        tls=tls.enabled, ca_file=None if tls.ca_file is None else str(tls.ca_file),
        cert_file=None if tls.cert_file is None else str(tls.cert_file),
        key_file=None if tls.key_file is None else str(tls.key_file), verify=tls.verify,
    )


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
        self.store = StateStore(Path(cfg.state.dir), durability=cfg.state.durability)
        self.rejects = RejectLog()
        self.inbox: queue.Queue[Inbound] = queue.Queue(QUEUE_LIMIT)
        self.dropped = 0
        self._stop = threading.Event()
        self._reload = threading.Event()
        self._dirty = False
        self.transport: Transport | None = None

    # -- network thread side -------------------------------------------------------------------

    def _enqueue(self, topic: str, payload: bytes, mid: int, qos: int) -> None:
        try:
            self.inbox.put(Inbound(topic, payload, mid, qos), timeout=1.0)
        except queue.Full:
            # Not acknowledged: a QoS 1 message comes again after the next reconnect.
            self.dropped += 1

    # -- recovery ------------------------------------------------------------------------------

    def recover(self) -> int:
        """Load the newest good checkpoint and re-feed the journal; returns records replayed."""
        rec = self.store.recover()
        if rec.state is not None:
            self.engine.load_state(rec.state)
        for record in rec.records:
            self.engine.process(record_to_event(record))
        log.info("state_recovered", generation=rec.generation, journal_records=len(rec.records),
                 torn_bytes=rec.torn_bytes, sensors=len(self.engine.sensors()))
        return len(rec.records)

    # -- message handling ----------------------------------------------------------------------

    def decode(self, msg: Inbound) -> Reading | Reference:
        """Topic and payload to an event; DecodeError with a reason otherwise."""
        sensor = self.t_readings.match(msg.topic)
        if sensor is not None:
            if not self.cfg.sensor_allowed(sensor):
                raise DecodeError("unknown_sensor", sensor)
            return self.codec.decode_reading(sensor, msg.payload)
        source = self.t_references.match(msg.topic)
        if source is not None:
            if not any(self.cfg.sensor_allowed(s) for s in self.cfg.reference_targets(source)):
                raise DecodeError("unknown_sensor", source)
            return self.codec.decode_reference(source, msg.payload)
        raise DecodeError("unknown_topic", msg.topic)

    def handle_batch(self, batch: list[Inbound]) -> None:
        """Decode, journal, process and publish a batch; make it durable; then acknowledge."""
        assert self.transport is not None
        qos_out = self.cfg.topics.qos
        has_reference = False
        for msg in batch:
            try:
                event = self.decode(msg)
            except DecodeError as exc:
                self.rejects.reject(exc.reason, exc.detail, msg.topic)
                continue
            self.store.append(event_to_record(event))
            self._dirty = True
            if isinstance(event, Reference):
                has_reference = True
            for c in self.engine.process(event):
                self.transport.publish(self.t_corrected.format(c.sensor),
                                       self.codec.encode_corrected(c), qos=qos_out)
        if has_reference:
            self.store.sync()
        for msg in batch:
            self.transport.ack(msg.mid, msg.qos)

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

    def checkpoint(self) -> None:
        """Write a checkpoint of the engine's whole state (and start a new journal)."""
        gen = self.store.checkpoint(self.engine.state_dict())
        self._dirty = False
        log.info("checkpoint_written", generation=gen)

    def publish_stats(self) -> None:
        """Retained per-daemon statistics beside the status topic."""
        assert self.transport is not None
        stats = self.engine.stats()
        stats["rejected"] = dict(self.rejects.total)
        stats["dropped"] = self.dropped
        stats["reconnects"] = self.transport.reconnects
        payload = json.dumps(stats, separators=(",", ":"), allow_nan=False).encode()
        self.transport.publish(status_topic(self.cfg) + "/stats", payload, qos=1, retain=True)

    def reload(self) -> None:
        """Re-validate the config file; apply what may change live; keep the old on error."""
        if self.config_path is None or self._loader is None:
            return
        try:
            new = self._loader(self.config_path)
        except ConfigError as exc:
            log.error("config_reload_failed", errors=exc.errors)
            return
        restart = [name for name in ("broker", "topics", "payload", "sensors", "pairing", "state")
                   if getattr(new, name) != getattr(self.cfg, name)]
        if restart:
            log.warning("config_reload_needs_restart", sections=restart)
        self.notifier.reloading()
        self.engine.reconfigure(new)
        self.cfg = self.cfg.model_copy(update={"learning": new.learning, "output": new.output,
                                               "logging": new.logging, "status": new.status})
        configure_logging(self.cfg.logging.level, self.cfg.logging.format)
        log.info("config_reloaded", path=str(self.config_path))
        self.notifier.ready()

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

    def _serve(self) -> None:
        self.recover()
        subs = [(self.t_readings.filter, self.cfg.topics.qos),
                (self.t_references.filter, self.cfg.topics.qos)]
        self.transport = Transport(endpoint_of(self.cfg), subs, self._enqueue,
                                   status_topic=status_topic(self.cfg))
        self.transport.start()
        log.info("service_started", client_id=self.cfg.broker.client_id,
                 state_dir=str(self.cfg.state.dir))
        now = time.monotonic()
        next_checkpoint = now + self.cfg.state.checkpoint_every
        next_stats = now + self.cfg.status.interval
        wd_interval = self.notifier.watchdog_interval
        next_watchdog = now
        ready = False
        while not self._stop.is_set():
            batch = self._drain()
            if batch:
                self.handle_batch(batch)
            now = time.monotonic()
            if not ready and self.transport.subscribed.is_set():
                ready = True
                self.notifier.ready()
            if self._reload.is_set():
                self._reload.clear()
                self.reload()
            if now >= next_checkpoint:
                next_checkpoint = now + self.cfg.state.checkpoint_every
                if self._dirty:
                    self.checkpoint()
            if now >= next_stats:
                next_stats = now + self.cfg.status.interval
                self.rejects.flush()
                if self.transport.connected.is_set():
                    self.publish_stats()
            if wd_interval is not None and now >= next_watchdog and self.transport.alive():
                next_watchdog = now + wd_interval
                self.notifier.watchdog()
        self._shutdown()

    def _shutdown(self) -> None:
        log.info("service_stopping")
        self.notifier.stopping()
        self.checkpoint()
        if self.transport is not None:
            if self.transport.connected.is_set():
                self.publish_stats()
            self.transport.stop(offline=True)
        self.store.close()
        log.info("service_stopped")
