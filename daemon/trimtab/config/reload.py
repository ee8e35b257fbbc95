"""What a SIGHUP reload applies: one table of the paths that reload live, and the applied config.

Service and engine both get the one applied object :func:`apply_reload` returns.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel

from trimtab.config.learning import LearningSettings, OutputSettings
from trimtab.config.tree import Config, parse_config
from trimtab.wire.fielderrors import key

__all__ = ["RELOADABLE", "SERVING", "apply_reload", "reloads_live", "restart_required"]


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
