"""The validated configuration: one frozen pydantic tree, loaded from TOML, that cannot be unstable.

Every section forbids unknown keys; scalars are strictly typed (TOML has types: ``port = "1883"``
is an error, an integer where a float is expected is fine); floats must be finite. Cross-field
rules run at construction, so a ``Config`` that exists satisfies them, including the stability
proofs of :mod:`trimtab.model.stability`. The files a config names (TLS, password, initial model
state) are not opened here: :func:`file_problems` checks them where they must exist.

Errors come back as one :class:`~trimtab.errors.ConfigError` whose ``errors`` holds one line per
problem: ``"<file>: <dotted.field.path>: <message>"``.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import Annotated, Any, Literal

from pydantic import Field, Strict, ValidationError, model_validator

from trimtab.config.connection import BrokerSettings, PayloadSettings, TopicSettings
from trimtab.config.learning import LearningSettings, OutputSettings, PairingSettings
from trimtab.config.sensors import (
    Bool,
    PosFloat,
    Section,
    SensorSettings,
    SensorsSettings,
    Str,
)
from trimtab.errors import ConfigError
from trimtab.model import stability
from trimtab.wire.fielderrors import Loc, Problems, dotted, expand_errors, refuse
from trimtab.wire.tomlfile import read_toml

__all__ = [
    "Config",
    "LoggingSettings",
    "MetricsSettings",
    "StateSettings",
    "StatusSettings",
    "file_problems",
    "load_config",
    "parse_config",
]

class StateSettings(Section):
    """Where and how the models' state survives restarts."""

    dir: Str = Field(
        default="/var/lib/trimtab", description="state directory (journal, checkpoints)"
    )
    checkpoint_every: PosFloat = Field(default=300.0, description="s between checkpoints")
    durability: Literal["fsync", "flush"] = Field(
        default="fsync", description="journal write barrier"
    )


class LoggingSettings(Section):
    """Log level and renderer."""

    level: Literal["debug", "info", "warning", "error", "critical"] = Field(
        default="info", description="least severe level logged"
    )
    format: Literal["auto", "json", "console"] = Field(
        default="auto", description="auto: console on a TTY"
    )


class StatusSettings(Section):
    """The retained status message."""

    interval: PosFloat = Field(default=60.0, description="s between retained statistics messages")


class MetricsSettings(Section):
    """The optional Prometheus endpoint (needs the ``metrics`` extra: prometheus-client)."""

    enabled: Bool = Field(default=False, description="serve Prometheus metrics over HTTP")
    host: Str = Field(default="127.0.0.1", description="address to bind; localhost by default")
    port: Annotated[int, Strict(), Field(ge=1, le=65535)] = Field(
        default=9478, description="TCP port of the metrics endpoint"
    )
    max_sensor_labels: Annotated[int, Strict(), Field(ge=0, le=100000)] = Field(
        default=1000, description="most sensors given per-sensor series; the rest are counted"
    )


class Config(Section):
    """The whole configuration of one trimtab daemon."""

    broker: BrokerSettings
    topics: TopicSettings = Field(default_factory=lambda: TopicSettings())
    payload: PayloadSettings = Field(default_factory=lambda: PayloadSettings())
    sensors: SensorsSettings
    learning: LearningSettings = Field(default_factory=lambda: LearningSettings())
    pairing: PairingSettings = Field(default_factory=lambda: PairingSettings())
    output: OutputSettings = Field(default_factory=lambda: OutputSettings())
    state: StateSettings = Field(default_factory=lambda: StateSettings())
    logging: LoggingSettings = Field(default_factory=lambda: LoggingSettings())
    status: StatusSettings = Field(default_factory=lambda: StatusSettings())
    metrics: MetricsSettings = Field(default_factory=lambda: MetricsSettings())

    def settings_groups(self) -> dict[str, SensorSettings]:
        """Every distinct resolved settings: ``sensors.defaults`` and each override, by path."""
        return {dotted(loc): settings for loc, settings in self._groups()}

    def _groups(self) -> list[tuple[Loc, SensorSettings]]:
        groups: list[tuple[Loc, SensorSettings]] = [
            (("sensors", "defaults"), self.sensors.defaults)
        ]
        for sid, settings in self.sensors._resolved.items():
            groups.append((("sensors", "overrides", sid), settings))
        return groups

    def sensor_settings(self, sensor_id: str) -> SensorSettings:
        """A sensor's settings: its override merged over the defaults, or the defaults."""
        return self.sensors._resolved.get(sensor_id, self.sensors.defaults)

    def sensor_allowed(self, sensor_id: str) -> bool:
        """Whether this daemon serves the sensor (listed in ids or matched by the pattern)."""
        return self.sensors.allowed(sensor_id)

    def reference_targets(self, source_id: str) -> tuple[str, ...]:
        """The sensors a reference stream serves here: its shared list, else itself if served.

        Sensors of a shared list that another daemon serves (another shard, excluded, or still
        incoming) are left out.
        """
        return self.sensors.targets(source_id)

    def reference_incoming(self, source_id: str) -> bool:
        """Whether a reference stream serves a sensor listed in ``sensors.incoming``."""
        incoming = self.sensors.incoming
        if not incoming:
            return False
        return source_id in incoming or any(
            s in incoming for s in self.sensors._targets.get(source_id, ()))

    @model_validator(mode="after")
    def _rules(self) -> Config:
        p: Problems = []
        lc = self.learning
        if self.topics.subscribe == "per_sensor" and self.sensors.pattern is not None:
            p.append((("topics", "subscribe"), "per_sensor subscribes the topics of the ids "
                      "listed; with sensors.pattern set, use wildcard"))
        for base, settings in self._groups():
            label = dotted(base)
            unknown = [x for x in settings.inputs[1:] if x not in self.payload.covariates]
            if unknown:
                p.append(
                    (
                        (*base, "inputs"),
                        f"{unknown} not in payload.covariates "
                        f"{sorted(self.payload.covariates)} (rule: every input but raw is read "
                        "from the payload)",
                    )
                )
            chk = stability.step_check(
                label,
                terms=settings.term_count(),
                alpha_max=lc.alpha_max,
                lambda_max=lc.lambda_max,
                memory=lc.memory,
                clip=lc.feature_clip,
                normalised=lc.normalised,
            )
            why = chk.problem()
            if why:
                p.append((("learning", "alpha_max"), why))
        refuse(p)
        return self


# -- loading and error lines --------------------------------------------------------------------


def parse_config(data: Mapping[str, Any], source: str = "<config>") -> Config:
    """Validate a parsed TOML document; ConfigError lists one ``source: path: message`` a line."""
    if not isinstance(data, Mapping):
        raise ConfigError(f"{source}: the config must be a table of sections")
    try:
        return Config.model_validate(dict(data))
    except ValidationError as exc:
        lines = [f"{source}: {dotted(loc)}: {msg}" for loc, msg in expand_errors(exc, Config)]
        raise ConfigError(f"{source}: {len(lines)} problem(s) in the config", lines) from None


def load_config(path: str | os.PathLike[str]) -> Config:
    """Read and validate a TOML config file; a missing or unreadable file is an error."""
    return parse_config(read_toml(path, "config file"), os.fspath(path))


def file_problems(cfg: Config, source: str = "<config>") -> list[str]:
    """The files and variables a config names that are missing here, one error line each."""
    out: list[str] = []

    def need(path: str | None, where: str) -> None:
        if path is not None and not (os.path.isfile(path) and os.access(path, os.R_OK)):
            out.append(f"{source}: {where}: {path!r} is not a readable file")

    tls = cfg.broker.tls
    for name in ("ca_file", "cert_file", "key_file"):
        need(getattr(tls, name), f"broker.tls.{name}")
    need(cfg.broker.password_file, "broker.password_file")
    if cfg.broker.password_env is not None and cfg.broker.password_env not in os.environ:
        out.append(
            f"{source}: broker.password_env: the environment variable "
            f"{cfg.broker.password_env} is not set"
        )
    for label, settings in cfg.settings_groups().items():
        need(settings.initial_state, f"{label}.initial_state")
    d = cfg.state.dir
    probe = d
    while not os.path.exists(probe) and os.path.dirname(probe.rstrip("/")) not in ("", probe):
        probe = os.path.dirname(probe.rstrip("/"))
    if os.path.exists(d) and not os.path.isdir(d):
        out.append(f"{source}: state.dir: {d!r} exists and is not a directory")
    elif not os.access(probe if os.path.exists(probe) else ".", os.W_OK):
        out.append(f"{source}: state.dir: {d!r} cannot be written ({probe!r} is not writable)")
    return out


