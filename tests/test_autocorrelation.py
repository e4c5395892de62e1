"""Tests for audit.autocorrelation: residual r1 with exact null moments; phase r1 and r1+."""

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.tsa.stattools import acf

from audit import reasons as R
from audit.autocorrelation import (
    lag_matrix,
    phase_lag1,
    phase_lag1_batch,
    residual_lag1,
    residual_lag1_batch,
    residual_lag1_null_moments,
)


def piecewise_design(n_a: int, n_b: int) -> np.ndarray:
    """AB design: intercept, time, level change, slope change."""
    n = n_a + n_b
    t = np.arange(n, dtype=float)
    s = (t >= n_a).astype(float)
    return np.column_stack([np.ones(n), t, s, (t - n_a) * s])


def ols_residuals(Y, X):
    Q = np.linalg.qr(X)[0]
    return Y - (Y @ Q) @ Q.T


# ----------------------------------------------------------------------------- residuals


def test_lag_matrix_quadratic_form():
    e = np.random.default_rng(1).normal(size=9)
    # source: definition, e'Le = sum_t e_t e_{t+1}
    assert e @ lag_matrix(9) @ e == pytest.approx(np.sum(e[1:] * e[:-1]), rel=1e-13)


@pytest.mark.parametrize("na,nb", [(3, 4), (5, 5), (10, 10), (20, 20)])
def test_residual_r1_matches_statsmodels_acf(na, nb):
    rng = np.random.default_rng(na * 10 + nb)
    X = piecewise_design(na, nb)
    y = X @ [1, 0.2, 1, 0] + rng.normal(size=X.shape[0])
    e = sm.OLS(y, X).fit().resid
    res = residual_lag1(e, X, y=y)
    # source: statsmodels acf (residuals have mean zero, so demeaning changes nothing)
    assert res.r1 == pytest.approx(acf(e, nlags=1, fft=False)[1], rel=1e-10)
    assert res.r1_corrected == pytest.approx(res.r1 - res.null_mean, rel=1e-12)
    # source: scipy.stats.norm (two-sided normal p)
    assert res.p_value == pytest.approx(2 * stats.norm.sf(abs(res.z)), rel=1e-12)
    assert "approximate" in res.method and res.reason == R.OK


@pytest.mark.parametrize("na,nb", [(3, 3), (5, 8), (10, 10)])
def test_exact_null_moments_match_monte_carlo(na, nb):
    """400,000 normal draws: MC s.e. of the mean ~ 4e-4, of the variance ~ 0.3% (relative)."""
    rng = np.random.default_rng(2000 + na + nb)
    X = piecewise_design(na, nb)
    n = X.shape[0]
    mean, var = residual_lag1_null_moments(X)
    draws = []
    for _ in range(4):
        E = ols_residuals(rng.normal(size=(100_000, n)), X)
        draws.append(np.sum(E[:, 1:] * E[:, :-1], axis=1) / np.sum(E**2, axis=1))
    r1 = np.concatenate(draws)
    se_mean = np.sqrt(var / r1.size)
    # source: Monte Carlo (tolerance 6 MC standard errors)
    assert abs(r1.mean() - mean) < 6 * se_mean
    # source: Monte Carlo (relative tolerance 3%, about 10 MC standard errors)
    assert r1.var() == pytest.approx(var, rel=0.03)


def test_null_mean_is_trace_formula():
    X = piecewise_design(6, 7)
    n, k = X.shape
    M = np.eye(n) - X @ np.linalg.solve(X.T @ X, X.T)
    mean, _ = residual_lag1_null_moments(X)
    # source: E0 = tr(ML)/(n-k) computed with the hat matrix directly (definition)
    assert mean == pytest.approx(np.trace(M @ lag_matrix(n)) / (n - k), rel=1e-12)


def test_intercept_only_moments_are_classical():
    # source: for an intercept-only model E[r1] = -1/n exactly and the variance equals
    # (n-2)^2 / (n^2 (n-1)) (Moran 1948 / Huitema & McKean 1991, from memory)
    for n in (5, 10, 25):
        mean, var = residual_lag1_null_moments(np.ones((n, 1)))
        assert mean == pytest.approx(-1.0 / n, rel=1e-12)
        assert var == pytest.approx((n - 2) ** 2 / (n**2 * (n - 1)), rel=1e-10)


def test_residual_batch_agrees_with_per_case():
    rng = np.random.default_rng(3)
    X = piecewise_design(6, 9)
    Y = X @ [1, 0.2, 1, 0] + rng.normal(size=(30, 15))
    Y[2] = 4.0
    Y[4, 3] = np.nan
    E = ols_residuals(np.where(np.isfinite(Y), Y, 0.0), X)
    E[4, 3] = np.nan
    frame = residual_lag1_batch(E, X, y=Y)
    singles = [residual_lag1(e, X, y=y) for e, y in zip(E, Y)]
    for col in ("r1", "null_mean", "null_variance", "r1_corrected", "z", "p_value"):
        got = frame[col].to_numpy(dtype=float)
        want = np.array([getattr(s, col) for s in singles])
        # batch vs per-case reference path (both ours; a consistency check)
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14)
    assert list(frame["reason"]) == [s.reason for s in singles]
    assert frame.loc[2, "reason"] == R.CONSTANT_SERIES
    assert frame.loc[4, "reason"] == R.NON_FINITE_INPUT


@pytest.mark.parametrize(
    "case,expected",
    [
        ("nan", R.NON_FINITE_INPUT),
        ("n_le_k", R.NO_RESIDUAL_DF),
        ("rank_deficient", R.SINGULAR_DESIGN),
        ("zero", R.ZERO_RESIDUAL_VARIANCE),
        ("constant_y", R.CONSTANT_SERIES),
        ("exact_fit_y", R.ZERO_RESIDUAL_VARIANCE),
        ("one_df", R.ZERO_VARIANCE),
    ],
)
def test_residual_degenerate(case, expected):
    rng = np.random.default_rng(4)
    X = piecewise_design(5, 5)
    y = rng.normal(size=10)
    if case == "n_le_k":
        X, y = piecewise_design(2, 2), y[:4]
    elif case == "rank_deficient":
        X = np.column_stack([X, X[:, 0] - X[:, 2]])
    elif case == "one_df":
        X, y = piecewise_design(2, 3), y[:5]
    elif case == "constant_y":
        y = np.full(10, 7.0)
    elif case == "exact_fit_y":
        y = X @ [3.0, 0.2, -1.0, 0.5]
    e = np.zeros_like(y) if case == "zero" else ols_residuals(y[None, :], X)[0] \
        if case not in ("n_le_k", "rank_deficient") else y.copy()
    if case == "nan":
        e[2] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = residual_lag1(e, X, y=y)
        frame = residual_lag1_batch(e[None, :], X, y=y[None, :])
    assert res.reason == expected and np.isnan(res.z) and np.isnan(res.p_value)
    assert frame.loc[0, "reason"] == expected and np.isnan(frame.loc[0, "p_value"])


# ----------------------------------------------------------------------------- phases


@pytest.mark.parametrize("n", [3, 5, 10, 20])
def test_phase_r1_matches_statsmodels_acf_and_formulas(n):
    y = np.random.default_rng(n).normal(size=n)
    res = phase_lag1(y)
    # source: statsmodels acf (lag-1 autocorrelation about the mean)
    assert res.r1 == pytest.approx(acf(y, nlags=1, fft=False)[1], rel=1e-10)
    # source: Huitema & McKean (1991), from memory: r1+ = r1 + 1/n,
    # z = r1+ / sqrt((n-2)^2 / (n^2 (n-1)))
    assert res.r1_plus == pytest.approx(res.r1 + 1.0 / n, rel=1e-12)
    assert res.z == pytest.approx(res.r1_plus / np.sqrt((n - 2) ** 2 / (n**2 * (n - 1))))
    # source: scipy.stats.norm
    assert res.p_value_one_sided == pytest.approx(stats.norm.sf(res.z), rel=1e-12)
    assert res.p_value_two_sided == pytest.approx(2 * stats.norm.sf(abs(res.z)), rel=1e-12)
    assert res.n == n and res.reason == R.OK


def test_phase_batch_agrees_with_per_case():
    rng = np.random.default_rng(8)
    Y = rng.normal(size=(20, 7))
    Y[3] = 2.0
    Y[5, 0] = np.nan
    frame = phase_lag1_batch(Y)
    singles = [phase_lag1(y) for y in Y]
    for col in ("r1", "r1_plus", "std_error", "z", "p_value_one_sided", "p_value_two_sided"):
        want = np.array([getattr(s, col) for s in singles])
        # batch vs per-case reference path (both ours; a consistency check)
        np.testing.assert_allclose(frame[col].to_numpy(dtype=float), want, rtol=1e-12)
    assert list(frame["reason"]) == [s.reason for s in singles]


@pytest.mark.parametrize(
    "y,expected",
    [
        ([1.0, 2.0], R.TOO_FEW_POINTS),
        ([3.0, 3.0, 3.0, 3.0], R.CONSTANT_SERIES),
        ([1.0, np.nan, 2.0, 4.0], R.NON_FINITE_INPUT),
        ([], R.TOO_FEW_POINTS),
    ],
)
def test_phase_degenerate(y, expected):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = phase_lag1(np.array(y))
        assert res.reason == expected and np.isnan(res.r1) and np.isnan(res.z)
        if len(y):
            frame = phase_lag1_batch(np.array([y]))
            assert frame.loc[0, "reason"] == expected and np.isnan(frame.loc[0, "z"])


@pytest.mark.slow
def test_r1_plus_unbiased_and_variance_under_independence_n10():
    """200,000 iid normal phases of n=10 (source: Monte Carlo)."""
    rng = np.random.default_rng(10)
    n = 10
    frame = phase_lag1_batch(rng.normal(size=(200_000, n)))
    r1p = frame["r1_plus"].to_numpy()
    hm_var = (n - 2) ** 2 / (n**2 * (n - 1))
    se_mean = np.sqrt(hm_var / r1p.size)  # ~6e-4
    # source: Monte Carlo; r1+ nearly unbiased under independence (tolerance 5 MC s.e.)
    assert abs(r1p.mean()) < 5 * se_mean
    # source: Monte Carlo; Huitema-McKean variance within 3% of the simulated one
    assert r1p.var() == pytest.approx(hm_var, rel=0.03)
    # raw r1 is biased by about -1/n (source: Monte Carlo)
    assert frame["r1"].mean() == pytest.approx(-1.0 / n, abs=5 * se_mean)
