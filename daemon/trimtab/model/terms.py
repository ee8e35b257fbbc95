"""The terms of a sensor's model (inputs, products, squares, elapsed time) and their scaling.

A :class:`TermSpec` says which terms a model uses; :meth:`TermSpec.row` and
:meth:`TermSpec.matrix` turn readings into unstandardised term values. A :class:`Scaler`
holds the centre and scale that standardise them, fixed when a model is created and stored with
it, because the meaning of the ridge penalty depends on them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from trimtab.errors import DataError, ModelError

SECONDS_PER_DAY = 86400.0
ELAPSED = "elapsed_days"
_RESERVED_CHARS = ("*", "^")


@dataclass(frozen=True, slots=True)
class TermSpec:
    """Which terms a model has, in a fixed order.

    ``inputs[0]`` is the raw value of the sensor (the factory prior puts gain 1 on it); the
    others are covariates such as temperature and relative humidity. ``products`` are pairs of
    inputs multiplied together, ``squares`` inputs squared, and ``elapsed`` adds the days since
    the model's origin (a linear drift term). Term names: the inputs, then ``"a*b"``, then
    ``"a^2"``, then ``"elapsed_days"``.
    """

    inputs: tuple[str, ...]
    products: tuple[tuple[str, str], ...] = ()
    squares: tuple[str, ...] = ()
    elapsed: bool = False
    _product_idx: tuple[tuple[int, int], ...] = field(init=False, repr=False, compare=False)
    _square_idx: tuple[int, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        inputs = tuple(self.inputs)
        if not inputs:
            raise ModelError("term spec: inputs must name at least the raw value")
        for name in inputs:
            if not isinstance(name, str) or not name.strip():
                raise ModelError(f"term spec: input name {name!r} must be a non-empty string")
            if any(c in name for c in _RESERVED_CHARS) or name == ELAPSED:
                raise ModelError(
                    f"term spec: input name {name!r} may not contain '*' or '^' "
                    f"nor be {ELAPSED!r} (they name derived terms)"
                )
        if len(set(inputs)) != len(inputs):
            dupes = sorted({n for n in inputs if inputs.count(n) > 1})
            raise ModelError(f"term spec: duplicate input names {dupes}")
        index = {name: i for i, name in enumerate(inputs)}
        products = tuple((str(a), str(b)) for a, b in self.products)
        seen: set[frozenset[str]] = set()
        for a, b in products:
            for name in (a, b):
                if name not in index:
                    raise ModelError(f"term spec: product {a}*{b} names unknown input {name!r}")
            if a == b:
                raise ModelError(f"term spec: product {a}*{b} is a square; list {a!r} in squares")
            key = frozenset((a, b))
            if key in seen:
                raise ModelError(f"term spec: product {a}*{b} is listed twice")
            seen.add(key)
        squares = tuple(str(s) for s in self.squares)
        for s in squares:
            if s not in index:
                raise ModelError(f"term spec: square {s}^2 names unknown input {s!r}")
        if len(set(squares)) != len(squares):
            raise ModelError(f"term spec: a square is listed twice in {list(squares)}")
        object.__setattr__(self, "inputs", inputs)
        object.__setattr__(self, "products", products)
        object.__setattr__(self, "squares", squares)
        object.__setattr__(self, "elapsed", bool(self.elapsed))
        object.__setattr__(self, "_product_idx", tuple((index[a], index[b]) for a, b in products))
        object.__setattr__(self, "_square_idx", tuple(index[s] for s in squares))

    @property
    def n_terms(self) -> int:
        """The number of terms k (the model has k + 1 weights with the intercept)."""
        return len(self.inputs) + len(self.products) + len(self.squares) + int(self.elapsed)

    def names(self) -> tuple[str, ...]:
        """The terms' names in order: inputs, ``a*b``, ``a^2``, ``elapsed_days``."""
        names = list(self.inputs)
        names += [f"{a}*{b}" for a, b in self.products]
        names += [f"{s}^2" for s in self.squares]
        if self.elapsed:
            names.append(ELAPSED)
        return tuple(names)

    def row(self, inputs: Mapping[str, float], t: float, origin: float) -> list[float]:
        """One reading's unstandardised term values; a missing input raises DataError."""
        try:
            v = [float(inputs[name]) for name in self.inputs]
        except KeyError as exc:
            raise DataError(
                f"reading has no input {exc.args[0]!r} (the model needs {list(self.inputs)})"
            ) from None
        except (TypeError, ValueError) as exc:
            raise DataError(f"reading has a non-numeric input: {exc}") from None
        out = v  # derived terms follow the inputs; they read only the inputs' positions
        for i, j in self._product_idx:
            out.append(v[i] * v[j])
        for i in self._square_idx:
            out.append(v[i] * v[i])
        if self.elapsed:
            out.append((float(t) - origin) / SECONDS_PER_DAY)
        return out

    def matrix(self, X: NDArray[np.float64], t: NDArray[np.float64], origin: float) -> NDArray[
        np.float64
    ]:
        """The n × k term matrix of n readings (X's columns in ``inputs`` order)."""
        X = np.asarray(X, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != len(self.inputs):
            raise DataError(
                f"input matrix has shape {X.shape}; expected (n, {len(self.inputs)}) "
                f"with columns {list(self.inputs)}"
            )
        if t.shape != (X.shape[0],):
            raise DataError(f"time vector has shape {t.shape}; expected ({X.shape[0]},)")
        cols = [X[:, i] for i in range(X.shape[1])]
        cols += [X[:, i] * X[:, j] for i, j in self._product_idx]
        cols += [X[:, i] * X[:, i] for i in self._square_idx]
        if self.elapsed:
            cols.append((t - origin) / SECONDS_PER_DAY)
        return np.column_stack(cols) if cols else np.empty((X.shape[0], 0))

    def to_dict(self) -> dict[str, Any]:
        """A plain JSON-able form."""
        return {
            "inputs": list(self.inputs),
            "products": [list(p) for p in self.products],
            "squares": list(self.squares),
            "elapsed": self.elapsed,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> TermSpec:
        """Rebuild from :meth:`to_dict`'s form; DataError names the malformed key."""
        if not isinstance(d, Mapping):
            raise DataError("spec: expected an object")
        check_keys(d, {"inputs", "products", "squares", "elapsed"}, "spec")
        inputs = _str_list(d["inputs"], "spec.inputs")
        squares = _str_list(d["squares"], "spec.squares")
        products_raw = d["products"]
        if not isinstance(products_raw, list):
            raise DataError("spec.products: expected a list of [a, b] pairs")
        products = []
        for i, pair in enumerate(products_raw):
            names = _str_list(pair, f"spec.products[{i}]")
            if len(names) != 2:
                raise DataError(f"spec.products[{i}]: expected a pair of input names")
            products.append((names[0], names[1]))
        if not isinstance(d["elapsed"], bool):
            raise DataError("spec.elapsed: expected true or false")
        try:
            return cls(tuple(inputs), tuple(products), tuple(squares), d["elapsed"])
        except ModelError as exc:
            raise DataError(f"spec: {exc}") from exc


@dataclass(frozen=True, slots=True)
class Scaler:
    """Centre and scale per term: ``z_j = (term_j - centre_j) / scale_j``."""

    centre: tuple[float, ...]
    scale: tuple[float, ...]

    def __post_init__(self) -> None:
        centre = tuple(float(c) for c in self.centre)
        scale = tuple(float(s) for s in self.scale)
        if len(centre) != len(scale):
            raise ModelError(f"scaler: {len(centre)} centres but {len(scale)} scales")
        for j, (c, s) in enumerate(zip(centre, scale, strict=True)):
            if not math.isfinite(c):
                raise ModelError(f"scaler: centre[{j}] = {c} is not finite")
            if not (math.isfinite(s) and s > 0.0):
                raise ModelError(f"scaler: scale[{j}] = {s} must be finite and > 0")
        object.__setattr__(self, "centre", centre)
        object.__setattr__(self, "scale", scale)

    def __len__(self) -> int:
        return len(self.centre)

    @classmethod
    def identity(cls, k: int) -> Scaler:
        """No standardisation: centre 0, scale 1 for k terms."""
        return cls((0.0,) * k, (1.0,) * k)

    @classmethod
    def from_terms(cls, T: NDArray[np.float64]) -> Scaler:
        """Mean and population standard deviation of each column of T.

        A constant column (std 0, or below 1e-12 of its mean's magnitude, which is rounding)
        gets scale 1.0 so it stays finite.
        """
        T = np.asarray(T, dtype=np.float64)
        if T.ndim != 2 or T.shape[0] == 0:
            raise DataError(f"scaler: need a non-empty n × k term matrix, got shape {T.shape}")
        if not np.all(np.isfinite(T)):
            raise DataError("scaler: the term matrix holds non-finite values")
        mean = T.mean(axis=0)
        sd = T.std(axis=0)
        tiny = 1e-12 * np.maximum(np.abs(mean), np.finfo(np.float64).tiny)
        sd = np.where(sd > tiny, sd, 1.0)
        return cls(tuple(float(m) for m in mean), tuple(float(s) for s in sd))

    def transform(self, T: NDArray[np.float64]) -> NDArray[np.float64]:
        """Standardise an n × k term matrix."""
        T = np.asarray(T, dtype=np.float64)
        if T.ndim != 2 or T.shape[1] != len(self.centre):
            raise DataError(f"scaler: term matrix has shape {T.shape}; expected k = {len(self)}")
        centre = np.asarray(self.centre)
        scale = np.asarray(self.scale)
        out: NDArray[np.float64] = (T - centre) / scale
        return out

    def to_dict(self) -> dict[str, Any]:
        """A plain JSON-able form."""
        return {"centre": list(self.centre), "scale": list(self.scale)}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Scaler:
        """Rebuild from :meth:`to_dict`'s form; DataError names the malformed key."""
        if not isinstance(d, Mapping):
            raise DataError("scaler: expected an object")
        check_keys(d, {"centre", "scale"}, "scaler")
        centre = float_list(d["centre"], "scaler.centre")
        scale = float_list(d["scale"], "scaler.scale")
        try:
            return cls(tuple(centre), tuple(scale))
        except ModelError as exc:
            raise DataError(str(exc)) from exc


def check_keys(d: Mapping[str, Any], expected: set[str] | frozenset[str], where: str) -> None:
    """DataError naming the first missing, then the first unknown key of ``d``."""
    missing = sorted(expected - set(d))
    if missing:
        raise DataError(f"{where}: missing key {missing[0]!r}")
    extra = sorted(set(d) - expected)
    if extra:
        raise DataError(f"{where}: unknown key {extra[0]!r}")


def _str_list(value: Any, where: str) -> list[str]:
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise DataError(f"{where}: expected a list of strings")
    return list(value)


def float_list(value: Any, where: str) -> list[float]:
    """A JSON list of finite numbers as floats; DataError naming ``where`` otherwise."""
    if not isinstance(value, list):
        raise DataError(f"{where}: expected a list of numbers")
    return [as_float(v, f"{where}[{i}]") for i, v in enumerate(value)]


def as_float(value: Any, where: str) -> float:
    """A JSON number as a finite float; DataError naming ``where`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise DataError(f"{where}: expected a number, got {type(value).__name__}")
    out = float(value)
    if not math.isfinite(out):
        raise DataError(f"{where}: {out} is not finite")
    return out


def as_sequence(values: Sequence[float], where: str) -> list[float]:
    """Floats from a sequence, each finite; ModelError naming ``where`` otherwise."""
    out = []
    for i, v in enumerate(values):
        f = float(v)
        if not math.isfinite(f):
            raise ModelError(f"{where}[{i}] = {f} is not finite")
        out.append(f)
    return out
