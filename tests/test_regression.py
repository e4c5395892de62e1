"""Tests for audit.regression: OLS, GLS-AR(1) (Prais-Winsten) and HAC tests of c'beta."""

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.sandwich_covariance import S_hac_simple

from audit import reasons as R
from audit.regression import (
    ContrastTest,
    contrast_batch,
    contrast_test,
    gls_contrast_batch,
    gls_contrast_test,
    hac_contrast_batch,
    hac_contrast_test,
    newey_west_default_lags,
    ols_contrast_batch,
    ols_contrast_test,
    ols_fit,
)


def piecewise_design(n_a: int, n_b: int) -> np.ndarray:
    """AB design: intercept, time, level change, slope change."""
    n = n_a + n_b
    t = np.arange(n, dtype=float)
    s = (t >= n_a).astype(float)
    return np.column_stack([np.ones(n), t, s, (t - n_a) * s])


def ar1_series(rng, X, beta, rho, m=1):
    n = X.shape[0]
    e = np.empty((m, n))
    e[:, 0] = rng.normal(size=m) / np.sqrt(1 - rho**2)
    for t in range(1, n):
        e[:, t] = rho * e[:, t - 1] + rng.normal(size=m)
    return X @ beta + e


def ar1_corr(n, rho):
    i = np.arange(n)
    return rho ** np.abs(i[:, None] - i[None, :])


C = np.array([0.0, 0.0, 1.0, 0.0])  # level change
DESIGNS = [(3, 3), (5, 5), (4, 8), (10, 10), (20, 20)]


# ----------------------------------------------------------------------------- OLS


@pytest.mark.parametrize("na,nb", DESIGNS)
def test_ols_fit_matches_statsmodels(na, nb):
    rng = np.random.default_rng(100 + na + nb)
    X = piecewise_design(na, nb)
    y = ar1_series(rng, X, [2.0, 0.1, 1.0, 0.05], 0.3)[0]
    fit = ols_fit(y, X)
    ref = sm.OLS(y, X).fit()
    # source: statsmodels OLS
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fit.std_error, ref.bse, rtol=1e-10)
    np.testing.assert_allclose(fit.residuals, ref.resid, atol=1e-10)
    assert fit.sigma2 == pytest.approx(ref.scale, rel=1e-10)  # source: statsmodels OLS
    assert fit.df_resid == ref.df_resid and fit.rank == 4 and fit.reason == R.OK


@pytest.mark.parametrize("na,nb", DESIGNS)
def test_ols_contrast_matches_statsmodels_t_test(na, nb):
    rng = np.random.default_rng(200 + na + nb)
    X = piecewise_design(na, nb)
    c = np.array([0.0, 0.0, 1.0, 0.5])
    y = ar1_series(rng, X, [2.0, 0.1, 1.0, 0.05], 0.0)[0]
    res = ols_contrast_test(y, X, c, alpha=0.05)
    ref = sm.OLS(y, X).fit().t_test(c)
    # source: statsmodels OLS.t_test
    assert res.estimate == pytest.approx(float(ref.effect[0]), rel=1e-10, abs=1e-12)
    assert res.std_error == pytest.approx(float(ref.sd[0, 0]), rel=1e-10)
    assert res.statistic == pytest.approx(float(ref.tvalue[0, 0]), rel=1e-10, abs=1e-12)
    assert res.p_value == pytest.approx(float(ref.pvalue), rel=1e-9, abs=1e-14)
    assert res.df == ref.df_denom
    assert res.method == "ols" and res.significant == (res.p_value < 0.05)


# ----------------------------------------------------------------------------- GLS


@pytest.mark.parametrize("rho", [-0.6, -0.2, 0.0, 0.3, 0.7, 0.95])
@pytest.mark.parametrize("na,nb", [(3, 3), (5, 7), (15, 15)])
def test_gls_contrast_matches_statsmodels_gls(rho, na, nb):
    rng = np.random.default_rng(int(1000 * (rho + 1)) + na)
    X = piecewise_design(na, nb)
    n = X.shape[0]
    y = ar1_series(rng, X, [1.0, 0.2, 1.5, -0.1], rho)[0]
    res = gls_contrast_test(y, X, C, rho)
    ref = sm.GLS(y, X, sigma=ar1_corr(n, rho)).fit().t_test(C)
    # source: statsmodels GLS(sigma=R)
    assert res.estimate == pytest.approx(float(ref.effect[0]), rel=1e-8, abs=1e-10)
    assert res.std_error == pytest.approx(float(ref.sd[0, 0]), rel=1e-8)
    assert res.statistic == pytest.approx(float(ref.tvalue[0, 0]), rel=1e-8, abs=1e-10)
    assert res.p_value == pytest.approx(float(ref.pvalue), rel=1e-7, abs=1e-12)
    assert res.df == n - 4 and res.method == "gls_ar1" and res.rho == rho


def test_gls_with_rho_zero_equals_ols():
    rng = np.random.default_rng(5)
    X = piecewise_design(6, 9)
    y = ar1_series(rng, X, [1, 0, 1, 0], 0.2)[0]
    a, b = gls_contrast_test(y, X, C, 0.0), ols_contrast_test(y, X, C)
    # source: definition (GLS with R = I is OLS)
    assert a.estimate == pytest.approx(b.estimate, rel=1e-12)
    assert a.std_error == pytest.approx(b.std_error, rel=1e-12)


# ----------------------------------------------------------------------------- HAC


def test_default_lags_equal_statsmodels_rule():
    # source: statsmodels S_hac_simple default nlags = floor(4 (n/100)^(2/9)) (Newey & West 1994)
    for n in range(6, 41):
        x = np.ones((n, 1))
        w = np.arange(1, n + 1, dtype=float)[:, None]
        L = newey_west_default_lags(n)
        np.testing.assert_allclose(S_hac_simple(x * w), S_hac_simple(x * w, nlags=L))
    assert newey_west_default_lags(6) == 2 and newey_west_default_lags(40) == 3  # common practice


@pytest.mark.parametrize("maxlags", [None, 0, 1, 4])
@pytest.mark.parametrize("na,nb", DESIGNS)
def test_hac_contrast_matches_statsmodels(maxlags, na, nb):
    rng = np.random.default_rng(300 + na + nb + (maxlags or 0))
    X = piecewise_design(na, nb)
    n = X.shape[0]
    y = ar1_series(rng, X, [1.0, 0.2, 1.5, -0.1], 0.4)[0]
    res = hac_contrast_test(y, X, C, maxlags=maxlags)
    L = newey_west_default_lags(n) if maxlags is None else maxlags
    fit = sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": L, "use_correction": True},
                           use_t=True)
    ref = fit.t_test(C)
    # source: statsmodels OLS(cov_type='HAC', use_correction=True, use_t=True)
    assert res.estimate == pytest.approx(float(ref.effect[0]), rel=1e-10, abs=1e-12)
    assert res.std_error == pytest.approx(float(ref.sd[0, 0]), rel=1e-10)
    assert res.statistic == pytest.approx(float(ref.tvalue[0, 0]), rel=1e-10, abs=1e-12)
    assert res.p_value == pytest.approx(float(ref.pvalue), rel=1e-9, abs=1e-14)
    assert res.df == fit.df_resid == n - 4
    assert res.lags == L and res.method == "hac"


# ----------------------------------------------------------------------------- batch


def _mixed_batch(rng, X, m=40):
    """Series with a few degenerate rows mixed in."""
    Y = ar1_series(rng, X, [1.0, 0.1, 1.0, 0.0], 0.3, m)
    Y[3] = 5.0  # constant
    Y[7, 2] = np.nan  # NaN
    Y[11] = X @ np.array([1.0, 2.0, 3.0, 4.0])  # exact fit
    Y[13] *= 1e6  # scale
    return Y


def _compare_batch_to_single(frame: pd.DataFrame, singles: list[ContrastTest]):
    cols = ["estimate", "std_error", "statistic", "df", "p_value", "rho"]
    got = frame[cols].to_numpy(dtype=float)
    want = np.array([[getattr(s, c) for c in cols] for s in singles], dtype=float)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    ok = ~np.isnan(want)
    # batch vs per-case reference path (both ours; a consistency check)
    np.testing.assert_allclose(got[ok], want[ok], rtol=1e-10, atol=1e-12)
    assert list(frame["reason"]) == [s.reason for s in singles]
    sig = [None if pd.isna(v) else bool(v) for v in frame["significant"]]
    assert sig == [s.significant for s in singles]
    assert list(frame["method"]) == [s.method for s in singles]
    return float(np.max(np.abs(got[ok] - want[ok]) / np.maximum(1.0, np.abs(want[ok]))))


@pytest.mark.parametrize("na,nb", DESIGNS)
def test_batches_agree_with_per_case(na, nb):
    rng = np.random.default_rng(400 + na + nb)
    X = piecewise_design(na, nb)
    Y = _mixed_batch(rng, X)
    m = Y.shape[0]
    rho = rng.uniform(-0.9, 0.9, size=m)
    rho[5] = np.nan
    rho[6] = 1.0
    worst = _compare_batch_to_single(ols_contrast_batch(Y, X, C),
                                     [ols_contrast_test(y, X, C) for y in Y])
    worst = max(worst, _compare_batch_to_single(
        gls_contrast_batch(Y, X, C, rho), [gls_contrast_test(y, X, C, r) for y, r in zip(Y, rho)]))
    for L in (None, 2):
        worst = max(worst, _compare_batch_to_single(
            hac_contrast_batch(Y, X, C, maxlags=L),
            [hac_contrast_test(y, X, C, maxlags=L) for y in Y]))
    assert worst < 1e-10


def test_dispatchers():
    rng = np.random.default_rng(9)
    X = piecewise_design(5, 5)
    Y = ar1_series(rng, X, [1, 0, 1, 0], 0.2, 3)
    for method, kw in [("ols", {}), ("gls_ar1", {"rho": 0.3}), ("hac", {})]:
        single = contrast_test(Y[0], X, C, method=method, **kw)
        batch = contrast_batch(Y, X, C, method=method, **kw)
        assert single.method == method
        assert batch["estimate"].iloc[0] == pytest.approx(single.estimate, rel=1e-12)
    with pytest.raises(ValueError):
        contrast_test(Y[0], X, C, method="bogus")


# ----------------------------------------------------------------------------- degenerate


def _all_paths(y, X, c=C, rho=0.3):
    singles = [ols_contrast_test(y, X, c), gls_contrast_test(y, X, c, rho),
               hac_contrast_test(y, X, c)]
    batches = [ols_contrast_batch(y[None, :], X, c), gls_contrast_batch(y[None, :], X, c, [rho]),
               hac_contrast_batch(y[None, :], X, c)]
    return singles, batches


@pytest.mark.parametrize(
    "case,expected",
    [
        ("constant", R.CONSTANT_SERIES),
        ("n_le_k", R.NO_RESIDUAL_DF),
        ("rank_deficient", R.SINGULAR_DESIGN),
        ("exact_fit", R.ZERO_RESIDUAL_VARIANCE),
        ("nan_y", R.NON_FINITE_INPUT),
        ("nan_x", R.NON_FINITE_INPUT),
        ("zero_contrast", R.NO_CONTRAST),
    ],
)
def test_degenerate_inputs_give_nan_and_reason(case, expected):
    rng = np.random.default_rng(11)
    X = piecewise_design(5, 5)
    y = rng.normal(size=10)
    c = C
    if case == "constant":
        y = np.full(10, 3.0)
    elif case == "n_le_k":
        X = piecewise_design(2, 2)
        y = y[:4]
    elif case == "rank_deficient":
        X = np.column_stack([X, X[:, 2] * 2.0])
        c = np.append(C, 0.0)
    elif case == "exact_fit":
        y = X @ np.array([1.0, 0.5, 2.0, -0.3])
    elif case == "nan_y":
        y[4] = np.nan
    elif case == "nan_x":
        X = X.copy()
        X[3, 1] = np.nan
    elif case == "zero_contrast":
        c = np.zeros(4)
    singles, batches = _all_paths(y, X, c)
    for s in singles:
        assert np.isnan(s.estimate) and np.isnan(s.std_error) and np.isnan(s.p_value)
        assert s.significant is None and s.reason == expected
    for b in batches:
        assert b["p_value"].isna().all() and b["estimate"].isna().all()
        assert b["significant"].isna().all() and (b["reason"] == expected).all()
    if case not in ("zero_contrast",):
        fit = ols_fit(y, X)
        assert fit.reason == expected and np.all(np.isnan(fit.std_error))


def test_gls_bad_rho_gives_nan():
    rng = np.random.default_rng(12)
    X = piecewise_design(5, 5)
    y = rng.normal(size=10)
    assert gls_contrast_test(y, X, C, np.nan).reason == R.NON_FINITE_INPUT
    assert gls_contrast_test(y, X, C, 1.0).reason == R.NUMERICAL_FAILURE
    assert np.isnan(gls_contrast_test(y, X, C, -1.2).p_value)


def test_shape_mismatch_is_a_programming_error():
    X = piecewise_design(5, 5)
    with pytest.raises(ValueError):
        ols_contrast_test(np.zeros(9), X, C)
    with pytest.raises(ValueError):
        ols_contrast_test(np.zeros(10), X, C[:3])


def test_no_warnings_on_degenerate_batch():
    X = piecewise_design(4, 4)
    Y = np.vstack([np.full(8, 1.0), np.full(8, np.nan), np.arange(8.0)])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for f in (ols_contrast_batch(Y, X, C), gls_contrast_batch(Y, X, C, [0.5, 0.5, 0.5]),
                  hac_contrast_batch(Y, X, C)):
            assert f["p_value"].isna().all()


def test_p_value_two_sided():
    rng = np.random.default_rng(13)
    X = piecewise_design(6, 6)
    y = ar1_series(rng, X, [0, 0, 1, 0], 0.0)[0]
    r = ols_contrast_test(y, X, C)
    # source: scipy.stats.t (two-sided p = 2 P(T > |t|))
    assert r.p_value == pytest.approx(2 * stats.t.sf(abs(r.statistic), 8), rel=1e-12)
