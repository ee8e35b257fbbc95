"""Immutable model parts (specs, scalers, priors) shared between models of one configuration.

Thousands of sensors of one configuration have equal specs, and equal scalers when centre and
scale are configured; each would otherwise hold its own copy.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar

from trimtab.model.terms import Scaler, TermSpec

__all__ = ["parsed", "shared"]

_SHARED: dict[tuple[str, str], object] = {}
_SHARED_LIMIT = 1024
_Part = TypeVar("_Part", TermSpec, Scaler, tuple[float, ...])


def shared(part: _Part) -> _Part:
    """One instance of each equal spec, scaler or prior (immutable), for models to share.

    At most
    ``_SHARED_LIMIT`` distinct parts are remembered; past that a part is used as it is.
    """
    key = (type(part).__name__, repr(part))  # repr, not ==: it tells -0.0 from 0.0
    found = _SHARED.get(key)
    if found is not None:
        return found  # type: ignore[return-value]
    if len(_SHARED) < _SHARED_LIMIT:
        _SHARED[key] = part
    return part


def parsed(d: Any, parse: Callable[[Any], _Part]) -> _Part:
    """``shared(parse(d))``, skipping the parse (and its checks) for a form seen before."""
    try:
        key = ("form", repr(d))
    except RecursionError:
        return shared(parse(d))
    found = _SHARED.get(key)
    if found is not None:
        return found  # type: ignore[return-value]
    part = shared(parse(d))
    if len(_SHARED) < _SHARED_LIMIT:
        _SHARED[key] = part
    return part
