"""Tests for audit.durbin_watson: statistic, exact p-values, bounds, zones, power, batches."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from statsmodels.stats.stattools import durbin_watson as sm_durbin_watson

from audit import reasons as R
from audit.durbin_watson import (
    ZONES,
    critical_bounds,
    dw_exact_critical_values,
    dw_null_eigenvalues,
    dw_power,
    dw_power_grid,
    dw_pvalues_batch,
    dw_statistic,
    dw_test,
)
from audit.quadform import prob_quadform_below_zero_pan, prob_quadform_below_zero_reference

# ----------------------------------------------------------------------------- designs


def trend_design(n: int) -> np.ndarray:
    t = np.arange(n, dtype=float)
    return np.column_stack([np.ones(n), t])


def piecewise_design(n: int, starts: list[int]) -> np.ndarray:
    """Intercept, time, and a level and slope change at each phase start (Huitema-McKean)."""
    t = np.arange(n, dtype=float)
    cols = [np.ones(n), t]
    for s in starts:
        step = (t >= s).astype(float)
        cols += [step, (t - s) * step]
    return np.column_stack(cols)


DESIGNS = {
    "trend_n8": trend_design(8),
    "trend_n15": trend_design(15),
    "trend_n40": trend_design(40),
    "ab_n12": piecewise_design(12, [6]),
    "ab_n20": piecewise_design(20, [8]),
    "aba_n24": piecewise_design(24, [8, 16]),
    "abab_n40": piecewise_design(40, [10, 20, 30]),
}


def ols_residuals(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    return y - x @ np.linalg.lstsq(x, y, rcond=None)[0]


def residuals_with_statistic(x: np.ndarray, d: float) -> np.ndarray:
    """OLS residuals for design x whose Durbin-Watson statistic is exactly d.

    e = cos(a) N v_min + sin(a) N v_max with v the extreme eigenvectors of N'AN gives
    d = cos^2(a) mu_min + sin^2(a) mu_max (orthonormal eigenvectors of MAM).
    """
    n, k = x.shape
    u = np.linalg.svd(x, full_matrices=True)[0][:, k:]
    dn = np.diff(u, axis=0)
    mu, vec = np.linalg.eigh(dn.T @ dn)
    w = (d - mu[0]) / (mu[-1] - mu[0])
    return u @ (math.sqrt(1 - w) * vec[:, 0] + math.sqrt(w) * vec[:, -1])


# ----------------------------------------------------------------------------- statistic


def test_statistic_matches_statsmodels():
    rng = np.random.default_rng(1)
    for name, x in DESIGNS.items():
        e = ols_residuals(rng.normal(size=x.shape[0]).cumsum(), x)
        # source: statsmodels.stats.stattools.durbin_watson
        assert dw_statistic(e) == pytest.approx(sm_durbin_watson(e), rel=1e-13, abs=1e-14)
        assert dw_test(e, x).statistic == pytest.approx(sm_durbin_watson(e), rel=1e-13)


def test_null_eigenvalues_are_those_of_mam():
    # source: definition, eigenvalues of M A M by numpy.linalg.eigvalsh in n dimensions
    for x in DESIGNS.values():
        n, k = x.shape
        m = np.eye(n) - x @ np.linalg.pinv(x)
        a = 2 * np.eye(n) - np.eye(n, k=1) - np.eye(n, k=-1)
        a[0, 0] = a[-1, -1] = 1
        full = np.sort(np.linalg.eigvalsh(m @ a @ m))[k:]
        assert np.max(np.abs(dw_null_eigenvalues(x) - full)) < 1e-10


# ----------------------------------------------------------------------------- bounds

# Savin & White (1977) / Durbin & Watson (1951) tables, (n, k') -> (d_L, d_U).
# k' = 1 at 0.05: public copy of the table in the MATLAB file dwatson.m (L. Kanzler, 1998,
# "as published in Durbin & Watson (1951) and Savin & White (1977)").
SW_005_K1_PUBLIC = {
    (6, 1): (0.610, 1.400), (8, 1): (0.763, 1.332), (10, 1): (0.879, 1.320),
    (15, 1): (1.077, 1.361), (20, 1): (1.201, 1.411), (30, 1): (1.352, 1.489),
    (40, 1): (1.442, 1.544), (50, 1): (1.503, 1.585), (100, 1): (1.654, 1.694),
}
# k' = 2..5 at 0.05: Savin & White (1977) table, from memory.
SW_005_MEMORY = {
    (15, 2): (0.946, 1.543), (20, 2): (1.100, 1.537), (30, 2): (1.284, 1.567),
    (50, 2): (1.462, 1.628), (10, 3): (0.525, 2.016), (20, 3): (0.998, 1.676),
    (40, 3): (1.338, 1.659), (15, 4): (0.685, 1.977), (25, 4): (1.038, 1.767),
    (100, 4): (1.592, 1.758), (20, 5): (0.792, 1.991), (30, 5): (1.071, 1.833),
    (100, 5): (1.571, 1.780),
}
# 0.01 level: Savin & White (1977) table, from memory.
SW_001_MEMORY = {
    (6, 1): (0.390, 1.142), (15, 1): (0.811, 1.070), (20, 1): (0.952, 1.147),
    (30, 1): (1.133, 1.263), (100, 1): (1.522, 1.562), (10, 2): (0.466, 1.333),
    (15, 2): (0.700, 1.252), (50, 2): (1.285, 1.445), (20, 3): (0.773, 1.411),
    (50, 3): (1.245, 1.491), (15, 4): (0.488, 1.704), (40, 4): (1.098, 1.518),
    (10, 5): (0.150, 2.690), (20, 5): (0.598, 1.737), (100, 5): (1.441, 1.647),
}
# 0.01 level, k' = 1, two decimals: Durbin & Watson (1951) via dwatson.m (public copy).
DW51_001_K1_PUBLIC = {
    (15, 1): (0.81, 1.07), (20, 1): (0.95, 1.15), (30, 1): (1.13, 1.26),
    (40, 1): (1.25, 1.34), (50, 1): (1.32, 1.40), (100, 1): (1.52, 1.56),
}


@pytest.mark.parametrize("key,expected", sorted(SW_005_K1_PUBLIC.items()))
def test_bounds_005_k1_published_copy(key, expected):
    # source: Savin & White (1977) k'=1 column, public copy in dwatson.m (Kanzler 1998)
    assert np.allclose(critical_bounds(*key, alpha=0.05), expected, atol=0.002, rtol=0)


@pytest.mark.parametrize("key,expected", sorted(SW_005_MEMORY.items()))
def test_bounds_005_savin_white_from_memory(key, expected):
    # source: Savin & White (1977) Table (alpha 0.05), from memory
    assert np.allclose(critical_bounds(*key, alpha=0.05), expected, atol=0.002, rtol=0)


@pytest.mark.parametrize("key,expected", sorted(SW_001_MEMORY.items()))
def test_bounds_001_savin_white_from_memory(key, expected):
    # source: Savin & White (1977) Table (alpha 0.01), from memory
    assert np.allclose(critical_bounds(*key, alpha=0.01), expected, atol=0.002, rtol=0)


@pytest.mark.parametrize("key,expected", sorted(DW51_001_K1_PUBLIC.items()))
def test_bounds_001_k1_two_decimals_published_copy(key, expected):
    # source: Durbin & Watson (1951) 1% table, k'=1, two decimals, copy in dwatson.m
    assert np.allclose(critical_bounds(*key, alpha=0.01), expected, atol=0.005 + 1e-9, rtol=0)


def test_bounds_contain_the_exact_critical_value_of_any_design():
    # source: Durbin & Watson (1950) bounds theorem: d_L <= exact critical value <= d_U
    rng = np.random.default_rng(5)
    for _ in range(12):
        n = int(rng.integers(8, 41))
        kp = int(rng.integers(1, 5))
        x = np.column_stack([np.ones(n), rng.normal(size=(n, kp)).cumsum(axis=0)])
        for alpha in (0.05, 0.01):
            lo, hi = critical_bounds(n, kp, alpha)
            c = dw_exact_critical_values(x, alpha)[0]
            assert lo - 1e-9 <= c <= hi + 1e-9
        # No intercept: the bounds for k = k' columns (Farebrother 1980) still bracket.
        xn = rng.normal(size=(n, kp)).cumsum(axis=0)
        lo, hi = critical_bounds(n, kp, 0.05, intercept=False)
        c = dw_exact_critical_values(xn, 0.05)[0]
        assert lo - 1e-9 <= c <= hi + 1e-9


def test_bounds_for_k_prime_zero_equal_the_exact_value():
    # With only the intercept both bounding distributions are the exact null (d_L = d_U).
    lo, hi = critical_bounds(12, 0, 0.05)
    assert abs(lo - hi) < 1e-12
    assert abs(lo - dw_exact_critical_values(np.ones((12, 1)), 0.05)[0]) < 1e-10


def test_bounds_undefined_return_nan():
    assert all(math.isnan(v) for v in critical_bounds(3, 1))  # n - k = 1
    assert all(math.isnan(v) for v in critical_bounds(10, 2, alpha=1.5))


# ----------------------------------------------------------------------------- zones


@pytest.mark.parametrize("d,zone", [(0.6, "positive"), (1.05, "positive"),
                                    (1.2, "inconclusive_positive"), (2.0, "none"),
                                    (2.8, "inconclusive_negative"), (2.95, "negative"),
                                    (3.4, "negative")])
def test_zone_one_predictor_fifteen_points(d, zone):
    # common practice: one predictor, ~15 points: d below about 1.08 flags positive,
    # above about 2.92 negative; between 1.08-1.36 (and 2.64-2.92) inconclusive.
    x = trend_design(15)
    res = dw_test(residuals_with_statistic(x, d), x)
    assert res.statistic == pytest.approx(d, abs=1e-10)
    assert res.zone == zone and res.zone in ZONES
    assert res.n_regressors == 1 and res.reason == R.OK


def test_zone_agrees_with_exact_test_outside_the_inconclusive_band():
    # source: Durbin & Watson (1950) bounds theorem: d < d_L implies p_positive < alpha,
    # d > d_U implies p_positive > alpha (and the same with 4 - d).
    x = DESIGNS["ab_n20"]
    for d in np.linspace(0.4, 3.6, 33):
        res = dw_test(residuals_with_statistic(x, d), x)
        if res.zone == "positive":
            assert res.p_positive < res.alpha
        if res.zone == "negative":
            assert res.p_negative < res.alpha
        if res.zone == "none":
            assert res.p_positive > res.alpha and res.p_negative > res.alpha


# ----------------------------------------------------------------------------- p-values


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_pvalues_agree_with_second_method(name):
    x = DESIGNS[name]
    mu = dw_null_eigenvalues(x)
    worst = 0.0
    for d in np.quantile(mu, [0.1, 0.3, 0.5, 0.7, 0.9]):
        res = dw_test(residuals_with_statistic(x, d), x, exact_critical_values=False)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = prob_quadform_below_zero_reference(mu - d)  # source: scipy.integrate.quad
            pan = prob_quadform_below_zero_pan(mu - d)  # source: Pan (1968) formula
        worst = max(worst, abs(res.p_positive - ref), abs(res.p_positive - pan))
        assert abs(res.p_positive + res.p_negative - 1) < 1e-15
    print(f"{name}: max abs difference from quad / Pan = {worst:.2e}")
    assert worst < 1e-9


@pytest.mark.parametrize("name", ["trend_n8", "ab_n12", "aba_n24", "abab_n40"])
def test_pvalues_agree_with_monte_carlo(name):
    x = DESIGNS[name]
    mu = dw_null_eigenvalues(x)
    rng = np.random.default_rng(sorted(DESIGNS).index(name) + 100)
    w2 = rng.standard_normal((200_000, mu.size)) ** 2
    d_sim = (w2 @ mu) / w2.sum(axis=1)
    # Statistics spread over the null distribution (from an independent pilot draw).
    pilot = rng.standard_normal((5_000, mu.size)) ** 2
    stats = np.quantile((pilot @ mu) / pilot.sum(axis=1), [0.02, 0.1, 0.5, 0.9, 0.98])
    p_pos, p_neg = dw_pvalues_batch(stats, x)
    for d, pp, pn in zip(stats, p_pos, p_neg):
        hits = (d_sim <= d).mean()
        se = math.sqrt(max(hits * (1 - hits), 1e-12) / d_sim.size)
        assert abs(pp - hits) < 4 * se  # source: Monte Carlo, 200,000 draws, 4 SE
        assert abs(pn - (d_sim >= d).mean()) < 4 * se


def test_exact_critical_values_have_size_alpha_by_monte_carlo():
    x = DESIGNS["aba_n24"]
    mu = dw_null_eigenvalues(x)
    c_low, c_high = dw_exact_critical_values(x, 0.05)
    rng = np.random.default_rng(9)
    w2 = rng.standard_normal((200_000, mu.size)) ** 2
    d_sim = (w2 @ mu) / w2.sum(axis=1)
    se = math.sqrt(0.05 * 0.95 / d_sim.size)
    assert abs((d_sim < c_low).mean() - 0.05) < 4 * se  # source: Monte Carlo, 4 SE
    assert abs((d_sim > c_high).mean() - 0.05) < 4 * se


# ----------------------------------------------------------------------------- batch paths


def test_per_case_and_batch_pvalues_agree():
    rng = np.random.default_rng(2)
    names = sorted(DESIGNS)
    cases = []
    for name in names:
        x = DESIGNS[name]
        for _ in range(3):
            e = ols_residuals(rng.normal(size=x.shape[0]).cumsum() * rng.uniform(0, 1)
                              + rng.normal(size=x.shape[0]), x)
            cases.append((name, e, dw_test(e, x, exact_critical_values=False)))
    # Shared design: design argument and null_eigenvalues argument.
    for name in names:
        sub = [c for c in cases if c[0] == name]
        stats = np.array([c[2].statistic for c in sub])
        pp, pn = dw_pvalues_batch(stats, DESIGNS[name])
        pp2, pn2 = dw_pvalues_batch(stats, null_eigenvalues=dw_null_eigenvalues(DESIGNS[name]))
        for (_, _, res), a, b, a2 in zip(sub, pp, pn, pp2):
            assert abs(res.p_positive - a) < 1e-10 and abs(res.p_negative - b) < 1e-10
            assert abs(a - a2) < 1e-15
    # One design per case: NaN-padded eigenvalue rows.
    eigs = [dw_null_eigenvalues(DESIGNS[c[0]]) for c in cases]
    width = max(len(v) for v in eigs)
    padded = np.full((len(cases), width), np.nan)
    for i, v in enumerate(eigs):
        padded[i, : len(v)] = v
    pp, pn = dw_pvalues_batch(np.array([c[2].statistic for c in cases]), null_eigenvalues=padded)
    assert np.max(np.abs(pp - [c[2].p_positive for c in cases])) < 1e-10
    assert np.max(np.abs(pn - [c[2].p_negative for c in cases])) < 1e-10
    # Exact critical values: per case vs padded rows.
    lo, hi = dw_exact_critical_values(null_eigenvalues=padded, alpha=0.05)
    for i, c in enumerate(cases[::4]):
        ref = dw_test(c[1], DESIGNS[c[0]])
        assert abs(ref.critical_lower_exact - lo[4 * i]) < 1e-10
        assert abs(ref.critical_upper_exact - hi[4 * i]) < 1e-10


def test_power_per_case_and_grid_agree():
    rhos = np.array([-0.7, -0.3, -0.05, 0.0, 0.1, 0.4, 0.8])
    for name in ["trend_n15", "aba_n24"]:
        x = DESIGNS[name]
        grid = dw_power_grid(x, rhos, alpha=0.05)
        single = np.array([dw_power(x, r, alpha=0.05) for r in rhos])
        assert np.max(np.abs(grid - single)) < 1e-10
        assert grid[3] == 0.05
        # Power rises with |rho| on each side (more dependence, more rejections).
        assert np.all(np.diff(grid[4:]) > 0) and np.all(np.diff(grid[:3]) < 0)


@pytest.mark.parametrize("name,rho", [("trend_n15", 0.5), ("ab_n20", 0.3), ("aba_n24", -0.4)])
def test_power_agrees_with_ar1_simulation(name, rho):
    x = DESIGNS[name]
    n, k = x.shape
    power = dw_power(x, rho, alpha=0.05)
    c_low, c_high = dw_exact_critical_values(x, 0.05)
    rng = np.random.default_rng(31)
    reps = 200_000
    # Stationary AR(1) errors by the recursion e_t = rho e_{t-1} + sqrt(1 - rho^2) u_t.
    eps = np.empty((reps, n))
    eps[:, 0] = rng.standard_normal(reps)
    for t in range(1, n):
        eps[:, t] = rho * eps[:, t - 1] + math.sqrt(1 - rho * rho) * rng.standard_normal(reps)
    m = np.eye(n) - x @ np.linalg.pinv(x)
    e = eps @ m
    d_sim = (np.diff(e, axis=1) ** 2).sum(axis=1) / (e * e).sum(axis=1)
    hits = (d_sim < c_low).mean() if rho > 0 else (d_sim > c_high).mean()
    se = math.sqrt(hits * (1 - hits) / reps)
    assert abs(power - hits) < 4 * se  # source: Monte Carlo of AR(1) errors, 200,000 series


@pytest.mark.slow
def test_calibration_under_independent_errors():
    # source: Monte Carlo; the exact test has size alpha under iid normal errors.
    rng = np.random.default_rng(123)
    reps = 4000
    x = DESIGNS["aba_n24"]
    beta = np.array([5.0, 0.2, 1.0, -0.1, -1.0, 0.1])
    rej_pos = rej_neg = 0
    for _ in range(reps):
        y = x @ beta + rng.standard_normal(x.shape[0])
        res = dw_test(ols_residuals(y, x), x, exact_critical_values=False)
        rej_pos += res.p_positive < 0.05
        rej_neg += res.p_negative < 0.05
    se = math.sqrt(0.05 * 0.95 / reps)
    assert abs(rej_pos / reps - 0.05) < 4 * se
    assert abs(rej_neg / reps - 0.05) < 4 * se


# ----------------------------------------------------------------------------- degenerate


def test_degenerate_inputs_return_nan_with_reason():
    x = trend_design(10)
    e = ols_residuals(np.random.default_rng(0).normal(size=10), x)

    res = dw_test(np.zeros(10), x)
    assert res.reason == R.ZERO_RESIDUAL_VARIANCE and math.isnan(res.p_positive)
    res = dw_test(e * 1e-14, x, scale=5.0)
    assert res.reason == R.ZERO_RESIDUAL_VARIANCE

    bad = e.copy()
    bad[3] = np.nan
    res = dw_test(bad, x)
    assert res.reason == R.NON_FINITE_INPUT and math.isnan(res.statistic)
    xb = x.copy()
    xb[2, 1] = np.inf
    assert dw_test(e, xb).reason == R.NON_FINITE_INPUT

    singular = np.column_stack([x, 2 * x[:, 1]])
    res = dw_test(e, singular)
    assert res.reason == R.SINGULAR_DESIGN and math.isnan(res.p_positive) and res.zone == ""

    wide = piecewise_design(4, [2])  # n = 4, k = 4
    assert dw_test(np.array([1.0, -1.0, 0.5, 0.2]), wide).reason == R.NO_RESIDUAL_DF
    three = trend_design(3)  # n - k = 1: d is fixed by the design
    res = dw_test(ols_residuals(np.array([1.0, 3.0, 2.0]), three), three)
    assert res.reason == R.NO_RESIDUAL_DF and math.isnan(res.p_positive)

    assert math.isnan(dw_statistic([1.0])) and math.isnan(dw_statistic([0.0, 0.0]))
    assert math.isnan(dw_power(singular, 0.5)) and math.isnan(dw_power(x, 1.0))
    assert math.isnan(dw_power(x, np.nan))
    assert np.all(np.isnan(dw_power_grid(singular, [0.2, 0.5])))
    assert dw_null_eigenvalues(singular).size == 0
    pp, pn = dw_pvalues_batch([np.nan, 2.0], x)
    assert np.isnan(pp[0]) and np.isfinite(pp[1])
    pp, pn = dw_pvalues_batch([1.0, 2.0], singular)
    assert np.all(np.isnan(pp)) and np.all(np.isnan(pn))


def test_shape_mismatch_is_a_programming_error():
    with pytest.raises(ValueError):
        dw_test(np.ones(5), trend_design(6))
