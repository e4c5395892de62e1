"""Tests for audit.ar1: REML/ML AR(1) coefficient and the Prais-Winsten GLS table."""

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import linalg, optimize, stats
from statsmodels.tsa.statespace.sarimax import SARIMAX

from audit import reasons as R
from audit.ar1 import (
    RHO_BOUND,
    ar1_batch,
    ar1_correlation_matrix,
    ar1_loglik,
    ar1_ml,
    ar1_ml_batch,
    ar1_reml,
    ar1_reml_batch,
    gls_ar1_table,
)


def piecewise_design(n_a: int, n_b: int) -> np.ndarray:
    """AB design: intercept, time, level change, slope change."""
    n = n_a + n_b
    t = np.arange(n, dtype=float)
    s = (t >= n_a).astype(float)
    return np.column_stack([np.ones(n), t, s, (t - n_a) * s])


def level_design(n_a: int, n_b: int) -> np.ndarray:
    n = n_a + n_b
    t = np.arange(n, dtype=float)
    return np.column_stack([np.ones(n), t, (t >= n_a).astype(float)])


def ar1_series(rng, X, beta, rho, m=1):
    n = X.shape[0]
    e = np.empty((m, n))
    e[:, 0] = rng.normal(size=m) / np.sqrt(1 - rho**2)
    for t in range(1, n):
        e[:, t] = rho * e[:, t - 1] + rng.normal(size=m)
    return X @ beta + e


# ----------------------------------------------------------------------------- GLS table


@pytest.mark.parametrize("rho", [-0.5, 0.0, 0.4, 0.8])
@pytest.mark.parametrize("na,nb", [(3, 3), (6, 10), (20, 20)])
def test_gls_table_matches_statsmodels_gls(rho, na, nb):
    rng = np.random.default_rng(int(10 * (rho + 1)) + na * 7 + nb)
    X = piecewise_design(na, nb)
    n = X.shape[0]
    y = ar1_series(rng, X, [1.0, 0.3, 2.0, -0.2], rho)[0]
    tab = gls_ar1_table(y, X, rho)
    ref = sm.GLS(y, X, sigma=ar1_correlation_matrix(n, rho)).fit()
    # source: statsmodels GLS(y, X, sigma=R)
    np.testing.assert_allclose(tab["coef"], ref.params, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(tab["std_error"], ref.bse, rtol=1e-8)
    np.testing.assert_allclose(tab["t"], ref.tvalues, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(tab["p_value"], ref.pvalues, rtol=1e-6, atol=1e-12)
    assert (tab["df"] == ref.df_resid).all() and (tab["reason"] == R.OK).all()


def test_gls_table_names_from_dataframe():
    X = pd.DataFrame(piecewise_design(4, 4), columns=["b0", "trend", "level", "slope"])
    y = np.random.default_rng(1).normal(size=8)
    assert list(gls_ar1_table(y, X, 0.2).index) == ["b0", "trend", "level", "slope"]


def test_correlation_matrix():
    # source: definition of the stationary AR(1) correlation, R_ts = rho^|t-s|;
    # |R| = (1-rho^2)^(n-1) (standard result, from memory)
    Rm = ar1_correlation_matrix(6, 0.4)
    assert Rm[0, 3] == pytest.approx(0.4**3) and Rm[5, 5] == 1.0
    assert np.linalg.det(Rm) == pytest.approx((1 - 0.16) ** 5, rel=1e-12)


# ----------------------------------------------------------------------------- ML vs SARIMAX


def _sarimax_fit(y, X):
    model = SARIMAX(y, exog=X, order=(1, 0, 0), trend="n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = model.fit(disp=False, method="lbfgs", maxiter=1000)
    return model, res


def test_ml_matches_sarimax():
    """20 seeded series; rho within 1e-3 of SARIMAX (exact Gaussian AR(1) MLE)."""
    rng = np.random.default_rng(2024)
    diffs, ll_gap, ll_at_ours = [], [], []
    for i in range(20):
        na, nb = [(5, 5), (8, 12), (10, 10), (15, 20)][i % 4]
        X = piecewise_design(na, nb) if i % 2 else level_design(na, nb)
        rho_true = [-0.3, 0.0, 0.3, 0.5][i % 4]
        y = ar1_series(rng, X, np.r_[1.0, 0.2, 1.0, 0.1][: X.shape[1]], rho_true)[0]
        fit = ar1_ml(y, X)
        assert fit.reason == R.OK and fit.converged
        model, ref = _sarimax_fit(y, X)
        k = X.shape[1]
        if fit.at_bound:  # SARIMAX is bounded by stationarity only, not |rho| <= 0.95
            continue
        diffs.append(abs(fit.rho - ref.params[k]))
        # source: statsmodels SARIMAX loglike: our profile loglik at our estimate equals the
        # exact Gaussian loglik at (b_GLS(rho), rho, innovation variance RSS*/n)
        tab = gls_ar1_table(y, X, fit.rho)
        ys = np.r_[np.sqrt(1 - fit.rho**2) * y[0], y[1:] - fit.rho * y[:-1]]
        Xs = np.vstack([np.sqrt(1 - fit.rho**2) * X[:1], X[1:] - fit.rho * X[:-1]])
        sigma_u2 = float(np.sum((ys - Xs @ tab["coef"].to_numpy()) ** 2)) / len(y)
        ll_sm = model.loglike(np.r_[tab["coef"].to_numpy(), fit.rho, sigma_u2])
        ll_at_ours.append(abs(ll_sm - fit.loglik))
        ll_gap.append(ref.llf - fit.loglik)
    assert len(diffs) >= 15
    # source: statsmodels SARIMAX(order=(1,0,0), trend='n') MLE
    assert max(diffs) < 1e-3
    assert max(ll_at_ours) < 1e-8  # source: statsmodels SARIMAX.loglike
    assert max(ll_gap) < 1e-6  # SARIMAX's optimum is not higher than ours


# ----------------------------------------------------------------------------- REML vs dense


def _dense_reml(y, X):
    """REML as ML of the error contrasts w = K'y (Harville 1974), dense MVN likelihood."""
    n, k = X.shape
    K = linalg.null_space(X.T)
    w = K.T @ y

    def nll(p):
        rho, log_s2 = p
        if abs(rho) > RHO_BOUND:
            return np.inf
        V = np.exp(log_s2) * (K.T @ ar1_correlation_matrix(n, rho) @ K)
        return -stats.multivariate_normal(mean=np.zeros(n - k), cov=V).logpdf(w)

    best = None
    for start in (-0.5, 0.0, 0.5):
        res = optimize.minimize(nll, [start, np.log(np.mean(w**2))], method="Nelder-Mead",
                                options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 20000})
        if best is None or res.fun < best.fun:
            best = res
    return best.x[0], -best.fun


def test_reml_matches_dense_error_contrast_likelihood():
    rng = np.random.default_rng(31)
    worst_rho, worst_ll = 0.0, 0.0
    for i in range(10):
        na, nb = [(4, 4), (6, 9), (10, 10), (12, 18), (20, 20)][i % 5]
        X = piecewise_design(na, nb)
        y = ar1_series(rng, X, [1.0, 0.2, 1.0, 0.1], [0.0, 0.3, 0.6, -0.3, 0.2][i % 5])[0]
        fit = ar1_reml(y, X)
        rho_dense, ll_dense = _dense_reml(y, X)
        worst_rho = max(worst_rho, abs(fit.rho - rho_dense))
        worst_ll = max(worst_ll, abs(fit.loglik - ll_dense))
    # source: Harville (1974) definition of REML, dense scipy computation
    assert worst_rho < 1e-4
    assert worst_ll < 1e-6


def test_loglik_function_matches_dense_at_fixed_rho():
    rng = np.random.default_rng(32)
    X = piecewise_design(7, 8)
    n, k = X.shape
    y = ar1_series(rng, X, [0, 0, 1, 0], 0.4)[0]
    K = linalg.null_space(X.T)
    w = K.T @ y
    for rho in (-0.7, 0.0, 0.5, 0.9):
        V = K.T @ ar1_correlation_matrix(n, rho) @ K
        s2 = w @ np.linalg.solve(V, w) / (n - k)
        # source: Harville (1974) REML = density of K'y, profiled over sigma^2 (scipy MVN)
        ref = stats.multivariate_normal(mean=np.zeros(n - k), cov=s2 * V).logpdf(w)
        assert ar1_loglik(y, X, rho, "REML") == pytest.approx(ref, abs=1e-9)
        Rm = ar1_correlation_matrix(n, rho)
        b = np.linalg.solve(X.T @ np.linalg.solve(Rm, X), X.T @ np.linalg.solve(Rm, y))
        u = y - X @ b
        s2_ml = u @ np.linalg.solve(Rm, u) / n
        # source: exact Gaussian likelihood (scipy MVN) at the GLS estimate, profile ML
        ref_ml = stats.multivariate_normal(mean=X @ b, cov=s2_ml * Rm).logpdf(y)
        assert ar1_loglik(y, X, rho, "ML") == pytest.approx(ref_ml, abs=1e-9)


# ----------------------------------------------------------------------------- batch


@pytest.mark.parametrize("method", ["REML", "ML"])
@pytest.mark.parametrize("design", [(3, 3), (5, 5), (6, 10), (20, 20), "level"])
def test_batch_agrees_with_per_case(method, design):
    rng = np.random.default_rng(41)
    X = level_design(8, 8) if design == "level" else piecewise_design(*design)
    k = X.shape[1]
    Y = np.vstack([ar1_series(rng, X, np.r_[1.0, 0.2, 1.0, 0.1][:k], rho, 12)
                   for rho in (-0.5, 0.0, 0.4, 0.8)])
    Y[2] = 1.0
    Y[5, 1] = np.nan
    frame = ar1_batch(Y, X, method)
    single = [ar1_reml(y, X) if method == "REML" else ar1_ml(y, X) for y in Y]
    rho_s = np.array([s.rho for s in single])
    ll_s = np.array([s.loglik for s in single])
    np.testing.assert_array_equal(np.isnan(frame["rho"]), np.isnan(rho_s))
    ok = ~np.isnan(rho_s)
    # batch vs per-case reference path (both ours; a consistency check)
    assert np.max(np.abs(frame["rho"].to_numpy()[ok] - rho_s[ok])) < 1e-8
    assert np.max(np.abs(frame["loglik"].to_numpy()[ok] - ll_s[ok])) < 1e-8
    assert list(frame["reason"]) == [s.reason for s in single]
    assert list(frame["at_bound"]) == [s.at_bound for s in single]
    assert list(frame["converged"]) == [s.converged for s in single]
    rb = ar1_reml_batch(Y, X) if method == "REML" else ar1_ml_batch(Y, X)
    np.testing.assert_array_equal(rb, frame["rho"].to_numpy())


def test_bound_solutions_are_flagged():
    rng = np.random.default_rng(51)
    X = piecewise_design(10, 10)
    Y = ar1_series(rng, X, [1, 0.2, 1, 0.1], 0.9, 200)
    frame = ar1_batch(Y, X, "REML")
    hit = frame[frame["at_bound"]]
    assert len(hit) > 0
    assert np.all(np.abs(hit["rho"]) == RHO_BOUND)
    assert np.all(np.abs(frame["rho"]) <= RHO_BOUND)
    for i in hit.index[:5]:
        r = hit.loc[i, "rho"]
        inner = r - 0.01 * np.sign(r)
        # the likelihood still rises towards the bound (source: definition of a boundary maximum)
        assert ar1_loglik(Y[i], X, r) >= ar1_loglik(Y[i], X, inner)


def test_interior_maximum_is_a_maximum():
    rng = np.random.default_rng(52)
    X = piecewise_design(8, 8)
    y = ar1_series(rng, X, [1, 0.2, 1, 0.1], 0.3)[0]
    fit = ar1_reml(y, X)
    assert not fit.at_bound and fit.converged
    grid = np.linspace(-0.95, 0.95, 381)
    # source: brute-force grid of the same likelihood (scipy-free check of the optimiser)
    assert fit.loglik >= max(ar1_loglik(y, X, g) for g in grid) - 1e-12


# ----------------------------------------------------------------------------- degenerate


@pytest.mark.parametrize(
    "case,expected",
    [
        ("constant", R.CONSTANT_SERIES),
        ("n_le_k", R.NO_RESIDUAL_DF),
        ("one_contrast", R.TOO_FEW_POINTS),
        ("rank_deficient", R.SINGULAR_DESIGN),
        ("exact_fit", R.ZERO_RESIDUAL_VARIANCE),
        ("nan_y", R.NON_FINITE_INPUT),
        ("nan_x", R.NON_FINITE_INPUT),
    ],
)
def test_degenerate_inputs(case, expected):
    rng = np.random.default_rng(61)
    X = piecewise_design(5, 5)
    y = rng.normal(size=10)
    if case == "constant":
        y = np.full(10, 2.0)
    elif case == "n_le_k":
        X, y = piecewise_design(2, 2), y[:4]
    elif case == "one_contrast":
        X, y = piecewise_design(2, 3), y[:5]
    elif case == "rank_deficient":
        X = np.column_stack([X, X[:, 1] + X[:, 2]])
    elif case == "exact_fit":
        y = X @ np.array([1.0, 0.1, 2.0, 0.3])
    elif case == "nan_y":
        y[0] = np.nan
    elif case == "nan_x":
        X = X.copy()
        X[0, 1] = np.inf
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for fit in (ar1_reml(y, X), ar1_ml(y, X)):
            assert np.isnan(fit.rho) and np.isnan(fit.loglik) and fit.reason == expected
            assert not fit.converged
        frame = ar1_batch(np.vstack([y, y]), X)
        assert frame["rho"].isna().all() and (frame["reason"] == expected).all()
        tab = gls_ar1_table(y, X, 0.3)
        if case != "one_contrast":
            assert tab["coef"].isna().all() and (tab["reason"] == expected).all()


# ----------------------------------------------------------------------------- Monte Carlo


@pytest.mark.slow
def test_reml_less_biased_than_ml():
    """Small Monte Carlo: 2000 AB series (n=20, k=4), rho = 0.3 (source: Monte Carlo)."""
    rng = np.random.default_rng(71)
    X = piecewise_design(10, 10)
    Y = ar1_series(rng, X, [1.0, 0.2, 1.0, 0.1], 0.3, 2000)
    bias_reml = np.mean(ar1_reml_batch(Y, X)) - 0.3
    bias_ml = np.mean(ar1_ml_batch(Y, X)) - 0.3
    # source: Monte Carlo (MC standard error of each mean ~0.006)
    assert abs(bias_reml) < abs(bias_ml) - 0.05
    assert abs(bias_reml) < 0.1
