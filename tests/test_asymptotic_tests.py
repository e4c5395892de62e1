"""Tests for audit.asymptotic_tests: Breusch-Godfrey (lag 1) and Ljung-Box."""

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.diagnostic import acorr_breusch_godfrey, acorr_ljungbox

from audit import reasons as R
from audit.asymptotic_tests import (
    breusch_godfrey,
    breusch_godfrey_batch,
    ljung_box,
    ljung_box_batch,
    ljung_box_default_lags,
    ljung_box_rows,
)
from audit.regression import series_reasons


def piecewise_design(n_a: int, n_b: int) -> np.ndarray:
    """AB design: intercept, time, level change, slope change."""
    n = n_a + n_b
    t = np.arange(n, dtype=float)
    s = (t >= n_a).astype(float)
    return np.column_stack([np.ones(n), t, s, (t - n_a) * s])


def ar1_noise(rng, n, rho):
    e = np.empty(n)
    e[0] = rng.normal() / np.sqrt(1 - rho**2)
    for t in range(1, n):
        e[t] = rho * e[t - 1] + rng.normal()
    return e


DESIGNS = [(3, 3), (4, 5), (5, 5), (10, 10), (15, 25)]


@pytest.mark.parametrize("rho", [-0.4, 0.0, 0.6])
@pytest.mark.parametrize("na,nb", DESIGNS)
@pytest.mark.parametrize("intercept", [True, False])
def test_breusch_godfrey_matches_statsmodels(rho, na, nb, intercept):
    rng = np.random.default_rng(int(100 * (rho + 1)) + na * 3 + nb)
    X = piecewise_design(na, nb)
    if not intercept:
        X = X[:, 1:]
    y = X @ np.ones(X.shape[1]) + ar1_noise(rng, X.shape[0], rho)
    fit = sm.OLS(y, X).fit()
    ref = acorr_breusch_godfrey(fit, nlags=1, result_object=True)
    res = breusch_godfrey(fit.resid, X, y=y)
    # source: statsmodels acorr_breusch_godfrey(nlags=1)
    assert res.statistic == pytest.approx(ref.lm, rel=1e-9, abs=1e-12)
    assert res.p_value == pytest.approx(ref.lmpval, rel=1e-9, abs=1e-14)
    assert res.f_statistic == pytest.approx(ref.fval, rel=1e-9, abs=1e-12)
    assert res.f_p_value == pytest.approx(ref.fpval, rel=1e-9, abs=1e-14)
    assert res.asymptotic and "asymptotic=True" in res.method and res.df == 1
    frame = breusch_godfrey_batch(fit.resid[None, :], X, y=y[None, :])
    # batch vs per-case reference path (both ours; a consistency check)
    assert frame.loc[0, "statistic"] == pytest.approx(res.statistic, rel=1e-10, abs=1e-12)
    assert frame.loc[0, "f_statistic"] == pytest.approx(res.f_statistic, rel=1e-10, abs=1e-12)


@pytest.mark.parametrize("n", [6, 7, 10, 13, 20, 31, 40])
def test_ljung_box_matches_statsmodels(n):
    rng = np.random.default_rng(n)
    X = piecewise_design(n // 2, n - n // 2)
    y = X @ np.ones(4) + ar1_noise(rng, n, 0.3)
    e = sm.OLS(y, X).fit().resid
    h = ljung_box_default_lags(n)
    assert h == max(1, n // 4)
    ref = acorr_ljungbox(e, lags=h)
    res = ljung_box(e, y=y)
    # source: statsmodels acorr_ljungbox (statistic at the largest lag)
    assert res.statistic == pytest.approx(ref["lb_stat"].iloc[-1], rel=1e-10)
    assert res.p_value == pytest.approx(ref["lb_pvalue"].iloc[-1], rel=1e-9)
    assert res.df == h and res.lags == h and res.asymptotic and "asymptotic=True" in res.method


@pytest.mark.parametrize("lags", [1, 3])
def test_ljung_box_explicit_lags_and_raw_series(lags):
    y = np.random.default_rng(lags).normal(size=15) + 10.0
    ref = acorr_ljungbox(y, lags=lags)
    # source: statsmodels acorr_ljungbox (demeans the series itself)
    assert ljung_box(y, lags=lags).statistic == pytest.approx(ref["lb_stat"].iloc[-1], rel=1e-10)


def test_batches_agree_with_per_case():
    rng = np.random.default_rng(5)
    X = piecewise_design(7, 9)
    n = X.shape[0]
    Y = X @ np.ones(4) + rng.normal(size=(25, n))
    Y[1] = 3.0
    Y[2, 5] = np.nan
    Q = np.linalg.qr(X)[0]
    Yf = np.where(np.isfinite(Y), Y, 0.0)
    E = Yf - (Yf @ Q) @ Q.T
    E[2, 5] = np.nan
    bg = breusch_godfrey_batch(E, X, y=Y)
    lb = ljung_box_batch(E, y=Y)
    bgs = [breusch_godfrey(e, X, y=y) for e, y in zip(E, Y)]
    lbs = [ljung_box(e, y=y) for e, y in zip(E, Y)]
    for col in ("statistic", "p_value", "f_statistic", "f_p_value"):
        # batch vs per-case reference path (both ours; a consistency check)
        np.testing.assert_allclose(bg[col].to_numpy(dtype=float),
                                   [getattr(s, col) for s in bgs], rtol=1e-10, atol=1e-13)
    for col in ("statistic", "p_value"):
        np.testing.assert_allclose(lb[col].to_numpy(dtype=float),
                                   [getattr(s, col) for s in lbs], rtol=1e-10, atol=1e-13)
    assert list(bg["reason"]) == [s.reason for s in bgs]
    assert list(lb["reason"]) == [s.reason for s in lbs]
    assert bg.loc[1, "reason"] == R.CONSTANT_SERIES and lb.loc[2, "reason"] == R.NON_FINITE_INPUT
    assert bg["asymptotic"].all() and lb["method"].str.contains("asymptotic=True").all()
    # the frame-free rows (with or without the data reasons given) are the frame's columns
    h = ljung_box_default_lags(n)
    for given in (None, series_reasons(Y, np.where(np.isfinite(E), E, 0.0))):
        q, reason = ljung_box_rows(E, h, Y, data_reasons=given)
        np.testing.assert_array_equal(q, lb["statistic"].to_numpy(dtype=float))
        assert list(reason) == list(lb["reason"])


@pytest.mark.parametrize(
    "case,bg_expected,lb_expected",
    [
        ("nan", R.NON_FINITE_INPUT, R.NON_FINITE_INPUT),
        ("zero", R.ZERO_RESIDUAL_VARIANCE, R.ZERO_RESIDUAL_VARIANCE),
        ("constant_y", R.CONSTANT_SERIES, R.CONSTANT_SERIES),
        ("n_le_k", R.NO_RESIDUAL_DF, R.OK),
        ("no_aux_df", R.NO_RESIDUAL_DF, R.OK),
        ("rank_deficient", R.SINGULAR_DESIGN, R.OK),
        ("too_short", R.NO_RESIDUAL_DF, R.TOO_FEW_POINTS),
    ],
)
def test_degenerate(case, bg_expected, lb_expected):
    rng = np.random.default_rng(6)
    X = piecewise_design(5, 5)
    y = rng.normal(size=10)
    if case == "n_le_k":
        X, y = piecewise_design(2, 2), y[:4]
    elif case == "no_aux_df":
        X, y = piecewise_design(2, 3), y[:5]
    elif case == "rank_deficient":
        X = np.column_stack([X, 2 * X[:, 1]])
    elif case == "too_short":
        X, y = np.ones((2, 1)), y[:2]
    elif case == "constant_y":
        y = np.full(10, 1.5)
    e = y - y.mean()
    if case == "constant_y":
        e = np.full(10, 1e-16)
    if case == "nan":
        e[3] = np.nan
    if case == "zero":
        e = np.zeros(10)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        bg = breusch_godfrey(e, X, y=y)
        lb = ljung_box(e, y=y)
        bgb = breusch_godfrey_batch(e[None, :], X, y=y[None, :])
        lbb = ljung_box_batch(e[None, :], y=y[None, :])
    assert bg.reason == bg_expected and bgb.loc[0, "reason"] == bg_expected
    assert lb.reason == lb_expected and lbb.loc[0, "reason"] == lb_expected
    if bg_expected:
        assert np.isnan(bg.statistic) and np.isnan(bg.p_value) and np.isnan(bgb.loc[0, "p_value"])
    if lb_expected:
        assert np.isnan(lb.statistic) and np.isnan(lbb.loc[0, "statistic"])
