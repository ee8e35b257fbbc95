"""Where and how the daemon connects: the endpoint, the broker password, and the backoff.

The ``[broker]`` section becomes an :class:`Endpoint` (the password read from an environment
variable or a file, never inline); reconnecting and storage retries wait by :class:`Backoff`.
"""

from __future__ import annotations

import os
import random
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

from trimtab.errors import ConfigError

if TYPE_CHECKING:
    from trimtab.config import Config

__all__ = ["Backoff", "Endpoint", "endpoint_of", "read_password"]


@dataclass(frozen=True, slots=True)
class Endpoint:
    """Where and how to connect; built from the config's ``[broker]`` section."""

    host: str
    port: int
    client_id: str
    protocol: str = "5"
    keepalive: int = 30
    session_expiry: int = 86400
    username: str | None = None
    password: str | None = field(default=None, repr=False)  # never in a log line or traceback
    tls: bool = False
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    verify: bool = True


def read_password(env: str | None, file: str | Path | None) -> str | None:
    """The broker password from an environment variable or a file (never inline)."""
    if env:
        value = os.environ.get(env)
        if value is None:
            raise ConfigError(f"broker.password_env: environment variable {env} is not set")
        return value
    if file:
        try:
            return Path(file).read_text().rstrip("\r\n")
        except OSError as exc:
            raise ConfigError(f"broker.password_file: cannot read {file}: {exc.strerror}") from exc
    return None


class Backoff:
    """Capped exponential backoff with full jitter; reset after a successful connect."""

    def __init__(self, first: float = 0.5, cap: float = 30.0, rng: random.Random | None = None):
        self.first = first
        self.cap = cap
        self.attempt = 0
        self._rng = rng or random.Random()

    def next(self) -> float:
        """The next delay: uniform in [first/2, min(cap, first·2^attempt)]."""
        ceiling = min(self.cap, self.first * (2.0**self.attempt))
        self.attempt += 1
        return self._rng.uniform(self.first / 2.0, max(ceiling, self.first / 2.0))

    def reset(self) -> None:
        self.attempt = 0


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
