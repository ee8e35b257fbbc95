"""Tests of the term specification and the scaler."""

from __future__ import annotations

import numpy as np
import pytest

from trimtab.errors import DataError, ModelError
from trimtab.model.terms import Scaler, TermSpec


class TestTermSpec:
    def test_names_follow_inputs_products_squares_elapsed(self) -> None:
        """Term names list the inputs, then a*b, then a^2, then elapsed_days."""
        spec = TermSpec(("raw", "temp", "rh"), (("raw", "temp"),), ("rh",), elapsed=True)
        assert spec.names() == ("raw", "temp", "rh", "raw*temp", "rh^2", "elapsed_days")
        assert spec.n_terms == 6

    def test_row_computes_each_term(self) -> None:
        """A row holds the inputs, their product, the square and the days since the origin."""
        spec = TermSpec(("raw", "temp"), (("raw", "temp"),), ("temp",), elapsed=True)
        row = spec.row({"raw": 2.0, "temp": 3.0, "rh": 50.0}, t=86400.0 * 3, origin=86400.0)
        assert row == [2.0, 3.0, 6.0, 9.0, 2.0]

    def test_matrix_agrees_with_rows(self) -> None:
        """The batch matrix equals the per-reading rows stacked."""
        spec = TermSpec(("raw", "temp"), (("raw", "temp"),), ("raw",), elapsed=True)
        X = np.array([[1.0, 2.0], [3.5, -1.0], [0.0, 4.0]])
        t = np.array([0.0, 43200.0, 86400.0])
        rows = [spec.row({"raw": a, "temp": b}, ti, 0.0) for (a, b), ti in zip(X, t, strict=True)]
        np.testing.assert_array_equal(spec.matrix(X, t, 0.0), np.array(rows))

    def test_missing_input_names_it(self) -> None:
        """A reading without a configured input raises DataError naming that input."""
        spec = TermSpec(("raw", "temp"))
        with pytest.raises(DataError, match="'temp'"):
            spec.row({"raw": 1.0}, 0.0, 0.0)

    @pytest.mark.parametrize(
        ("kwargs", "match"),
        [
            ({"inputs": ()}, "at least"),
            ({"inputs": ("raw", "raw")}, "duplicate"),
            ({"inputs": ("raw", "")}, "non-empty"),
            ({"inputs": ("raw", "a*b")}, "may not contain"),
            ({"inputs": ("raw",), "products": (("raw", "temp"),)}, "unknown input 'temp'"),
            ({"inputs": ("raw", "t"), "products": (("raw", "t"), ("t", "raw"))}, "twice"),
            ({"inputs": ("raw",), "products": (("raw", "raw"),)}, "squares"),
            ({"inputs": ("raw",), "squares": ("rh",)}, "unknown input 'rh'"),
        ],
    )
    def test_invalid_specs_are_refused(self, kwargs: dict[str, object], match: str) -> None:
        """An inconsistent spec raises ModelError saying what is wrong."""
        with pytest.raises(ModelError, match=match):
            TermSpec(**kwargs)  # type: ignore[arg-type]

    def test_dict_round_trip(self) -> None:
        """A spec survives to_dict/from_dict unchanged."""
        spec = TermSpec(("raw", "temp"), (("raw", "temp"),), ("temp",), elapsed=True)
        assert TermSpec.from_dict(spec.to_dict()) == spec

    def test_from_dict_names_bad_key(self) -> None:
        """A malformed spec dict raises DataError naming the key."""
        with pytest.raises(DataError, match=r"spec\.elapsed"):
            TermSpec.from_dict({"inputs": ["raw"], "products": [], "squares": [], "elapsed": 1})


class TestScaler:
    def test_from_terms_uses_mean_and_population_sd(self) -> None:
        """Centre is the column mean and scale the population (ddof 0) standard deviation."""
        T = np.array([[1.0, 5.0], [3.0, 5.0], [5.0, 5.0]])
        s = Scaler.from_terms(T)
        assert s.centre == (3.0, 5.0)
        assert s.scale[0] == pytest.approx(np.sqrt(8.0 / 3.0), rel=1e-15)
        assert s.scale[1] == 1.0  # a constant column keeps scale 1

    def test_identity(self) -> None:
        """The identity scaler has centre 0 and scale 1."""
        assert Scaler.identity(2) == Scaler((0.0, 0.0), (1.0, 1.0))

    @pytest.mark.parametrize(
        ("centre", "scale", "match"),
        [
            ((0.0,), (0.0,), r"scale\[0\]"),
            ((float("nan"),), (1.0,), r"centre\[0\]"),
            ((0.0, 1.0), (1.0,), "centres"),
            ((0.0,), (float("inf"),), r"scale\[0\]"),
        ],
    )
    def test_invalid_scalers_are_refused(
        self, centre: tuple[float, ...], scale: tuple[float, ...], match: str
    ) -> None:
        """A non-finite centre, a non-positive scale or mismatched lengths raise ModelError."""
        with pytest.raises(ModelError, match=match):
            Scaler(centre, scale)
