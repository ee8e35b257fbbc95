"""What comes in: received messages, their decoding and timeliness, and what was refused.

The network thread hands each MQTT message on as an :class:`Inbound`; the main thread turns it
into a reading or reference of a sensor this daemon serves (or holds for a sensor being moved
here), or refuses it with a reason that :class:`RejectLog` counts and logs once per burst.
"""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from trimtab.errors import DecodeError
from trimtab.logs import get_logger
from trimtab.messages import Reading, Reference

if TYPE_CHECKING:
    from trimtab.config import Config
    from trimtab.wire.codec import JsonCodec, SenmlCodec
    from trimtab.wire.topics import TopicTemplate

__all__ = ["BURST_QUIET", "ENGINE_KEPT", "Inbound", "Processed", "RejectLog", "decode",
           "engine_refusals", "timely"]

log = get_logger("trimtab.service")

BURST_QUIET = 10.0
"""Seconds of quiet after which a refusal reason is logged again (in between: counted)."""


@dataclass(frozen=True, slots=True)
class Inbound:
    """One received MQTT message, as the network thread hands it on."""

    topic: str
    payload: bytes
    mid: int
    qos: int
    arrived: float = 0.0


@dataclass(slots=True)
class Processed:
    """A batch the engine has handled, to be made durable, then acknowledged and published."""

    batch: list[Inbound]
    records: list[dict[str, Any]]
    outputs: list[tuple[str, bytes]]
    received: Counter[str]
    held: list[dict[str, Any]] = field(default_factory=list)
    has_reference: bool = False
    journaled: bool = False
    held_written: bool = False


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


ENGINE_KEPT = frozenset({"reading_accepted", "reference_applied", "reference_level_shift",
                         "reference_pending", "scaler_moved"})
"""Engine counters that are not a refusal, a drop or a guard's intervention."""


def engine_refusals(before: Mapping[str, int], after: Mapping[str, int]) -> dict[str, int]:
    """The engine's refusal and guard counters that grew between two readings of its counts."""
    return {k: v - before.get(k, 0) for k, v in sorted(after.items())
            if k not in ENGINE_KEPT and v > before.get(k, 0)}



def decode(cfg: Config, codec: JsonCodec | SenmlCodec, readings: TopicTemplate,
       references: TopicTemplate, msg: Inbound) -> tuple[Reading | Reference, bool, bool]:
    """Topic and payload to (event, serve it, hold it); DecodeError with a reason otherwise.

    The reason ``foreign`` marks a sensor this daemon knows another daemon serves.
    """
    sensors = cfg.sensors
    sensor = readings.match(msg.topic)
    if sensor is not None:
        serve = cfg.sensor_allowed(sensor)
        hold = not serve and sensor in sensors.incoming
        if not (serve or hold):
            raise DecodeError("foreign" if sensors.elsewhere(sensor) else "unknown_sensor",
                              sensor)
        reading = codec.decode_reading(sensor, msg.payload)
        return timely(reading, cfg.pairing.max_future), serve, hold
    source = references.match(msg.topic)
    if source is not None:
        serve = bool(cfg.reference_targets(source))
        hold = cfg.reference_incoming(source)
        if not (serve or hold):
            raise DecodeError("foreign" if sensors.elsewhere(source) else "unknown_sensor",
                              source)
        event = codec.decode_reference(source, msg.payload)
        return timely(event, cfg.pairing.max_future), serve, hold
    raise DecodeError("unknown_topic", msg.topic)

def timely(event: Reading | Reference, max_future: float,
       now: Callable[[], float] = time.time) -> Reading | Reference:
    """Refuse an event stamped further ahead of the daemon's clock than pairing.max_future.

    One reading stamped in the year 9999 would otherwise become the sensor's clock and
    leave every later reference unmatched, or every later reference out of order. Past
    times are left to the engine (late and replayed data are normal); refused events are
    never journaled, so recovery and the running daemon agree.
    """
    ahead = event.t - now()
    if ahead > max_future:
        raise DecodeError("future_time", f"t = {event.t} is {ahead:.0f} s ahead of the clock")
    return event

