"""The ``[sensors]`` section, and the pieces every section of the config is built from.

Shared pieces: strictly typed scalars, the ``Section`` base (unknown keys forbidden, frozen,
finite floats), :func:`refuse` for cross-field rules that keep each problem's own path, and
:func:`expand_errors`, which turns a pydantic ``ValidationError`` into (path, message) pairs.
"""

from __future__ import annotations

import re
import zlib
from collections.abc import Callable
from typing import Annotated, Any, Literal, TypeVar

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    Strict,
    ValidationError,
    ValidatorFunctionWrapHandler,
    WrapValidator,
    field_validator,
    model_validator,
)
from pydantic_core import PydanticCustomError

from trimtab.errors import ConfigError, DecodeError
from trimtab.model.terms import TermSpec
from trimtab.wire.fielderrors import Loc, Problems, dotted, expand_errors, refuse
from trimtab.wire.topics import SENSOR_ID_PATTERN, validate_sensor_id

__all__ = [
    "Bool",
    "InputName",
    "Loc",
    "NonNegFloat",
    "PosFloat",
    "PosInt",
    "Problems",
    "Section",
    "SensorId",
    "SensorOverride",
    "SensorSettings",
    "SensorsSettings",
    "SharedReference",
    "Str",
    "dotted",
    "expand_errors",
    "refuse",
]

INPUT_NAME_PATTERN = r"^[a-z][a-z0-9_]{0,31}$"
ROUTES_MEMO = 100_000
"""Sensor and stream ids whose routing answers a config remembers (they never change for one
config; a reload makes a new config). Bounded, so made-up ids cannot grow memory."""


K = TypeVar("K")
V = TypeVar("V")


def _remember(memo: dict[K, V], key: K, compute: Callable[[K], V]) -> V:
    """``compute(key)``, answered from ``memo`` when it holds the key; kept while it has room."""
    if key in memo:
        return memo[key]
    answer = compute(key)
    if len(memo) < ROUTES_MEMO:
        memo[key] = answer
    return answer


def _sensor_id(value: str) -> str:
    try:
        return validate_sensor_id(value)
    except DecodeError as exc:
        raise ValueError(exc.detail) from None


def _input_name(value: str) -> str:
    if not re.fullmatch(INPUT_NAME_PATTERN, value) or value == "elapsed_days":
        raise ValueError(
            f"input name {value!r} must be 1-32 of a-z 0-9 _ starting with a letter, "
            "and not 'elapsed_days'"
        )
    return value


def _prior(value: Any, handler: ValidatorFunctionWrapHandler) -> Any:
    try:
        return handler(value)
    except ValidationError:
        raise PydanticCustomError(
            "prior", 'must be "factory", "zero", "initial" or a list of numbers, intercept first'
        ) from None


Bool = Annotated[bool, Strict()]
Str = Annotated[str, Strict(), Field(min_length=1, max_length=4096)]
PosFloat = Annotated[float, Strict(), Field(gt=0)]
NonNegFloat = Annotated[float, Strict(), Field(ge=0)]
PosInt = Annotated[int, Strict(), Field(ge=1)]
SensorId = Annotated[
    str,
    Strict(),
    AfterValidator(_sensor_id),
    Field(json_schema_extra={"pattern": SENSOR_ID_PATTERN}),
]
InputName = Annotated[str, Strict(), AfterValidator(_input_name), Field(pattern=INPUT_NAME_PATTERN)]
FieldName = Annotated[str, Strict(), Field(pattern=r"^[^\x00-\x1f]{1,64}$")]
Prior = Annotated[
    Literal["factory", "zero", "initial"] | tuple[Annotated[float, Strict()], ...],
    WrapValidator(_prior),
]


def shard_of(sensor_id: str, count: int) -> int:
    """The hash shard of a sensor id: CRC-32 of its UTF-8 bytes modulo ``count``."""
    if count < 1:
        raise ConfigError(f"shard count {count} must be ≥ 1")
    return zlib.crc32(sensor_id.encode("utf-8")) % count


class Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


_SETTINGS_DOC = {
    "inputs": 'model inputs; the first is "raw", the others covariates',
    "products": 'pairs of inputs multiplied, e.g. [["raw", "temp"]]',
    "squares": "inputs squared",
    "elapsed": "add a drift term: days since the model's origin",
    "prior": '"factory" (ŷ = raw), "zero" (plain ridge), "initial" (the weights the model '
             "starts from: an initial_state's fit) or the k + 1 weights, intercept first, "
             'standardised; unset: "initial" with an initial_state, else "factory"',
    "penalise_intercept": "pull the intercept toward the prior too",
    "initial_state": "model-state file from `trimtab fit` to start from",
    "centre": "input → centre used to standardise it (with scale)",
    "scale": "input → scale (> 0) used to standardise it (with centre)",
    "scaler_readings": "readings that fix centre and scale when neither is configured",
}


class SensorSettings(Section):
    """One sensor's model: its terms, prior and how its features are standardised."""

    inputs: tuple[InputName, ...] = Field(default=("raw",), description=_SETTINGS_DOC["inputs"])
    products: tuple[tuple[InputName, InputName], ...] = Field(
        default=(), description=_SETTINGS_DOC["products"]
    )
    squares: tuple[InputName, ...] = Field(default=(), description=_SETTINGS_DOC["squares"])
    elapsed: Bool = Field(default=False, description=_SETTINGS_DOC["elapsed"])
    prior: Prior | None = Field(default=None, description=_SETTINGS_DOC["prior"])
    penalise_intercept: Bool = Field(default=False, description=_SETTINGS_DOC["penalise_intercept"])
    initial_state: Str | None = Field(default=None, description=_SETTINGS_DOC["initial_state"])
    centre: dict[InputName, Annotated[float, Strict()]] | None = Field(
        default=None, description=_SETTINGS_DOC["centre"]
    )
    scale: dict[InputName, PosFloat] | None = Field(
        default=None, description=_SETTINGS_DOC["scale"]
    )
    scaler_readings: Annotated[int, Strict(), Field(ge=2, le=1000000)] = Field(
        default=100, description=_SETTINGS_DOC["scaler_readings"]
    )

    def term_count(self) -> int:
        """k, the number of terms (the model has k + 1 weights)."""
        return len(self.inputs) + len(self.products) + len(self.squares) + int(self.elapsed)

    def term_spec(self) -> TermSpec:
        """The model's terms as :class:`trimtab.model.terms.TermSpec`."""
        return TermSpec(self.inputs, self.products, self.squares, self.elapsed)

    @model_validator(mode="after")
    def _rules(self) -> SensorSettings:
        refuse(_settings_problems(self))
        return self


def _settings_problems(s: SensorSettings) -> Problems:
    p: Problems = []
    if not s.inputs or s.inputs[0] != "raw":
        p.append((("inputs",), f'the first input must be "raw", got {list(s.inputs)}'))
    for name, items in (("inputs", list(s.inputs)), ("squares", list(s.squares))):
        dupes = sorted({x for x in items if items.count(x) > 1})
        if dupes:
            p.append(((name,), f"listed more than once: {dupes}"))
    known = set(s.inputs)
    seen: set[frozenset[str]] = set()
    for i, (a, b) in enumerate(s.products):
        unknown = [x for x in (a, b) if x not in known]
        if unknown:
            p.append((("products", i), f"{unknown[0]!r} is not one of inputs {list(s.inputs)}"))
        elif a == b:
            p.append((("products", i), f"{a}·{a} is a square; list {a!r} in squares"))
        elif frozenset((a, b)) in seen:
            p.append((("products", i), f"the product {a}·{b} is listed twice"))
        seen.add(frozenset((a, b)))
    for i, x in enumerate(s.squares):
        if x not in known:
            p.append((("squares", i), f"{x!r} is not one of inputs {list(s.inputs)}"))
    if isinstance(s.prior, tuple) and len(s.prior) != s.term_count() + 1:
        p.append(
            (
                ("prior",),
                f"{len(s.prior)} weights given; the model has k + 1 = "
                f"{s.term_count() + 1} (intercept first, then one per term)",
            )
        )
    if (s.centre is None) != (s.scale is None):
        p.append((("scale" if s.scale is None else "centre",), "centre and scale go together"))
    for name in ("centre", "scale"):
        table = getattr(s, name)
        if table is not None and set(table) != known:
            p.append(
                ((name,), f"must give exactly the inputs {sorted(known)}, got {sorted(table)}")
            )
    if s.initial_state is not None and s.centre is not None:
        p.append(
            (
                ("initial_state",),
                "an initial state carries its own centre and scale; remove centre and scale",
            )
        )
    return p


class SensorOverride(Section):
    """Per-sensor replacements for keys of ``[sensors.defaults]``; unset keys inherit."""

    inputs: tuple[InputName, ...] | None = None
    products: tuple[tuple[InputName, InputName], ...] | None = None
    squares: tuple[InputName, ...] | None = None
    elapsed: Bool | None = None
    prior: Prior | None = None
    penalise_intercept: Bool | None = None
    initial_state: Str | None = None
    centre: dict[InputName, Annotated[float, Strict()]] | None = None
    scale: dict[InputName, PosFloat] | None = None
    scaler_readings: Annotated[int, Strict(), Field(ge=2, le=1000000)] | None = None


class SharedReference(Section):
    """One reference stream serving several co-located sensors."""

    source: SensorId = Field(description="the id the reference stream publishes under")
    serves: tuple[SensorId, ...] = Field(min_length=1, description="sensors it serves")


class SensorsSettings(Section):
    """Which sensors this daemon serves, their model settings, and shared reference streams."""

    ids: tuple[SensorId, ...] = Field(default=(), description="sensor ids served")
    max: PosInt = Field(
        default=10000, description="most sensors with state; a new id past it is refused"
    )
    pattern: Str | None = Field(
        default=None, description="regex; ids it matches in full are served too"
    )
    defaults: SensorSettings = Field(default_factory=lambda: SensorSettings())
    overrides: dict[SensorId, SensorOverride] = Field(
        default={}, description="sensor id → a table of any keys of sensors.defaults"
    )
    shared_references: tuple[SharedReference, ...] = Field(
        default=(), description="reference streams serving several sensors"
    )
    shard_count: Annotated[int, Strict(), Field(ge=1, le=65536)] = Field(
        default=1, description="hash shards the pattern-matched ids are split into"
    )
    shard_index: Annotated[int, Strict(), Field(ge=0, le=65535)] = Field(
        default=0, description="this daemon's shard: CRC-32 of the id mod shard_count"
    )
    exclude: tuple[SensorId, ...] = Field(
        default=(), description="ids never served here (moved to another daemon)"
    )
    incoming: tuple[SensorId, ...] = Field(
        default=(), description="ids being moved here: subscribed and held until imported"
    )
    _regex: re.Pattern[str] | None = PrivateAttr(None)
    _resolved: dict[str, SensorSettings] = PrivateAttr(default_factory=dict)
    _targets: dict[str, tuple[str, ...]] = PrivateAttr(default_factory=dict)
    _served: dict[str, bool] = PrivateAttr(default_factory=dict)
    _routes: dict[str, tuple[str, ...]] = PrivateAttr(default_factory=dict)
    """:meth:`allowed`'s and :meth:`targets`' answers, asked for every message; at most
    ``ROUTES_MEMO`` of each (the answers never change for one config)."""

    @field_validator("pattern")
    @classmethod
    def _pattern(cls, value: str | None) -> str | None:
        if value is not None:
            try:
                re.compile(value)
            except re.error as exc:
                raise ValueError(f"not a regular expression: {exc}") from None
        return value

    def allowed(self, sensor_id: str) -> bool:
        """Whether a sensor is served: in ids, or matched by pattern in this hash shard.

        ``exclude`` and ``incoming`` win over the pattern; ids are never in either.
        """
        return _remember(self._served, sensor_id, self._allowed)

    def targets(self, source_id: str) -> tuple[str, ...]:
        """The sensors a reference stream serves here: its shared list, else itself if served.

        Sensors of a shared list that another daemon serves (another shard, excluded, or still
        incoming) are left out.
        """
        return _remember(self._routes, source_id, self._targets_of)

    def _targets_of(self, source_id: str) -> tuple[str, ...]:
        shared = self._targets.get(source_id)
        if shared is not None:
            return tuple(s for s in shared if self.allowed(s))
        return (source_id,) if self.allowed(source_id) else ()

    def _allowed(self, sensor_id: str) -> bool:
        if sensor_id in self.ids:
            return True
        if not self.matched(sensor_id) or sensor_id in self.exclude or sensor_id in self.incoming:
            return False
        return self.shard_count == 1 or shard_of(sensor_id, self.shard_count) == self.shard_index

    def matched(self, sensor_id: str) -> bool:
        """Whether ``pattern`` matches a valid sensor id in full (whatever its shard)."""
        if self._regex is None or self._regex.fullmatch(sensor_id) is None:
            return False
        try:
            validate_sensor_id(sensor_id)
        except DecodeError:
            return False
        return True

    def elsewhere(self, sensor_id: str) -> bool:
        """Configured here but served by another daemon: excluded, another shard's, or a
        shared reference stream none of whose sensors is served here."""
        if self.allowed(sensor_id) or sensor_id in self.incoming:
            return False
        shared = self._targets.get(sensor_id)
        if shared is not None:
            return not any(self.allowed(x) or x in self.incoming for x in shared)
        return sensor_id in self.exclude or self.matched(sensor_id)

    def known(self, sensor_id: str) -> bool:
        """Served here, incoming, or matched by the pattern in any shard (configurable here)."""
        return sensor_id in self.ids or sensor_id in self.incoming or self.matched(sensor_id)

    @model_validator(mode="after")
    def _rules(self) -> SensorsSettings:
        p: Problems = []
        self._regex = re.compile(self.pattern) if self.pattern is not None else None
        if not self.ids and self.pattern is None and not self.incoming:
            p.append((("ids",), "give ids, pattern or both; with neither no sensor is served"))
        p.extend(_shard_problems(self))
        for sid, override in self.overrides.items():
            if not self.known(sid):
                p.append((("overrides", sid), _not_served(sid, self.pattern)))
                continue
            merged = {**self.defaults.model_dump(), **override.model_dump(exclude_unset=True)}
            try:
                self._resolved[sid] = SensorSettings.model_validate(merged)
            except ValidationError as exc:
                p.extend(
                    (("overrides", sid, *loc), msg)
                    for loc, msg in expand_errors(exc, SensorSettings)
                )
        served_by: dict[str, str] = {}
        for i, ref in enumerate(self.shared_references):
            if ref.source in self._targets:
                p.append((("shared_references", i, "source"), f"{ref.source!r} is listed twice"))
            self._targets[ref.source] = ref.serves
            for j, sid in enumerate(ref.serves):
                where: Loc = ("shared_references", i, "serves", j)
                if not self.known(sid):
                    p.append((where, _not_served(sid, self.pattern)))
                elif sid in served_by:
                    p.append((where, f"{sid!r} is already served by {served_by[sid]!r}"))
                served_by[sid] = ref.source
        refuse(p)
        return self


def _shard_problems(s: SensorsSettings) -> Problems:
    """Duplicates, overlaps of ids / exclude / incoming, and the hash shard's own rules."""
    p: Problems = []
    lists = {"ids": s.ids, "exclude": s.exclude, "incoming": s.incoming}
    for name, items in lists.items():
        dupes = sorted({x for x in items if items.count(x) > 1})
        if dupes:
            p.append(((name,), f"listed more than once: {dupes}"))
    for a, b in (("ids", "exclude"), ("ids", "incoming"), ("incoming", "exclude")):
        both = sorted(set(lists[a]) & set(lists[b]))
        if both:
            p.append(((b,), f"{both} also listed in sensors.{a}; a sensor is in one of them"))
    if s.shard_index >= s.shard_count:
        p.append((("shard_index",), f"{s.shard_index} is not below shard_count = "
                  f"{s.shard_count} (rule: 0 ≤ shard_index < shard_count)"))
    if s.shard_count > 1 and s.pattern is None:
        p.append((("shard_count",), "hash shards split the ids sensors.pattern matches; set "
                  "a pattern (ids listed in sensors.ids are always served, whatever the shard)"))
    return p


def _not_served(sid: str, pattern: str | None) -> str:
    how = f"nor matched by sensors.pattern {pattern!r}" if pattern else "and no pattern is set"
    return f"sensor {sid!r} is not listed in sensors.ids {how}"


