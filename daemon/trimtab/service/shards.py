"""Static shards: which sensors a daemon serves, what it subscribes to, and moving a sensor.

MQTT shared subscriptions hand each message to any member of a group, with no per-sensor
affinity, so they cannot carry per-sensor state. trimtab scales out by static shards instead:
each daemon serves ``sensors.ids`` (pinned), plus the ids ``sensors.pattern`` matches whose
hash shard is ``sensors.shard_index`` of ``sensors.shard_count``, minus ``sensors.exclude``.

The hash is CRC-32 (the ISO-HDLC / IEEE 802.3 polynomial, as ``zlib.crc32`` computes it) of the
id's UTF-8 bytes, modulo the shard count: stable across processes, machines and Python versions,
unlike ``hash()``, which is salted per process.

Subscriptions: with ``topics.subscribe = "per_sensor"`` (ids only), one filter per sensor
topic, so the broker queues nothing for other daemons' sensors in this daemon's persistent
session; with ``"wildcard"`` (needed with a pattern), the templates' ``+`` filters, and messages
of sensors served elsewhere are dropped cheaply (counted as foreign, never logged one by one).
Filters a previous run subscribed and this one does not are unsubscribed at connect, from a
small ledger in the state directory, because a persistent session keeps its subscriptions.

Moving a sensor to this daemon: list it in ``sensors.incoming`` first. Its messages are then
queued in this daemon's session and kept, decoded, in a held file (a CRC-checked journal) in
the state directory, acknowledged only once durable, but not processed. After its state is
imported and the sensor moves from ``incoming`` to ``ids``, the next start feeds the held
events to the engine before anything else; the ones the old owner had already processed are
recognised by their event time and skipped, so no reference is lost or applied twice.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from trimtab.config.sensors import shard_of
from trimtab.errors import StateError
from trimtab.logs import get_logger
from trimtab.messages import Corrected, Reference
from trimtab.store.journal import Durability, Journal, fsync_directory, read_journal
from trimtab.store.privatefile import write_private
from trimtab.store.records import record_to_event

if TYPE_CHECKING:
    from trimtab.config import Config
    from trimtab.engine.engine import Engine

__all__ = ["HeldFile", "Released", "SubscriptionLedger", "plan_subscriptions", "release",
           "shard_of"]

log = get_logger("trimtab.shards")

HELD_NAME = "held.log"
LEDGER_NAME = "subscriptions.json"


def plan_subscriptions(cfg: Config) -> list[str]:
    """The topic filters this daemon subscribes to, sorted (QoS comes from the config).

    ``topics.subscribe = "wildcard"`` (needed with a pattern): one ``+`` filter per template.
    ``"per_sensor"``: each served and incoming sensor's readings and references topics, and
    each shared reference stream that serves one of them.
    """
    from trimtab.engine.wiring import topic_templates

    t_read, t_ref, _ = topic_templates(cfg)
    s = cfg.sensors
    if cfg.topics.subscribe == "wildcard":
        return sorted({t_read.filter, t_ref.filter})
    mine = set(s.ids) | set(s.incoming)
    filters = {t_read.format(x) for x in mine} | {t_ref.format(x) for x in mine}
    for shared in s.shared_references:
        if mine & set(shared.serves):
            filters.add(t_ref.format(shared.source))
    return sorted(filters)


class SubscriptionLedger:
    """The filters the last run subscribed to, kept beside the state (``subscriptions.json``)."""

    def __init__(self, directory: Path) -> None:
        self.path = Path(directory) / LEDGER_NAME

    def read(self) -> list[str]:
        """The filters recorded last time; none when there is no ledger yet."""
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            return []
        except (OSError, ValueError) as exc:
            raise StateError(f"{self.path}: cannot read the subscription ledger: {exc}") from exc
        if not isinstance(data, dict) or not isinstance(data.get("filters"), list) or not all(
                isinstance(f, str) for f in data["filters"]):
            raise StateError(f"{self.path}: the subscription ledger is not "
                             '{"filters": [string, ...]}')
        return list(data["filters"])

    def write(self, filters: Iterable[str]) -> None:
        """Record the filters now subscribed (atomically, owner-only like all state files)."""
        write_private(self.path, json.dumps({"filters": sorted(filters)}) + "\n")

    def stale(self, wanted: Iterable[str]) -> list[str]:
        """Filters subscribed by an earlier run that this run does not want, sorted."""
        return sorted(set(self.read()) - set(wanted))


class HeldFile:
    """Events of incoming sensors, kept until their state is imported (``held.log``)."""

    def __init__(self, directory: Path, durability: Durability) -> None:
        self.path = Path(directory) / HELD_NAME
        self._durability = durability
        self._journal: Journal | None = None
        self.count = 0
        self.first_t: dict[str, float] = {}

    def records(self) -> list[dict[str, Any]]:
        """Every held record, oldest first (a torn last line, from a crash, is ignored)."""
        if not self.path.exists():
            return []
        records, _ = read_journal(self.path)
        return records

    def open(self) -> None:
        """Open for appending; counts what an earlier run held."""
        if self._journal is None:
            self._journal = Journal.open(self.path, self._durability)
        for rec in self.records():
            self._note(rec)

    def _note(self, record: dict[str, Any]) -> None:
        self.count += 1
        sensor = str(record.get("sensor"))
        t = float(record.get("t", 0.0))
        if "reading" in record and sensor not in self.first_t:
            self.first_t[sensor] = t

    def append(self, record: dict[str, Any]) -> None:
        """Hold one event (the same record form as the journal's)."""
        if self._journal is None:
            self.open()
        assert self._journal is not None
        self._journal.append(record)
        self._note(record)

    def append_many(self, records: list[dict[str, Any]]) -> None:
        """Hold several events with one write: all of them or (on a storage fault) none."""
        if self._journal is None:
            self.open()
        assert self._journal is not None
        self._journal.append_many(records)
        for record in records:
            self._note(record)

    def sync(self) -> None:
        """Make what was held durable before it is acknowledged to the broker."""
        if self._journal is not None:
            self._journal.sync()

    def keep_only(self, records: list[dict[str, Any]]) -> None:
        """Replace the held file by ``records`` (those still waiting), atomically."""
        self.close()
        self.count = 0
        self.first_t = {}
        if not records:
            if self.path.exists():
                self.path.unlink()
                fsync_directory(self.path.parent)
            return
        tmp = self.path.with_suffix(".tmp")
        if tmp.exists():
            tmp.unlink()
        with Journal.open(tmp, self._durability) as journal:
            for rec in records:
                journal.append(rec)
            journal.sync()
        os.replace(tmp, self.path)
        fsync_directory(self.path.parent)
        for rec in records:
            self._note(rec)

    def close(self) -> None:
        if self._journal is not None:
            self._journal.close()
            self._journal = None


@dataclass(slots=True)
class Released:
    """What :func:`release` did: events fed, records still held, corrected values to publish."""

    fed: int = 0
    keep: list[dict[str, Any]] = field(default_factory=list)
    corrected: list[Corrected] = field(default_factory=list)


def release(records: Iterable[dict[str, Any]], cfg: Config, engine: Engine,
            journal: Callable[[Mapping[str, Any]], None]) -> Released:
    """Feed held events of sensors now served to the engine (journaling each); keep the rest.

    Events the old owner had already processed come again here and are skipped by event time
    (references must advance per sensor), so each reference is applied at most once. Only the
    corrected values of readings newer than the imported state are returned for publishing:
    the old owner published the earlier ones. A sensor served without imported state, or whose
    state ends before its first held reading, is logged (``handover_without_state``,
    ``handover_gap``): events may be missing between the two.
    """
    before: dict[str, Any] = engine.stats()["sensors"]
    out = Released()
    checked: set[str] = set()
    for rec in records:
        event = record_to_event(rec)
        if isinstance(event, Reference):
            serve = bool(cfg.reference_targets(event.sensor))
            still = cfg.reference_incoming(event.sensor)
        else:
            serve = cfg.sensor_allowed(event.sensor)
            still = event.sensor in cfg.sensors.incoming
            if serve and event.sensor not in checked:
                checked.add(event.sensor)
                _check_handover(event.sensor, event.t, before.get(event.sensor))
        if serve:
            journal(rec)
            old = (before.get(event.sensor) or {}).get("last_reading_t")
            for c in engine.process(event):
                if old is None or c.t > old:
                    out.corrected.append(c)
            out.fed += 1
        if still:
            out.keep.append(rec)
    return out


def _check_handover(sensor: str, first_t: float, state: Mapping[str, Any] | None) -> None:
    last = None if state is None else state.get("last_reading_t")
    if state is None:
        log.warning("handover_without_state", sensor=sensor, first_held_t=first_t,
                    hint="import the sensor's state before serving it")
    elif last is None or last < first_t:
        log.warning("handover_gap", sensor=sensor, state_last_reading_t=last,
                    first_held_t=first_t)
