"""The sections of how the daemon talks: the broker and its TLS, the topics, the payloads."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, Strict, field_validator, model_validator

from trimtab.config.sensors import (
    Bool,
    FieldName,
    InputName,
    Section,
    Str,
)
from trimtab.wire.fielderrors import Problems, refuse
from trimtab.wire.topics import TopicTemplate

__all__ = ["BrokerSettings", "PayloadSettings", "TlsSettings", "TopicSettings"]


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
