"""What the engine is given: its settings sections, a routing predicate, and the models the
settings describe (terms, prior, configured scaler).

The engine takes no config tree: :class:`EngineSettings` carries the ``[learning]``,
``[output]`` and ``[pairing]`` sections and a :class:`Routing` — which sensors it serves,
their settings, and which sensors a reference stream targets — so the rules of routing and
sharding stay with the config and the service (:func:`trimtab.engine.wiring.engine_settings`
builds both from a config).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from trimtab.engine.guards import GuardSettings
from trimtab.engine.learn import Band
from trimtab.model.online import RidgeModel, factory_prior
from trimtab.model.ranges import RangeTracker
from trimtab.model.terms import Scaler, TermSpec

if TYPE_CHECKING:
    from trimtab.config import LearningSettings, OutputSettings, PairingSettings, SensorSettings

__all__ = ["DAY", "EngineSettings", "Routing", "band_of", "configured_prior",
           "configured_scaler", "elapsed_scale_days", "guard_settings", "prior_mode",
           "ranges_for", "spec_of"]

DAY = 86400.0


@dataclass(frozen=True, slots=True)
class Routing:
    """Which sensors an engine serves and with what settings; where references go."""

    settings: Callable[[str], SensorSettings]
    """A sensor's resolved settings (its override over the defaults)."""
    serves: Callable[[str], bool]
    """Whether the engine serves a sensor id."""
    targets: Callable[[str], tuple[str, ...]]
    """The served sensors a reference stream with this id targets."""
    max_sensors: int
    """Most sensors with state; past it a new id gets none."""


@dataclass(frozen=True, slots=True)
class EngineSettings:
    """Everything an engine is configured with."""

    learning: LearningSettings
    output: OutputSettings
    pairing: PairingSettings
    routing: Routing


def guard_settings(lc: LearningSettings) -> GuardSettings:
    """The guard's knobs from ``[learning]`` (``step_gap`` +inf: the gap lift is off)."""
    return GuardSettings(
        gate_k=lc.gate_k, gate_run=lc.gate_run, warmup=lc.warmup, shift_after=lc.shift_after,
        snapshot_every=lc.snapshot_every, rollback_factor=lc.rollback_factor,
        alpha=lc.alpha, alpha_min=lc.alpha_min, error_window=lc.error_window,
        alpha_recovery=lc.alpha_recovery, alpha_max=lc.alpha_max,
        step_gap=lc.step_gap if lc.step_adapt == "gap" else math.inf,
    )


def band_of(oc: OutputSettings) -> Band:
    """The band's calibration settings from ``[output]``."""
    return Band(oc.band_coverage, oc.band_gain)


def prior_mode(settings: SensorSettings) -> str | tuple[float, ...]:
    """The prior a sensor's settings ask for: the configured one, or the default for unset
    (``"initial"`` with an initial_state, else ``"factory"``)."""
    if settings.prior is not None:
        return settings.prior
    return "initial" if settings.initial_state is not None else "factory"


def configured_prior(settings: SensorSettings, spec: TermSpec, scaler: Scaler,
                     start: Sequence[float] | None = None) -> list[float] | None:
    """The prior the online penalty pulls toward, in standardised units; None: the factory.

    ``"factory"`` is ŷ = raw in the scaler's units, ``"zero"`` plain ridge, ``"initial"`` the
    weights the model starts from (``start``: an initial_state's fitted θ, so the penalty keeps
    the model near the calibration it was given unless references say otherwise; a model the
    engine creates starts at the factory calibration), a list is taken as given. Unset:
    ``"initial"`` when there is an initial_state, else the factory calibration.
    """
    p = prior_mode(settings)
    if p == "initial":
        return None if start is None else [float(v) for v in start]
    if p == "factory":
        return factory_prior(spec, scaler)
    if p == "zero":
        return [0.0] * (spec.n_terms + 1)
    return [float(v) for v in p]


def ranges_for(model: RidgeModel) -> RangeTracker:
    """A range tracker starting at a model's scaler (the elapsed term stays fixed)."""
    fixed = [False] * len(model.scaler)
    if model.spec.elapsed:
        fixed[-1] = True
    return RangeTracker.start(model.scaler, fixed)


def spec_of(settings: SensorSettings) -> TermSpec:
    """The term specification a sensor's settings describe."""
    return TermSpec(
        inputs=tuple(settings.inputs),
        products=tuple((a, b) for a, b in settings.products),
        squares=tuple(settings.squares),
        elapsed=settings.elapsed,
    )


def elapsed_scale_days(lc: LearningSettings) -> float:
    """Scale of the elapsed-time term when the engine fixes it: the memory's span in days."""
    return max(1.0, lc.memory * lc.reference_interval / DAY)


def configured_scaler(spec: TermSpec, settings: SensorSettings,
                      lc: LearningSettings) -> Scaler | None:
    """Centre and scale from the config, when every input has both; derived for other terms.

    Products and squares get the centre and scale their inputs imply for independent inputs
    (an approximation; it only needs to be reasonable and fixed).
    """
    c, s = settings.centre, settings.scale
    if not c or not s or any(name not in c or name not in s for name in spec.inputs):
        return None
    centre = [float(c[n]) for n in spec.inputs]
    scale = [float(s[n]) for n in spec.inputs]
    for a, b in spec.products:
        centre.append(c[a] * c[b])
        scale.append(math.sqrt((s[a] * s[b]) ** 2 + (c[a] * s[b]) ** 2 + (c[b] * s[a]) ** 2))
    for a in spec.squares:
        centre.append(c[a] ** 2 + s[a] ** 2)
        scale.append(math.sqrt(2.0 * s[a] ** 4 + 4.0 * (c[a] * s[a]) ** 2))
    if spec.elapsed:
        centre.append(0.0)
        scale.append(elapsed_scale_days(lc))
    return Scaler(tuple(centre), tuple(scale))
