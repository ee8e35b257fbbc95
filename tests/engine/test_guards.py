"""The guards' step size: halved by rollbacks, recovered by good references, lifted by gaps.

Invented streams (a 1-input sensor, references with outliers and jumps drawn by Hypothesis);
what is checked are invariants of the guard, not accuracy.
"""

from __future__ import annotations

import math

from hypothesis import given, settings
from hypothesis import strategies as st

from trimtab.config import parse_config
from trimtab.engine.engine import Engine
from trimtab.engine.guards import Guard, GuardSettings, gap_fraction, lifted
from trimtab.engine.wiring import make_engine
from trimtab.messages import Reading, Reference

T0 = 1_767_225_600.0


def _engine(alpha: float, alpha_min: float, alpha_max: float, recovery: float,
            factor: float) -> Engine:
    return make_engine(parse_config({
        "broker": {"client_id": "guards"},
        "sensors": {"ids": ["s1"], "defaults": {
            "inputs": ["raw"], "centre": {"raw": 40.0}, "scale": {"raw": 10.0}}},
        "learning": {"alpha": alpha, "alpha_min": alpha_min, "alpha_max": alpha_max,
                     "alpha_recovery": recovery, "rollback_factor": factor, "warmup": 2,
                     "snapshot_every": 3, "gate_k": 3.0, "step_gap": 600.0},
    }))


class TestStepBounds:
    @settings(max_examples=60, deadline=None)
    @given(alpha=st.floats(0.05, 1.0), spread=st.floats(1.0, 4.0), recovery=st.floats(0, 1),
           factor=st.floats(1.1, 6.0),
           refs=st.lists(st.tuples(st.floats(-200.0, 200.0), st.integers(1, 40)), min_size=5,
                         max_size=60))
    def test_alpha_never_leaves_its_bounds(self, alpha: float, spread: float, recovery: float,
                                           factor: float,
                                           refs: list[tuple[float, int]]) -> None:
        """Through rollbacks, recoveries and gaps: α_min ≤ α ≤ α, and the step ≤ α_max."""
        alpha_max = min(1.0, alpha * spread)
        alpha_min = alpha / 8.0
        engine = _engine(alpha, alpha_min, alpha_max, recovery, factor)
        t = T0
        for k, (offset, gap) in enumerate(refs):
            for _ in range(gap):
                t += 60.0
                engine.process(Reading(t, "s1", {"raw": 40.0 + 5.0 * math.sin(k)}))
            engine.on_reference(Reference(t, "s1", 40.0 + offset))
            g = engine._sensors["s1"].guard
            assert alpha_min <= g.alpha <= alpha
            for f in (0.0, 0.5, 1.0):
                assert alpha_min <= lifted(g.alpha, alpha_max, f) <= alpha_max

    def test_rollback_halves_and_recovery_restores(self) -> None:
        """A rollback halves α; each good reference then closes a share of the distance."""
        s = GuardSettings(gate_k=4.0, gate_run=3, warmup=0, snapshot_every=2,
                          rollback_factor=2.0, alpha=0.8, alpha_min=0.1, alpha_recovery=0.5)
        g = Guard(alpha=0.8)
        g.take_snapshot({"theta": [0.0]})
        g.roll_back(s)
        assert g.alpha == 0.4
        g.recover(s)
        assert math.isclose(g.alpha, 0.6, rel_tol=1e-15)
        g.recover(s)
        assert math.isclose(g.alpha, 0.7, rel_tol=1e-15)

    def test_gap_fraction_rises_from_zero_to_one(self) -> None:
        """0 right after a reference, ½ after one span, toward 1 after a long gap."""
        assert gap_fraction(0.0, 3600.0) == 0.0
        assert gap_fraction(3600.0, 3600.0) == 0.5
        assert 0.99 < gap_fraction(360000.0, 3600.0) < 1.0


class TestRollbackScale:
    def test_one_large_residual_after_calm_ones_does_not_roll_back(self) -> None:
        """The rollback compares with a long-window scale, not the calm last snapshot."""
        s = GuardSettings(gate_k=4.0, gate_run=3, warmup=0, snapshot_every=10,
                          rollback_factor=4.0, alpha=0.5, alpha_min=0.01, error_window=200)
        g = Guard(alpha=0.5)
        for k in range(300):  # ordinary days: residuals of 1 with a few of 3
            g.record(3.0 if k % 20 == 0 else 1.0, s)
            if g.due_snapshot(s):
                g.take_snapshot({"theta": [0.0]})
        for _ in range(10):  # a calm night
            g.record(0.05, s)
        g.record(6.0, s)  # an ordinary rush hour
        assert not g.exploded(s)

    def test_a_run_of_huge_residuals_rolls_back(self) -> None:
        """Errors ten times the long-window scale for a while trip the rollback."""
        s = GuardSettings(gate_k=4.0, gate_run=3, warmup=0, snapshot_every=10,
                          rollback_factor=4.0, alpha=0.5, alpha_min=0.01, error_window=200)
        g = Guard(alpha=0.5)
        for _ in range(100):
            g.record(1.0, s)
            if g.due_snapshot(s):
                g.take_snapshot({"theta": [0.0]})
        tripped = False
        for _ in range(10):
            g.record(30.0, s)
            tripped = tripped or g.exploded(s)
        assert tripped
