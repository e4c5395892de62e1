"""Tests for audit.trend: baseline trend diagnostics."""

from __future__ import annotations

import math
import sys
from dataclasses import fields

import numpy as np
import pytest
from scipy import stats
from statsmodels.tsa.stattools import acf

from audit import reasons as R
from audit.trend import (
    baseline_trend,
    baseline_trends,
    mann_kendall,
    mann_kendall_exact_sf,
    mann_kendall_hamed_rao_lag1,
    ols_slope,
    theil_sen_slope,
)


def _random_series(rng, n, ties=False, spacing="equal"):
    if spacing == "equal":
        x = np.arange(1, n + 1, dtype=float)
    else:
        x = np.cumsum(rng.integers(1, 4, size=n)).astype(float)
    y = rng.normal(size=n).cumsum()
    if ties:
        y = np.round(y)  # creates tied outcomes
    return x, y


# ------------------------------------------------------------------------------------------------
# Theil-Sen
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("ties", [False, True])
@pytest.mark.parametrize("spacing", ["equal", "unequal"])
@pytest.mark.parametrize("confidence", [0.95, 0.90])
def test_theil_sen_matches_scipy(ties, spacing, confidence):
    rng = np.random.default_rng(11)
    worst = 0.0
    for _ in range(200):
        n = int(rng.integers(3, 25))
        x, y = _random_series(rng, n, ties, spacing)
        ours = theil_sen_slope(x, y, confidence=confidence)
        ref = stats.theilslopes(y, x, alpha=confidence)  # source: scipy.stats.theilslopes (Sen 1968 eq. 2.6)
        got = [ours.theil_sen_slope, ours.theil_sen_intercept, ours.theil_sen_slope_low, ours.theil_sen_slope_high]
        exp = [ref.slope, ref.intercept, ref.low_slope, ref.high_slope]
        worst = max(worst, float(np.max(np.abs(np.array(got) - np.array(exp)))))
        assert ours.reason == ""
    assert worst < 1e-12  # source: scipy.stats.theilslopes


# ------------------------------------------------------------------------------------------------
# OLS slope
# ------------------------------------------------------------------------------------------------


def test_ols_slope_matches_scipy_linregress():
    rng = np.random.default_rng(3)
    for _ in range(100):
        n = int(rng.integers(3, 30))
        x, y = _random_series(rng, n, spacing="unequal")
        ours = ols_slope(x, y)
        ref = stats.linregress(x, y)  # source: scipy.stats.linregress
        assert ours.ols_slope == pytest.approx(ref.slope, rel=1e-10, abs=1e-12)
        assert ours.ols_intercept == pytest.approx(ref.intercept, rel=1e-10, abs=1e-10)
        assert ours.ols_slope_se == pytest.approx(ref.stderr, rel=1e-10)
        assert ours.ols_slope_p_value == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-15)


# ------------------------------------------------------------------------------------------------
# Mann-Kendall
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("ties", [False, True])
def test_mann_kendall_tau_b_matches_scipy_kendalltau(ties):
    # Our S uses sign(session_j - session_i) * sign(y_j - y_i), so tau-b = S/sqrt((n0-n1)(n0-n2))
    # is exactly scipy's default (variant='b'); tau-a = S/n0 is compared through that identity.
    rng = np.random.default_rng(5)
    for _ in range(200):
        n = int(rng.integers(3, 30))
        x, y = _random_series(rng, n, ties)
        if np.unique(y).size < 2:
            continue
        mk = mann_kendall(x, y)
        ref = stats.kendalltau(x, y)  # source: scipy.stats.kendalltau (tau-b)
        assert mk.mann_kendall_tau_b == pytest.approx(ref.statistic, abs=1e-12)
        n0 = n * (n - 1) / 2
        _, cnt = np.unique(y, return_counts=True)
        n1 = float(np.sum(cnt * (cnt - 1) / 2))
        # tau-a = tau-b * sqrt((n0 - n1)(n0 - n2))/n0 with n2 = 0 (distinct sessions); definition of tau-a/tau-b
        assert mk.mann_kendall_tau_a == pytest.approx(ref.statistic * math.sqrt((n0 - n1) * n0) / n0, abs=1e-12)
        if not ties:
            # without ties tau-c = tau-a (m = n); source: scipy.stats.kendalltau(variant='c')
            assert mk.mann_kendall_tau_a == pytest.approx(stats.kendalltau(x, y, variant="c").statistic, abs=1e-12)


@pytest.mark.parametrize("ties", [False, True])
def test_mann_kendall_variance_matches_scipy_asymptotic_p(ties):
    # Without the continuity correction, Z = S/sqrt(Var(S)) is the statistic of scipy's asymptotic
    # Kendall test (its extra x-tie terms vanish for distinct sessions).
    rng = np.random.default_rng(6)
    for _ in range(200):
        n = int(rng.integers(4, 30))
        x, y = _random_series(rng, n, ties)
        if np.unique(y).size < 2:
            continue
        mk = mann_kendall(x, y, continuity=False)
        ref = stats.kendalltau(x, y, method="asymptotic")  # source: scipy.stats.kendalltau asymptotic
        assert mk.mann_kendall_p_value == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-14)


def test_mann_kendall_exact_matches_scipy_exact():
    rng = np.random.default_rng(8)
    for _ in range(60):
        n = int(rng.integers(3, 20))
        x = np.arange(n, dtype=float)
        y = rng.normal(size=n)
        mk = mann_kendall(x, y)
        ref = stats.kendalltau(x, y, method="exact")  # source: scipy.stats.kendalltau exact
        assert mk.mann_kendall_p_value_exact == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-14)


def test_mann_kendall_exact_tail_gilbert_table():
    # source: Gilbert (1987), Statistical Methods for Environmental Pollution Monitoring,
    # Table A18 (probabilities of S for the Mann-Kendall test, n <= 10), from memory:
    # n = 4, S = 4 -> 0.167; n = 5, S = 10 -> 0.008 (only the identity ordering: 1/120).
    # Arithmetic: of the 4! = 24 orderings, S = 6 - 2*(inversions); S >= 4 needs at most one
    # inversion: 1 + 3 = 4 orderings -> 4/24 = 0.1667.
    assert mann_kendall_exact_sf(4, 4) == pytest.approx(4 / 24, abs=1e-12)
    assert round(mann_kendall_exact_sf(4, 4), 3) == 0.167
    assert round(mann_kendall_exact_sf(10, 5), 3) == 0.008
    # a 4-point series with S = 4, e.g. 10, 15, 14, 20: pairs 10<15,10<14,10<20 (+3),
    # 15>14 (-1), 15<20 (+1), 14<20 (+1) -> S = 4; the two-sided exact p is 2 * 0.1667.
    mk = mann_kendall([1, 2, 3, 4], [10, 15, 14, 20])
    assert mk.mann_kendall_s == 4
    assert mk.mann_kendall_p_value_exact == pytest.approx(2 * 4 / 24)


def test_mann_kendall_worked_example_with_tie_and_continuity_correction():
    # source: "A Mann-Kendall example (by hand)", College of the Holy Cross course notes,
    # https://mathcs.holycross.edu/~little/Montserrat/MannKendallByHand.txt (procedure of Gilbert 1987).
    y = [12.9, 14.8, 13.2, 15.7, 13.8, 15.6, 12.9, 11.0, 17.3, 15.9, 19.0, 18.3, 20.1, 21.7]
    x = np.arange(1, 15)
    # 91 pairs: 72 increases, 18 decreases, 1 tie (12.9, 12.9) -> S = 72 - 18 = 54
    # Var(S) = 14*13*33/18 - 2*1*9/18 = 333.667 - 1 = 332.667   (one tie group of size 2)
    # Z = (S - 1)/sqrt(Var) = 53/18.2392 = 2.9058
    mk = mann_kendall(x, y)
    assert mk.mann_kendall_s == 54
    assert mk.mann_kendall_var_s == pytest.approx(14 * 13 * 33 / 18 - 2 * 1 * 9 / 18)
    assert mk.mann_kendall_z == pytest.approx(2.9058, abs=5e-5)
    # the notes quote the one-sided p ~ .0018; ours is two-sided
    assert mk.mann_kendall_p_value / 2 == pytest.approx(0.0018, abs=5e-5)
    assert math.isnan(mk.mann_kendall_p_value_exact)  # ties -> no exact p


# ------------------------------------------------------------------------------------------------
# Hamed-Rao lag-1 correction
# ------------------------------------------------------------------------------------------------


def test_hamed_rao_lag1_factor_follows_published_formula():
    # Hamed & Rao (1998): n/n*_s = 1 + 2/(n(n-1)(n-2)) * sum_i (n-i)(n-i-1)(n-i-2) rho_s(i);
    # the lag-1 term is evaluated here with rho_s(1) from statsmodels' acf of the ranks of the
    # Sen-detrended series (source: statsmodels.tsa.stattools.acf), unscreened.
    rng = np.random.default_rng(21)
    for _ in range(50):
        n = int(rng.integers(5, 30))
        x, y = _random_series(rng, n)
        slope = stats.theilslopes(y, x).slope  # source: scipy.stats.theilslopes
        r1 = acf(stats.rankdata(y - slope * x), nlags=1, fft=False)[1]
        factor = 1 + 2 / (n * (n - 1) * (n - 2)) * (n - 1) * (n - 2) * (n - 3) * r1
        hr = mann_kendall_hamed_rao_lag1(x, y, screen=False)
        mk = mann_kendall(x, y)
        if factor <= 0:
            assert math.isnan(hr.mann_kendall_hamed_rao_lag1_p_value)
            continue
        assert hr.hamed_rao_lag1_rank_autocorrelation == pytest.approx(r1, abs=1e-12)
        assert hr.hamed_rao_lag1_correction_factor == pytest.approx(factor, rel=1e-12)
        assert hr.mann_kendall_hamed_rao_lag1_var_s == pytest.approx(mk.mann_kendall_var_s * factor, rel=1e-12)
        z = (mk.mann_kendall_s - np.sign(mk.mann_kendall_s)) / math.sqrt(mk.mann_kendall_var_s * factor)
        assert hr.mann_kendall_hamed_rao_lag1_p_value == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-9)


def test_hamed_rao_lag1_screening_bound():
    # Hamed & Rao use only significant rank autocorrelations; bound z_0.975/sqrt(n) (common practice)
    rng = np.random.default_rng(22)
    seen = {True: 0, False: 0}
    for _ in range(100):
        x, y = _random_series(rng, 15)
        hr = mann_kendall_hamed_rao_lag1(x, y)
        small = abs(hr.hamed_rao_lag1_rank_autocorrelation) <= 1.959963984540054 / math.sqrt(15)
        assert hr.hamed_rao_lag1_screened == small
        seen[small] += 1
        if small:
            assert hr.hamed_rao_lag1_correction_factor == 1.0
            assert hr.mann_kendall_hamed_rao_lag1_p_value == pytest.approx(mann_kendall(x, y).mann_kendall_p_value)
    assert seen[True] and seen[False]


@pytest.mark.slow
def test_hamed_rao_lag1_reduces_false_trend_rate_under_ar1():
    # Monte Carlo (600 AR(1) series, phi = 0.6, n = 30, no trend): the naive Mann-Kendall test
    # over-rejects; the lag-1 corrected test rejects less often. Known behaviour of variance
    # corrections (Hamed & Rao 1998); the exact rates are our own Monte Carlo.
    rng = np.random.default_rng(2024)
    n, reps, phi = 30, 600, 0.6
    x = np.arange(n, dtype=float)
    naive = corrected = 0
    for _ in range(reps):
        e = rng.normal(size=n + 30)
        y = np.empty_like(e)
        y[0] = e[0]
        for t in range(1, e.size):
            y[t] = phi * y[t - 1] + e[t]
        y = y[30:]
        naive += mann_kendall(x, y).mann_kendall_p_value < 0.05
        corrected += mann_kendall_hamed_rao_lag1(x, y).mann_kendall_hamed_rao_lag1_p_value < 0.05
    assert naive / reps > 0.15  # well above the nominal 0.05
    assert corrected < naive
    assert corrected / reps < naive / reps - 0.04


# ------------------------------------------------------------------------------------------------
# Therapeutic-direction flag
# ------------------------------------------------------------------------------------------------


def test_therapeutic_flag_rule():
    x = np.arange(1, 9, dtype=float)
    up = np.array([1, 2, 2.5, 4, 5, 5.5, 7, 8])  # S = 28, p < 0.05
    assert baseline_trend(x, up, "increase").moves_in_therapeutic_direction == "yes"
    assert baseline_trend(x, up, "decrease").moves_in_therapeutic_direction == "no"
    assert baseline_trend(x, -up, "decrease").moves_in_therapeutic_direction == "yes"
    assert baseline_trend(x, up, None).moves_in_therapeutic_direction == "unknown"
    flat = np.array([3, 5, 4, 3, 5, 4, 3, 5.0])  # slope in the desired direction but not significant
    bt = baseline_trend(x, flat, "increase")
    assert bt.mann_kendall_p_value >= 0.05
    assert bt.moves_in_therapeutic_direction == "no"
    # one point: slope undefined -> unknown
    assert baseline_trend([1.0], [2.0], "increase").moves_in_therapeutic_direction == "unknown"


def test_baseline_trends_rows_per_phase_and_pooled():
    session = np.arange(1, 17, dtype=float)
    outcome = np.array([1, 2, 3, 4, 9, 9, 8, 9, 2, 3, 4, 5, 9, 8, 9, 9], dtype=float)
    phase = np.repeat([1, 2, 3, 4], 4)
    cond = np.repeat(["baseline", "treatment", "baseline", "treatment"], 4)
    df = baseline_trends(session, outcome, phase, cond, "increase")
    assert list(df["scope"]) == ["phase", "phase", "all_baseline"]
    assert list(df["phase_index"].astype("object")[:2]) == [1, 3]
    pooled = baseline_trend(session[cond == "baseline"], outcome[cond == "baseline"], "increase")
    assert df.iloc[2]["mann_kendall_s"] == pooled.mann_kendall_s
    assert df.iloc[0]["mann_kendall_s"] == 6  # 1,2,3,4: all 6 pairs increase (hand count)
    none = baseline_trends(session, outcome, phase, np.repeat("treatment", 16), "increase")
    assert list(none["scope"]) == ["all_baseline"]
    assert R.EMPTY_PHASE in none.iloc[0]["reason"]


# ------------------------------------------------------------------------------------------------
# Degenerate input: NaN + reason, never an exception
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "x, y, expect",
    [
        ([], [], R.TOO_FEW_POINTS),
        ([1.0], [3.0], R.TOO_FEW_POINTS),
        ([1.0, 2.0], [3.0, 4.0], R.NO_RESIDUAL_DF),
        ([1.0, 2.0, 3.0, 4.0], [5.0, 5.0, 5.0, 5.0], R.CONSTANT_SERIES),
        ([2.0, 2.0, 2.0], [1.0, 2.0, 3.0], R.SINGULAR_DESIGN),
        ([1.0, 2.0, 3.0], [1.0, np.nan, 3.0], R.NON_FINITE_INPUT),
        ([1.0, 2.0, 3.0, 4.0], [1.0, 2.0, 3.0, 4.0], R.ZERO_RESIDUAL_VARIANCE),
    ],
)
def test_degenerate_inputs_give_reasons(x, y, expect):
    bt = baseline_trend(x, y, "increase")
    assert expect in bt.reason.split(";")
    assert bt.moves_in_therapeutic_direction in {"yes", "no", "unknown"}


def test_constant_series_values():
    bt = baseline_trend([1, 2, 3, 4], [5, 5, 5, 5], "increase")
    assert bt.ols_slope == 0.0 and math.isnan(bt.ols_slope_p_value)
    assert bt.theil_sen_slope == 0.0
    assert bt.mann_kendall_s == 0 and bt.mann_kendall_var_s == 0
    assert math.isnan(bt.mann_kendall_p_value)
    assert bt.moves_in_therapeutic_direction == "no"
    ref = stats.theilslopes([5, 5, 5, 5], [1, 2, 3, 4])  # source: scipy.stats.theilslopes
    assert (bt.theil_sen_slope_low, bt.theil_sen_slope_high) == (ref.low_slope, ref.high_slope)


def test_two_points_defined_where_possible():
    bt = baseline_trend([1, 2], [3, 5], "increase")
    assert bt.ols_slope == 2.0 and math.isnan(bt.ols_slope_p_value)
    assert bt.theil_sen_slope == 2.0
    assert bt.mann_kendall_s == 1 and bt.mann_kendall_var_s == pytest.approx(2 * 1 * 9 / 18)


# ------------------------------------------------------------------------------------------------
# Sessions and outcomes near the float limits: finite, or NaN with the component's reason
# ------------------------------------------------------------------------------------------------

BIG = sys.float_info.max
X6 = np.arange(1.0, 7.0)
Y6 = np.array([3.0, 4.0, 2.0, 5.0, 3.5, 4.5])
EXTREME_SESSIONS = {
    "ordinary": X6,
    "offset_1e15": 1e15 + X6,
    "spaced_1e200": 1e200 * X6,
    "spaced_1e-300": 1e-300 * X6,
    "near_max": BIG * np.linspace(0.5, 1.0, 6),
}
EXTREME_OUTCOMES = {
    "ordinary": Y6,
    "huge": Y6 * 1e299,
    "huge_negative": -Y6 * 1e299,
    "largest_double": np.array([BIG, -BIG, -BIG, BIG, -BIG, -BIG]),
    "mixed_scales": np.array([1e-300, 1e300, 0.0, -1e300, 1.0, 1e-300]),
    "tiny": Y6 * 1e-300,
    "constant_huge": np.full(6, 1e300),
}
# fields that are NaN by definition in some cases (exact p-value: only without ties)
NOT_APPLICABLE = {"mann_kendall_p_value_exact"}


def _component_reason(bt, name: str) -> str:
    if name.startswith("ols_"):
        return bt.ols_reason
    if name.startswith("theil_sen_"):
        return bt.theil_sen_reason
    if "hamed_rao" in name:
        return bt.hamed_rao_reason
    return bt.mann_kendall_reason


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("sessions", list(EXTREME_SESSIONS))
@pytest.mark.parametrize("outcomes", list(EXTREME_OUTCOMES))
def test_baseline_trend_near_float_limits_finite_or_nan_with_reason(sessions, outcomes):
    # the house rule (DEVELOPERS.md: degenerate input gives NaN plus a reason code, never raises)
    bt = baseline_trend(EXTREME_SESSIONS[sessions], EXTREME_OUTCOMES[outcomes], "increase")
    for f in fields(bt):
        v = getattr(bt, f.name)
        if not isinstance(v, float) or f.name in NOT_APPLICABLE:
            continue
        assert not math.isinf(v), f"{f.name} infinite"
        assert not math.isnan(v) or _component_reason(bt, f.name), f"{f.name} NaN without a reason"


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("kx, ky", [(0, 990), (990, 0), (-1000, 0), (0, -1000), (-990, -1000), (1000, 1000)])
def test_trend_scales_exactly_with_powers_of_two(kx, ky):
    # exact scaling of sessions by 2**kx and outcomes by 2**ky: slopes scale by 2**(ky - kx),
    # intercepts by 2**ky; t, p-values, Mann-Kendall and Hamed-Rao are scale-free (by definition)
    ref = baseline_trend(X6, Y6, "increase")
    bt = baseline_trend(X6 * 2.0**kx, Y6 * 2.0**ky, "increase")
    assert bt.ols_slope == ref.ols_slope * 2.0 ** (ky - kx)
    assert bt.ols_intercept == ref.ols_intercept * 2.0**ky
    assert bt.ols_slope_se == ref.ols_slope_se * 2.0 ** (ky - kx)
    assert bt.ols_slope_p_value == ref.ols_slope_p_value
    assert bt.theil_sen_slope == ref.theil_sen_slope * 2.0 ** (ky - kx)
    assert (bt.theil_sen_slope_low, bt.theil_sen_slope_high) == (
        ref.theil_sen_slope_low * 2.0 ** (ky - kx), ref.theil_sen_slope_high * 2.0 ** (ky - kx))
    assert bt.mann_kendall_p_value == ref.mann_kendall_p_value
    assert bt.mann_kendall_hamed_rao_lag1_p_value == ref.mann_kendall_hamed_rao_lag1_p_value
    assert bt.reason == ref.reason == R.OK


@pytest.mark.filterwarnings("error")
def test_slopes_beyond_the_largest_double_are_nan_with_numerical_failure():
    # sessions 1e-300 apart, outcomes about 1e300: slopes about 1e600 are not representable
    x, y = 1e-300 * X6, Y6 * 1e299
    ols = ols_slope(x, y)
    assert math.isnan(ols.ols_slope) and ols.reason == R.NUMERICAL_FAILURE
    ref = ols_slope(X6, Y6)
    assert ols.ols_slope_t == pytest.approx(ref.ols_slope_t, rel=1e-12)  # scale-free, still given
    assert ols.ols_slope_p_value == pytest.approx(ref.ols_slope_p_value, rel=1e-12)
    ts = theil_sen_slope(x, y)
    assert math.isnan(ts.theil_sen_slope) and math.isnan(ts.theil_sen_slope_low) and ts.reason == R.NUMERICAL_FAILURE
    hr = mann_kendall_hamed_rao_lag1(x, y)
    assert hr.reason == R.OK and hr.mann_kendall_hamed_rao_lag1_p_value == mann_kendall_hamed_rao_lag1(
        X6, Y6).mann_kendall_hamed_rao_lag1_p_value  # Sen-detrended ranks do not depend on the scale
    bt = baseline_trend(x, y, "increase")
    assert bt.moves_in_therapeutic_direction == "unknown"  # rule: unknown when the slope is undefined
    # ordinary outcomes on sessions 1e-300 apart: a representable slope (was lost to underflow)
    ols = ols_slope(x, Y6)
    assert ols.ols_slope == pytest.approx(ref.ols_slope * 1e300, rel=1e-12) and ols.reason == R.OK
    # sessions near the largest double (their mean is beyond it unscaled)
    ols = ols_slope(EXTREME_SESSIONS["near_max"], Y6)
    assert np.isfinite(ols.ols_slope) and np.isfinite(ols.ols_slope_p_value) and ols.reason == R.OK
