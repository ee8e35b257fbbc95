"""The one error family of trimtab. This module imports nothing else of ours."""

from __future__ import annotations


class TrimtabError(Exception):
    """Base of every error trimtab raises on purpose."""


class ArgumentError(TrimtabError, ValueError):
    """A value handed to a function or constructor is outside what it accepts (a parameter, a
    name, a template). Also a ``ValueError``, the type pydantic validators and the standard
    library expect from such checks."""


class EncodeError(TrimtabError, ValueError):
    """A value cannot be written in the chosen format: a non-finite number, a time or flag the
    format cannot carry. Also a ``ValueError``, as the standard library's encoders raise."""


class ModelError(TrimtabError):
    """A model cannot be built, fitted or updated as asked (e.g. an unsolvable fit)."""


class DataError(TrimtabError):
    """Input data (a CSV, a stream file, a model-state file) is malformed; says where."""


class ConfigError(TrimtabError):
    """A configuration file is missing, unreadable, or fails validation.

    ``errors`` holds one line per problem, each naming the field path and the rule.
    """

    def __init__(self, message: str, errors: list[str] | None = None) -> None:
        super().__init__(message)
        self.errors: list[str] = list(errors) if errors else [message]


class DecodeError(TrimtabError):
    """A message payload or topic cannot be decoded. ``reason`` is a stable snake_case word."""

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail


class StateError(TrimtabError):
    """Persistent state (journal, checkpoint) is unreadable or inconsistent."""


class StateFault(StateError):
    """The daemon's state directory cannot be used (read-only, full at start, failing, or its
    state unrecoverable): a runtime fault of the gateway, not bad usage; its own exit code."""


class TransportError(TrimtabError):
    """The MQTT transport failed in a way the caller must hear about (e.g. TLS set-up)."""
