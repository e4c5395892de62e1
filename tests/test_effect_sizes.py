"""Tests for audit.effect_sizes: non-overlap and parametric effect sizes, dependence adjustment."""

from __future__ import annotations

import itertools
import math
import sys
from dataclasses import fields

import numpy as np
import pytest
from scipy import special, stats

from audit import reasons as R
from audit.effect_sizes import (
    MeanDifferenceTest,
    StandardizedMeanDifference,
    bound_rho,
    case_effect_sizes,
    contrast_effect_sizes,
    effective_sample_size,
    hanley_mcneil_se,
    hedges_correction,
    log_response_ratio,
    mean_difference_test,
    nap,
    newcombe_nap_interval,
    phase_contrasts,
    pnd,
    standardized_mean_difference,
    tau_between_phases,
    tau_u,
    tau_u_permutation_variance,
)


def _pairs(rng, ties):
    na, nb = int(rng.integers(1, 12)), int(rng.integers(1, 12))
    a = rng.normal(size=na)
    b = rng.normal(0.8, size=nb)
    if ties:
        a, b = np.round(a * 2), np.round(b * 2)
    return a, b


# ------------------------------------------------------------------------------------------------
# PND
# ------------------------------------------------------------------------------------------------


def test_pnd_by_hand():
    # increase: baseline max 5; treatment 6, 7 beyond, 5 (tie) and 4 not -> 2/4 = 50 %
    r = pnd([3, 5, 4], [6, 5, 7, 4], "increase")
    assert r.pnd_percent == 50.0 and r.n_treatment_beyond == 2 and r.baseline_extreme == 5
    # decrease: baseline min 3; treatment points below 3: 2, 1 -> 2/4 = 50 %
    r = pnd([3, 5, 4], [2, 3, 1, 4], "decrease")
    assert r.pnd_percent == 50.0 and r.baseline_extreme == 3 and not r.direction_assumed
    r = pnd([3, 5, 4], [6, 5, 7, 4], None)
    assert r.direction_assumed and r.desired_direction == "increase" and r.pnd_percent == 50.0


# ------------------------------------------------------------------------------------------------
# NAP and Tau
# ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("ties", [False, True])
@pytest.mark.parametrize("direction", ["increase", "decrease", None])
def test_nap_equals_mann_whitney_u_over_pairs(ties, direction):
    rng = np.random.default_rng(1)
    worst = 0.0
    for _ in range(300):
        a, b = _pairs(rng, ties)
        r = nap(a, b, direction)
        # U of the improving sample: treatment for "increase", baseline for "decrease"
        first, second = (a, b) if direction == "decrease" else (b, a)
        u = stats.mannwhitneyu(first, second).statistic  # source: scipy.stats.mannwhitneyu
        worst = max(worst, abs(r.nap - u / (a.size * b.size)))
        t = tau_between_phases(a, b, direction)
        assert t.tau == pytest.approx(2 * r.nap - 1, abs=1e-12)  # Tau = 2 NAP - 1 (Parker & Vannest)
    assert worst < 1e-12


@pytest.mark.parametrize("ties", [False, True])
def test_tau_p_value_matches_scipy_mannwhitneyu_asymptotic(ties):
    rng = np.random.default_rng(2)
    worst = 0.0
    for _ in range(300):
        a, b = _pairs(rng, ties)
        if np.unique(np.concatenate([a, b])).size < 2:
            continue
        t = tau_between_phases(a, b, "increase")
        # source: scipy.stats.mannwhitneyu(method='asymptotic', use_continuity=True), tie-corrected
        ref = stats.mannwhitneyu(b, a, method="asymptotic", use_continuity=True).pvalue
        worst = max(worst, abs(t.p_value - ref))
    assert worst < 1e-12


def test_hanley_mcneil_se_published_example():
    # source: Hanley & McNeil (1982), Radiology 143:29-36, worked example (from memory):
    # A = 0.893 with 58 normal and 51 abnormal cases, SE = 0.032.
    # Q1 = 0.893/1.107 = 0.8067, Q2 = 2*0.893^2/1.893 = 0.8425, A^2 = 0.7974
    # SE^2 = [0.0956 + 50*(0.8067-0.7974) + 57*(0.8425-0.7974)] / (58*51) = 3.129/2958 = 0.001058
    se = hanley_mcneil_se(0.893, n_baseline=58, n_treatment=51)
    assert se == pytest.approx(0.0325, abs=5e-4)
    assert round(se, 3) == 0.032 or round(se, 3) == 0.033


@pytest.mark.slow
def test_nap_intervals_monte_carlo():
    # Monte Carlo (1500 draws per setting): Newcombe's score interval covers the true AUC
    # P(B > A) = Phi(d/sqrt 2) near 95 %; Hanley-McNeil SE is close to the empirical SD.
    rng = np.random.default_rng(9)
    for na, nb, d in [(5, 5, 1.0), (8, 10, 0.5)]:
        true = stats.norm.cdf(d / math.sqrt(2))
        cover, vals, ses = 0, [], []
        for _ in range(1500):
            r = nap(rng.normal(size=na), rng.normal(d, size=nb))
            cover += r.nap_ci_low_newcombe <= true <= r.nap_ci_high_newcombe
            vals.append(r.nap)
            ses.append(r.nap_se_hanley_mcneil)
        assert 0.93 <= cover / 1500 <= 0.985
        assert np.mean(ses) == pytest.approx(np.std(vals), rel=0.15)


def test_newcombe_interval_solves_score_equation_and_stays_in_bounds():
    # definition check (Newcombe 2006 method 5): endpoints solve (A - t)^2 = z^2 V(t)
    z = stats.norm.ppf(0.975)
    for auc, m, n in [(0.7, 5, 6), (1.0, 4, 4), (0.0, 3, 7), (0.5, 1, 1)]:
        lo, hi = newcombe_nap_interval(auc, m, n)
        nstar = (m + n) / 2 - 1

        def v(t):
            return t * (1 - t) / (m * n) * (1 + nstar * ((1 - t) / (2 - t) + t / (1 + t)))

        assert 0 <= lo <= auc <= hi <= 1
        for t in (lo, hi):
            if t not in (auc,):
                assert (auc - t) ** 2 == pytest.approx(z**2 * v(t), abs=1e-9)


# ------------------------------------------------------------------------------------------------
# Tau-U
# ------------------------------------------------------------------------------------------------


def test_tau_u_by_hand():
    a = [3, 1, 2]
    b = [4, 2, 5]
    # A vs B pairs (b - a): b=4: +,+,+ (3); b=2: vs 3 -, vs 1 +, vs 2 tie (0); b=5: +,+,+ (3)
    #   P = 7, N = 1 -> S_AvsB = 6
    # baseline trend in time order 3,1,2: (3,1) -, (3,2) -, (1,2) + -> S_trendA = -1
    # Tau-U = (6 - (-1)) / (3*3) = 7/9 = 0.7778
    # Var(S) = nA nB (nA + nB + 1)/3 = 3*3*7/3 = 21; Z = 7/sqrt(21) = 1.5275; p = 2(1 - Phi(1.5275)) = 0.1266
    r = tau_u(a, b, "increase")
    assert r.s_a_vs_b == 6 and r.s_trend_a == -1
    assert r.tau_u == pytest.approx(7 / 9)
    assert r.var_s == 21
    assert r.z == pytest.approx(1.5275, abs=1e-4)
    assert r.p_value == pytest.approx(0.1266, abs=1e-4)
    # permutation variance: c_A = 3-2k+1-3 = -1,-3,-5 (sum sq 35); c_B = 3 (3*9 = 27);
    # sum w^2 = 9 + 3 = 12 -> (35 + 27 + 12)/3 = 74/3
    assert r.var_s_permutation == pytest.approx(74 / 3)
    # decrease: mirror the data; same magnitude
    rd = tau_u([-3, -1, -2], [-4, -2, -5], "decrease")
    assert rd.tau_u == pytest.approx(7 / 9)


@pytest.mark.parametrize("na, nb", [(3, 3), (4, 3), (2, 5), (1, 4)])
def test_tau_u_variances_by_full_enumeration(na, nb):
    # source: exhaustive enumeration of all (nA+nB)! orderings of distinct values (the exact
    # permutation null). Var(S_AvsB) = nA nB (N+1)/3 (Mann-Whitney) and
    # Var(S_AvsB - S_trendA) = tau_u_permutation_variance.
    n = na + nb
    s_ab, s_u = [], []
    for perm in itertools.permutations(range(n)):
        y = np.array(perm, dtype=float)
        r = tau_u(y[:na], y[na:], "increase")
        s_ab.append(r.s_a_vs_b)
        s_u.append(r.s_tau_u)
    assert np.var(s_ab) == pytest.approx(na * nb * (n + 1) / 3)
    assert np.var(s_u) == pytest.approx(tau_u_permutation_variance(na, nb))
    assert np.mean(s_u) == pytest.approx(0.0, abs=1e-12)


# ------------------------------------------------------------------------------------------------
# Log response ratio
# ------------------------------------------------------------------------------------------------


def test_lrr_by_hand_pustejovsky_2018():
    # source: Pustejovsky (2018), J. School Psychology 68:99-112, bias-corrected LRR formulae.
    a = [2, 4, 6]  # mA = 4, sA^2 = 4
    b = [8, 10, 12]  # mB = 10, sB^2 = 4
    # LRR = ln(10) - ln(4) = ln 2.5 = 0.916291
    # bias-corrected = ln 10 + 4/(2*3*100) - ln 4 - 4/(2*3*16) = 0.916291 + 0.006667 - 0.041667 = 0.881291
    # Var = 4/(3*16) + 4/(3*100) = 0.083333 + 0.013333 = 0.096667
    r = log_response_ratio(a, b, "count", "increase")
    assert r.lrr == pytest.approx(0.9162907, abs=1e-7)
    assert r.lrr_bias_corrected == pytest.approx(0.8812907, abs=1e-7)
    assert r.lrr_variance == pytest.approx(0.0966667, abs=1e-7)
    assert r.lrr_improvement == pytest.approx(0.8812907, abs=1e-7)
    # z = 0.881291 / sqrt(0.096667) = 2.8345 -> p = 0.00459 (exact fractions: 1/150, 1/24, 29/300)
    exact = math.log(2.5) + 1 / 150 - 1 / 24
    assert r.lrr_bias_corrected == pytest.approx(exact, rel=1e-12)
    assert r.lrr_variance == pytest.approx(29 / 300, rel=1e-12)
    assert r.p_value == pytest.approx(2 * stats.norm.sf(exact / math.sqrt(29 / 300)), rel=1e-9)
    assert r.p_value == pytest.approx(0.00459, abs=5e-6)
    # rho = 0.5: n_eff = 3 * 0.5/1.5 = 1 -> Var_adj = 4/16 + 4/100 = 0.29
    r5 = log_response_ratio(a, b, "count", "increase", rho=0.5)
    assert r5.lrr_variance_adjusted == pytest.approx(0.29)
    # "decrease": improvement sign flipped, raw LRR kept
    rd = log_response_ratio(a, b, "rate", "decrease")
    assert rd.lrr == pytest.approx(0.9162907, abs=1e-7)
    assert rd.lrr_improvement == pytest.approx(-0.8812907, abs=1e-7)


def test_lrr_not_ratio_scale_and_nonpositive_mean():
    r = log_response_ratio([1, 2], [3, 4], "rating")
    assert math.isnan(r.lrr) and r.reason == R.NOT_RATIO_SCALE
    r = log_response_ratio([1, 2], [3, 4], None)
    assert math.isnan(r.lrr) and r.reason == R.NOT_RATIO_SCALE
    r = log_response_ratio([0, 0], [3, 4], "count")
    assert math.isnan(r.lrr) and r.reason == R.NONPOSITIVE_MEAN
    r = log_response_ratio([2, 2], [3, 3], "percent")  # zero variance: estimate defined, no p
    assert r.lrr == pytest.approx(math.log(1.5)) and math.isnan(r.p_value) and r.reason == R.ZERO_VARIANCE
    r = log_response_ratio([2], [3, 4], "duration")  # single baseline point
    assert r.lrr == pytest.approx(math.log(3.5 / 2)) and math.isnan(r.lrr_bias_corrected)
    assert r.reason == R.TOO_FEW_POINTS


# ------------------------------------------------------------------------------------------------
# SMD
# ------------------------------------------------------------------------------------------------


def test_smd_by_hand_and_hedges_correction():
    a = [2, 4, 6]  # mA = 4, sA = 2
    b = [8, 10, 12, 14]  # mB = 11, sB^2 = 20/3
    # baseline-SD SMD = (11 - 4)/2 = 3.5
    # pooled SD = sqrt((2*4 + 3*20/3)/5) = sqrt(28/5) = 2.36643; SMD = 7/2.36643 = 2.95804
    r = standardized_mean_difference(a, b, "increase")
    assert r.smd_baseline_sd == pytest.approx(3.5)
    assert r.smd_pooled_sd == pytest.approx(7 / math.sqrt(28 / 5))
    # Hedges (1981) J(m) = Gamma(m/2)/(sqrt(m/2) Gamma((m-1)/2)); J(2) = 1/(sqrt 1 * sqrt(pi)) = 0.5642
    assert r.smd_baseline_sd_hedges == pytest.approx(3.5 / math.sqrt(math.pi))
    j5 = special.gamma(2.5) / (math.sqrt(2.5) * special.gamma(2.0))  # = 0.84082
    assert r.smd_pooled_sd_hedges == pytest.approx(7 / math.sqrt(28 / 5) * j5)
    # the usual approximation J ~ 1 - 3/(4m - 1) (Hedges 1981) agrees closely for larger m
    for m in (10, 20, 40):
        assert hedges_correction(m) == pytest.approx(1 - 3 / (4 * m - 1), abs=1e-3)
    rd = standardized_mean_difference(a, b, "decrease")
    assert rd.smd_baseline_sd == pytest.approx(-3.5)


# ------------------------------------------------------------------------------------------------
# Mean difference tests and the dependence adjustment
# ------------------------------------------------------------------------------------------------


def test_mean_difference_tests_match_scipy_ttest_at_rho_zero():
    rng = np.random.default_rng(4)
    for _ in range(200):
        na, nb = int(rng.integers(2, 12)), int(rng.integers(2, 12))
        a, b = rng.normal(size=na), rng.normal(0.5, 2.0, size=nb)
        r = mean_difference_test(a, b, "increase", rho=0.0)
        welch = stats.ttest_ind(b, a, equal_var=False)  # source: scipy.stats.ttest_ind (Welch)
        pooled = stats.ttest_ind(b, a, equal_var=True)  # source: scipy.stats.ttest_ind (Student)
        assert r.welch_p_value == pytest.approx(welch.pvalue, rel=1e-9)
        assert r.pooled_p_value == pytest.approx(pooled.pvalue, rel=1e-9)
        assert r.welch_p_value_adjusted == r.welch_p_value  # rho = 0: identical
        assert r.pooled_p_value_adjusted == r.pooled_p_value
        assert r.welch_flip is False and r.pooled_flip is False


def test_adjusted_equals_independence_when_rho_zero_or_negative():
    rng = np.random.default_rng(5)
    for _ in range(100):
        a, b = _pairs(rng, ties=True)
        for rho in (0.0, -0.4):  # negative rho is bounded to 0
            t = tau_between_phases(a, b, "increase", rho=rho)
            u = tau_u(a, b, "increase", rho=rho)
            assert (math.isnan(t.p_value) and math.isnan(t.p_value_adjusted)) or t.p_value_adjusted == t.p_value
            assert u.p_value_adjusted == u.p_value
            assert t.n_baseline_effective == a.size and t.rho_used == 0.0


def test_effective_sample_size_formula():
    # n_eff = n (1 - rho)/(1 + rho): 10 * 0.5/1.5 = 3.3333 (Bayley & Hammersley 1946 large-n form)
    assert effective_sample_size(10, 0.5) == pytest.approx(10 / 3)
    assert effective_sample_size(10, -0.3) == 10
    assert effective_sample_size(10, 0.99) == pytest.approx(10 * 0.05 / 1.95)  # bounded at 0.95
    assert bound_rho(None) == 0.0 and math.isnan(bound_rho(float("nan")))
    # large n: n/n_eff -> 1 + 2 sum_k (1 - k/n) rho^k, the exact variance inflation of an AR(1)
    # mean (source: Zwiers & von Storch 1995, J. Climate 8:336-351, eq. for the equivalent sample size)
    n, rho = 5000, 0.6
    k = np.arange(1, n)
    exact_inflation = 1 + 2 * np.sum((1 - k / n) * rho**k)
    assert n / effective_sample_size(n, rho) == pytest.approx(exact_inflation, rel=1e-3)


def test_tau_adjusted_by_hand():
    # A = 1,2,3,4 ; B = 5,6,7,8: S = 16, no ties; rho = 0.5 -> n_eff = 4/3 each
    # Var_adj(S) = 16^2 * (4/3 + 4/3 + 1) / (3 * 16/9) = 256 * 3.6667 / 5.3333 = 176
    # z_adj = (16 - 1)/sqrt(176) = 1.1307 -> p_adj = 0.2582;  independence: Var = 16*9/3 = 48,
    # z = 15/sqrt(48) = 2.1651 -> p = 0.0304: the decision at 0.05 flips
    r = tau_between_phases([1, 2, 3, 4], [5, 6, 7, 8], "increase", rho=0.5)
    assert r.var_s == pytest.approx(48) and r.var_s_adjusted == pytest.approx(176)
    assert r.p_value == pytest.approx(2 * stats.norm.sf(15 / math.sqrt(48)))
    assert r.p_value_adjusted == pytest.approx(2 * stats.norm.sf(15 / math.sqrt(176)))
    assert r.flip is True


# ------------------------------------------------------------------------------------------------
# Contrasts and case level
# ------------------------------------------------------------------------------------------------


def _abab():
    session = np.arange(1, 17, dtype=float)
    outcome = np.array([2, 3, 1, 4, 7, 8, 6, 9, 3.5, 2.5, 1.5, 4.5, 8.5, 9.5, 7.5, 10.5])  # no ties
    phase = np.repeat([1, 2, 3, 4], 4)
    cond = np.repeat(["baseline", "treatment", "baseline", "treatment"], 4)
    return session, outcome, phase, cond


def test_phase_contrasts_abab_and_alternating():
    _, _, phase, cond = _abab()
    cs = phase_contrasts(phase, cond, "ABAB")
    assert [c["contrast"] for c in cs] == ["A1B1", "A2B2"]
    assert [(c["baseline_phase"], c["treatment_phase"]) for c in cs] == [(1, 2), (3, 4)]
    alt_cond = np.array(["baseline", "treatment"] * 6)
    cs = phase_contrasts(np.arange(1, 13), alt_cond, "alternating")
    assert len(cs) == 1 and cs[0]["baseline_mask"].sum() == 6
    assert phase_contrasts(np.repeat([1, 2], 3), np.repeat(["treatment", "baseline"], 3), "AB") == []


def test_case_effect_sizes_abab_aggregation():
    session, outcome, phase, cond = _abab()
    per, case = case_effect_sizes(session, outcome, phase, cond, "ABAB", "increase", "count", rho=0.3)
    assert list(per["contrast"]) == ["A1B1", "A2B2"]
    assert per["tau_flip"].dtype == "boolean"
    # each contrast: all 16 pairs improve -> Tau = 1, NAP = 1, PND = 100
    assert list(per["tau"]) == [1.0, 1.0] and case["tau"] == 1.0 and case["nap"] == 1.0
    assert case["pnd_percent"] == 100.0
    # Tau aggregation: S = 16 + 16, Var = 48 + 48 (independent contrasts) -> z = 31/sqrt(96)
    assert case["tau_p_value"] == pytest.approx(2 * stats.norm.sf(31 / math.sqrt(96)))
    assert case["rho_used"] == 0.3 and case["rho_method"] == "given"
    # mean difference simple mean: ((7.5 - 2.5) + (9 - 3)) / 2 = 5.5
    assert case["mean_difference"] == pytest.approx(5.5)
    # LRR: inverse-variance weighted mean of the two contrast values
    w = 1 / per["lrr_variance"]
    assert case["lrr_improvement"] == pytest.approx(float((w * per["lrr_improvement"]).sum() / w.sum()))


def test_case_effect_sizes_single_contrast_matches_contrast_function():
    session, outcome, phase, cond = _abab()
    keep = phase <= 2
    per, case = case_effect_sizes(session[keep], outcome[keep], phase[keep], cond[keep], "AB", None,
                                  "count", rho=0.2)
    c = contrast_effect_sizes(outcome[:4], outcome[4:8], None, "count", rho=0.2)
    assert case["direction_assumed"] is True
    assert case["tau_p_value"] == pytest.approx(c.tau.p_value)
    assert case["tau_p_value_adjusted"] == pytest.approx(c.tau.p_value_adjusted)
    assert case["mean_difference_welch_p_value"] == pytest.approx(c.mean_difference.welch_p_value)
    assert case["mean_difference_welch_p_value_adjusted"] == pytest.approx(
        c.mean_difference.welch_p_value_adjusted)
    assert case["lrr_p_value"] == pytest.approx(c.lrr.p_value)


def test_case_effect_sizes_rho_estimated_when_missing_and_no_contrast():
    session, outcome, phase, cond = _abab()
    _, case = case_effect_sizes(session, outcome, phase, cond, "ABAB", "increase", "other")
    assert case["rho_method"] == "phase_mean_residual_lag1"
    assert 0.0 <= case["rho_used"] <= 0.95
    assert math.isnan(case["lrr_improvement"]) and R.NOT_RATIO_SCALE in case["lrr_reason"]
    # alternating design: one contrast, rho from condition-mean residuals over all lags
    alt = np.array(["baseline", "treatment"] * 8)
    per, case = case_effect_sizes(session, outcome, np.arange(1, 17), alt, "alternating", "increase", "count")
    assert list(per["contrast"]) == ["A_all_B_all"] and case["rho_method"] == "condition_mean_residual_lag1"
    assert np.isfinite(case["rho_used"]) and np.isfinite(case["tau_p_value_adjusted"])
    per, case = case_effect_sizes(session, outcome, phase, np.repeat("baseline", 16), "ABAB", "increase",
                                  "count", rho=0.2)
    assert len(per) == 0 and case["reason"] == R.NO_CONTRAST and math.isnan(case["tau"])


# ------------------------------------------------------------------------------------------------
# Degenerate input: defined values or NaN + reason, never an exception
# ------------------------------------------------------------------------------------------------


def test_empty_phase():
    c = contrast_effect_sizes([], [1, 2, 3], "increase", "count", rho=0.3)
    for obj in (c.pnd, c.nap, c.tau, c.tau_u, c.lrr, c.mean_difference):
        reason = getattr(obj, "reason", None) or getattr(obj, "welch_reason")
        assert R.EMPTY_PHASE in reason
    assert math.isnan(c.nap.nap) and math.isnan(c.tau.tau) and math.isnan(c.smd.smd_baseline_sd)


def test_single_points():
    c = contrast_effect_sizes([2.0], [5.0], "increase", "count", rho=0.3)
    assert c.nap.nap == 1.0 and c.tau.tau == 1.0 and c.pnd.pnd_percent == 100.0
    assert c.tau.var_s == pytest.approx(1.0)  # nA nB (N+1)/3 = 1*1*3/3
    assert c.tau_u.tau_u == 1.0
    assert c.lrr.lrr == pytest.approx(math.log(2.5)) and c.lrr.reason == R.TOO_FEW_POINTS
    assert math.isnan(c.smd.smd_baseline_sd) and c.smd.reason_baseline_sd == R.TOO_FEW_POINTS
    assert math.isnan(c.mean_difference.welch_p_value) and c.mean_difference.welch_reason == R.TOO_FEW_POINTS
    assert c.mean_difference.pooled_reason == R.TOO_FEW_POINTS
    assert 0 < c.nap.nap_ci_low_newcombe < 1 and c.nap.nap_ci_high_newcombe == 1.0


def test_all_values_tied():
    c = contrast_effect_sizes([3, 3, 3], [3, 3], "increase", "count", rho=0.3)
    assert c.nap.nap == 0.5 and c.tau.tau == 0.0 and c.pnd.pnd_percent == 0.0
    assert math.isnan(c.tau.p_value) and R.ZERO_VARIANCE in c.tau.reason
    assert c.tau.flip is None
    assert c.lrr.lrr == 0.0 and c.lrr.reason == R.ZERO_VARIANCE
    assert c.smd.reason_baseline_sd == R.ZERO_VARIANCE and c.smd.reason_pooled_sd == R.ZERO_VARIANCE
    assert c.mean_difference.welch_reason == R.ZERO_VARIANCE


def test_zero_baseline_variance_only():
    c = contrast_effect_sizes([3, 3, 3], [4, 6, 5], "increase", "count")
    assert math.isnan(c.smd.smd_baseline_sd) and c.smd.reason_baseline_sd == R.ZERO_VARIANCE
    assert np.isfinite(c.smd.smd_pooled_sd)
    assert np.isfinite(c.mean_difference.welch_p_value)


def test_non_finite_and_nan_rho():
    c = contrast_effect_sizes([1, np.nan], [3, 4], "increase", "count")
    assert c.tau.reason == R.NON_FINITE_INPUT and math.isnan(c.tau.tau)
    c = contrast_effect_sizes([1, 2, 3], [3, 4, 6], "increase", "count", rho=float("nan"))
    assert np.isfinite(c.tau.p_value) and math.isnan(c.tau.p_value_adjusted)
    assert c.tau.reason_adjusted == R.NON_FINITE_INPUT and c.tau.flip is None
    assert c.mean_difference.welch_reason_adjusted == R.NON_FINITE_INPUT


def test_high_rho_makes_effective_sizes_too_small_for_t():
    # rho = 0.95 -> n_eff = 4 * 0.05/1.95 = 0.1026 < 1: Welch df undefined -> NaN with reason
    c = mean_difference_test([1, 2, 3, 2], [5, 6, 7, 6], "increase", rho=0.95)
    assert math.isnan(c.welch_p_value_adjusted) and c.welch_reason_adjusted == R.TOO_FEW_POINTS
    assert math.isnan(c.pooled_p_value_adjusted) and c.pooled_reason_adjusted == R.TOO_FEW_POINTS


# ------------------------------------------------------------------------------------------------
# Values near the float limits: finite, or NaN with a reason of the same result; never inf
# ------------------------------------------------------------------------------------------------

BIG = sys.float_info.max
A6 = np.array([3.0, 4.0, 2.0, 5.0, 3.5, 4.5])
B6 = np.array([8.0, 9.5, 7.0, 8.5, 10.0, 9.0])
EXTREME_CONTRASTS = {
    "huge": (A6 * 1e299, B6 * 1e299),
    "huge_negative": (-A6 * 1e299, -B6 * 1e299),
    "largest_double": (np.array([BIG, -BIG, -BIG, BIG, -BIG, -BIG]), np.array([BIG, -BIG, -BIG, BIG, -BIG, -BIG])),
    "opposite_extremes": (-BIG * np.array([0.9, 0.95, 1.0]), BIG * np.array([0.9, 0.95, 1.0])),
    "mixed_scales": (np.array([1e-300, 1e300, 0.0, -1e300, 1.0, 1e-300]),
                     np.array([2.0, 1e300, -1.0, 0.5, 1e12, -1e12])),
    "tiny_vs_huge": (np.array([1e-300, 2e-300, 3e-300]), np.full(3, 1e300)),
    "tiny": (A6 * 1e-300, B6 * 1e-300),
    "subnormal": (A6 * 5e-324, B6 * 5e-324),
    "constant_huge": (np.full(4, 1e300), np.full(4, 1e300)),
}


def _reasons_for(obj, name: str) -> list[str]:
    """The reason fields of obj that must explain a NaN in its field `name`."""
    rs = {f.name: getattr(obj, f.name) for f in fields(obj) if "reason" in f.name}
    if isinstance(obj, StandardizedMeanDifference):
        if name == "mean_difference":
            return [rs["reason_baseline_sd"], rs["reason_pooled_sd"]]
        return [rs["reason_pooled_sd"] if "pooled" in name else rs["reason_baseline_sd"]]
    if isinstance(obj, MeanDifferenceTest):
        if name == "mean_difference":
            return list(rs.values())
        kind = "welch" if name.startswith("welch") else "pooled"
        return [rs[f"{kind}_reason_adjusted" if name.endswith("adjusted") else f"{kind}_reason"]]
    if "adjusted" in name and "reason_adjusted" in rs:
        return [rs["reason_adjusted"]]
    return [rs["reason"]]


def _check_result(obj, where: str) -> None:
    for f in fields(obj):
        v = getattr(obj, f.name)
        if not isinstance(v, (float, np.floating)):
            continue
        assert not math.isinf(v), f"{where}: {type(obj).__name__}.{f.name} is infinite"
        if math.isnan(v):
            assert all(_reasons_for(obj, f.name)), f"{where}: {type(obj).__name__}.{f.name} NaN without a reason"


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("name", list(EXTREME_CONTRASTS))
@pytest.mark.parametrize("direction, scale", [("increase", "count"), ("decrease", "other"), (None, "percent")])
def test_contrast_near_float_limits_finite_or_nan_with_reason(name, direction, scale):
    # the house rule (DEVELOPERS.md: degenerate input gives NaN plus a reason code, never raises)
    a, b = EXTREME_CONTRASTS[name]
    c = contrast_effect_sizes(a, b, direction, scale, rho=0.3)
    for obj in (c.pnd, c.nap, c.tau, c.tau_u, c.lrr, c.smd, c.mean_difference):
        _check_result(obj, name)


@pytest.mark.filterwarnings("error")
def test_standardized_mean_difference_is_scale_free_near_float_limits():
    # SMDs and t statistics are ratios (scale-free by definition): data multiplied by 2**k (exact)
    # give the same values up to rounding; SDs and mean differences scale by 2**k
    ref = contrast_effect_sizes(A6, B6, "increase", "count", rho=0.3)
    for k in (-1000, -990, 990, 1000):
        c = contrast_effect_sizes(A6 * 2.0**k, B6 * 2.0**k, "increase", "count", rho=0.3)
        for key in ("smd_baseline_sd", "smd_baseline_sd_hedges", "smd_pooled_sd", "smd_pooled_sd_hedges"):
            assert getattr(c.smd, key) == pytest.approx(getattr(ref.smd, key), rel=1e-13), key
        assert c.smd.sd_baseline == pytest.approx(ref.smd.sd_baseline * 2.0**k, rel=1e-15)
        assert c.smd.sd_pooled == pytest.approx(ref.smd.sd_pooled * 2.0**k, rel=1e-13)
        assert c.smd.mean_difference == ref.smd.mean_difference * 2.0**k
        md, md0 = c.mean_difference, ref.mean_difference
        for key in ("welch_t", "welch_df", "welch_p_value", "welch_p_value_adjusted", "pooled_t", "pooled_p_value"):
            assert getattr(md, key) == pytest.approx(getattr(md0, key), rel=1e-12), key
        assert md.welch_se == pytest.approx(md0.welch_se * 2.0**k, rel=1e-13)
        assert c.lrr.lrr_improvement == pytest.approx(ref.lrr.lrr_improvement, abs=1e-12)
        assert c.lrr.lrr_variance == pytest.approx(ref.lrr.lrr_variance, rel=1e-13)
        assert c.lrr.sd_treatment == pytest.approx(ref.lrr.sd_treatment * 2.0**k, rel=1e-15)
        assert (c.nap.nap, c.tau.p_value, c.tau_u.tau_u) == (ref.nap.nap, ref.tau.p_value, ref.tau_u.tau_u)
        assert c.smd.reason_baseline_sd == c.mean_difference.welch_reason == c.lrr.reason == R.OK


@pytest.mark.filterwarnings("error")
def test_values_beyond_the_largest_double_are_nan_with_numerical_failure():
    a, b = EXTREME_CONTRASTS["largest_double"]
    c = contrast_effect_sizes(a, b, "increase", "count")
    # SD of +-1.8e308 values exceeds the largest double: NaN; the SMD (a ratio) is still given
    assert math.isnan(c.smd.sd_baseline) and math.isnan(c.smd.sd_pooled) and math.isnan(c.lrr.sd_baseline)
    assert R.NUMERICAL_FAILURE in c.smd.reason_baseline_sd and R.NUMERICAL_FAILURE in c.smd.reason_pooled_sd
    assert c.smd.mean_difference == 0.0 and c.smd.smd_pooled_sd == 0.0 and c.smd.smd_baseline_sd == 0.0
    assert c.mean_difference.welch_p_value == 1.0  # t = 0
    # its standard error, sqrt(2 s^2 / 6) = 0.60 of the largest double, is representable
    assert c.mean_difference.welch_se == pytest.approx(BIG * (np.std([1.0, -1, -1, 1, -1, -1], ddof=1) / np.sqrt(3)))
    assert c.mean_difference.welch_reason == R.OK
    assert c.lrr.mean_baseline == pytest.approx(-BIG / 3.0, rel=1e-15)
    # mean difference of about 3.4e308: NaN, while the SMD and t statistic are finite
    a, b = EXTREME_CONTRASTS["opposite_extremes"]
    c = contrast_effect_sizes(a, b, "increase", "count")
    assert math.isnan(c.smd.mean_difference) and math.isnan(c.mean_difference.mean_difference)
    assert np.isfinite(c.smd.smd_pooled_sd) and c.smd.smd_pooled_sd > 0
    assert np.isfinite(c.mean_difference.welch_t) and c.mean_difference.welch_t > 0
    assert R.NUMERICAL_FAILURE in c.mean_difference.welch_reason
    # SMD and t of about 1e600 (SD 1e-300 against a difference of 1e300): NaN, numerical_failure
    a, b = EXTREME_CONTRASTS["tiny_vs_huge"]
    c = contrast_effect_sizes(a, b, "increase", "count")
    assert math.isnan(c.smd.smd_baseline_sd) and c.smd.reason_baseline_sd == R.NUMERICAL_FAILURE
    assert math.isnan(c.mean_difference.welch_t) and c.mean_difference.welch_reason == R.NUMERICAL_FAILURE
    assert c.smd.sd_baseline == pytest.approx(1e-300, rel=1e-12)


def _case_reason(case: dict, key: str) -> str:
    if key.startswith("rho_"):
        return case["rho_reason"]
    for prefix in ("pnd", "nap", "tau_u", "tau", "lrr", "smd"):
        if key.startswith(prefix):
            return case[f"{prefix}_reason"]
    return case["mean_difference_reason_adjusted" if "adjusted" in key else "mean_difference_reason"]


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize("name", list(EXTREME_CONTRASTS))
@pytest.mark.parametrize("rho", [None, 0.3])
def test_case_effect_sizes_near_float_limits(name, rho):
    a, b = EXTREME_CONTRASTS[name]
    y = np.r_[a, b, a[::-1], b[::-1]]  # ABAB: two contrasts
    phase = np.repeat([1, 2, 3, 4], [a.size, b.size, a.size, b.size])
    cond = np.where(phase % 2 == 1, "baseline", "treatment")
    per, case = case_effect_sizes(np.arange(1.0, y.size + 1), y, phase, cond, "ABAB", "increase", "count", rho=rho)
    assert len(per) == 2
    for key, v in case.items():
        if isinstance(v, (float, np.floating)):
            assert not math.isinf(v), f"{name}: {key} infinite"
            # adjusted p-values are also NaN when rho is unavailable (rho_reason says why)
            explained = _case_reason(case, key) or ("adjusted" in key and case["rho_reason"])
            assert not math.isnan(v) or explained, f"{name}: {key} NaN without a reason"
