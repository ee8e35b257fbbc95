"""Candidate learning settings for ``trimtab tune``: a grid file, a seeded search, the validator.

A candidate sets some of the tuned keys of ``[learning]`` — ``alpha``, ``lambda``,
``memory``, ``huber_delta``, ``gate_k``, ``normalised``, the scaler's ``scaler``,
``scaler_width`` and ``scaler_span``, and the guards' ``rollback_factor`` and
``alpha_recovery`` — and takes every other key from the config being tuned. A candidate is
checked for stability at its own bounds: its λ is its ``lambda_max``; its α is its
``alpha_max`` unless the gap lift is on (``step_adapt = "gap"``), when ``alpha_max`` is at
least α; ``alpha_min`` is lowered to α when needed. A candidate is never refused because of a
bound it does not use. Each candidate is merged into the config's own TOML document and run
through :func:`trimtab.config.parse_config`, so it is refused for exactly the reasons
``trimtab check`` would give; a refused candidate is reported with those reasons and never
evaluated.

Grid file (TOML, one table; every key optional, each a non-empty list)::

    [grid]
    alpha = [0.01, 0.02, 0.05, 0.1]
    lambda = [0.1, 1.0, 10.0]
    memory = [100, 200, 400]
    huber_delta = ["none", 2.0]      # "none": the squared loss (the key left unset)
    gate_k = [3.0, 4.0]
    normalised = [true, false]
    products = [[], [["raw", "rh"]]]   # terms: [sensors.defaults] products and squares
    squares = [[], ["raw"]]
    scaler = ["follow", "fixed"]
    scaler_width = [2.0, 3.0, 4.0]
    scaler_span = [604800.0, 2592000.0]
    rollback_factor = [3.0, 4.0]
    alpha_recovery = [0.0, 0.1]

The candidates are every combination, in the order of the keys above, the last varying
fastest.
"""

from __future__ import annotations

import copy
import itertools
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from trimtab.config import Config, LearningSettings, parse_config
from trimtab.engine.wiring import initial_models
from trimtab.errors import ConfigError, DataError
from trimtab.wire.tomlfile import read_toml

__all__ = [
    "MAX_CANDIDATES",
    "TUNED",
    "Candidate",
    "Value",
    "build_candidates",
    "current_settings",
    "grid_settings",
    "load_grid",
    "search_settings",
]

TUNED = ("alpha", "alpha_max", "lambda", "memory", "huber_delta", "gate_k", "normalised",
         "step_adapt", "step_gap", "scaler", "scaler_width", "scaler_span", "rollback_factor",
         "alpha_recovery", "products", "squares")
"""The ``[learning]`` keys a candidate may set, as the config file spells them."""

MAX_CANDIDATES = 10000

Value = float | int | bool | str | tuple[Any, ...] | None
TERMS = ("products", "squares")
"""Tuned keys of ``[sensors.defaults]`` (the model's terms); the others are ``[learning]``'s."""
_NUMBER_KEYS = ("alpha", "alpha_max", "lambda", "gate_k", "step_gap", "scaler_width",
                "scaler_span", "rollback_factor", "alpha_recovery")
_CHOICES = {"scaler": ("follow", "fixed"), "step_adapt": ("gap", "none")}


@dataclass(frozen=True, slots=True)
class Candidate:
    """One candidate: its tuned settings and either its validated config or why it was refused."""

    index: int
    settings: Mapping[str, Value]
    config: Config | None
    refused: tuple[str, ...] = ()
    labels: tuple[str, ...] = field(default=())
    """Where it came from: ``"current"`` (the config's own settings), ``"grid"``, ``"search"``."""

    @property
    def valid(self) -> bool:
        """Whether the validator accepted it (only valid candidates are evaluated)."""
        return self.config is not None


def current_settings(cfg: Config) -> dict[str, Value]:
    """The tuned keys' values in a config."""
    lc = cfg.learning
    return {"alpha": lc.alpha, "alpha_max": lc.alpha_max, "lambda": lc.lam, "memory": lc.memory,
            "huber_delta": lc.huber_delta, "gate_k": lc.gate_k, "normalised": lc.normalised,
            "step_adapt": lc.step_adapt, "step_gap": lc.step_gap, "scaler": lc.scaler,
            "scaler_width": lc.scaler_width, "scaler_span": lc.scaler_span,
            "rollback_factor": lc.rollback_factor, "alpha_recovery": lc.alpha_recovery,
            "products": tuple(tuple(p) for p in cfg.sensors.defaults.products),
            "squares": tuple(cfg.sensors.defaults.squares)}


def _is_number(v: object) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def _check_value(key: str, v: object, where: str) -> Value:
    if key == "products":
        if not isinstance(v, list) or not all(
                isinstance(p, list) and len(p) == 2 and all(isinstance(x, str) for x in p)
                for p in v):
            raise DataError(f'{where}: expected a list of input pairs, e.g. [["raw", "rh"]]')
        return tuple((str(a), str(b)) for a, b in v)
    if key == "squares":
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise DataError(f'{where}: expected a list of input names, e.g. ["raw"]')
        return tuple(str(x) for x in v)
    if key in _NUMBER_KEYS:
        if not _is_number(v):
            raise DataError(f"{where}: expected a finite number, got {v!r}")
        return float(v)  # type: ignore[arg-type]
    if key == "memory":
        if isinstance(v, bool) or not isinstance(v, int):
            raise DataError(f"{where}: expected an integer count of references, got {v!r}")
        return v
    if key in _CHOICES:
        if v not in _CHOICES[key]:
            raise DataError(f"{where}: expected one of {', '.join(map(repr, _CHOICES[key]))}, "
                            f"got {v!r}")
        return str(v)
    if key == "huber_delta":
        if v == "none":
            return None
        if not _is_number(v):
            raise DataError(f'{where}: expected a finite number or "none", got {v!r}')
        return float(v)  # type: ignore[arg-type]
    if not isinstance(v, bool):
        raise DataError(f"{where}: expected true or false, got {v!r}")
    return v


def load_grid(path: str | os.PathLike[str]) -> dict[str, list[Value]]:
    """Read a grid file; DataError names the file, the key and the item on any problem."""
    source = os.fspath(path)
    data = read_toml(path, "grid file", DataError)
    extra = sorted(set(data) - {"grid"})
    if extra:
        raise DataError(f"{source}: {extra[0]}: unknown table; a grid file has one [grid] table")
    grid = data.get("grid")
    if not isinstance(grid, dict) or not grid:
        raise DataError(f"{source}: grid: missing or empty [grid] table; give lists for some of "
                        f"{', '.join(TUNED)}")
    out: dict[str, list[Value]] = {}
    for key in grid:
        if key not in TUNED:
            raise DataError(f"{source}: grid.{key}: unknown key; the tuned keys are "
                            f"{', '.join(TUNED)}")
    for key in TUNED:
        if key not in grid:
            continue
        values = grid[key]
        if not isinstance(values, list) or not values:
            raise DataError(f"{source}: grid.{key}: expected a non-empty list")
        checked = [_check_value(key, v, f"{source}: grid.{key}[{i}]")
                   for i, v in enumerate(values)]
        out[key] = list(dict.fromkeys(checked))  # duplicates once, first order kept
    n = math.prod(len(v) for v in out.values())
    if n > MAX_CANDIDATES:
        raise DataError(f"{source}: the grid makes {n} candidates; at most {MAX_CANDIDATES}")
    return out


def grid_settings(cfg: Config, grid: Mapping[str, Sequence[Value]]) -> list[dict[str, Value]]:
    """Every combination of the grid's lists; keys the grid leaves out keep the config's value."""
    base = current_settings(cfg)
    keys = [k for k in TUNED if k in grid]
    out = []
    for combo in itertools.product(*(grid[k] for k in keys)):
        s = dict(base)
        s.update(zip(keys, combo, strict=True))
        out.append(s)
    return out


def _round(x: float, lo: float, hi: float) -> float:
    """Three significant digits, kept inside [lo, hi]."""
    return min(max(float(f"{x:.3g}"), lo), hi)


def search_settings(cfg: Config, n: int, seed: int) -> list[dict[str, Value]]:
    """``n`` seeded random candidates: α and λ log-uniform inside the config's own bounds.

    α is drawn from [alpha_min, alpha_max]; λ from [lambda_min, lambda_max], or from
    [lambda_max/1000, lambda_max] when lambda_min is 0 (a log scale cannot reach 0), and is 0
    when lambda_max is. Values are rounded to three significant digits; the other tuned keys
    keep the config's values.
    """
    if n < 1 or n > MAX_CANDIDATES:
        raise DataError(f"--search {n}: give between 1 and {MAX_CANDIDATES} candidates")
    lc = cfg.learning
    rng = np.random.default_rng(seed)
    base = current_settings(cfg)
    lam_lo = lc.lambda_min if lc.lambda_min > 0.0 else lc.lambda_max / 1000.0
    out = []
    for _ in range(n):
        s = dict(base)
        u_a, u_l = rng.random(2)
        s["alpha"] = _round(math.exp(math.log(lc.alpha_min) + u_a * math.log(
            lc.alpha_max / lc.alpha_min)), lc.alpha_min, lc.alpha_max)
        if lc.lambda_max > 0.0:
            s["lambda"] = _round(math.exp(math.log(lam_lo) + u_l * math.log(
                lc.lambda_max / lam_lo)), lc.lambda_min, lc.lambda_max)
        else:
            s["lambda"] = 0.0
        out.append(s)
    return out


def candidate_document(raw: Mapping[str, Any], settings: Mapping[str, Value]) -> dict[str, Any]:
    data = copy.deepcopy(dict(raw))
    learning = data.get("learning")
    if not isinstance(learning, dict):
        learning = data["learning"] = {}
    sensors = data.setdefault("sensors", {})
    defaults = sensors.setdefault("defaults", {})
    for key, value in settings.items():
        if key in TERMS:
            if isinstance(value, tuple | list):  # None: the config's own terms
                defaults[key] = [list(v) if isinstance(v, tuple) else v for v in value]
        elif value is None:
            learning.pop(key, None)
        else:
            learning[key] = value
    # Each candidate's own bounds: its stability is proved at the largest α and λ it uses.
    # λ is fixed at run time, so λ is its own λ_max; α reaches α_max only through the gap lift,
    # so without the lift α is its own α_max, and with it α_max is at least α.
    fields = LearningSettings.model_fields

    def num(key: str) -> float | None:
        v = learning.get(key, fields["lam" if key == "lambda" else key].default)
        return float(v) if isinstance(v, int | float) and not isinstance(v, bool) else None

    lam, alpha = num("lambda"), num("alpha")
    if lam is not None:
        learning["lambda_max"] = lam
        if (num("lambda_min") or 0.0) > lam:
            learning["lambda_min"] = lam
    if alpha is not None:
        lifts = learning.get("step_adapt", fields["step_adapt"].default) == "gap"
        top = num("alpha_max")
        learning["alpha_max"] = max(alpha, top) if lifts and top is not None else alpha
        if (num("alpha_min") or 0.0) > alpha:
            learning["alpha_min"] = alpha
    return data


def build_candidates(raw: Mapping[str, Any], cfg: Config,
                     settings: Sequence[Mapping[str, Value]], *, label: str,
                     include_current: bool = True) -> list[Candidate]:
    """Validate each setting merged into the config's TOML document ``raw``.

    With ``include_current`` the config's own settings come first (labelled ``current``)
    unless one of ``settings`` equals them, which is then labelled so. Settings that repeat
    an earlier one are dropped.
    """
    cur = current_settings(cfg)
    wanted: list[tuple[dict[str, Value], list[str]]] = []
    seen: dict[tuple[tuple[str, Value], ...], int] = {}

    def key_of(s: Mapping[str, Value]) -> tuple[tuple[str, Value], ...]:
        return tuple((k, s[k]) for k in TUNED)

    if include_current and not any(key_of(s) == key_of(cur) for s in settings):
        wanted.append((dict(cur), ["current"]))
        seen[key_of(cur)] = 0
    for s in settings:
        k = key_of(s)
        if k in seen:
            continue
        seen[k] = len(wanted)
        labels = [label, "current"] if include_current and k == key_of(cur) else [label]
        wanted.append((dict(s), labels))
    out = []
    for i, (s, labels) in enumerate(wanted):
        try:
            c: Config | None = parse_config(candidate_document(raw, s), f"candidate {i}")
            refused: tuple[str, ...] = ()
            if c is not None and any(s[k] != cur[k] for k in TERMS if k in s):
                initial_models(c)  # other terms must still fit each initial_state file
        except ConfigError as exc:
            c, refused = None, tuple(exc.errors) or (f"candidate {i}: {exc}",)
        out.append(Candidate(i, s, c, refused, tuple(labels)))
    return out
