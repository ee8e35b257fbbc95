"""The sections the engine runs on: learning (step, penalty, guards, scaler), pairing, output.

The learning section's cross-field rules include the stability proofs of
:mod:`trimtab.model.stability`, at the section's own bounds.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, Strict, model_validator

from trimtab.config.sensors import (
    Bool,
    NonNegFloat,
    PosFloat,
    PosInt,
    Section,
)
from trimtab.model import stability
from trimtab.wire.fielderrors import Problems, refuse

__all__ = ["LearningSettings", "OutputSettings", "PairingSettings"]


class LearningSettings(Section):
    """The online step: step size and penalty with their bounds, loss, guards and memory."""

    alpha: PosFloat = Field(default=0.5, description="starting step size α")
    alpha_min: PosFloat = Field(default=0.01, description="α never halves below this")
    alpha_max: PosFloat = Field(default=1.0, description="largest α; the stability proofs use it")
    lam: NonNegFloat = Field(
        default=1.0, alias="lambda", description="ridge penalty λ toward the prior"
    )
    lambda_min: NonNegFloat = Field(default=0.0, description="smallest λ a tuner may choose")
    lambda_max: NonNegFloat = Field(
        default=10.0, description="largest λ; the stability proofs use it"
    )
    memory: PosInt = Field(default=200, description="references m the penalty is scaled over")
    normalised: Bool = Field(default=True, description="divide α by 1 + ‖φ‖² (normalised step)")
    huber_delta: PosFloat | None = Field(
        default=None, description="Huber δ in output units; unset: squared"
    )
    gate_k: PosFloat = Field(default=5.0, description="suspect beyond this many robust spreads")
    gate_run: PosInt = Field(
        default=3, description="suspects in a row on one side accepted as a shift"
    )
    max_references: PosInt = Field(
        default=60, description="most references a sensor learns from per reference_interval"
    )
    shift_after: NonNegFloat = Field(
        default=3600.0, description="s of event time a run of suspects must span to be a shift"
    )
    warmup: Annotated[int, Strict(), Field(ge=0)] = Field(
        default=5, description="references of warmup"
    )
    snapshot_every: PosInt = Field(
        default=10, description="applied references between good snapshots"
    )
    rollback_factor: Annotated[float, Strict(), Field(gt=1)] = Field(
        default=4.0,
        description="recent RMS error over the long-window robust error scale that rolls back",
    )
    error_window: PosInt = Field(
        default=200, description="applied references the rollback's robust error scale spans"
    )
    alpha_recovery: Annotated[float, Strict(), Field(ge=0, le=1)] = Field(
        default=0.1, description="after a good reference α moves this fraction back toward alpha"
    )
    step_adapt: Literal["gap", "none"] = Field(
        default="gap", description="raise a reference's step toward alpha_max after a long gap"
    )
    step_gap: PosFloat = Field(
        default=43200.0, description="s without a reference that lift the step halfway"
    )
    scaler: Literal["follow", "fixed"] = Field(
        default="follow", description="centre and scale follow the operating range, or stay"
    )
    scaler_span: PosFloat = Field(
        default=2592000.0, description="s; time constant of the followed operating range"
    )
    scaler_width: PosFloat = Field(
        default=2.0, description="a followed scale is this many running standard deviations"
    )
    feature_clip: PosFloat = Field(default=6.0, description="standardised terms clipped to ±this")
    reference_interval: PosFloat = Field(
        default=3600.0, description="expected seconds between references"
    )

    @model_validator(mode="after")
    def _rules(self) -> LearningSettings:
        p: Problems = []
        for name, lo, hi, lo_name, hi_name in (
            ("alpha", self.alpha_min, self.alpha_max, "alpha_min", "alpha_max"),
            ("lambda", self.lambda_min, self.lambda_max, "lambda_min", "lambda_max"),
        ):
            value = self.alpha if name == "alpha" else self.lam
            if lo > hi:
                p.append(
                    (
                        (lo_name,),
                        f"{lo_name} = {lo:g} > {hi_name} = {hi:g} "
                        f"(rule: {lo_name} ≤ {name} ≤ {hi_name})",
                    )
                )
            elif not lo <= value <= hi:
                p.append(
                    (
                        (name,),
                        f"{value:g} is outside [{lo_name}, {hi_name}] = "
                        f"[{lo:g}, {hi:g}] (rule: {lo_name} ≤ {name} ≤ {hi_name})",
                    )
                )
        why = stability.shrink_problem(self.alpha_max, self.lambda_max, self.memory)
        if why:
            p.append((("lambda_max",), why))
        refuse(p)
        return self


class PairingSettings(Section):
    """How a reference finds its readings: window mean or nearest reading, in event time."""

    window: PosFloat | None = Field(
        default=None, description="window (s) for references without one"
    )
    anchor: Literal["end", "start"] = Field(
        default="end", description="what a reference's time marks"
    )
    tolerance: PosFloat = Field(default=30.0, description="s; a spot reference's nearest reading")
    max_future: PosFloat = Field(
        default=600.0, description="s an event may be stamped ahead of the daemon's clock"
    )
    buffer_span: PosFloat = Field(
        default=7200.0, description="s of recent readings kept per sensor"
    )
    buffer_capacity: Annotated[int, Strict(), Field(ge=16, le=10000000)] = Field(
        default=10000, description="most readings kept per sensor (bounds memory)"
    )

    @model_validator(mode="after")
    def _rules(self) -> PairingSettings:
        p: Problems = []
        for name in ("window", "tolerance"):
            value = getattr(self, name)
            if value is not None and not self.buffer_span > value:
                p.append(
                    (
                        ("buffer_span",),
                        f"{self.buffer_span:g} s does not exceed pairing.{name}"
                        f" = {value:g} s (rule: buffer_span > {name})",
                    )
                )
        refuse(p)
        return self


class OutputSettings(Section):
    """What goes with each corrected value: band, cap and flags."""

    band_coverage: Annotated[float, Strict(), Field(gt=0, lt=1)] = Field(
        default=0.9, description="share of references the ± band should cover (calibrated online)"
    )
    band_gain: Annotated[float, Strict(), Field(gt=0, le=1)] = Field(
        default=0.05, description="step of the band's online calibration per reference"
    )
    cap: PosFloat | None = Field(
        default=None, description="largest absolute change corrected − raw; unset: no cap"
    )
    stale_after: PosFloat = Field(
        default=172800.0, description="s without a reference before `stale`"
    )
    extrapolation: PosFloat = Field(
        default=4.0, description="standardised input size beyond which `extrapolating` is flagged"
    )
