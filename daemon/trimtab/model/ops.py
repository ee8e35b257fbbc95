"""The arithmetic vocabulary the learning kernel is written in, for floats and for K-vectors.

The kernel (:mod:`trimtab.model.step`, :mod:`trimtab.engine.guards`,
:mod:`trimtab.engine.kernel`) is one source that runs on plain Python floats for one sensor
(the daemon and ``trimtab replay``) and on numpy float64 K-vectors for the tuner's K
candidates. Elementwise + − × ÷ and √ are correctly rounded in both, so the two give the same
bits whenever the order of operations is the kernel's: :func:`dot` adds left to right from 0.0
on both (never a BLAS call, a pairwise sum or Python's ``sum``).

What differs between the two is written here once each, as :data:`SCALAR` and :data:`ARRAY`:
choosing (``where(c, a, b)`` is ``a if c else b`` on floats), the elementwise minimum and
maximum (the floats' versions repeat numpy's rule exactly: ``maximum(a, b)`` is ``a`` when
``a ≥ b`` or ``a`` is NaN, else ``b``; so ties between 0.0 and −0.0 pick alike), negation
of a mask, and ``any`` (whether a branch has work for any lane). On floats a mask is a bool;
on arrays a K-vector of bools; ``&`` and ``|`` combine both kinds.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Callable, Iterable, Sequence
from typing import Any

import numpy as np

__all__ = ["ARRAY", "SCALAR", "ArrayOps", "Ops", "ScalarOps", "dot"]


def dot(a: Sequence[Any], b: Sequence[Any]) -> Any:
    """Σ a_j·b_j added strictly left to right from 0.0, on floats or arrays alike.

    The order is part of the contract: the tuner runs this very loop on K-vectors to give the
    daemon's bits, and ``sum()`` cannot promise an order (Python 3.12 changed its float
    algorithm to a compensated one). ``b`` must be at least as long as ``a``; the callers
    check lengths once (a model's weights, prior and features have k + 1 entries each).
    """
    acc: Any = 0.0
    for i in range(len(a)):  # an index loop: half the cost of zip(strict=True) per term
        acc = acc + a[i] * b[i]
    return acc


_MAX: Callable[[Iterable[Any]], Any] = max


class ScalarOps:
    """The vocabulary on Python floats and bools: one sensor.

    Where a builtin does the job exactly (``abs``, ``bool`` for ``any``, ``int`` for
    ``count``) it is used itself, so the per-sample path pays no Python frame for it.
    """

    __slots__ = ()

    @staticmethod
    def where(c: Any, a: Any, b: Any) -> Any:
        """``a`` where ``c``, else ``b``."""
        return a if c else b

    @staticmethod
    def maximum(a: Any, b: Any) -> Any:
        """numpy's ``maximum`` on two floats: ``a`` when a ≥ b or a is NaN, else ``b``."""
        return a if (a >= b or a != a) else b

    @staticmethod
    def minimum(a: Any, b: Any) -> Any:
        """numpy's ``minimum`` on two floats: ``a`` when a ≤ b or a is NaN, else ``b``."""
        return a if (a <= b or a != a) else b

    @staticmethod
    def clip(x: Any, d: Any) -> Any:
        """``maximum(−d, minimum(d, x))`` for d > 0, in one step (NaN stays NaN)."""
        return d if x >= d else -d if x <= -d else x

    # builtins themselves, not wrapped: C functions do not bind to an instance, so a lookup
    # and a call cost no Python frame on the per-sample path
    absolute: Callable[[Any], Any] = abs
    isfinite: Callable[[Any], Any] = math.isfinite
    isnan: Callable[[Any], Any] = math.isnan
    isinf: Callable[[Any], Any] = math.isinf
    copysign: Callable[[Any, Any], Any] = math.copysign
    amax: Callable[[Iterable[Any]], Any] = _MAX
    """The largest of finite values."""
    not_: Callable[[Any], Any] = operator.not_
    any: Callable[[Any], bool] = bool
    """Whether the mask holds anywhere."""
    all: Callable[[Any], bool] = bool
    """Whether the mask holds everywhere."""
    count: Callable[[Any], Any] = int
    """1 where the mask holds, else 0 (to add to a tally)."""
    most: Callable[[Any], int] = int
    """The largest count over the lanes."""


class ArrayOps:
    """The vocabulary on numpy float64 and bool arrays: K lanes (candidates) at once."""

    __slots__ = ()

    where: Callable[..., Any] = staticmethod(np.where)
    maximum: Callable[..., Any] = staticmethod(np.maximum)
    minimum: Callable[..., Any] = staticmethod(np.minimum)
    absolute: Callable[..., Any] = staticmethod(np.abs)
    isfinite: Callable[..., Any] = staticmethod(np.isfinite)
    isnan: Callable[..., Any] = staticmethod(np.isnan)
    isinf: Callable[..., Any] = staticmethod(np.isinf)
    copysign: Callable[..., Any] = staticmethod(np.copysign)
    not_: Callable[..., Any] = staticmethod(np.logical_not)

    @staticmethod
    def clip(x: Any, d: Any) -> Any:
        """``maximum(−d, minimum(d, x))``."""
        return np.maximum(-d, np.minimum(d, x))

    @staticmethod
    def amax(values: Iterable[Any]) -> Any:
        """The elementwise largest of finite values (left to right)."""
        it = iter(values)
        out = next(it)
        for v in it:
            out = np.maximum(out, v)
        return out

    @staticmethod
    def any(m: Any) -> bool:
        """Whether the mask holds in any lane."""
        return bool(np.any(m))

    @staticmethod
    def all(m: Any) -> bool:
        """Whether the mask holds in every lane."""
        return bool(np.all(m))

    @staticmethod
    def count(m: Any) -> Any:
        """1 where the mask holds, else 0, as integers."""
        return np.asarray(m, dtype=np.int64)

    @staticmethod
    def most(n: Any) -> int:
        """The largest count over the lanes."""
        return int(np.max(n)) if np.size(n) else 0


Ops = ScalarOps | ArrayOps
SCALAR = ScalarOps()
ARRAY = ArrayOps()
