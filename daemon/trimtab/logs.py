"""Logging for trimtab: structlog configured once, from one call.

``configure_logging`` sets up every logger of the process in one go:

* ``fmt="json"`` (or ``"auto"`` on a stream that is not a TTY, as under systemd): one JSON
  object per line with ``timestamp`` (ISO 8601, UTC, ``Z``), ``level`` and ``event``, then the
  event's key-value context;
* ``fmt="console"`` (or ``"auto"`` on a TTY): structlog's human-readable console renderer.

Events below ``level`` are dropped before any work is done on them. Records from the standard
library's ``logging`` (paho-mqtt, for one) go through the same renderer, so a log file holds
one format only. Two processors run on every event before it is rendered:

* any key named like a credential (``password``, ``secret``, ``token``, ``api_key``, …), at any
  depth of nested dicts and lists, has its value replaced by ``"***"``: a secret never reaches
  a log line, whoever logs it;
* a non-finite float (``nan``, ``inf``) becomes the string ``"nan"``/``"inf"``/``"-inf"``, so
  every JSON line stays strict JSON.

Event names are stable snake_case words (``journal_tail_truncated``), with key-value context,
never formatted strings. Calling ``configure_logging`` again reconfigures; tests call
``reset_logging`` to return to structlog's defaults.
"""

from __future__ import annotations

import logging
import math
import re
import sys
from collections.abc import Mapping
from typing import Any, Literal, TextIO, cast

import structlog
from structlog.typing import EventDict, FilteringBoundLogger, Processor, WrappedLogger

from trimtab.errors import ConfigError

__all__ = ["LEVELS", "MASK", "configure_logging", "get_logger", "reset_logging"]

LEVELS: dict[str, int] = {
    "debug": logging.DEBUG,
    "info": logging.INFO,
    "warning": logging.WARNING,
    "error": logging.ERROR,
    "critical": logging.CRITICAL,
}

MASK = "***"

# Substrings that mark a key as holding a credential (compared case-insensitively, with "-"
# read as "_"). A harmless key that matches is masked too: masking too much costs nothing.
_SECRET_KEY = re.compile(
    r"password|passwd|passphrase|secret|token|api_?key|credential|private_?key|authorization"
)

# The handler this module put on the root logger, so reconfiguring replaces it, never stacks.
_root_handler: logging.Handler | None = None


def _is_secret_key(key: object) -> bool:
    return isinstance(key, str) and _SECRET_KEY.search(key.lower().replace("-", "_")) is not None


def _mask(value: Any) -> Any:
    """A copy of ``value`` with every credential-named key's value masked, at any depth."""
    if isinstance(value, Mapping):
        return {k: MASK if _is_secret_key(k) else _mask(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_mask(v) for v in value]
    return value


def mask_secrets(_logger: WrappedLogger, _method: str, event_dict: EventDict) -> EventDict:
    """Processor: replace the value of every credential-named key by ``MASK``."""
    for key, value in list(event_dict.items()):
        if _is_secret_key(key):
            event_dict[key] = MASK
        elif isinstance(value, Mapping | list | tuple):
            event_dict[key] = _mask(value)
    return event_dict


def _finite(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)  # 'nan', 'inf', '-inf'
    if isinstance(value, Mapping):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


def stringify_non_finite(_logger: WrappedLogger, _method: str, event_dict: EventDict) -> EventDict:
    """Processor: turn non-finite floats into strings so JSON lines stay strict JSON."""
    for key, value in list(event_dict.items()):
        event_dict[key] = _finite(value)
    return event_dict


# Tracebacks as structured data in JSON lines, without local variables (they may hold secrets).
_JSON_TRACEBACKS = structlog.processors.ExceptionRenderer(
    structlog.tracebacks.ExceptionDictTransformer(show_locals=False)
)


def _lead_keys(_logger: WrappedLogger, _method: str, event_dict: EventDict) -> EventDict:
    """Processor: put ``timestamp``, ``level`` and ``event`` first, for people reading lines."""
    lead = {k: event_dict.pop(k) for k in ("timestamp", "level", "event") if k in event_dict}
    return {**lead, **event_dict}


def _resolve_format(fmt: str, stream: TextIO) -> Literal["json", "console"]:
    if fmt == "json":
        return "json"
    if fmt == "console":
        return "console"
    if fmt != "auto":
        raise ConfigError(f"log format {fmt!r} is not one of 'auto', 'json', 'console'")
    try:
        tty = stream.isatty()
    except (AttributeError, ValueError):  # a closed or minimal stream is not a terminal
        tty = False
    return "console" if tty else "json"


class _CurrentStderr:
    """Writes to whatever ``sys.stderr`` is at the time of writing (it may be replaced later,
    as test runners and daemonisers do), never to a stream captured when logging was set up."""

    def write(self, text: str) -> int:
        return sys.stderr.write(text)

    def flush(self) -> None:
        sys.stderr.flush()

    def isatty(self) -> bool:
        return sys.stderr.isatty()


def configure_logging(
    level: str = "info",
    fmt: Literal["auto", "json", "console"] = "auto",
    stream: TextIO | None = None,
) -> None:
    """Configure structlog and the stdlib root logger for the whole process, in one call.

    ``level`` is one of ``LEVELS`` (case-insensitive); ``stream`` defaults to ``sys.stderr``,
    where systemd collects it. Calling again replaces the previous configuration.
    """
    numeric = LEVELS.get(level.lower())
    if numeric is None:
        raise ConfigError(f"log level {level!r} is not one of {', '.join(LEVELS)}")
    out: TextIO = _CurrentStderr() if stream is None else stream  # type: ignore[assignment]
    chosen = _resolve_format(fmt, out)

    shared: list[Processor] = [
        _name_key,
        structlog.contextvars.merge_contextvars,
        structlog.processors.add_log_level,
        structlog.processors.TimeStamper(fmt="iso", utc=True, key="timestamp"),
        mask_secrets,
        stringify_non_finite,
    ]
    renderer: Processor
    if chosen == "json":
        renderer = structlog.processors.JSONRenderer()
        tail: list[Processor] = [_JSON_TRACEBACKS, _lead_keys, renderer]
    else:
        # plain_traceback: the rich formatter would print local variables, secrets included.
        renderer = structlog.dev.ConsoleRenderer(
            colors=_colors_wanted(out), exception_formatter=structlog.dev.plain_traceback
        )
        tail = [renderer]

    structlog.configure(
        processors=[*shared, structlog.processors.StackInfoRenderer(), *tail],
        wrapper_class=structlog.make_filtering_bound_logger(numeric),
        logger_factory=structlog.WriteLoggerFactory(file=out),
        # Not cached: module-level loggers must follow a later reconfiguration.
        cache_logger_on_first_use=False,
    )
    _route_stdlib(numeric, out, shared, renderer, chosen)


def _colors_wanted(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def _route_stdlib(
    numeric: int,
    stream: TextIO,
    shared: list[Processor],
    renderer: Processor,
    chosen: str,
) -> None:
    """Send the stdlib ``logging`` records through the same processors and renderer."""
    global _root_handler
    final: list[Processor] = [structlog.stdlib.ProcessorFormatter.remove_processors_meta]
    if chosen == "json":
        final += [_JSON_TRACEBACKS, _lead_keys]
    final.append(renderer)
    formatter = structlog.stdlib.ProcessorFormatter(
        foreign_pre_chain=[structlog.stdlib.add_logger_name, *shared],
        processors=final,
    )
    handler = logging.StreamHandler(stream)
    handler.setFormatter(formatter)
    root = logging.getLogger()
    if _root_handler is not None:
        root.removeHandler(_root_handler)
    root.addHandler(handler)
    root.setLevel(numeric)
    _root_handler = handler


def reset_logging() -> None:
    """Return structlog to its defaults and remove the root handler ``configure_logging`` added."""
    global _root_handler
    structlog.reset_defaults()
    if _root_handler is not None:
        logging.getLogger().removeHandler(_root_handler)
        _root_handler = None
    logging.getLogger().setLevel(logging.WARNING)


def get_logger(name: str | None = None) -> FilteringBoundLogger:
    """A structlog logger; ``name`` (usually ``__name__``) is added to each event as ``logger``."""
    if name is None:
        return cast(FilteringBoundLogger, structlog.get_logger())
    # structlog.get_logger(logger=...) collides with its own parameter named ``logger``: the
    # name travels as ``logger_name`` and _name_key renames it in every event.
    return cast(FilteringBoundLogger, structlog.get_logger(logger_name=name))


def _name_key(_logger: WrappedLogger, _method: str, event: EventDict) -> EventDict:
    """Put a named logger's name under the key ``logger`` (see :func:`get_logger`)."""
    if "logger_name" in event:
        event["logger"] = event.pop("logger_name")
    return event
