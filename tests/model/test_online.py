"""Tests of the online ridge model: its update, its cost, and its serialised state."""

from __future__ import annotations

import contextlib
import copy
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_diabetes
from sklearn.linear_model import SGDRegressor

from trimtab.errors import DataError, ModelError
from trimtab.model.closedform import design, fit_model
from trimtab.model.online import RidgeModel
from trimtab.model.terms import Scaler, TermSpec

SPEC = TermSpec(("raw", "temp"), (("raw", "temp"),))
SCALER = Scaler((30.0, 20.0, 600.0), (8.0, 5.0, 250.0))


def _model(**kw: object) -> RidgeModel:
    return RidgeModel(SPEC, SCALER, **kw)  # type: ignore[arg-type]


class TestPrior:
    def test_factory_prior_predicts_the_raw_value(self) -> None:
        """With the factory prior (gain 1 on raw, 0 elsewhere) the prediction is the raw value."""
        m = _model()
        assert m.prior == (30.0, 8.0, 0.0, 0.0)
        assert m.predict({"raw": 41.25, "temp": 3.0}, 0.0) == pytest.approx(41.25, rel=1e-15)

    def test_coefficients_in_engineering_units(self) -> None:
        """The factory prior reads as offset 0, gain 1 and zero covariate coefficients."""
        assert _model().coefficients() == {"offset": 0.0, "raw": 1.0, "temp": 0.0, "raw*temp": 0.0}

    def test_phi_reports_largest_z_before_clipping(self) -> None:
        """phi clips standardised terms to ±clip and reports the largest |z| before it."""
        phi, zmax = _model(clip=3.0).phi({"raw": 30.0 + 8.0 * 5.0, "temp": 20.0}, 0.0)
        assert phi[:3] == [1.0, 3.0, 0.0]
        assert zmax == pytest.approx(5.0)


class TestStep:
    def test_zero_residual_shrinks_toward_prior_by_exact_factor(self) -> None:
        """A zero-residual step multiplies θ_j − p_j by 1 − αλ/m = 0.99 (α = 0.01, λ = 1,
        m = 1: common practice's example of a shrink factor a little below one) and leaves
        the intercept alone."""
        theta = [2.0, 9.5, -0.75, 0.3]
        m = _model(lam=1.0, memory=1.0, theta=theta)
        phi, _ = m.phi({"raw": 33.0, "temp": 18.0}, 0.0)
        y = m.predict_phi(phi)
        r = m.step_phi(phi, y, 0.01)
        assert r == 0.0
        assert m.theta[0] == theta[0]
        for j in (1, 2, 3):
            assert m.theta[j] - m.prior[j] == pytest.approx(
                0.99 * (theta[j] - m.prior[j]), rel=1e-14
            )
        assert m.updates == 1

    def test_one_pass_equals_sklearn_sgd(self) -> None:
        """One pass with prior 0 and no scaling equals scikit-learn's SGDRegressor (penalty
        'l2', alpha = λ/m, constant eta0 = α, no shuffling) after one partial_fit epoch."""
        X, y = load_diabetes(return_X_y=True)
        X, y = X[:120, :4], y[:120]
        lam, m_mem, alpha = 0.5, 2.0, 0.02
        spec = TermSpec(("a", "b", "c", "d"))
        m = RidgeModel(spec, Scaler.identity(4), lam=lam, memory=m_mem, prior=[0.0] * 5)
        for row, target in zip(X, y, strict=True):
            m.step_phi([1.0, *row], float(target), alpha)
        ref = SGDRegressor(
            penalty="l2", alpha=lam / m_mem, learning_rate="constant", eta0=alpha,
            shuffle=False, max_iter=1, tol=None, fit_intercept=True,
        )
        ref.partial_fit(X, y)
        np.testing.assert_allclose(m.theta[1:], ref.coef_, rtol=0, atol=1e-12)
        assert m.theta[0] == pytest.approx(float(ref.intercept_[0]), abs=1e-12)

    def test_decaying_step_converges_to_closed_form(self) -> None:
        """Cycling a fixed dataset with a decaying step reaches the closed form (m = n, so the
        fixed points coincide) to relative error below 1e-3; Robbins–Monro, common practice."""
        rng = np.random.default_rng(7)
        n = 40
        raw, temp = rng.normal(30, 8, n), rng.normal(20, 5, n)
        y = 0.9 * raw - 0.3 * temp + 4 + rng.normal(0, 1, n)
        spec = TermSpec(("raw", "temp"))
        X, t = np.column_stack([raw, temp]), np.arange(n) * 3600.0
        closed, _ = fit_model(spec, X, t, y, lam=2.0)
        online = RidgeModel(spec, closed.scaler, origin=closed.origin, lam=2.0, memory=n)
        rows = design(spec, closed.scaler, X, t, closed.origin).tolist()
        for epoch in range(400):
            for phi, target in zip(rows, y, strict=True):
                online.step_phi(phi, float(target), 0.2 / (1 + epoch / 4))
        a, b = np.array(online.theta), np.array(closed.theta)
        assert np.linalg.norm(a - b) / np.linalg.norm(b) < 1e-3

    def test_huber_clips_the_residual(self) -> None:
        """With δ set, a huge residual moves each weight by exactly what a residual of δ would."""
        a = _model(lam=0.0, huber_delta=2.0)
        b = _model(lam=0.0)
        phi, _ = a.phi({"raw": 35.0, "temp": 22.0}, 0.0)
        ra = a.step_phi(phi, a.predict_phi(phi) - 1e6, 0.1)
        b.step_phi(phi, b.predict_phi(phi) - 2.0, 0.1)
        assert ra == pytest.approx(1e6)
        np.testing.assert_allclose(a.theta, b.theta, rtol=1e-15)

    def test_normalised_step_divides_by_one_plus_norm(self) -> None:
        """A normalised step equals a plain step of α/(1 + ‖φ‖²), ‖φ‖² counting the leading 1."""
        a = _model(lam=0.5, memory=10.0, normalised=True)
        phi, _ = a.phi({"raw": 40.0, "temp": 12.0}, 0.0)
        b = _model(lam=0.5, memory=10.0)
        a.step_phi(phi, 50.0, 0.3)
        b.step_phi(phi, 50.0, 0.3 / (1.0 + sum(v * v for v in phi)))
        assert a.theta == b.theta

    @pytest.mark.parametrize(
        ("y", "alpha", "inputs"),
        [
            (math.nan, 0.1, {"raw": 1.0, "temp": 1.0}),
            (1.0, math.inf, {"raw": 1.0, "temp": 1.0}),
            (1.0, -0.1, {"raw": 1.0, "temp": 1.0}),
            (1.0, 0.1, {"raw": math.inf, "temp": 1.0}),
            (1.0, 0.1, {"raw": 1.0, "temp": math.nan}),
        ],
    )
    def test_non_finite_is_refused_and_state_untouched(
        self, y: float, alpha: float, inputs: dict[str, float]
    ) -> None:
        """A non-finite reference, step size or input raises ModelError and changes nothing."""
        m = _model(lam=1.0, memory=5.0, clip=4.0)
        before = m.to_dict()
        with pytest.raises(ModelError):
            m.step(inputs, 0.0, y, alpha)
        assert m.to_dict() == before

    def test_non_positive_shrink_factor_is_refused(self) -> None:
        """A step with αλ/m ≥ 1 raises ModelError quoting the shrink factor."""
        m = _model(lam=10.0, memory=1.0)
        with pytest.raises(ModelError, match="shrink factor"):
            m.step({"raw": 1.0, "temp": 1.0}, 0.0, 2.0, 0.1)
        assert m.updates == 0


class TestSpreadAndBand:
    def test_spread_is_ew_mean_abs_residual_scaled(self) -> None:
        """The spread starts at |r|·√(π/2), then moves a fraction β toward each new value."""
        m = _model(spread_decay=0.25)
        phi, _ = m.phi({"raw": 30.0, "temp": 20.0}, 0.0)
        m.step_phi(phi, 30.0 - 2.0, 0.0)  # residual +2, α = 0 leaves θ unchanged
        assert m.spread == pytest.approx(2.0 * math.sqrt(math.pi / 2))
        m.step_phi(phi, 30.0 + 6.0, 0.0)  # residual −6
        expect = 0.75 * 2.0 * math.sqrt(math.pi / 2) + 0.25 * 6.0 * math.sqrt(math.pi / 2)
        assert m.spread == pytest.approx(expect)
        assert m.band(3.0) == pytest.approx(3.0 * expect)


class TestCostAndGradient:
    @pytest.mark.parametrize(
        "settings_",
        [{}, {"huber_delta": 0.7}, {"penalise_intercept": True}, {"lam": 0.0}],
    )
    def test_gradient_matches_finite_differences(self, settings_: dict[str, object]) -> None:
        """gradient() agrees with central differences of cost() (common practice, step 1e-6)."""
        rng = np.random.default_rng(3)
        Phi = np.column_stack([np.ones(25), rng.normal(size=(25, 3))])
        y = rng.normal(size=25) * 3
        theta = rng.normal(size=4)
        base = {"lam": 1.5, "memory": 7.0, "theta": theta, **settings_}
        g = _model(**base).gradient(Phi, y)
        h = 1e-6
        for j in range(4):
            up, dn = theta.copy(), theta.copy()
            up[j] += h
            dn[j] -= h
            fd = (_model(**{**base, "theta": up}).cost(Phi, y)
                  - _model(**{**base, "theta": dn}).cost(Phi, y)) / (2 * h)
            assert g[j] == pytest.approx(fd, rel=1e-6, abs=1e-8)

    def test_step_is_gradient_step_on_per_reference_cost(self) -> None:
        """With m = 1 and one row, the update equals θ − α∇J(θ) (J then is the per-reference
        cost), the definition of a stochastic-gradient step."""
        m = _model(lam=0.4, memory=1.0, theta=[29.0, 7.0, 0.5, -0.2])
        phi, _ = m.phi({"raw": 34.0, "temp": 25.0}, 0.0)
        g = m.gradient(np.array([phi]), np.array([31.0]))
        expect = np.array(m.theta) - 0.05 * g
        m.step_phi(phi, 31.0, 0.05)
        np.testing.assert_allclose(m.theta, expect, rtol=1e-13)


class TestCopies:
    def test_with_settings_keeps_learned_state(self) -> None:
        """with_settings changes the settings and keeps θ, spread and update count."""
        m = _model(lam=1.0, memory=10.0)
        m.step({"raw": 33.0, "temp": 18.0}, 0.0, 31.0, 0.1)
        c = m.with_settings(lam=2.0, huber_delta=1.5, clip=None, normalised=True)
        assert (c.theta, c.spread, c.updates) == (m.theta, m.spread, m.updates)
        assert (c.lam, c.memory, c.huber_delta, c.normalised) == (2.0, 10.0, 1.5, True)

    def test_copy_is_independent(self) -> None:
        """Stepping a copy leaves the original alone."""
        m = _model(lam=1.0, memory=10.0)
        c = m.copy()
        c.step({"raw": 33.0, "temp": 18.0}, 0.0, 31.0, 0.1)
        assert m.updates == 0 and m.theta == m.prior


finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False)
any_finite = st.floats(allow_nan=False, allow_infinity=False)


@st.composite
def models(draw: st.DrawFn) -> RidgeModel:
    scale = st.floats(min_value=1e-3, max_value=1e3)
    return RidgeModel(
        SPEC,
        Scaler(tuple(draw(finite) for _ in range(3)), tuple(draw(scale) for _ in range(3))),
        origin=draw(finite),
        lam=draw(st.floats(min_value=0, max_value=100)),
        memory=draw(st.floats(min_value=1, max_value=1e4)),
        penalise_intercept=draw(st.booleans()),
        huber_delta=draw(st.none() | st.floats(min_value=1e-3, max_value=1e3)),
        normalised=draw(st.booleans()),
        clip=draw(st.floats(min_value=0.5, max_value=20)),
        theta=[draw(finite) for _ in range(4)],
        spread=draw(st.floats(min_value=0, max_value=1e3)),
        updates=draw(st.integers(min_value=0, max_value=10**9)),
    )


class TestProperties:
    @settings(max_examples=60, deadline=None)
    @given(m=models(), raw=finite, temp=finite)
    def test_state_round_trips_exactly(self, m: RidgeModel, raw: float, temp: float) -> None:
        """to_dict → json → from_dict gives bit-equal weights and equal predictions."""
        back = RidgeModel.from_dict(json.loads(json.dumps(m.to_dict())))
        assert [v.hex() for v in back.theta] == [v.hex() for v in m.theta]
        assert back.to_dict() == m.to_dict()
        x = {"raw": raw, "temp": temp}
        assert back.predict(x, 5.0) == m.predict(x, 5.0)

    @settings(max_examples=60, deadline=None)
    @given(m=models(), raw=finite, temp=finite, y=finite)
    def test_inputs_are_not_mutated(self, m: RidgeModel, raw: float, temp: float, y: float) -> None:
        """step and predict leave the caller's inputs mapping and feature list unchanged."""
        x = {"raw": raw, "temp": temp, "rh": 50.0}
        x0 = copy.deepcopy(x)
        m.predict(x, 1.0)
        phi, _ = m.phi(x, 1.0)
        phi0 = list(phi)
        with contextlib.suppress(ModelError):  # a refused step is fine; mutation is checked
            m.step_phi(phi, y, 1e-6)
        assert x == x0 and phi == phi0

    @settings(max_examples=80, deadline=None)
    @given(m=models(), raw=any_finite, temp=any_finite, t=any_finite)
    def test_any_finite_input_gives_finite_prediction(
        self, m: RidgeModel, raw: float, temp: float, t: float
    ) -> None:
        """With clip set, every finite reading (even one whose terms overflow) predicts finitely."""
        assert math.isfinite(m.predict({"raw": raw, "temp": temp}, t))


class TestFromDict:
    @pytest.mark.parametrize(
        ("key", "value", "match"),
        [
            ("theta", [1.0, 2.0], "theta"),
            ("theta", [1.0, "x", 0.0, 0.0], r"model\.theta\[1\]"),
            ("lam", -1.0, "lam"),
            ("updates", 1.5, r"model\.updates"),
            ("clip", "big", r"model\.clip"),
            ("normalised", 1, r"model\.normalised"),
        ],
    )
    def test_malformed_state_names_the_key(self, key: str, value: object, match: str) -> None:
        """A malformed state raises DataError naming the offending key."""
        d = _model().to_dict()
        d[key] = value
        with pytest.raises(DataError, match=match):
            RidgeModel.from_dict(d)

    def test_missing_and_unknown_keys(self) -> None:
        """A missing or an unknown key raises DataError naming it."""
        d = _model().to_dict()
        del d["spread"]
        with pytest.raises(DataError, match="'spread'"):
            RidgeModel.from_dict(d)
        d = {**_model().to_dict(), "extra": 1}
        with pytest.raises(DataError, match="'extra'"):
            RidgeModel.from_dict(d)
