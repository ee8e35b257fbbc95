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
from trimtab.model.closedform import FitReport, cross_validate, fit_model, solve
from trimtab.model.terms import Scaler, TermSpec

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


# ISO/TS 28037:2010 straight-line examples. The x, y and u(y) below are those of NPL's
# "Software to support ISO/TS 28037:2010(E)" (the MATLAB scripts that reproduce the
# Technical Specification's numerical examples, in the ISOts-2024 package on npl.co.uk,
# read as a stored copy of that page). The clause 6 data also match what was remembered of
# the document; the Annex E data were not known from memory. The results checked against
# are the ones the issue (#14) quotes from ISO/TS 28037; the data reproduce every one.
ISO_X = (1.0, 2.0, 3.0, 4.0, 5.0, 6.0)
# clause 6, known equal weights (the "example 1", u(y) = 0.5 for all points)
ISO_EQUAL_Y = (3.3, 5.6, 7.1, 9.3, 10.7, 12.1)
# clause 6, known unequal weights (the "example 2")
ISO_UNEQUAL_Y = (3.2, 4.3, 7.6, 8.6, 11.7, 12.8)
ISO_UNEQUAL_U = (0.5, 0.5, 0.5, 1.0, 1.0, 1.0)
# Annex E, uncertainties known up to a scale factor: ordinary least squares, u from the
# residual SD (the "example 4/5")
ISO_OLS_Y = (3.014, 5.225, 7.004, 9.061, 11.201, 12.762)


def _line(y: tuple[float, ...], u: tuple[float, ...] | None = None) -> FitReport:
    x = np.array(ISO_X)
    _, rep = fit_model(TermSpec(("x",)), x[:, None], np.zeros(6), np.array(y), lam=0.0,
                       u_ref=None if u is None else np.array(u))
    return rep


class TestFitUncertainty:
    def test_iso_28037_ordinary_least_squares(self) -> None:
        """ISO/TS 28037:2010 Annex E data (NPL's software): a = 1.172, u(a) = 0.159,
        b = 1.964, u(b) = 0.041, cov(a, b) = −0.006, as the issue quotes the document."""
        rep = _line(ISO_OLS_Y)
        c, u, cov = rep.coefficients, rep.uncertainties, rep.covariance
        assert u is not None and cov is not None
        assert (round(c["offset"], 3), round(u["offset"], 3)) == (1.172, 0.159)
        assert (round(c["x"], 3), round(u["x"], 3)) == (1.964, 0.041)
        assert round(cov[0][1], 3) == round(cov[1][0], 3) == -0.006
        assert rep.chi2 is None and rep.dof == 4
        assert "residual SD" in rep.uncertainty_basis

    def test_iso_28037_equal_stated_uncertainties(self) -> None:
        """ISO/TS 28037:2010 clause 6, u(y) = 0.5 (NPL's software): u(a) = 0.465,
        u(b) = 0.120, χ² = 1.665 on 4 degrees of freedom, as the issue quotes."""
        rep = _line(ISO_EQUAL_Y, (0.5,) * 6)
        u = rep.uncertainties
        assert u is not None and rep.chi2 is not None
        assert (round(u["offset"], 3), round(u["x"], 3)) == (0.465, 0.120)
        assert round(rep.chi2, 3) == 1.665 and rep.dof == 4
        assert rep.weighted

    def test_iso_28037_unequal_stated_uncertainties(self) -> None:
        """ISO/TS 28037:2010 clause 6, unequal u(y) (NPL's software): a = 0.885, u(a) = 0.530,
        b = 2.057, u(b) = 0.178, χ² = 4.131, as the issue quotes."""
        rep = _line(ISO_UNEQUAL_Y, ISO_UNEQUAL_U)
        c, u = rep.coefficients, rep.uncertainties
        assert u is not None and rep.chi2 is not None
        assert (round(c["offset"], 3), round(u["offset"], 3)) == (0.885, 0.530)
        assert (round(c["x"], 3), round(u["x"], 3)) == (2.057, 0.178)
        assert round(rep.chi2, 3) == 4.131

    def test_norris_certified_standard_deviations(self) -> None:
        """NIST StRD Norris: the certified standard deviations of B0 and B1 (the second
        number on their lines in Norris.dat, shipped in scipy) to 9 significant digits."""
        x, y, _ = _norris()
        text = NORRIS.read_text()
        sds = {}
        for label in ("B0", "B1"):
            m = re.search(rf"^\s*{label}\s+\S+\s+(\S+)", text, re.MULTILINE)
            assert m is not None
            sds[label] = float(m.group(1))
        _, rep = fit_model(TermSpec(("x",)), x[:, None], np.zeros_like(x), y, lam=0.0)
        assert rep.uncertainties is not None
        assert rep.uncertainties["offset"] == pytest.approx(sds["B0"], rel=1e-9)
        assert rep.uncertainties["x"] == pytest.approx(sds["B1"], rel=1e-9)

    @staticmethod
    def _covariates() -> tuple[TermSpec, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        rng = np.random.default_rng(28037)
        n = 80
        raw = rng.uniform(5, 60, n)
        temp = rng.uniform(-5, 30, n)
        rh = rng.uniform(20, 95, n)
        u = rng.uniform(0.3, 2.0, n)
        y = 2.0 + 0.8 * raw - 0.3 * temp + 0.05 * rh + 0.004 * raw * temp + rng.normal(0, u)
        spec = TermSpec(("raw", "temp", "rh"), products=(("raw", "temp"),), squares=("rh",))
        X = np.column_stack([raw, temp, rh])
        design = np.column_stack([np.ones(n), raw, temp, rh, raw * temp, rh**2])
        return spec, X, y, u, design

    def test_matches_statsmodels_ols_with_covariates(self) -> None:
        """With covariates, a product and a square: bse and cov_params() of statsmodels OLS."""
        import statsmodels.api as sm

        spec, X, y, _, design = self._covariates()
        _, rep = fit_model(spec, X, np.zeros(len(y)), y, lam=0.0)
        ref = sm.OLS(y, design).fit()
        assert rep.uncertainties is not None and rep.covariance is not None
        np.testing.assert_allclose(list(rep.coefficients.values()), ref.params, rtol=1e-9)
        np.testing.assert_allclose(list(rep.uncertainties.values()), ref.bse, rtol=1e-8)
        np.testing.assert_allclose(np.array(rep.covariance), ref.cov_params(), rtol=1e-7,
                                   atol=1e-14)

    def test_matches_statsmodels_wls_with_covariates(self) -> None:
        """Weighted by stated u(y): statsmodels WLS (weights 1/u², scale fixed at 1, as
        ISO/TS 28037 clause 6 does) bse and cov_params(); χ² is its weighted SSR."""
        import statsmodels.api as sm

        spec, X, y, u, design = self._covariates()
        _, rep = fit_model(spec, X, np.zeros(len(y)), y, lam=0.0, u_ref=u)
        ref = sm.WLS(y, design, weights=1.0 / u**2).fit(cov_type="fixed scale",
                                                         cov_kwds={"scale": 1.0})
        assert rep.uncertainties is not None and rep.covariance is not None
        np.testing.assert_allclose(list(rep.coefficients.values()), ref.params, rtol=1e-9)
        np.testing.assert_allclose(list(rep.uncertainties.values()), ref.bse, rtol=1e-8)
        np.testing.assert_allclose(np.array(rep.covariance), ref.cov_params(), rtol=1e-7,
                                   atol=1e-14)
        assert rep.chi2 == pytest.approx(float(ref.ssr), rel=1e-9)
        assert rep.dof == int(ref.df_resid) == len(y) - 6

    def test_no_uncertainty_when_penalised(self) -> None:
        """With λ > 0 no uncertainty is reported, and the report says why."""
        spec, X, y, _, _ = self._covariates()
        _, rep = fit_model(spec, X, np.zeros(len(y)), y, lam=0.5)
        assert rep.uncertainties is None and rep.covariance is None
        assert rep.uncertainty_basis.startswith("not given for λ > 0")

    def test_weighted_ridge_refused(self) -> None:
        """Stated uncertainties with λ > 0 are refused: a weighted ridge is not offered."""
        spec, X, y, u, _ = self._covariates()
        with pytest.raises(ModelError, match="needs λ = 0"):
            fit_model(spec, X, np.zeros(len(y)), y, lam=0.5, u_ref=u)
