"""The followed scaler: running ranges, bounded moves, and moves that leave every ŷ unchanged."""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from trimtab.model.online import RidgeModel
from trimtab.model.ranges import FLOOR, MAX_FACTOR, RangeTracker, remap
from trimtab.model.terms import Scaler, TermSpec

SPEC = TermSpec(("raw", "temp", "rh"), products=(("raw", "rh"),), squares=("raw",))
K = SPEC.n_terms
finite = st.floats(-1e3, 1e3, allow_nan=False)
positive = st.floats(1e-2, 1e3, allow_nan=False)


def _scaler(c: list[float], s: list[float]) -> Scaler:
    return Scaler(tuple(c), tuple(s))


class TestRemap:
    @settings(max_examples=300, deadline=None)
    @given(theta=st.lists(finite, min_size=K + 1, max_size=K + 1),
           c0=st.lists(finite, min_size=K, max_size=K), s0=st.lists(positive, min_size=K,
                                                                    max_size=K),
           c1=st.lists(finite, min_size=K, max_size=K), s1=st.lists(positive, min_size=K,
                                                                    max_size=K),
           x=st.lists(st.floats(-50, 150, allow_nan=False), min_size=3, max_size=3))
    def test_a_move_leaves_the_prediction_unchanged(self, theta: list[float], c0: list[float],
                                                    s0: list[float], c1: list[float],
                                                    s1: list[float], x: list[float]) -> None:
        """ŷ before and after a scaler move agree to 1e-12 of the sum of |contributions|."""
        old, new = _scaler(c0, s0), _scaler(c1, s1)
        model = RidgeModel(SPEC, old, theta=theta)
        inputs = dict(zip(SPEC.inputs, x, strict=True))
        phi, _ = model.phi(inputs, 0.0)
        before = model.predict_phi(phi)
        scale = abs(theta[0]) + sum(abs(w * z) for w, z in zip(theta[1:], phi[1:], strict=True))
        scale += sum(abs(w * (b - a) / s) for w, a, b, s in zip(theta[1:], c0, c1, s0,
                                                                 strict=True))
        model.move_scaler(new)
        after = model.predict(inputs, 0.0)
        assert abs(after - before) <= 1e-12 * max(scale, 1.0)

    def test_the_prior_moves_with_theta(self) -> None:
        """The prior describes the same calibration after a move: its ŷ is unchanged too."""
        old = _scaler([40.0, 10.0, 60.0, 2400.0, 1700.0], [8.0, 5.0, 15.0, 800.0, 700.0])
        new = _scaler([45.0, 14.0, 55.0, 2500.0, 2100.0], [12.0, 4.0, 20.0, 900.0, 1000.0])
        model = RidgeModel(SPEC, old)
        prior_before = RidgeModel(SPEC, old, theta=model.prior)
        model.move_scaler(new)
        prior_after = RidgeModel(SPEC, new, theta=model.prior)
        inputs = {"raw": 52.0, "temp": 9.0, "rh": 80.0}
        assert math.isclose(prior_before.predict(inputs, 0.0), prior_after.predict(inputs, 0.0),
                            rel_tol=1e-13)
        assert math.isclose(prior_after.predict(inputs, 0.0), 52.0, rel_tol=1e-13)  # factory

    def test_arrays_and_floats_give_the_same_bits(self) -> None:
        """The tuner remaps K candidates as arrays; each equals the daemon's float remap."""
        rng = np.random.default_rng(3)
        old = _scaler(list(rng.normal(0, 10, K)), list(rng.uniform(1, 5, K)))
        new = _scaler(list(rng.normal(0, 10, K)), list(rng.uniform(1, 5, K)))
        thetas = rng.normal(0, 3, (K + 1, 7))
        arrays = np.array(remap(list(thetas), old, new))
        for i in range(7):
            floats = remap([float(v) for v in thetas[:, i]], old, new)
            assert [float(v) for v in arrays[:, i]] == floats


class TestRangeTracker:
    def test_follows_a_seasonal_shift_of_the_mean(self) -> None:
        """A temperature that moves from 5 to 25 °C over 60 days is followed within days."""
        start = _scaler([5.0], [2.0])
        tr = RangeTracker.start(start, [False])
        day = 86400.0
        for h in range(60 * 24):
            t = h * 3600.0
            tr.observe([5.0 + 20.0 * h / (60 * 24) + math.sin(h / 3.8)], t, 7 * day)
        assert 20.0 < tr.mean[0] < 25.0
        assert 0.5 < math.sqrt(tr.var[0]) < 5.0

    def test_a_move_is_bounded_in_rate(self) -> None:
        """One move changes a scale by at most MAX_FACTOR and a centre by at most one scale."""
        start = _scaler([0.0, 0.0], [1.0, 1.0])
        tr = RangeTracker.start(start, [False, True])
        tr.mean = [100.0, 50.0]
        tr.var = [1e6, 9.0]
        moved = tr.target(start, 2.0)
        assert moved.centre == (1.0, 0.0) and moved.scale == (MAX_FACTOR, 1.0)
        tr.var = [0.0, 0.0]
        shrunk = tr.target(_scaler([0.0, 0.0], [FLOOR * 1.5, 1.0]), 2.0)
        assert shrunk.scale[0] == FLOOR  # never below FLOOR × where it started

    def test_one_wild_reading_moves_the_range_a_little(self) -> None:
        """A reading of 1e9 among readings near 10 moves the mean by at most β·4 sd."""
        tr = RangeTracker.start(_scaler([10.0], [1.0]), [False])
        tr.observe([10.0], 0.0, 86400.0)
        tr.observe([1e9], 60.0, 86400.0)
        beta = -math.expm1(-60.0 / 86400.0)
        assert tr.mean[0] <= 10.0 + 4.0 * beta + 1e-12

    def test_round_trips_exactly(self) -> None:
        """to_dict/from_dict keep every bit."""
        tr = RangeTracker.start(_scaler([1.0, 2.0], [0.3, 0.7]), [False, True])
        tr.observe([1.1, 5.0], 10.0, 3600.0)
        tr.observe([0.9, 6.0], 20.0, 3600.0)
        back = RangeTracker.from_dict(tr.to_dict())
        assert back.to_dict() == tr.to_dict()
