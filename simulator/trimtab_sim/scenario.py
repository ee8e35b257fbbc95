"""Scenario files: what a simulated site, its sensors and its references look like.

A scenario is one TOML file validated into a pydantic tree with ``extra="forbid"``. Every
sensor in a scenario measures the same air (one site); every reference instrument or check
serves the sensors it lists. Times inside a scenario are given in days and hours from the
scenario's ``start``; intervals, windows and lags in seconds.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from trimtab.errors import ConfigError, DecodeError
from trimtab.wire.fielderrors import dotted, expand_errors
from trimtab.wire.tomlfile import read_toml
from trimtab.wire.topics import validate_sensor_id

NonNeg = Annotated[float, Field(ge=0.0)]
Pos = Annotated[float, Field(gt=0.0)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Episodes(_Strict):
    """Weather-driven episodes (e.g. stagnant air trapping pollution) added to the signal."""

    per_day: NonNeg = 0.0
    mean_height: NonNeg = 0.0
    mean_hours: Pos = 8.0


class Signal(_Strict):
    """The true quantity the sensors are exposed to."""

    unit: str = ""
    base: float = 10.0
    daily_amplitude: float = 0.0
    daily_peak_hour: Annotated[float, Field(ge=0.0, lt=24.0)] = 8.0
    weekly: Annotated[list[Annotated[float, Field(ge=0.0)]], Field(min_length=7, max_length=7)] = (
        Field(default_factory=lambda: [1.0] * 7)
    )
    wander: NonNeg = 0.0
    wander_hours: Pos = 6.0
    floor: float | None = 0.0
    episodes: Episodes = Field(default_factory=Episodes)


class Weather(_Strict):
    """Temperature and relative humidity, with daily cycles tied to the signal's episodes."""

    temp_mean: float = 15.0
    temp_daily_amplitude: NonNeg = 5.0
    temp_peak_hour: Annotated[float, Field(ge=0.0, lt=24.0)] = 15.0
    temp_wander: NonNeg = 1.0
    rh_mean: Annotated[float, Field(ge=0.0, le=100.0)] = 65.0
    rh_daily_amplitude: NonNeg = 10.0
    rh_wander: NonNeg = 5.0
    wander_hours: Pos = 12.0
    episode_temp: float = 0.0
    episode_rh: float = 0.0
    temp_trend_per_day: float = 0.0
    """Seasonal change of the mean temperature, °C per day (spring into summer: positive)."""
    rh_trend_per_day: float = 0.0
    """Seasonal change of the mean relative humidity, % per day."""
    rh_min: Annotated[float, Field(ge=0.0, le=100.0)] = 5.0
    rh_max: Annotated[float, Field(ge=0.0, lt=100.0)] = 98.0

    @model_validator(mode="after")
    def _rh_range(self) -> Weather:
        if self.rh_min >= self.rh_max:
            raise ValueError(f"rh_min ({self.rh_min}) must be below rh_max ({self.rh_max})")
        return self


class Drift(_Strict):
    """Slow change of a sensor's gain and offset with age."""

    offset_per_day: float = 0.0
    gain_per_day: float = 0.0
    offset_walk: NonNeg = 0.0
    gain_walk: NonNeg = 0.0


class Step(_Strict):
    """A maintenance visit at ``day``: gain and offset jump; ``reset`` undoes drift so far."""

    day: NonNeg
    offset: float = 0.0
    gain: float = 0.0
    reset: bool = False


class Cross(_Strict):
    """Cross-sensitivity to temperature and humidity.

    ``kappa`` applies the hygroscopic growth factor ``1 + kappa * rh / (100 - rh)`` to the
    exposure, the single-parameter κ-Köhler form used for optical particle counters.
    """

    temp: float = 0.0
    temp_ref: float = 20.0
    rh: float = 0.0
    rh_ref: float = 50.0
    kappa: NonNeg = 0.0


class Faults(_Strict):
    """Noise and failures of one sensor."""

    noise: NonNeg = 0.0
    noise_rel: NonNeg = 0.0
    spike_prob: Annotated[float, Field(ge=0.0, le=1.0)] = 0.0
    spike_size: float = 0.0
    stuck_per_day: NonNeg = 0.0
    stuck_minutes: Pos = 30.0
    dropout_per_day: NonNeg = 0.0
    dropout_minutes: Pos = 60.0


class Sensor(_Strict):
    """One low-cost sensor and how its raw value responds to the air around it."""

    id: str
    interval: Pos = 60.0
    gain: float = 1.0
    offset: float = 0.0
    covariates: list[Literal["temp", "rh"]] = Field(default_factory=lambda: ["temp", "rh"])  # type: ignore[arg-type]
    temp_noise: NonNeg = 0.2
    rh_noise: NonNeg = 1.0
    clip_min: float | None = None
    decimals: Annotated[int, Field(ge=0, le=9)] = 3
    drift: Drift = Field(default_factory=Drift)
    steps: list[Step] = Field(default_factory=list)
    cross: Cross = Field(default_factory=Cross)
    faults: Faults = Field(default_factory=Faults)

    @field_validator("id")
    @classmethod
    def _id_ok(cls, v: str) -> str:
        try:
            validate_sensor_id(v)
        except DecodeError as exc:
            raise ValueError(exc.detail) from exc
        return v


class Period(_Strict):
    """A span of days, from ``start_day`` (inclusive) to ``end_day`` (exclusive)."""

    start_day: NonNeg
    end_day: Pos

    @model_validator(mode="after")
    def _ordered(self) -> Period:
        if self.end_day <= self.start_day:
            raise ValueError(f"end_day ({self.end_day}) must be after start_day ({self.start_day})")
        return self


class ReferenceSpec(_Strict):
    """A co-located reference instrument reporting every ``every`` seconds.

    ``window`` > 0: the value is the true mean over the window; 0: a spot value at ``t``.
    ``periods`` empty means co-located for the whole run. ``lag`` is the reporting delay:
    it does not move the event in the file (events stay in ``t`` order); a player may
    publish the reference ``lag`` seconds after ``t``.
    """

    id: str = "reference"
    serves: Annotated[list[str], Field(min_length=1)]
    every: Pos = 3600.0
    window: NonNeg = 3600.0
    stamp: Literal["end", "start"] = "end"
    periods: list[Period] = Field(default_factory=list)
    noise: NonNeg = 0.0
    noise_rel: NonNeg = 0.0
    lag: NonNeg = 0.0
    decimals: Annotated[int, Field(ge=0, le=9)] = 3


class CheckSpec(_Strict):
    """Periodic checks: each level of a check gas applied in turn, or a handheld visit.

    With ``levels`` the served sensors are exposed to each level for ``duration`` seconds and
    the reference is the level over the inner window (``settle`` seconds trimmed from each
    end). With no levels it is a visit with a calibrated handheld: the reference is the
    ambient mean over the same inner window.
    """

    id: str = "check"
    serves: Annotated[list[str], Field(min_length=1)]
    every_days: Pos = 7.0
    first_day: NonNeg = 0.0
    at_hour: Annotated[float, Field(ge=0.0, lt=24.0)] = 10.0
    levels: list[float] = Field(default_factory=list)
    duration: Pos = 900.0
    settle: NonNeg = 120.0
    stamp: Literal["end", "start"] = "end"
    noise: NonNeg = 0.0
    lag: NonNeg = 0.0
    decimals: Annotated[int, Field(ge=0, le=9)] = 3

    @model_validator(mode="after")
    def _window_left(self) -> CheckSpec:
        if self.duration <= 2 * self.settle:
            raise ValueError(f"duration ({self.duration}) must exceed twice settle ({self.settle})")
        return self


class ScoreSpec(_Strict):
    """How a run of this scenario is scored (see ``trimtab_sim.score``)."""

    min_improvement: Annotated[float, Field(ge=0.0, lt=1.0)] = 0.2
    targets: Literal["pm25", "o3", "none"] = "none"
    oracle_days: Pos = 1.0
    oracle_lambda: NonNeg = 1.0
    recovery_window: Pos = 3600.0
    recovery_tolerance: Pos | None = None


class Scenario(_Strict):
    """A whole simulated site: signal, weather, sensors, references, checks and scoring."""

    name: str
    description: str = ""
    start: datetime = datetime(2026, 1, 5, tzinfo=UTC)
    days: Annotated[float, Field(gt=0.0, le=366.0)] = 14.0
    step: Pos = 10.0
    signal: Signal = Field(default_factory=Signal)
    weather: Weather = Field(default_factory=Weather)
    sensors: Annotated[list[Sensor], Field(min_length=1)]
    references: list[ReferenceSpec] = Field(default_factory=list)
    checks: list[CheckSpec] = Field(default_factory=list)
    score: ScoreSpec = Field(default_factory=ScoreSpec)

    @field_validator("start", mode="before")
    @classmethod
    def _start_aware(cls, v: Any) -> Any:
        if isinstance(v, int | float) and not isinstance(v, bool):
            return datetime.fromtimestamp(float(v), tz=UTC)
        return v

    @field_validator("start")
    @classmethod
    def _start_has_zone(cls, v: datetime) -> datetime:
        if v.tzinfo is None:
            raise ValueError("must carry a time zone (e.g. 2026-01-05T00:00:00Z)")
        return v

    @property
    def t0(self) -> float:
        """Start of the run, epoch seconds."""
        return self.start.timestamp()

    @property
    def duration(self) -> float:
        """Length of the run in seconds."""
        return self.days * 86400.0

    def sensor(self, sensor_id: str) -> Sensor:
        """The sensor called ``sensor_id``; KeyError if there is none."""
        for s in self.sensors:
            if s.id == sensor_id:
                return s
        raise KeyError(sensor_id)

    @model_validator(mode="after")
    def _cross_checks(self) -> Scenario:
        problems = list(_cross_field_problems(self))
        if problems:
            raise ValueError("; ".join(problems))
        return self


def _multiple(value: float, step: float) -> bool:
    q = value / step
    return abs(q - round(q)) < 1e-9 and round(q) >= 1


def _cross_field_problems(sc: Scenario) -> list[str]:
    out: list[str] = []
    if not _multiple(sc.duration, sc.step):
        out.append(f"days: run length must be a whole number of step ({sc.step} s)")
    ids = [s.id for s in sc.sensors]
    for i, s in enumerate(sc.sensors):
        if ids.index(s.id) < i:
            out.append(f"sensors.{i}.id: duplicate sensor id {s.id!r}")
        if not _multiple(s.interval, sc.step):
            out.append(f"sensors.{i}.interval: must be a whole multiple of step ({sc.step} s)")
        for j, st in enumerate(s.steps):
            if st.day >= sc.days:
                out.append(f"sensors.{i}.steps.{j}.day: must lie within the run (< {sc.days})")
    served = [("references", i, r.serves) for i, r in enumerate(sc.references)]
    served += [("checks", i, c.serves) for i, c in enumerate(sc.checks)]
    for kind, i, serves in served:
        out += [f"{kind}.{i}.serves: unknown sensor {n!r}" for n in serves if n not in ids]
    for i, ref in enumerate(sc.references):
        if ref.window > 0 and not _multiple(ref.window, sc.step):
            out.append(f"references.{i}.window: must be 0 or a whole multiple of step")
        if ref.window > ref.every:
            out.append(f"references.{i}.window: must not exceed every ({ref.every} s)")
        for j, p in enumerate(ref.periods):
            if p.end_day > sc.days:
                out.append(f"references.{i}.periods.{j}.end_day: must be <= days ({sc.days})")
    for i, chk in enumerate(sc.checks):
        if not _multiple(chk.duration, sc.step) or (
            chk.settle > 0 and not _multiple(chk.settle, sc.step)
        ):
            out.append(f"checks.{i}.duration: duration and settle must be multiples of step")
        if max(1, len(chk.levels)) * chk.duration > chk.every_days * 86400.0:
            out.append(f"checks.{i}.every_days: a check must end before the next begins")
    return out


def _index_path(line: str) -> str:
    """``sensors.0.interval: …`` with its path written as config errors write it: ``sensors[0]``."""
    path, sep, rest = line.partition(": ")
    return re.sub(r"\.(\d+)(?=\.|$)", r"[\1]", path) + sep + rest


def parse_scenario(data: dict[str, Any], source: str = "scenario") -> Scenario:
    """Validate a parsed TOML table; ConfigError lists ``source: path: message`` a problem.

    The lines read like a config's: the file, the field path, what is wrong, and for an
    unknown key the closest allowed one (``did you mean 'daily_amplitude'?``).
    """
    try:
        return Scenario.model_validate(data)
    except ValidationError as exc:
        errors: list[str] = []
        for loc, msg in expand_errors(exc, Scenario):
            if not loc and ": " in msg:
                # cross-field problems already name their own field paths
                errors += [f"{source}: {_index_path(line)}" for line in msg.split("; ")]
            else:
                errors.append(f"{source}: {dotted(loc)}: {msg}")
        raise ConfigError(f"{source}: invalid scenario ({len(errors)} problems)", errors) from None


def load_scenario(path: str | Path) -> Scenario:
    """Load and validate a scenario TOML file; a missing or unreadable file is an error."""
    data = read_toml(path, "scenario file")
    return parse_scenario(data, str(path))
