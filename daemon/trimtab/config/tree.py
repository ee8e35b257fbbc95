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

from pydantic import BaseModel, Field, Strict, ValidationError, field_validator, model_validator

from trimtab.config.sensors import (
    Bool,
    FieldName,
    InputName,
    NonNegFloat,
    PosFloat,
    PosInt,
    Section,
    SensorOverride,
    SensorSettings,
    SensorsSettings,
    SharedReference,
    Str,
)
from trimtab.errors import ConfigError
from trimtab.model import stability
from trimtab.wire.fielderrors import Loc, Problems, dotted, expand_errors, key, refuse
from trimtab.wire.tomlfile import read_toml
from trimtab.wire.topics import TopicTemplate

__all__ = [
    "RELOADABLE",
    "BrokerSettings",
    "Config",
    "LearningSettings",
    "LoggingSettings",
    "MetricsSettings",
    "OutputSettings",
    "PairingSettings",
    "PayloadSettings",
    "SensorOverride",
    "SensorSettings",
    "SensorsSettings",
    "SharedReference",
    "StateSettings",
    "StatusSettings",
    "TlsSettings",
    "TopicSettings",
    "apply_reload",
    "file_problems",
    "load_config",
    "parse_config",
    "reloads_live",
    "restart_required",
]

class TlsSettings(Section):
    """TLS to the broker; with no ``ca_file`` the system's trust store is used."""

    enabled: Bool = Field(default=False, description="connect over TLS")
    ca_file: Str | None = Field(
        default=None, description="CA bundle (PEM); unset: system trust store"
    )
    cert_file: Str | None = Field(
        default=None, description="client certificate (PEM), with key_file"
    )
    key_file: Str | None = Field(
        default=None, description="client private key (PEM), with cert_file"
    )
    verify: Bool = Field(default=True, description="check the broker's certificate and host name")

    @model_validator(mode="after")
    def _rules(self) -> TlsSettings:
        problems: Problems = []
        if (self.cert_file is None) != (self.key_file is None):
            missing = "key_file" if self.key_file is None else "cert_file"
            problems.append(((missing,), "cert_file and key_file go together; one is unset"))
        if not self.enabled:
            for name in ("ca_file", "cert_file", "key_file"):
                if getattr(self, name) is not None:
                    problems.append(((name,), "set while enabled = false; enable TLS or remove it"))
        refuse(problems)
        return self


class BrokerSettings(Section):
    """The MQTT broker and this daemon's persistent session on it."""

    host: Str = Field(default="127.0.0.1", description="broker host name or address")
    port: Annotated[int, Strict(), Field(ge=1, le=65535)] = Field(
        default=1883, description="TCP port"
    )
    protocol: Literal["5", "3.1.1"] = Field(default="5", description="MQTT protocol version")
    client_id: Annotated[str, Strict(), Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_-]{0,63}$")] = Field(
        description="fixed client id; the persistent session is keyed by it"
    )
    keepalive: Annotated[int, Strict(), Field(ge=5, le=65535)] = Field(
        default=30, description="seconds between keep-alive pings"
    )
    session_expiry: Annotated[int, Strict(), Field(ge=1, le=4294967295)] = Field(
        default=86400, description="MQTT 5 session expiry interval in seconds (kept while away)"
    )
    publish_window: Annotated[int, Strict(), Field(ge=1, le=32768)] = Field(
        default=1000,
        description="corrected values published but not yet acknowledged by the broker, at most"
        " (input waits beyond it)",
    )
    username: Str | None = Field(default=None, description="user name for the broker")
    password_env: (
        Annotated[str, Strict(), Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]{0,127}$")] | None
    ) = Field(default=None, description="name of the environment variable holding the password")
    password_file: Str | None = Field(
        default=None, description="file whose first line is the password"
    )
    tls: TlsSettings = Field(default_factory=lambda: TlsSettings())

    @model_validator(mode="after")
    def _rules(self) -> BrokerSettings:
        problems: Problems = []
        if self.password_env is not None and self.password_file is not None:
            problems.append((("password_file",), "give password_env or password_file, not both"))
        has_password = self.password_env is not None or self.password_file is not None
        if has_password and self.username is None and self.protocol == "3.1.1":
            problems.append((("username",), "MQTT 3.1.1 sends a password only with a user name"))
        refuse(problems)
        return self


def _status_template(value: str) -> str:
    """A status topic: the rules of a sensor template, with an optional {client_id} level."""
    levels = value.split("/")
    stray = [lv for lv in levels if ("{" in lv or "}" in lv) and lv != "{client_id}"]
    if stray or levels.count("{client_id}") > 1:
        raise ValueError(
            f"status topic {value!r} may hold {{client_id}} once, as a whole level, "
            "and no other braces"
        )
    with_sensor = "/".join(lv if lv != "{client_id}" else "cid" for lv in levels) + "/{sensor}"
    try:
        TopicTemplate(with_sensor)  # the remaining rules: wildcards, '$', NUL, length
    except ValueError as exc:
        raise ValueError(str(exc).replace(repr(with_sensor), repr(value))) from None
    return value


def _collide(a: str, b: str) -> bool:
    """Whether two templates can name the same topic (placeholders match any level)."""
    la, lb = a.split("/"), b.split("/")
    return len(la) == len(lb) and all(
        x == y or x.startswith("{") or y.startswith("{") for x, y in zip(la, lb, strict=True)
    )


class TopicSettings(Section):
    """Topic templates (one ``{sensor}`` level each) and the QoS of subscriptions and publishes."""

    readings: Str = Field(default="sensors/{sensor}/raw", description="raw readings, subscribed")
    references: Str = Field(
        default="sensors/{sensor}/reference", description="references, subscribed"
    )
    corrected: Str = Field(
        default="sensors/{sensor}/corrected", description="corrected values, published"
    )
    status: Str = Field(
        default="trimtab/{client_id}/status", description="retained online/offline and statistics"
    )
    qos: Annotated[int, Strict(), Field(ge=0, le=2)] = Field(
        default=1, description="MQTT QoS 0, 1 or 2"
    )
    subscribe: Literal["wildcard", "per_sensor"] = Field(
        default="wildcard",
        description="one + filter per template, or one topic per listed sensor (ids only)",
    )

    @field_validator("readings", "references", "corrected")
    @classmethod
    def _template(cls, value: str) -> str:
        TopicTemplate(value)
        return value

    @field_validator("status")
    @classmethod
    def _status(cls, value: str) -> str:
        return _status_template(value)

    @model_validator(mode="after")
    def _rules(self) -> TopicSettings:
        names = ("readings", "references", "corrected", "status")
        problems: Problems = []
        for i, a in enumerate(names):
            for b in names[i + 1 :]:
                ta, tb = getattr(self, a), getattr(self, b)
                if _collide(ta, tb):
                    problems.append(
                        (
                            (b,),
                            f"{tb!r} can name the same topic as topics.{a} {ta!r} "
                            "(rule: the four templates never share a topic)",
                        )
                    )
        refuse(problems)
        return self


class PayloadSettings(Section):
    """How readings and references are encoded: flat JSON objects or SenML (RFC 8428) packs."""

    format: Literal["json", "senml"] = Field(default="json", description="payload encoding")
    time_field: FieldName = Field(
        default="t", description="JSON field of the event time (SenML uses t)"
    )
    value_field: FieldName = Field(default="raw", description="field / SenML name of the raw value")
    reference_field: FieldName = Field(
        default="value", description="field / SenML name of a reference"
    )
    window_field: FieldName = Field(
        default="window", description="field / SenML name of a window (s)"
    )
    covariates: dict[InputName, FieldName] = Field(
        default={"temp": "temp", "rh": "rh"},
        description="input name → payload field / SenML record name",
    )
    max_bytes: Annotated[int, Strict(), Field(ge=64, le=16777216)] = Field(
        default=65536, description="larger payloads are dropped unread"
    )

    @model_validator(mode="after")
    def _rules(self) -> PayloadSettings:
        problems: Problems = []
        if "raw" in self.covariates:
            problems.append(
                (("covariates", "raw"), "'raw' is the sensor's own value (value_field)")
            )
        reading = [self.time_field, self.value_field, *self.covariates.values()]
        reference = [self.time_field, self.reference_field, self.window_field]
        for kind, fields in (("reading", reading), ("reference", reference)):
            dupes = sorted({f for f in fields if fields.count(f) > 1})
            if dupes:
                problems.append(((), f"a {kind} payload would use the field(s) {dupes} twice"))
        refuse(problems)
        return self


class LearningSettings(Section):
    """The online step: step size and penalty with their bounds, loss, guards and memory."""

    alpha: PosFloat = Field(default=0.5, description="starting step size α")
    alpha_min: PosFloat = Field(default=0.01, description="α never halves below this")
    alpha_max: PosFloat = Field(default=1.0, description="largest α; the stability proofs use it")
    lam: NonNegFloat = Field(
        default=1.0, alias="lambda", description="ridge penalty λ toward the prior"
    )
    lambda_min: NonNegFloat = Field(default=0.0, description="smallest λ a tuner may choose")
    lambda_max: NonNegFloat = Field(
        default=10.0, description="largest λ; the stability proofs use it"
    )
    memory: PosInt = Field(default=200, description="references m the penalty is scaled over")
    normalised: Bool = Field(default=True, description="divide α by 1 + ‖φ‖² (normalised step)")
    huber_delta: PosFloat | None = Field(
        default=None, description="Huber δ in output units; unset: squared"
    )
    gate_k: PosFloat = Field(default=5.0, description="suspect beyond this many robust spreads")
    gate_run: PosInt = Field(
        default=3, description="suspects in a row on one side accepted as a shift"
    )
    max_references: PosInt = Field(
        default=60, description="most references a sensor learns from per reference_interval"
    )
    shift_after: NonNegFloat = Field(
        default=3600.0, description="s of event time a run of suspects must span to be a shift"
    )
    warmup: Annotated[int, Strict(), Field(ge=0)] = Field(
        default=5, description="references of warmup"
    )
    snapshot_every: PosInt = Field(
        default=10, description="applied references between good snapshots"
    )
    rollback_factor: Annotated[float, Strict(), Field(gt=1)] = Field(
        default=4.0,
        description="recent RMS error over the long-window robust error scale that rolls back",
    )
    error_window: PosInt = Field(
        default=200, description="applied references the rollback's robust error scale spans"
    )
    alpha_recovery: Annotated[float, Strict(), Field(ge=0, le=1)] = Field(
        default=0.1, description="after a good reference α moves this fraction back toward alpha"
    )
    step_adapt: Literal["gap", "none"] = Field(
        default="gap", description="raise a reference's step toward alpha_max after a long gap"
    )
    step_gap: PosFloat = Field(
        default=43200.0, description="s without a reference that lift the step halfway"
    )
    scaler: Literal["follow", "fixed"] = Field(
        default="follow", description="centre and scale follow the operating range, or stay"
    )
    scaler_span: PosFloat = Field(
        default=2592000.0, description="s; time constant of the followed operating range"
    )
    scaler_width: PosFloat = Field(
        default=2.0, description="a followed scale is this many running standard deviations"
    )
    feature_clip: PosFloat = Field(default=6.0, description="standardised terms clipped to ±this")
    reference_interval: PosFloat = Field(
        default=3600.0, description="expected seconds between references"
    )

    @model_validator(mode="after")
    def _rules(self) -> LearningSettings:
        p: Problems = []
        for name, lo, hi, lo_name, hi_name in (
            ("alpha", self.alpha_min, self.alpha_max, "alpha_min", "alpha_max"),
            ("lambda", self.lambda_min, self.lambda_max, "lambda_min", "lambda_max"),
        ):
            value = self.alpha if name == "alpha" else self.lam
            if lo > hi:
                p.append(
                    (
                        (lo_name,),
                        f"{lo_name} = {lo:g} > {hi_name} = {hi:g} "
                        f"(rule: {lo_name} ≤ {name} ≤ {hi_name})",
                    )
                )
            elif not lo <= value <= hi:
                p.append(
                    (
                        (name,),
                        f"{value:g} is outside [{lo_name}, {hi_name}] = "
                        f"[{lo:g}, {hi:g}] (rule: {lo_name} ≤ {name} ≤ {hi_name})",
                    )
                )
        why = stability.shrink_problem(self.alpha_max, self.lambda_max, self.memory)
        if why:
            p.append((("lambda_max",), why))
        refuse(p)
        return self


class PairingSettings(Section):
    """How a reference finds its readings: window mean or nearest reading, in event time."""

    window: PosFloat | None = Field(
        default=None, description="window (s) for references without one"
    )
    anchor: Literal["end", "start"] = Field(
        default="end", description="what a reference's time marks"
    )
    tolerance: PosFloat = Field(default=30.0, description="s; a spot reference's nearest reading")
    max_future: PosFloat = Field(
        default=600.0, description="s an event may be stamped ahead of the daemon's clock"
    )
    buffer_span: PosFloat = Field(
        default=7200.0, description="s of recent readings kept per sensor"
    )
    buffer_capacity: Annotated[int, Strict(), Field(ge=16, le=10000000)] = Field(
        default=10000, description="most readings kept per sensor (bounds memory)"
    )

    @model_validator(mode="after")
    def _rules(self) -> PairingSettings:
        p: Problems = []
        for name in ("window", "tolerance"):
            value = getattr(self, name)
            if value is not None and not self.buffer_span > value:
                p.append(
                    (
                        ("buffer_span",),
                        f"{self.buffer_span:g} s does not exceed pairing.{name}"
                        f" = {value:g} s (rule: buffer_span > {name})",
                    )
                )
        refuse(p)
        return self


class OutputSettings(Section):
    """What goes with each corrected value: band, cap and flags."""

    band_coverage: Annotated[float, Strict(), Field(gt=0, lt=1)] = Field(
        default=0.9, description="share of references the ± band should cover (calibrated online)"
    )
    band_gain: Annotated[float, Strict(), Field(gt=0, le=1)] = Field(
        default=0.05, description="step of the band's online calibration per reference"
    )
    cap: PosFloat | None = Field(
        default=None, description="largest absolute change corrected − raw; unset: no cap"
    )
    stale_after: PosFloat = Field(
        default=172800.0, description="s without a reference before `stale`"
    )
    extrapolation: PosFloat = Field(
        default=4.0, description="standardised input size beyond which `extrapolating` is flagged"
    )


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
        shared = self.sensors._targets.get(source_id)
        if shared is not None:
            return tuple(s for s in shared if self.sensor_allowed(s))
        return (source_id,) if self.sensor_allowed(source_id) else ()

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


def _leaves(model: type[BaseModel], prefix: str) -> list[str]:
    return [f"{prefix}.{f.alias or n}" for n, f in model.model_fields.items()]


RELOADABLE: frozenset[str] = frozenset(
    [
        *_leaves(LearningSettings, "learning"),
        *_leaves(OutputSettings, "output"),
        "logging.level",
        "status.interval",
        "pairing.tolerance",
    ]
)
"""Dotted leaf paths a SIGHUP reload applies live; a change anywhere else needs a restart."""

SERVING: frozenset[str] = frozenset(
    ["sensors.ids", "sensors.pattern", "sensors.exclude", "sensors.max"]
)
"""Which sensors are served: live when the daemon subscribes by wildcard (the subscriptions
stay the same); with ``topics.subscribe = "per_sensor"`` a change needs a restart."""


def reloads_live(path: str, cfg: Config) -> bool:
    """Whether a change at ``path`` takes effect on SIGHUP: the one table of what reloads."""
    return path in RELOADABLE or (path in SERVING and cfg.topics.subscribe == "wildcard")


def apply_reload(old: Config, new: Config) -> tuple[Config, tuple[str, ...], tuple[str, ...]]:
    """The config a reload puts in force, the paths it changed live and those left for a restart.

    The applied config is the old one with every live-reloadable changed leaf taken from the
    new one, validated again; service and engine both get this one object.
    """
    a = _flatten(old.model_dump(by_alias=True), "")
    b = _flatten(new.model_dump(by_alias=True), "")
    changed = sorted(k for k in a.keys() | b.keys() if a.get(k, None) != b.get(k, None))
    live = tuple(k for k in changed if reloads_live(k, old) and reloads_live(k, new))
    later = tuple(k for k in changed if k not in live)
    data = old.model_dump(by_alias=True, exclude_none=True)
    fresh = new.model_dump(by_alias=True, exclude_none=True)
    for path in live:
        src, dst = fresh, data
        *parents, leaf = path.split(".")
        for part in parents:
            src = src.get(part, {})
            dst = dst.setdefault(part, {})
        if leaf in src:
            dst[leaf] = src[leaf]
        else:
            dst.pop(leaf, None)
    return parse_config(data, "<reloaded config>"), live, later


def _flatten(value: Any, prefix: str) -> dict[str, Any]:
    if isinstance(value, dict):
        out: dict[str, Any] = {}
        for k, v in value.items():
            out.update(_flatten(v, f"{prefix}.{key(k)}" if prefix else key(k)))
        return out or {prefix: {}}
    return {prefix: value}


def restart_required(old: Config, new: Config) -> tuple[str, ...]:
    """The changed paths between two configs that a reload cannot apply live, sorted."""
    return apply_reload(old, new)[2]
