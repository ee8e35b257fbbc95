"""One sensor's ridge regression: standardised features, a prior, and the online update.

Plain Python floats on the per-sample path (a few hundred nanoseconds a term), through the
arithmetic of :mod:`trimtab.model.kernel` that the tuner runs on K candidates at once; numpy
only in :meth:`RidgeModel.cost` and :meth:`RidgeModel.gradient` (:mod:`trimtab.model.batch`),
which serve fitting and tests.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from trimtab.errors import DataError, ModelError
from trimtab.model.batch import batch_cost, batch_gradient
from trimtab.model.kernel import shrink_step, standardise, why_refused
from trimtab.model.ops import SCALAR, dot
from trimtab.model.parts import shared
from trimtab.model.ranges import remap
from trimtab.model.state import finite as _finite
from trimtab.model.state import model_arguments
from trimtab.model.state import positive_or_none as _positive_or_none
from trimtab.model.terms import Scaler, TermSpec, as_sequence

__all__ = ["KEEP", "RidgeModel", "dot", "factory_prior", "shared"]


class _Keep(enum.Enum):
    KEEP = 0


KEEP = _Keep.KEEP
"""Sentinel for :meth:`RidgeModel.with_settings`: leave this setting as it is."""


def factory_prior(spec: TermSpec, scaler: Scaler) -> list[float]:
    """The prior ŷ = raw in standardised units: p_0 = centre_raw, p_raw = scale_raw, others 0."""
    if len(scaler) != spec.n_terms:
        raise ModelError(f"scaler has {len(scaler)} terms; the spec has {spec.n_terms}")
    prior = [0.0] * (spec.n_terms + 1)
    prior[0] = scaler.centre[0]
    prior[1] = scaler.scale[0]
    return prior


class RidgeModel:
    """A ridge regression on standardised terms, updated online one reference at a time.

    Features: ``z_j = (term_j − centre_j) / scale_j``, clipped to ``[−clip, clip]`` when
    ``clip`` is set; ``φ = [1, z_1 … z_k]``; prediction ``ŷ = θ·φ``.

    Cost over the m references of the model's memory (m = ``memory``, a fixed count)::

        J(θ) = 1/(2m) [ Σ ρ(θ·φ − y) + λ Σ_{j≥1} (θ_j − p_j)² ]

    with ρ(r) = r² (the design's J exactly) when ``huber_delta`` is None, and with δ set
    ρ(r) = r² for |r| ≤ δ, 2δ|r| − δ² beyond (twice Huber's loss, so ½ρ′ = ψ below). p is the
    prior (the factory calibration ŷ = raw unless given); j = 0 joins the penalty only when
    ``penalise_intercept``.

    Update, one per reference (:meth:`step_phi`)::

        r = θ·φ − y                         (returned: the residual before the update)
        ψ = clip(r, −δ, δ)                  (ψ = r when huber_delta is None)
        g = ψ·φ
        a = α / (1 + ‖φ‖²) if normalised else α     (‖φ‖² includes the leading 1)
        θ_j ← p_j + (1 − aλ/m)(θ_j − p_j) − a·g_j   for penalised j
        θ_0 ← θ_0 − a·g_0                   (the intercept, unless penalised)

    which is a stochastic-gradient step on ½ρ(r) + (λ/2m)‖θ − p‖²_L, the per-reference share
    of m·J. A step whose shrink factor 1 − aλ/m is not positive, or whose inputs or result are
    not finite, raises ModelError and leaves the state untouched.

    Running spread (for :meth:`band`): an exponentially weighted mean of |r| (the prequential
    residual, taken before each update) times √(π/2), which estimates the standard deviation
    of Gaussian residuals and leans less on single outliers than a mean square:
    ``spread ← (1 − β)·spread + β·|r|·√(π/2)`` with β = ``spread_decay``; a model with no
    spread yet (0) takes its first residual's value.
    """

    __slots__ = (
        "_centre", "_clip", "_delta", "_huber_delta", "_lam", "_memory", "_normalised", "_origin",
        "_penalise_intercept", "_prior", "_scale", "_scaler", "_spec", "_spread",
        "_spread_decay", "_theta", "_updates",
    )

    def __init__(
        self,
        spec: TermSpec,
        scaler: Scaler,
        *,
        origin: float = 0.0,
        lam: float = 0.0,
        memory: float = 1.0,
        prior: Sequence[float] | None = None,
        penalise_intercept: bool = False,
        huber_delta: float | None = None,
        normalised: bool = False,
        clip: float | None = None,
        theta: Sequence[float] | None = None,
        spread: float = 0.0,
        spread_decay: float = 0.05,
        updates: int = 0,
    ) -> None:
        if not isinstance(spec, TermSpec):
            raise ModelError(f"spec must be a TermSpec, got {type(spec).__name__}")
        if not isinstance(scaler, Scaler):
            raise ModelError(f"scaler must be a Scaler, got {type(scaler).__name__}")
        k = spec.n_terms
        if len(scaler) != k:
            raise ModelError(f"scaler has {len(scaler)} terms; the spec has {k} {spec.names()}")
        self._spec = spec
        self._scaler = scaler
        self._centre = scaler.centre
        self._scale = scaler.scale
        self._origin = _finite(origin, "origin")
        self._lam = _finite(lam, "lam")
        if self._lam < 0.0:
            raise ModelError(f"lam = {self._lam} must be ≥ 0")
        self._memory = _finite(memory, "memory")
        if self._memory <= 0.0:
            raise ModelError(f"memory = {self._memory} must be > 0")
        p = factory_prior(spec, scaler) if prior is None else as_sequence(prior, "prior")
        if len(p) != k + 1:
            raise ModelError(f"prior has {len(p)} weights; the model has {k + 1}")
        self._prior = tuple(p)
        self._penalise_intercept = bool(penalise_intercept)
        self._huber_delta = _positive_or_none(huber_delta, "huber_delta")
        self._delta = math.inf if self._huber_delta is None else self._huber_delta
        self._normalised = bool(normalised)
        self._clip = _positive_or_none(clip, "clip")
        th = list(self._prior) if theta is None else as_sequence(theta, "theta")
        if len(th) != k + 1:
            raise ModelError(f"theta has {len(th)} weights; the model has {k + 1}")
        self._theta = th
        self._spread = _finite(spread, "spread")
        if self._spread < 0.0:
            raise ModelError(f"spread = {self._spread} must be ≥ 0")
        self._spread_decay = _finite(spread_decay, "spread_decay")
        if not 0.0 < self._spread_decay <= 1.0:
            raise ModelError(f"spread_decay = {self._spread_decay} must be in (0, 1]")
        if isinstance(updates, bool) or not isinstance(updates, int) or updates < 0:
            raise ModelError(f"updates = {updates!r} must be an integer ≥ 0")
        self._updates = updates

    # -- settings and state -------------------------------------------------------------------

    @property
    def spec(self) -> TermSpec:
        return self._spec

    @property
    def scaler(self) -> Scaler:
        return self._scaler

    @property
    def origin(self) -> float:
        return self._origin

    @property
    def lam(self) -> float:
        return self._lam

    @property
    def memory(self) -> float:
        return self._memory

    @property
    def theta(self) -> tuple[float, ...]:
        return tuple(self._theta)

    @property
    def prior(self) -> tuple[float, ...]:
        return self._prior

    def weights(self) -> list[float]:
        """θ itself, without a copy, for the learning kernel to read (never to mutate)."""
        return self._theta

    @property
    def n_terms(self) -> int:
        """The number of weights, k + 1 (the intercept and one per term)."""
        return len(self._theta)

    @property
    def updates(self) -> int:
        """How many online steps have been applied (a closed-form fit counts none)."""
        return self._updates

    @property
    def spread(self) -> float:
        return self._spread

    @property
    def spread_decay(self) -> float:
        return self._spread_decay

    @property
    def huber_delta(self) -> float | None:
        return self._huber_delta

    @property
    def normalised(self) -> bool:
        return self._normalised

    @property
    def clip(self) -> float | None:
        return self._clip

    @property
    def penalise_intercept(self) -> bool:
        return self._penalise_intercept

    def __repr__(self) -> str:
        return (
            f"RidgeModel(terms={list(self._spec.names())}, lam={self._lam}, "
            f"memory={self._memory}, updates={self._updates})"
        )

    # -- per sample -----------------------------------------------------------------------------

    def phi(self, inputs: Mapping[str, float], t: float) -> tuple[list[float], float]:
        """The feature vector [1, z_1 … z_k] (clipped) and the largest |z| before clipping.

        A non-finite input raises ModelError; so does a term that overflows to ±inf unless
        ``clip`` is set, in which case it is clipped like any other far-out value.
        """
        row = self._spec.row(inputs, t, self._origin)
        # phi_of_row's two lines, not a call to it: a Python frame less on the per-sample path
        phi, zmax, finite = standardise(SCALAR, row, self._centre, self._scale, self._clip)
        return (phi, zmax) if finite else self._phi_checked(row, t)

    def phi_of_row(self, row: list[float], t: float) -> tuple[list[float], float]:
        """:meth:`phi` from the term values ``spec.row(inputs, t, origin)`` already computed."""
        phi, zmax, finite = standardise(SCALAR, row, self._centre, self._scale, self._clip)
        return (phi, zmax) if finite else self._phi_checked(row, t)

    def _phi_checked(self, row: list[float], t: float) -> tuple[list[float], float]:
        """:meth:`phi` term by term, naming the first term that is not finite."""
        for name, v in zip(self._spec.inputs, row, strict=False):
            if not math.isfinite(v):
                raise ModelError(f"input {name!r} = {v} is not finite")
        if self._spec.elapsed and not math.isfinite(t):
            raise ModelError(f"time t = {t} is not finite")
        phi = [1.0]
        zmax = 0.0
        clip = self._clip
        for j, (v, c, s) in enumerate(zip(row, self._centre, self._scale, strict=True)):
            z = (v - c) / s
            # An overflowed term is still a finite reading far outside: clipping bounds it.
            if math.isnan(z) or (clip is None and math.isinf(z)):
                raise ModelError(f"term {self._spec.names()[j]!r} is not finite ({v})")
            az = abs(z)
            if az > zmax:
                zmax = az
            if clip is not None and az > clip:
                z = clip if z > 0.0 else -clip
            phi.append(z)
        return phi, zmax

    def predict_phi(self, phi: Sequence[float]) -> float:
        """ŷ = θ·φ."""
        if len(phi) != len(self._theta):
            raise ModelError(f"phi has {len(phi)} entries; the model has {len(self._theta)}")
        out: float = dot(self._theta, phi)
        return out

    def predict(self, inputs: Mapping[str, float], t: float) -> float:
        """The corrected value for one reading's inputs at time t."""
        return self.predict_phi(self.phi(inputs, t)[0])

    def step_phi(self, phi: Sequence[float], y: float, alpha: float) -> float:
        """Apply one update toward reference y; return the residual θ·φ − y from before it."""
        n = len(self._theta)
        if len(phi) != n:
            raise ModelError(f"phi has {len(phi)} entries; the model has {n}")
        y = float(y)
        alpha = float(alpha)
        if not math.isfinite(y):
            raise ModelError(f"reference value {y} is not finite")
        if not (math.isfinite(alpha) and alpha >= 0.0):
            raise ModelError(f"step size alpha = {alpha} must be finite and ≥ 0")
        r, theta, spread, a, shrink, total, ok = shrink_step(
            SCALAR, self._theta, self._prior, phi, y, alpha, self._lam, self._memory,
            self._delta, self._normalised, self._penalise_intercept, self._spread,
            self._spread_decay)
        if not ok:
            raise ModelError(why_refused(r, a, shrink, total, self._lam, self._memory))
        self._theta = theta
        self._spread = spread
        self._updates += 1
        out: float = r
        return out

    def step(self, inputs: Mapping[str, float], t: float, y: float, alpha: float) -> float:
        """One update from a reading's inputs and its reference y; returns the prior residual."""
        return self.step_phi(self.phi(inputs, t)[0], y, alpha)

    def band(self, k: float) -> float:
        """The ± band: k times the running residual spread."""
        k = float(k)
        if not (math.isfinite(k) and k >= 0.0):
            raise ModelError(f"band multiplier k = {k} must be finite and ≥ 0")
        return k * self._spread

    def with_prior(self, prior: Sequence[float]) -> RidgeModel:
        """A copy whose penalty pulls toward ``prior`` (standardised units); θ is unchanged."""
        d = self._state()
        d["prior"] = as_sequence(prior, "prior")
        return RidgeModel(self._spec, self._scaler, **d)

    def move_scaler(self, new: Scaler) -> None:
        """Standardise with ``new`` from now on; θ and the prior move so ŷ stays the same.

        See :mod:`trimtab.model.ranges` for the map and what the penalty means after a move.
        """
        old = self._scaler
        if new == old:
            return
        if len(new) != len(old):
            raise ModelError(f"scaler has {len(new)} terms; the model has {len(old)}")
        theta = remap(self._theta, old, new)
        if not math.isfinite(sum(theta)):
            raise ModelError("scaler move would make a weight non-finite; state left unchanged")
        self._theta = theta
        self._prior = tuple(remap(self._prior, old, new))
        self._scaler = new
        self._centre = new.centre
        self._scale = new.scale

    def coefficients(self) -> dict[str, float]:
        """Weights in engineering units: ``offset``, then one per term (ŷ = offset + Σ c·term)."""
        theta = self._theta
        offset = theta[0] - math.fsum(
            w * c / s for w, c, s in zip(theta[1:], self._centre, self._scale, strict=True)
        )
        out = {"offset": offset}
        for name, w, s in zip(self._spec.names(), theta[1:], self._scale, strict=True):
            out[name] = w / s
        return out

    # -- copies -----------------------------------------------------------------------------------

    def with_settings(
        self,
        *,
        lam: float | _Keep = KEEP,
        memory: float | _Keep = KEEP,
        huber_delta: float | _Keep | None = KEEP,
        normalised: bool | _Keep = KEEP,
        clip: float | _Keep | None = KEEP,
    ) -> RidgeModel:
        """A copy with changed learning settings and the same learned state."""
        changes = {"lam": lam, "memory": memory, "huber_delta": huber_delta,
                   "normalised": normalised, "clip": clip}
        d = self._state()
        d.update({k: v for k, v in changes.items() if v is not KEEP})
        return RidgeModel(self._spec, self._scaler, **d)

    def copy(self) -> RidgeModel:
        """An independent copy."""
        return RidgeModel(self._spec, self._scaler, **self._state())

    def _state(self) -> dict[str, Any]:
        return {
            "origin": self._origin,
            "lam": self._lam,
            "memory": self._memory,
            "prior": self._prior,
            "penalise_intercept": self._penalise_intercept,
            "huber_delta": self._huber_delta,
            "normalised": self._normalised,
            "clip": self._clip,
            "theta": tuple(self._theta),
            "spread": self._spread,
            "spread_decay": self._spread_decay,
            "updates": self._updates,
        }

    # -- batch cost (fitting and tests) --------------------------------------------------------

    def cost(self, Phi: NDArray[np.float64], y: NDArray[np.float64]) -> float:
        """J(θ) over the rows of Phi (features [1, z…]) and references y, as the class states."""
        return batch_cost(self._theta, self._prior, Phi, y, lam=self._lam, memory=self._memory,
                          delta=self._huber_delta, penalise_intercept=self._penalise_intercept)

    def gradient(self, Phi: NDArray[np.float64], y: NDArray[np.float64]) -> NDArray[np.float64]:
        """∇J(θ) = (1/m) [ Φᵀψ(Φθ − y) + λ L (θ − p) ]."""
        return batch_gradient(self._theta, self._prior, Phi, y, lam=self._lam,
                              memory=self._memory, delta=self._huber_delta,
                              penalise_intercept=self._penalise_intercept)

    # -- serialisation ---------------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able state; floats round-trip bit for bit through ``json``."""
        d = self._state()
        d["prior"] = list(self._prior)
        d["theta"] = list(self._theta)
        return {"spec": self._spec.to_dict(), "scaler": self._scaler.to_dict(), **d}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> RidgeModel:
        """Rebuild from :meth:`to_dict`'s form; DataError names the malformed key."""
        spec, scaler, kw = model_arguments(d)
        try:
            model = cls(spec, scaler, **kw)
        except ModelError as exc:
            raise DataError(f"model: {exc}") from exc
        model._prior = shared(model._prior)  # equal across sensors of one configuration
        return model
