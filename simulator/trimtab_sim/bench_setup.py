"""What every part of the bench shares: the daemon config and the invented workload.

The workload is invented for measurement only (it proves nothing about accuracy): sensors
``s000``… report ``raw``, ``temp`` and ``rh`` every 10 s, each gets a spot reference every
``REF_EVERY`` readings, and values wander smoothly so the models really update.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

T0 = 1_767_225_600.0
"""Event time of the first reading (2026-01-01 UTC)."""

STEP = 10.0
"""Seconds between one sensor's readings (the issue's 10-second readings)."""

REF_EVERY = 60
"""A sensor gets a spot reference every this many of its readings."""

WINDOW = 3600.0
"""The reading buffer's span: a one-hour reference window."""


def daemon_toml(*, port: int, prefix: str, client_id: str, qos: int, state_dir: Path,
                durability: str = "fsync", log_level: str = "info", covariates: bool = True) -> str:
    """The bench daemon's config: the workload's topics, configured centre and scale.

    Centre and scale are configured so every model exists from a sensor's first reading and
    the engine does its full work (predict, flags, band) on every message from the start.
    The models' terms are raw, temp, rh and elapsed time (4 terms), or without
    ``covariates`` raw and elapsed time.
    """
    inputs = '["raw", "temp", "rh"]' if covariates else '["raw"]'
    centre = "raw = 40.0, temp = 15.0, rh = 60.0" if covariates else "raw = 40.0"
    scale = "raw = 12.0, temp = 6.0, rh = 15.0" if covariates else "raw = 12.0"
    return f"""\
[broker]
host = "127.0.0.1"
port = {port}
protocol = "5"
client_id = "{client_id}"
session_expiry = 600

[topics]
readings = "{prefix}/{{sensor}}/raw"
references = "{prefix}/{{sensor}}/ref"
corrected = "{prefix}/{{sensor}}/corrected"
status = "{prefix}-status/{{client_id}}"
qos = {qos}

[payload]
format = "json"

[payload.covariates]
temp = "temp"
rh = "rh"

[sensors]
pattern = "s[0-9]+"

[sensors.defaults]
inputs = {inputs}
elapsed = true
centre = {{ {centre} }}
scale = {{ {scale} }}

[learning]
alpha = 0.5
alpha_max = 1.0
lambda = 1.0
memory = 200
normalised = true
warmup = 5
reference_interval = 600.0

[pairing]
tolerance = 30.0
buffer_span = {WINDOW}

[output]
stale_after = 86400.0

[state]
dir = "{state_dir}"
checkpoint_every = 300.0
durability = "{durability}"

[status]
interval = 60.0

[logging]
level = "{log_level}"
format = "json"
"""


@dataclass(frozen=True, slots=True)
class Message:
    """One bench message: where it goes, its payload, and for a reading its (sensor, t) key."""

    topic: str
    payload: bytes
    key: tuple[str, float] | None


def _values(k: int, i: int) -> tuple[float, float, float, float]:
    """Truth, raw, temp, rh of sensor k at its reading i: smooth, drifting, deterministic."""
    truth = 40.0 + 15.0 * math.sin(2.0 * math.pi * i / 360.0 + 0.1 * k)
    temp = 15.0 + 8.0 * math.sin(2.0 * math.pi * i / 500.0 + 1.0 + 0.05 * k)
    rh = 60.0 + 20.0 * math.sin(2.0 * math.pi * i / 700.0 + 0.03 * k)
    raw = (1.1 + 0.0002 * i) * truth + 0.4 * (temp - 15.0) + 0.05 * (rh - 60.0) + 0.5 * (k % 4)
    return round(truth, 3), round(raw, 3), round(temp, 2), round(rh, 2)


def workload(prefix: str, n: int, sensors: int = 100) -> list[Message]:
    """``n`` messages: readings round-robin over the sensors, references interleaved."""
    out: list[Message] = []
    i = 0
    while len(out) < n:
        t = T0 + STEP * i
        for k in range(sensors):
            if len(out) >= n:
                break
            sensor = f"s{k:03d}"
            truth, raw, temp, rh = _values(k, i)
            body = {"t": t, "raw": raw, "temp": temp, "rh": rh}
            out.append(Message(f"{prefix}/{sensor}/raw", json.dumps(body).encode(), (sensor, t)))
            if i % REF_EVERY == REF_EVERY - 1 and len(out) < n:
                ref = json.dumps({"t": t, "value": truth}).encode()
                out.append(Message(f"{prefix}/{sensor}/ref", ref, None))
        i += 1
    return out


__all__ = ["REF_EVERY", "STEP", "T0", "WINDOW", "Message", "daemon_toml", "workload"]
