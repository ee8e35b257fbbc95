"""trimtab: online ridge recalibration of drifting low-cost sensors over MQTT."""

from __future__ import annotations

from trimtab.errors import (
    ConfigError,
    DataError,
    DecodeError,
    ModelError,
    StateError,
    TransportError,
    TrimtabError,
)
from trimtab.messages import Corrected, Reading, Reference

__version__ = "0.1.0"

__all__ = [
    "ConfigError",
    "Corrected",
    "DataError",
    "DecodeError",
    "ModelError",
    "Reading",
    "Reference",
    "StateError",
    "TransportError",
    "TrimtabError",
    "__version__",
]
