"""The configuration: the pydantic tree, sensor sections, routing, and the derived figures.

The public face: import sections and functions from ``trimtab.config``; the modules behind it
are ``tree`` (the whole tree and loading), ``connection`` (broker, topics, payload),
``learning`` (learning, pairing, output), ``sensors`` (sensor sections and routing),
``reload`` (what a SIGHUP applies) and ``figures`` (what ``trimtab check`` derives).
"""

from trimtab.config.connection import BrokerSettings, PayloadSettings, TlsSettings, TopicSettings
from trimtab.config.learning import LearningSettings, OutputSettings, PairingSettings
from trimtab.config.reload import (
    RELOADABLE,
    SERVING,
    apply_reload,
    reloads_live,
    restart_required,
)
from trimtab.config.sensors import SensorOverride, SensorSettings, SensorsSettings, SharedReference
from trimtab.config.tree import (
    Config,
    LoggingSettings,
    MetricsSettings,
    StateSettings,
    StatusSettings,
    file_problems,
    load_config,
    parse_config,
)

__all__ = [
    "RELOADABLE",
    "SERVING",
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
