"""The checkpointed form of a ridge model, and the checks of its settings.

:func:`model_arguments` reads back the keys of ``RidgeModel.to_dict``: it checks every key
and gives the spec, the scaler and the constructor's keyword arguments;
:meth:`trimtab.model.online.RidgeModel.from_dict` builds the model from them (its own checks,
:func:`finite` and :func:`positive_or_none`, give the rest). DataError names the malformed key.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from trimtab.errors import DataError, ModelError
from trimtab.model.parts import parsed
from trimtab.model.terms import Scaler, TermSpec, as_float, check_keys, float_list

__all__ = ["STATE_KEYS", "finite", "model_arguments", "positive_or_none"]

STATE_KEYS = frozenset(
    {
        "spec", "scaler", "origin", "lam", "memory", "prior", "penalise_intercept",
        "huber_delta", "normalised", "clip", "theta", "spread", "spread_decay", "updates",
    }
)


def model_arguments(d: Mapping[str, Any]) -> tuple[TermSpec, Scaler, dict[str, Any]]:
    """(spec, scaler, keyword arguments) of a model's ``to_dict`` form, every key checked."""
    if not isinstance(d, Mapping):
        raise DataError("model: expected an object")
    check_keys(d, STATE_KEYS, "model")
    spec = parsed(d["spec"], TermSpec.from_dict)
    scaler = parsed(d["scaler"], Scaler.from_dict)
    kw: dict[str, Any] = {
        name: as_float(d[name], f"model.{name}")
        for name in ("origin", "lam", "memory", "spread", "spread_decay")
    }
    for name in ("huber_delta", "clip"):
        kw[name] = None if d[name] is None else as_float(d[name], f"model.{name}")
    for name in ("penalise_intercept", "normalised"):
        if not isinstance(d[name], bool):
            raise DataError(f"model.{name}: expected true or false")
        kw[name] = d[name]
    updates = d["updates"]
    if isinstance(updates, bool) or not isinstance(updates, int) or updates < 0:
        raise DataError(f"model.updates: expected an integer ≥ 0, got {updates!r}")
    kw["updates"] = updates
    kw["prior"] = float_list(d["prior"], "model.prior")
    kw["theta"] = float_list(d["theta"], "model.theta")
    return spec, scaler, kw


def finite(value: float, name: str) -> float:
    """``value`` as a finite float; ModelError naming the setting otherwise."""
    try:
        f = float(value)
    except (TypeError, ValueError):
        raise ModelError(f"{name} = {value!r} is not a number") from None
    if not math.isfinite(f):
        raise ModelError(f"{name} = {f} is not finite")
    return f


def positive_or_none(value: float | None, name: str) -> float | None:
    """None, or ``value`` as a float > 0; ModelError naming the setting otherwise."""
    if value is None:
        return None
    f = finite(value, name)
    if f <= 0.0:
        raise ModelError(f"{name} = {f} must be > 0 (or unset)")
    return f
