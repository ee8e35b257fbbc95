"""The messages that flow through the engine: decoded readings and references, and outputs."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field


@dataclass(frozen=True, slots=True)
class Reading:
    """One raw reading of a sensor at event time ``t`` (epoch seconds, UTC).

    ``inputs`` maps input names (the raw value under ``"raw"`` and covariates such as
    ``"temp"``, ``"rh"``) to floats. ``truth`` is carried by simulated streams for scoring only;
    the engine never reads it.
    """

    t: float
    sensor: str
    inputs: Mapping[str, float]
    truth: float | None = None


@dataclass(frozen=True, slots=True)
class Reference:
    """A trusted value for ``sensor`` at event time ``t``.

    ``window`` (seconds) means the value is a mean over a window; ``None`` means a spot value
    paired with the nearest reading. Whether ``t`` marks the window's start or end is a config
    setting of the pairing.
    """

    t: float
    sensor: str
    value: float
    window: float | None = None


@dataclass(frozen=True, slots=True)
class Corrected:
    """A corrected value published for one reading."""

    t: float
    sensor: str
    value: float
    raw: float
    band: float
    flags: tuple[str, ...] = field(default=())
    updates: int = 0


Event = Reading | Reference
