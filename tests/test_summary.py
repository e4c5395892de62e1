"""Tests of the review-wide summary (audit.summary) and its schemas (schemas.summary)."""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats
from statsmodels.stats.meta_analysis import combine_effects
from statsmodels.stats.proportion import proportion_confint

from audit.autocorrelation import lag_matrix
from audit.design import case_design
from audit.summary import (
    SUMMARY_TABLES,
    _pooled_effect,
    _study_verdicts,
    ar1_from_residual_lag1,
    cmd_summary,
    empirical_bayes_shrinkage,
    load_summary,
    make_gls_at_rho,
    random_effects_dersimonian_laird,
    residual_lag1_mean_under_ar1,
    summarize,
    wilson_interval,
)
from schemas.summary import summary_validators, validate_summary


def _ab_design(n_a: int = 7, n_b: int = 8) -> np.ndarray:
    n = n_a + n_b
    phase = np.r_[np.ones(n_a, int), np.full(n_b, 2)]
    cond = np.where(phase == 1, "baseline", "treatment")
    return case_design(np.arange(1.0, n + 1), phase, cond, "AB").X  # level and trend, k = 4


def _null_moments(X: np.ndarray) -> tuple[float, float]:
    """Exact null mean and variance of residual r1 written out here (Koopmans 1942, Pitman-Koopmans)."""
    n, k = X.shape
    M = np.eye(n) - X @ np.linalg.pinv(X)
    A = M @ lag_matrix(n) @ M
    p = n - k
    mean = np.trace(A) / p
    second = (2 * np.trace(A @ A) + np.trace(A) ** 2) / (p * (p + 2))
    return mean, second - mean**2


def _ar1_chol(n: int, rho: float) -> np.ndarray:
    idx = np.arange(n)
    return np.linalg.cholesky(rho ** np.abs(np.subtract.outer(idx, idx)))


def _residual_r1(X: np.ndarray, E: np.ndarray) -> np.ndarray:
    Q = np.linalg.qr(X)[0]
    R = E - (E @ Q) @ Q.T
    return np.sum(R[:, 1:] * R[:, :-1], axis=1) / np.sum(R**2, axis=1)


# ----------------------------------------------------------------------------- random effects


EFFECTS = np.array([0.42, 0.10, 0.65, -0.05, 0.30, 0.51, 0.22])
VARIANCES = np.array([0.040, 0.025, 0.090, 0.030, 0.015, 0.060, 0.020])


def test_dersimonian_laird_equals_statsmodels_combine_effects():
    ours = random_effects_dersimonian_laird(EFFECTS, VARIANCES, alpha=0.05)
    ref = combine_effects(EFFECTS, VARIANCES, method_re="dl")
    frame = ref.summary_frame()
    # source: statsmodels.stats.meta_analysis.combine_effects(method_re="dl")
    assert ours.estimate == pytest.approx(ref.mean_effect_re, abs=1e-12)
    assert ours.tau2 == pytest.approx(ref.tau2, abs=1e-12)
    assert ours.i2 == pytest.approx(ref.i2, abs=1e-12)
    assert ours.q == pytest.approx(ref.q, abs=1e-10)
    assert ours.std_error == pytest.approx(frame.loc["random effect", "sd_eff"], abs=1e-12)
    assert ours.ci_lower == pytest.approx(frame.loc["random effect", "ci_low"], abs=1e-12)
    assert ours.ci_upper == pytest.approx(frame.loc["random effect", "ci_upp"], abs=1e-12)
    assert ours.fixed_estimate == pytest.approx(ref.mean_effect_fe, abs=1e-12)
    assert ours.tau2 > 0  # heterogeneous inputs: the random-effects branch is exercised


def test_prediction_interval_formula():
    ours = random_effects_dersimonian_laird(EFFECTS, VARIANCES)
    ref = combine_effects(EFFECTS, VARIANCES, method_re="dl")
    se = ref.summary_frame().loc["random effect", "sd_eff"]
    half = stats.t.ppf(0.975, len(EFFECTS) - 2) * math.sqrt(ref.tau2 + se**2)
    # source: Higgins, Thompson & Spiegelhalter (2009), PI = mu +- t_{k-2} sqrt(tau^2 + SE^2) (from memory),
    # with statsmodels' tau^2 and SE
    assert ours.pi_lower == pytest.approx(ref.mean_effect_re - half, abs=1e-12)
    assert ours.pi_upper == pytest.approx(ref.mean_effect_re + half, abs=1e-12)


def test_dersimonian_laird_degenerate_inputs():
    empty = random_effects_dersimonian_laird([], [])
    assert empty.n == 0 and math.isnan(empty.estimate) and empty.reason
    one = random_effects_dersimonian_laird([0.3, np.nan], [0.04, 0.1])
    assert one.n == 1 and one.estimate == pytest.approx(0.3) and math.isnan(one.tau2) and math.isnan(one.pi_lower)
    # zero / negative variances are dropped, not divided by
    two = random_effects_dersimonian_laird([0.3, 0.5, 9.0], [0.04, 0.04, 0.0])
    assert two.n == 2 and math.isnan(two.pi_lower)


# ----------------------------------------------------------------------------- Wilson


def test_wilson_interval_equals_statsmodels():
    counts = np.array([0, 1, 3, 7, 10, 19, 20, 0, 5])
    trials = np.array([20, 20, 20, 20, 20, 20, 20, 1, 52])
    for alpha in (0.05, 0.10):
        lo, hi = wilson_interval(counts, trials, alpha)
        ref_lo, ref_hi = proportion_confint(counts, trials, alpha=alpha, method="wilson")
        # source: statsmodels.stats.proportion.proportion_confint(method="wilson")
        np.testing.assert_allclose(lo, ref_lo, atol=1e-12)
        np.testing.assert_allclose(hi, ref_hi, atol=1e-12)
    lo, hi = wilson_interval(0, 0)
    assert np.isnan(lo) and np.isnan(hi)


# ----------------------------------------------------------------------------- shrinkage


def test_shrinkage_three_cases_by_hand():
    y = np.array([0.6, 0.0, 0.3])
    v = np.array([0.04, 0.12, 0.02])
    pooled = random_effects_dersimonian_laird(y, v)
    # By hand (DerSimonian & Laird 1986):
    #   w = 1/v = 25, 8.3333, 50; sum w = 83.3333; fixed mean = (15 + 0 + 15)/83.3333 = 0.36
    #   Q = 25*0.24^2 + 8.3333*0.36^2 + 50*0.06^2 = 1.44 + 1.08 + 0.18 = 2.70
    #   C = 83.3333 - (625 + 69.4444 + 2500)/83.3333 = 83.3333 - 38.3333 = 45
    #   tau^2 = (2.70 - 2)/45 = 7/450 = 0.0155556
    #   w* = 1/(v + tau^2) = 450/25, 450/61, 450/16 = 18, 7.377049, 28.125
    #   mu = (18*0.6 + 0 + 28.125*0.3)/(18 + 7.377049 + 28.125) = 19.2375/53.502049 = 0.3595657
    assert pooled.fixed_estimate == pytest.approx(0.36, abs=1e-12)
    assert pooled.q == pytest.approx(2.70, abs=1e-12)
    assert pooled.tau2 == pytest.approx(7 / 450, abs=1e-12)
    assert pooled.estimate == pytest.approx(0.3595657, abs=1e-7)
    out = empirical_bayes_shrinkage(y, v, pooled.estimate, pooled.tau2)
    #   weights tau^2/(tau^2 + v) = 7/25, 7/61, 7/16 = 0.28, 0.1147541, 0.4375
    #   shrunken = mu + w (y - mu):
    #     0.3595657 + 0.28      * ( 0.2404343) = 0.4268873
    #     0.3595657 + 0.1147541 * (-0.3595657) = 0.3183040
    #     0.3595657 + 0.4375    * (-0.0595657) = 0.3335057
    np.testing.assert_allclose(out["weight"], [0.28, 7 / 61, 0.4375], atol=1e-12)
    np.testing.assert_allclose(out["shrunken"], [0.4268873, 0.3183040, 0.3335057], atol=2e-7)


def test_shrinkage_edge_cases():
    out = empirical_bayes_shrinkage([0.99, np.nan, -2.0], [0.0, 0.1, 0.0], 0.2, 0.05)
    assert out["shrunken"].iloc[0] == pytest.approx(0.95)  # weight 1, clipped to the bound
    assert out["weight"].iloc[1] == 0 and out["shrunken"].iloc[1] == pytest.approx(0.2)  # no estimate: the mean
    assert out["shrunken"].iloc[2] == pytest.approx(-0.95)
    zero_tau = empirical_bayes_shrinkage([0.5], [0.1], 0.2, 0.0)
    assert zero_tau["shrunken"].iloc[0] == pytest.approx(0.2)  # no between-case variance: all the way to the mean
    nan_tau = empirical_bayes_shrinkage([0.5], [0.1], 0.2, float("nan"))
    assert nan_tau["shrunken"].iloc[0] == pytest.approx(0.2)


# ----------------------------------------------------------------------------- E_rho[r1]


def test_mean_curve_at_zero_is_the_exact_null_mean():
    for X in (_ab_design(), _ab_design(4, 12), np.column_stack([np.ones(9), np.arange(9.0)])):
        mean0, _ = _null_moments(X)
        # source: Koopmans (1942) / Pitman-Koopmans: E0[r1] = tr(ML)/(n-k)
        assert residual_lag1_mean_under_ar1(X, [0.0])[0] == pytest.approx(mean0, abs=1e-10)


def test_mean_curve_equals_adaptive_quadrature():
    X = _ab_design(10, 30)  # n = 40: a wide spread of eigenvalues at rho = 0.95
    n, k = X.shape
    N = np.linalg.qr(X, mode="complete")[0][:, k:]
    A = N.T @ lag_matrix(n) @ N
    rhos = np.array([-0.9, -0.3, 0.4, 0.95])
    ours = residual_lag1_mean_under_ar1(X, rhos)
    for rho, got in zip(rhos, ours):
        L = _ar1_chol(n, rho)
        G = N.T @ (L @ L.T) @ N
        g, Q = np.linalg.eigh(G)
        a = g * np.diag(Q.T @ A @ Q)
        f = lambda t: np.prod((1 + 2 * t * g) ** -0.5) * np.sum(a / (1 + 2 * t * g))  # noqa: E731
        ref = integrate.quad(f, 0, np.inf, limit=400, epsabs=1e-13, epsrel=1e-12)[0]
        # source: scipy.integrate.quad of the Sawa (1978) / Magnus (1986) integral
        assert got == pytest.approx(ref, abs=1e-9)


@pytest.mark.slow
def test_mean_curve_and_its_slope_by_monte_carlo():
    X = _ab_design()
    n, k = X.shape
    rng = np.random.default_rng(20261201)
    z = rng.standard_normal((40000, n))
    for rho in (-0.4, 0.3, 0.6):
        r1 = _residual_r1(X, z @ _ar1_chol(n, rho).T)
        got = residual_lag1_mean_under_ar1(X, [rho])[0]
        se = r1.std() / np.sqrt(r1.size)
        # source: Monte Carlo, 40000 draws of AR(1) errors (tolerance 4 standard errors)
        assert abs(r1.mean() - got) < 4 * se
    # slope at 0 = (n-k) V0; common random numbers for the difference quotient at rho = +-0.02
    _, v0 = _null_moments(X)
    h = 0.02
    diff = (_residual_r1(X, z @ _ar1_chol(n, h).T) - _residual_r1(X, z @ _ar1_chol(n, -h).T)) / (2 * h)
    se = diff.std() / np.sqrt(diff.size)
    # source: Monte Carlo with common random numbers (the curvature term at +-0.02 is below 1e-3)
    assert abs(diff.mean() - (n - k) * v0) < 4 * se + 2e-3
    assert (n - k) * v0 < 0.6  # the attenuation that motivates the calibration (15 points, 4 parameters)


def test_ar1_from_residual_lag1_inverts_the_curve_and_first_order_path():
    X = _ab_design()
    n, k = X.shape
    rhos = np.array([-0.5, 0.0, 0.25, 0.6])
    r1 = residual_lag1_mean_under_ar1(X, rhos)
    res = ar1_from_residual_lag1(r1, X)
    np.testing.assert_allclose(res.rho, rhos, atol=1e-9)  # root of the exact curve (brentq to 1e-10)
    mean0, v0 = _null_moments(X)
    np.testing.assert_allclose(res.variance, 1 / ((n - k) ** 2 * v0), rtol=1e-10)
    far = ar1_from_residual_lag1([0.99, -0.99, np.nan], X)
    assert far.rho[0] == pytest.approx(0.95) and far.rho[1] == pytest.approx(-0.95)
    assert far.at_bound[:2].all() and np.isnan(far.rho[2]) and far.reason[2]
    first = ar1_from_residual_lag1([mean0 + 0.1], null_mean=mean0, null_variance=v0, n_obs=n, n_params=k)
    assert first.rho[0] == pytest.approx(0.1 / ((n - k) * v0))
    none = ar1_from_residual_lag1([0.1], null_mean=0.0, null_variance=0.0, n_obs=5, n_params=4)
    assert np.isnan(none.rho[0]) and none.reason[0]


@pytest.mark.slow
def test_pooled_ar1_interval_covers_the_mean_coefficient_in_simulated_reviews():
    """Monte Carlo: 200 reviews of 36 short cases (AB and ABAB designs), true AR(1) 0.1 to 0.5."""
    rng = np.random.default_rng(7)
    designs = [_ab_design(), _ab_design(5, 9)]
    phase = np.repeat([1, 2, 3, 4], 5)
    cond = np.where(phase % 2 == 1, "baseline", "treatment")
    designs.append(case_design(np.arange(1.0, 21), phase, cond, "ABAB").X)
    cases = [(designs[i % 3], 0.1 + 0.4 * (i / 35)) for i in range(36)]
    target = np.mean([r for _, r in cases])
    reps = 200
    draws = {}
    for i, (X, rho) in enumerate(cases):
        z = rng.standard_normal((reps, X.shape[0]))
        draws[i] = _residual_r1(X, z @ _ar1_chol(X.shape[0], rho).T)
    est = np.empty((reps, len(cases)))
    var = np.empty((reps, len(cases)))
    for i, (X, _) in enumerate(cases):
        res = ar1_from_residual_lag1(draws[i], X)
        est[:, i], var[:, i] = res.rho, res.variance
    covered = []
    centre = []
    for r in range(reps):
        pooled = random_effects_dersimonian_laird(est[r], var[r])
        covered.append(pooled.ci_lower <= target <= pooled.ci_upper)
        centre.append(pooled.estimate)
    # source: Monte Carlo, 200 simulated reviews; nominal 95% (SE of the coverage about 0.015)
    assert np.mean(covered) >= 0.88
    assert abs(np.mean(centre) - target) < 0.03
    # the null-corrected r1 would not do: its mean is a fraction of the coefficient
    r1c = np.mean([draws[i].mean() - _null_moments(X)[0] for i, (X, _) in enumerate(cases)])
    assert r1c < 0.6 * target


# ----------------------------------------------------------------------------- demo review


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from audit.config import AuditConfig
    from audit.demo import write_demo_review
    from audit.diagnose import diagnose_cases
    from audit.intake import load_review

    folder = tmp_path_factory.mktemp("demo")
    review = write_demo_review(folder)
    prep = load_review([review.data_folder], AuditConfig()).prepared
    cases = diagnose_cases(prep.observations)["cases"]
    tables = summarize(cases, 0.05, quarantine=prep.quarantine, accepted_cases=prep.cases,
                       observations=prep.observations)
    return {"review": review, "prep": prep, "cases": cases, "tables": tables}


def test_demo_pooled_ar1_covers_the_true_mean(demo):
    truth = demo["review"].truth.copy()
    for col in ("study", "case", "series"):
        truth[col] = truth[col].astype(str).replace({"nan": "", "<NA>": "", "None": ""})
    cases = demo["cases"][["study", "case", "series"]].astype(str).replace({"nan": "", "<NA>": "", "None": ""})
    audited = cases.merge(truth, on=["study", "case", "series"], how="left")
    assert audited["rho"].notna().all()
    true_mean = float(audited["rho"].mean())  # about 0.3 (the generator's design)
    pooled = demo["tables"]["summary_pooled_autocorrelation"]
    ar1 = pooled[(pooled["measure"] == "ar1_coefficient") & (pooled["group_by"] == "all")].iloc[0]
    # How the pooled quantity relates to the true rho: each case's estimate inverts the exact expectation of
    # its residual r1 under AR(1) errors for its own design, so it is (nearly) mean-unbiased for that case's
    # coefficient; the random-effects mean (weights that depend on the design only) targets the average
    # coefficient of the audited cases. source: truth.csv of the invented demo review (generating rho).
    assert ar1["ci_lower"] <= true_mean <= ar1["ci_upper"], (ar1.to_dict(), true_mean)
    assert abs(ar1["estimate"] - true_mean) < 0.1
    # The null-corrected r1 pooled as it is estimates a fraction ((n-k) V0, about 0.4) of the coefficient:
    # its interval lies below the true mean. This is why the AR(1) estimate is calibrated.
    r1c = pooled[(pooled["measure"] == "r1_corrected") & (pooled["group_by"] == "all")].iloc[0]
    assert r1c["ci_upper"] < true_mean


def test_demo_tables_validate_and_are_consistent(demo):
    tables = demo["tables"]
    assert set(tables) == set(SUMMARY_TABLES)
    for name, df in tables.items():
        validate_summary(name, df)
    cases = demo["cases"]
    flips = tables["summary_flip_rates"]
    overall_flips = flips[flips["group_by"] == "all"].set_index("alternative")
    # consistent with the per-case flag of audit.diagnose
    n_flip_reml = int(cases["flip_gls_reml"].astype("boolean").fillna(False).sum())
    assert overall_flips.loc["gls_reml", "n_flips"] == n_flip_reml
    row = overall_flips.loc["hac"]
    lo, hi = proportion_confint(row["n_flips"], row["n_cases"], alpha=0.05, method="wilson")
    # source: statsmodels proportion_confint(method="wilson")
    assert row["flip_ci_lower"] == pytest.approx(lo, abs=1e-12) and row["flip_ci_upper"] == pytest.approx(hi, abs=1e-12)
    sens = tables["summary_sensitivity"]
    assert list(sens["assumed_rho"]) == pytest.approx([0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6])
    # source: the Prais-Winsten transform at rho = 0 is the identity, so GLS equals OLS: no flips
    assert sens["n_flips"].iloc[0] == 0
    shrink = tables["summary_case_shrinkage"]
    assert len(shrink) == len(cases) and shrink["shrunken"].abs().max() <= 0.95
    mu = shrink["pooled_mean"].iloc[0]
    ok = shrink["raw"].notna()
    between = (shrink.loc[ok, "shrunken"] - mu) * (shrink.loc[ok, "raw"] - mu) >= -1e-12
    assert between.all() and (shrink.loc[ok, "shrunken"] - mu).abs().le((shrink.loc[ok, "raw"] - mu).abs() + 1e-12).all()
    screening = tables["summary_screening"]
    assert screening["study"].is_unique and len(screening) == cases["study"].nunique()
    expected_q = demo["review"].truth.groupby("study")["expected_quarantine"].sum()
    got_q = screening.set_index("study")["cases_quarantined"]
    assert (got_q.reindex(expected_q.index).fillna(0).astype(int) == expected_q.astype(int)).all()
    dw = tables["summary_durbin_watson"]
    all_dw = dw[dw["group_by"] == "all"].iloc[0]
    assert all_dw["power_rho"] == pytest.approx(mu)
    assert 0.05 < all_dw["mean_power"] < 1  # power against a positive coefficient exceeds the size
    overall = tables["summary_overall"].iloc[0]
    assert "pooled AR(1)" in overall["answer"] and "three-demonstrations" in overall["answer"]
    assert overall["n_cases_quarantined"] == int(demo["review"].truth["expected_quarantine"].sum())


def test_fast_gls_at_rho_matches_diagnose_cases(demo):
    from audit.diagnose import diagnose_cases

    obs = demo["prep"].observations
    keys = demo["cases"]["case_key"]
    rho = pd.Series(np.linspace(-0.4, 0.8, len(keys)), index=keys.to_numpy())
    full = diagnose_cases(obs, 0.05, supplied_rho=rho)["cases"].set_index("case_key")
    fast = make_gls_at_rho(obs, 0.05)(rho).set_index("case_key").reindex(full.index)
    for col in ("effect_gls_supplied_estimate", "effect_gls_supplied_p_value"):
        np.testing.assert_allclose(fast[col], full[col], rtol=1e-12, atol=1e-12, equal_nan=True)


# ----------------------------------------------------------------------------- verdicts, pooled effect


def _toy_cases(rows):
    cols = ["case_key", "study", "case", "series", "design", "desired_direction", "n_transitions",
            "effect_ols_estimate", "effect_ols_p_value", "effect_gls_reml_estimate", "effect_gls_reml_p_value"]
    return pd.DataFrame(rows, columns=cols)


def test_three_demonstrations_verdicts():
    cases = _toy_cases([
        # S1: three AB cases improve under OLS, one loses significance under AR(1)
        ("a", "S1", "P1", "", "AB", "increase", 1, 2.0, 0.01, 2.0, 0.01),
        ("b", "S1", "P2", "", "AB", "increase", 1, 2.0, 0.02, 2.0, 0.03),
        ("c", "S1", "P3", "", "AB", "increase", 1, 2.0, 0.04, 2.0, 0.20),
        # S2: one ABAB case, average effect significant: one demonstration per transition (3)
        ("d", "S2", "P1", "", "ABAB", "decrease", 3, -1.5, 0.001, -1.4, 0.004),
        # S3: significant but in the wrong direction does not count
        ("e", "S3", "P1", "", "AB", "decrease", 1, 3.0, 0.001, 3.0, 0.001),
        ("f", "S3", "P2", "", "AB", "decrease", 1, -3.0, 0.001, -3.0, 0.001),
        ("g", "S3", "P3", "", "AB", "decrease", 1, -3.0, 0.001, -3.0, 0.001),
    ])
    v = _study_verdicts(cases, None, 0.05).set_index("study")
    # common practice: three demonstrations of effect in the desired direction
    assert v.loc["S1", "verdict_independence"] == "effect" and v.loc["S1", "verdict_ar1"] == "no effect"
    assert bool(v.loc["S1", "verdict_changes"]) and v.loc["S1", "change"] == "effect lost under AR(1)"
    assert v.loc["S2", "demonstrations_independence"] == 3 and v.loc["S2", "verdict_ar1"] == "effect"
    assert v.loc["S3", "demonstrations_independence"] == 2 and v.loc["S3", "verdict_independence"] == "no effect"
    assert v.loc["S1", "verdict_shrunken"] == "not computed"


def test_pooled_effect_variance_inflation():
    rho = 0.4
    cases = pd.DataFrame({"study": ["S1"] * 4 + ["S2"] * 2, "lrr": [0.5] * 6, "lrr_variance": [0.02] * 6})
    shrink = pd.DataFrame({"shrunken": [rho] * 6})
    out = _pooled_effect(cases, shrink, 0.05, [])
    all_rows = out[(out["measure"] == "lrr") & (out["group_by"] == "all")].set_index("assumption")
    # equal effects: Q = 0, tau^2 = 0 under both assumptions, so the pooled SE scales like one case's SE;
    # source: variance of the mean of AR(1) observations, large-n factor (1+rho)/(1-rho)
    # (Bayley & Hammersley 1946, from memory)
    factor = math.sqrt((1 + rho) / (1 - rho))
    assert all_rows.loc["ar1", "std_error"] / all_rows.loc["independence", "std_error"] == pytest.approx(factor)
    assert all_rows.loc["ar1", "width_ratio"] == pytest.approx(factor)
    assert all_rows.loc["ar1", "median_case_width_ratio"] == pytest.approx(factor)
    assert all_rows.loc["independence", "estimate"] == pytest.approx(0.5)
    neg = _pooled_effect(cases, pd.DataFrame({"shrunken": [-0.3] * 6}), 0.05, [])
    assert neg["width_ratio"].dropna().eq(1.0).all()  # negative coefficients are not used to narrow intervals


# ----------------------------------------------------------------------------- degraded inputs


def test_summarize_without_observations_and_with_empty_input(demo):
    cases = demo["cases"]
    out = summarize(cases)
    notes = out["summary_notes"]
    assert (notes["status"] != "done").any()
    assert out["summary_sensitivity"].empty
    assert set(out["summary_case_shrinkage"]["calibration"]) == {"first order"}
    for name, df in out.items():
        validate_summary(name, df)
    empty = summarize(cases.iloc[0:0])
    for name, df in empty.items():
        validate_summary(name, df)
    assert empty["summary_overall"]["n_cases"].iloc[0] == 0
    broken = cases.copy()
    broken.loc[:2, ["r1_residual", "r1_corrected"]] = np.nan
    out = summarize(broken, observations=demo["prep"].observations)
    shr = out["summary_case_shrinkage"].set_index("case_key").loc[broken["case_key"].iloc[:3]]
    assert shr["raw"].isna().all() and (shr["weight"] == 0).all()
    assert np.allclose(shr["shrunken"], shr["pooled_mean"])


# ----------------------------------------------------------------------------- store and CLI


def _store_with(tmp_path, demo, with_summary: bool):
    from audit.store import ResultsStore

    store = ResultsStore(tmp_path / "store", validators=summary_validators())
    prep = demo["prep"]
    with store.begin_run({"alpha": 0.05}, "test", {}) as run:
        run.write_table("cases", demo["cases"])
        run.write_table("observations", prep.observations)
        run.write_table("quarantine", prep.quarantine)
        run.write_table("adjustments", prep.adjustments)
        if with_summary:
            for name, df in demo["tables"].items():
                run.write_table(name, df)
        run.commit({})
    return store.path


def test_load_summary_reads_stored_tables_or_computes_them(tmp_path, demo):
    stored = load_summary(_store_with(tmp_path / "a", demo, True))
    assert set(stored) == set(SUMMARY_TABLES)
    pd.testing.assert_frame_equal(stored["summary_flip_rates"].reset_index(drop=True),
                                  demo["tables"]["summary_flip_rates"].reset_index(drop=True), check_dtype=False)
    computed = load_summary(_store_with(tmp_path / "b", demo, False))
    assert computed["summary_overall"]["pooled_ar1"].iloc[0] == pytest.approx(
        demo["tables"]["summary_overall"]["pooled_ar1"].iloc[0])


@pytest.mark.parametrize("by", [None, "study", "design", "scale"])
def test_cmd_summary_prints_the_answer_and_the_table(tmp_path, demo, capsys, by):
    path = _store_with(tmp_path, demo, True)
    assert cmd_summary(argparse.Namespace(store=str(path), by=by, json=False, run="latest")) == 0
    out = capsys.readouterr().out
    assert "pooled AR(1)" in out and "Caution" in out
    if by == "study":
        assert "Screening table" in out
    elif by is not None:
        assert ("design" if by == "design" else "outcome scale") in out
    assert cmd_summary(argparse.Namespace(store=str(path), by=by, json=True, run="latest")) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["overall"][0]["n_cases"] == len(demo["cases"]) and doc["by"] == by


def test_cmd_summary_on_an_empty_store(tmp_path, capsys):
    assert cmd_summary(argparse.Namespace(store=str(tmp_path / "nothing"), by=None, json=False, run="latest")) == 2
    assert "no committed run" in capsys.readouterr().err
