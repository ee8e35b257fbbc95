"""Tests of the closed-form ridge, the fit report and time-blocked cross-validation."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
import scipy
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.model_selection import KFold, cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from statsmodels.datasets import longley

from trimtab.errors import ModelError
from trimtab.ridge import cross_validate, fit_model, solve
from trimtab.terms import Scaler, TermSpec

NORRIS = Path(scipy.__file__).parent / "stats/tests/data/nist_linregress/Norris.dat"

# NIST StRD, Longley (https://www.itl.nist.gov/div898/strd/lls/data/Longley.shtml), certified
# values typed in from memory; the same figures appear in statsmodels'
# regression/tests/results/results_regression.py, which cites NIST.
LONGLEY_B = (
    -3482258.63459582,  # B0 (intercept)
    15.0618722713733,  # GNPDEFL
    -0.358191792925910e-01,  # GNP
    -2.02022980381683,  # UNEMP
    -1.03322686717359,  # ARMED
    -0.511041056535807e-01,  # POP
    1829.15146461355,  # YEAR
)
LONGLEY_SD = 304.854073561965
LONGLEY_R2 = 0.995479004577296


def _norris() -> tuple[np.ndarray, np.ndarray, dict[str, float]]:
    """Norris data and its certified values, read from the NIST file scipy ships."""
    text = NORRIS.read_text()
    cert = {
        "B0": _certified(text, r"B0"),
        "B1": _certified(text, r"B1"),
        "sd": _certified(text, r"Residual\s+Standard Deviation"),
        "r2": _certified(text, r"R-Squared"),
    }
    body = text.split("Data:       y          x")[1]
    data = np.array([[float(v) for v in line.split()] for line in body.strip().splitlines()])
    return data[:, 1], data[:, 0], cert


def _certified(text: str, label: str) -> float:
    """The first number after ``label`` at the start of a line of a NIST StRD file."""
    found = re.search(rf"^\s*{label}\s+(-?\d+\.\d+(?:E[-+]?\d+)?)", text, re.MULTILINE)
    assert found is not None, label
    return float(found.group(1))


def _longley() -> tuple[np.ndarray, np.ndarray]:
    d = longley.load_pandas().data
    return d.drop(columns="TOTEMP").to_numpy(dtype=float), d["TOTEMP"].to_numpy(dtype=float)


class TestSolveNist:
    def test_norris_certified(self) -> None:
        """λ = 0 on [1, x] reproduces NIST StRD Norris's certified B0, B1 (relative 1e-9);
        data and values from Norris.dat as shipped in scipy's wheel."""
        x, y, cert = _norris()
        assert x.shape == (36,)
        theta = solve(np.column_stack([np.ones_like(x), x]), y, 0.0)
        assert theta[0] == pytest.approx(cert["B0"], rel=1e-9)
        assert theta[1] == pytest.approx(cert["B1"], rel=1e-9)

    def test_norris_through_fit_model(self) -> None:
        """fit_model (standardised) gives NIST StRD Norris's certified coefficients, residual SD
        and R² after converting back to engineering units (Norris.dat in scipy's wheel)."""
        x, y, cert = _norris()
        _, rep = fit_model(TermSpec(("x",)), x[:, None], np.zeros_like(x), y, lam=0.0)
        assert rep.coefficients["offset"] == pytest.approx(cert["B0"], rel=1e-9)
        assert rep.coefficients["x"] == pytest.approx(cert["B1"], rel=1e-9)
        assert rep.residual_sd == pytest.approx(cert["sd"], rel=1e-9)
        assert rep.r2 == pytest.approx(cert["r2"], rel=1e-12)
        assert rep.n == 36

    def test_longley_certified(self) -> None:
        """λ = 0 on unstandardised [1, X] reproduces NIST StRD Longley's certified coefficients
        to relative 1e-9 (data: statsmodels.datasets.longley; values: NIST StRD, from memory)."""
        X, y = _longley()
        theta = solve(np.column_stack([np.ones(len(y)), X]), y, 0.0)
        np.testing.assert_allclose(theta, LONGLEY_B, rtol=1e-9)

    def test_longley_through_fit_model(self) -> None:
        """fit_model (standardised) reproduces NIST StRD Longley's certified coefficients, residual
        SD and R² in engineering units (data: statsmodels; values: NIST StRD, from memory)."""
        X, y = _longley()
        spec = TermSpec(("GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"))
        _, rep = fit_model(spec, X, np.zeros(len(y)), y, lam=0.0)
        np.testing.assert_allclose(list(rep.coefficients.values()), LONGLEY_B, rtol=1e-9)
        assert rep.residual_sd == pytest.approx(LONGLEY_SD, rel=1e-9)
        assert rep.r2 == pytest.approx(LONGLEY_R2, rel=1e-12)
        assert rep.condition > 1.0


class TestSolveSklearn:
    @pytest.mark.parametrize("lam", [1e-3, 0.1, 1.0, 10.0, 100.0])
    def test_matches_sklearn_ridge(self, lam: float) -> None:
        """Unpenalised intercept and prior 0 give scikit-learn Ridge(alpha=λ, fit_intercept=True)'s
        coefficients on its bundled diabetes data (relative 1e-9)."""
        X, y = load_diabetes(return_X_y=True)
        ref = Ridge(alpha=lam, fit_intercept=True).fit(X, y)
        theta = solve(np.column_stack([np.ones(len(y)), X]), y, lam)
        np.testing.assert_allclose(theta[1:], ref.coef_, rtol=1e-9)
        assert theta[0] == pytest.approx(ref.intercept_, rel=1e-9)

    @pytest.mark.parametrize("lam", [0.1, 10.0])
    def test_fit_model_with_identity_scaler_matches_sklearn(self, lam: float) -> None:
        """fit_model with no scaling and prior 0 equals scikit-learn Ridge on diabetes."""
        X, y = load_diabetes(return_X_y=True)
        spec = TermSpec(tuple(f"x{i}" for i in range(10)))
        model, rep = fit_model(spec, X, np.zeros(len(y)), y, lam=lam,
                               scaler=Scaler.identity(10), prior=[0.0] * 11)
        ref = Ridge(alpha=lam, fit_intercept=True).fit(X, y)
        np.testing.assert_allclose(model.theta[1:], ref.coef_, rtol=1e-9)
        assert rep.coefficients["offset"] == pytest.approx(ref.intercept_, rel=1e-9)

    def test_penalising_the_intercept_differs_from_sklearn(self) -> None:
        """Counter-example: penalising θ_0 moves the intercept away from scikit-learn Ridge's."""
        X, y = load_diabetes(return_X_y=True)
        ref = Ridge(alpha=100.0, fit_intercept=True).fit(X, y)
        theta = solve(np.column_stack([np.ones(len(y)), X]), y, 100.0, penalise_intercept=True)
        assert abs(theta[0] - ref.intercept_) / ref.intercept_ > 0.1

    def test_fewer_references_than_terms(self) -> None:
        """With 6 references and 11 weights λ = 0 is refused (saying λ > 0 makes it solvable)
        and λ = 1 equals scikit-learn Ridge(alpha=1)."""
        X, y = load_diabetes(return_X_y=True)
        X, y = X[:6], y[:6]
        Phi = np.column_stack([np.ones(6), X])
        with pytest.raises(ModelError, match=r"fewer references \(6\).*λ > 0 makes"):
            solve(Phi, y, 0.0)
        ref = Ridge(alpha=1.0, fit_intercept=True).fit(X, y)
        theta = solve(Phi, y, 1.0)
        np.testing.assert_allclose(theta[1:], ref.coef_, rtol=1e-9)
        assert theta[0] == pytest.approx(ref.intercept_, rel=1e-9)

    def test_collinear_terms_refused_at_lambda_zero(self) -> None:
        """Two identical columns at λ = 0 are refused; λ > 0 solves it."""
        x = np.arange(10.0)
        Phi = np.column_stack([np.ones(10), x, x])
        with pytest.raises(ModelError, match="collinear"):
            solve(Phi, 2 * x, 0.0)
        assert np.all(np.isfinite(solve(Phi, 2 * x, 0.1)))

    def test_prior_is_the_large_lambda_limit(self) -> None:
        """A huge λ gives the prior for the penalised weights (ridge toward p: common practice)."""
        X, y = load_diabetes(return_X_y=True)
        Phi = np.column_stack([np.ones(len(y)), X[:, :3]])
        p = np.array([0.0, 5.0, -2.0, 1.0])
        theta = solve(Phi, y, 1e14, prior=p)
        np.testing.assert_allclose(theta[1:], p[1:], atol=1e-6)


class TestCrossValidate:
    def _data(self) -> tuple[TermSpec, np.ndarray, np.ndarray, np.ndarray]:
        X, y = load_diabetes(return_X_y=True)
        X, y = X[:97, :4], y[:97]
        t = 1.7e9 + 600.0 * np.arange(97)
        return TermSpec(("a", "b", "c", "d")), X, t, y

    def test_curve_matches_sklearn_blocked_cv(self) -> None:
        """The RMSE curve equals scikit-learn's cross_val_predict with unshuffled KFold
        (contiguous blocks) over StandardScaler + Ridge (prior 0: plain ridge)."""
        spec, X, t, y = self._data()
        lams = [0.01, 1.0, 30.0]
        cv = cross_validate(spec, X, t, y, lams, folds=5, prior=[0.0] * 5)
        for lam, rmse in zip(lams, cv.rmse, strict=True):
            pred = cross_val_predict(
                make_pipeline(StandardScaler(), Ridge(alpha=lam)), X, y, cv=KFold(5)
            )
            assert rmse == pytest.approx(np.sqrt(np.mean((pred - y) ** 2)), rel=1e-9)
        assert cv.chosen == lams[int(np.argmin(cv.rmse))]
        assert cv.scheme == "leave-one-block-out"

    def test_time_order_not_row_order(self) -> None:
        """Rows given out of time order give the same curve as rows sorted by time."""
        spec, X, t, y = self._data()
        perm = np.random.default_rng(1).permutation(len(y))
        a = cross_validate(spec, X, t, y, [0.1, 10.0], folds=4)
        b = cross_validate(spec, X[perm], t[perm], y[perm], [0.1, 10.0], folds=4)
        assert a.rmse == b.rmse

    def test_unsolvable_lambda_gets_infinite_rmse(self) -> None:
        """λ = 0 with fewer training references than weights scores inf; λ > 0 is chosen."""
        spec, X, t, y = self._data()
        cv = cross_validate(spec, X[:6], t[:6], y[:6], [0.0, 1.0], folds=3)
        assert cv.rmse[0] == float("inf")
        assert cv.chosen == 1.0

    def test_too_few_references_for_folds(self) -> None:
        """Fewer references than folds raises ModelError."""
        spec, X, t, y = self._data()
        with pytest.raises(ModelError, match="fewer than the 5 folds"):
            cross_validate(spec, X[:3], t[:3], y[:3], [1.0], folds=5)
