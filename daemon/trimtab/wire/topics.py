"""MQTT topic templates with one ``{sensor}`` level, and the sensor-id rule they enforce.

A sensor id ends up in topic names, log lines, checkpoint keys and file names, so it is held to
a short, boring alphabet: it starts with a letter or digit, continues with letters, digits,
``.``, ``_`` or ``-``, is at most 64 characters long and never contains ``..``. That excludes
path separators, MQTT wildcards (``+``, ``#``), control characters and whitespace by
construction.
"""

from __future__ import annotations

import re

from trimtab.errors import ArgumentError, DecodeError

__all__ = ["PLACEHOLDER", "SENSOR_ID_PATTERN", "TopicTemplate", "validate_sensor_id"]

SENSOR_ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
"""What a sensor id looks like (matched against the whole string, trailing newline included)."""

PLACEHOLDER = "{sensor}"
"""The one placeholder a topic template carries, as a whole topic level."""

_SENSOR_ID = re.compile(SENSOR_ID_PATTERN)
_MAX_TOPIC_BYTES = 65535  # MQTT's limit on a UTF-8 encoded topic name


def _show(s: str) -> str:
    """A hostile string shown safely in an error detail: repr, cut to a readable length."""
    return repr(s) if len(s) <= 80 else repr(s[:80]) + "..."


_VALID_IDS: set[str] = set()
_VALID_IDS_LIMIT = 65536  # ids already checked; bounded, so hostile ids cannot grow it


def validate_sensor_id(s: str) -> str:
    """Return ``s`` if it is a valid sensor id; raise ``DecodeError("bad_sensor_id")`` if not."""
    if type(s) is str and s in _VALID_IDS:
        return s
    if not isinstance(s, str):
        raise DecodeError("bad_sensor_id", f"sensor id must be a string, got {type(s).__name__}")
    if _SENSOR_ID.fullmatch(s) is None:
        raise DecodeError(
            "bad_sensor_id",
            f"sensor id {_show(s)} must be 1-64 characters of A-Z a-z 0-9 . _ - "
            "starting with a letter or digit",
        )
    if ".." in s:
        raise DecodeError("bad_sensor_id", f"sensor id {_show(s)} must not contain '..'")
    if len(_VALID_IDS) < _VALID_IDS_LIMIT:
        _VALID_IDS.add(s)
    return s


class TopicTemplate:
    """A topic name with exactly one ``{sensor}`` level, e.g. ``site/{sensor}/raw``.

    ``filter`` is the subscription filter (``+`` in place of the placeholder), ``match`` takes
    the sensor id back out of a received topic and ``format`` builds a topic to publish on.
    A template is refused with ``ValueError`` (so a pydantic validator can report it under its
    field path) when it is empty, has no or several placeholders, a placeholder that is not a
    whole level, stray braces, wildcards, a NUL, more than 65535 bytes, or starts with ``$``
    (broker-internal topics, and ``$share/`` groups, which cannot keep per-sensor state).
    """

    __slots__ = ("_index", "_levels", "template")

    def __init__(self, template: str) -> None:
        if not isinstance(template, str) or not template:
            raise ArgumentError("topic template must be a non-empty string")
        if len(template.encode("utf-8", "surrogatepass")) > _MAX_TOPIC_BYTES:
            raise ArgumentError(f"topic template is longer than {_MAX_TOPIC_BYTES} bytes")
        if "\x00" in template:
            raise ArgumentError(f"topic template {template!r} contains a NUL character")
        if "+" in template or "#" in template:
            raise ArgumentError(
                f"topic template {template!r} must not contain the wildcards '+' or '#'; "
                f"write {PLACEHOLDER} where the sensor id goes"
            )
        if template.startswith("$"):
            raise ArgumentError(
                f"topic template {template!r} must not start with '$' (broker-internal "
                "topics and shared subscriptions cannot carry per-sensor state)"
            )
        levels = template.split("/")
        found = [i for i, level in enumerate(levels) if level == PLACEHOLDER]
        if len(found) != 1 or template.count(PLACEHOLDER) != 1:
            raise ArgumentError(
                f"topic template {template!r} must contain {PLACEHOLDER} exactly once, "
                "as a whole level between '/' separators"
            )
        others = [level for i, level in enumerate(levels) if i != found[0]]
        if any("{" in level or "}" in level for level in others):
            raise ArgumentError(
                f"topic template {template!r} has braces outside the {PLACEHOLDER} level"
            )
        self.template = template
        self._levels = levels
        self._index = found[0]

    @property
    def filter(self) -> str:
        """The subscription filter: the template with ``+`` in place of ``{sensor}``."""
        return self.template.replace(PLACEHOLDER, "+")

    def match(self, topic: str) -> str | None:
        """The sensor id in ``topic``, or ``None`` when the topic does not fit the template.

        A topic that fits but whose sensor level is not a valid id raises
        ``DecodeError("bad_sensor_id")``, so a hostile publisher is reported, not ignored.
        """
        levels = topic.split("/")
        if len(levels) != len(self._levels):
            return None
        for i, (got, want) in enumerate(zip(levels, self._levels, strict=True)):
            if i != self._index and got != want:
                return None
        return validate_sensor_id(levels[self._index])

    def format(self, sensor: str) -> str:
        """The topic for ``sensor``; raises ``DecodeError("bad_sensor_id")`` for a bad id."""
        validate_sensor_id(sensor)
        levels = list(self._levels)
        levels[self._index] = sensor
        return "/".join(levels)

    def __repr__(self) -> str:
        return f"TopicTemplate({self.template!r})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, TopicTemplate) and other.template == self.template

    def __hash__(self) -> int:
        return hash(self.template)
