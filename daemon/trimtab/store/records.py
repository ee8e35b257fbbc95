"""Events as journal records: the stream-file object form, built and read without re-parsing.

The journal is written by this daemon and protected by its own checksums, so records are read
back trusting their shape; a record of the wrong shape is a StateError, never skipped.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from trimtab.errors import StateError
from trimtab.messages import Reading, Reference


def event_to_record(event: Reading | Reference) -> dict[str, Any]:
    """The stream-file object of an event (``truth`` is left out: the engine never reads it)."""
    if isinstance(event, Reading):
        return {"t": event.t, "sensor": event.sensor, "reading": dict(event.inputs)}
    rec: dict[str, Any] = {"t": event.t, "sensor": event.sensor, "reference": event.value}
    if event.window is not None:
        rec["window"] = event.window
    return rec


def record_to_event(record: Mapping[str, Any]) -> Reading | Reference:
    """The event a journal record holds."""
    try:
        if "reading" in record:
            inputs = {str(k): float(v) for k, v in record["reading"].items()}
            return Reading(float(record["t"]), str(record["sensor"]), inputs)
        window = record.get("window")
        return Reference(float(record["t"]), str(record["sensor"]), float(record["reference"]),
                         None if window is None else float(window))
    except (KeyError, TypeError, ValueError, AttributeError, OverflowError) as exc:
        raise StateError(f"journal record has the wrong shape: {exc!r}: {dict(record)!r:.200}") \
            from exc
