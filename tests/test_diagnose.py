"""The per-case engine as a whole: case models, batched path vs per-case path, references, edge cases."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats.stattools import durbin_watson

from audit.config import AuditConfig
from audit.design import LEVEL_AND_TREND, LEVEL_ONLY, case_design
from audit.diagnose import diagnose_case, diagnose_cases
from audit.intake import load_review
from schemas.results import CaseResults, PhaseResults

FIXTURE = "fixtures/demo_small"


def _obs(cases: dict[str, tuple[list[float], list[str]]], design="AB") -> pd.DataFrame:
    """Observations table from {case: (outcomes, phase labels)} with sessions 1..n."""
    rows = []
    for name, (ys, labels) in cases.items():
        idx = 0
        prev = None
        for i, (y, lab) in enumerate(zip(ys, labels)):
            if lab != prev:
                idx += 1
                prev = lab
            rows.append({"case_key": name, "study": "s", "case": name, "series": "", "session": float(i + 1),
                         "outcome": float(y), "phase": lab, "phase_index": idx,
                         "condition": "baseline" if lab.startswith("A") else "treatment", "design": design,
                         "outcome_scale": None, "desired_direction": None})
    return pd.DataFrame(rows)


def _ar1(rng, n, rho):
    e = np.empty(n)
    e[0] = rng.normal() / np.sqrt(1 - rho**2)
    for t in range(1, n):
        e[t] = rho * e[t - 1] + rng.normal()
    return e


@pytest.fixture(scope="module")
def fixture_tables():
    obs = load_review([FIXTURE], AuditConfig()).prepared.observations
    return obs, diagnose_cases(obs)


def test_design_level_and_trend_columns_follow_huitema_mckean():
    # Huitema & McKean (2000): y = b0 + b1 T + b2 D + b3 [T - (n1 + 1)] D for an AB case
    s = np.arange(1, 13, dtype=float)
    ph = np.r_[np.ones(6, int), np.full(6, 2)]
    des = case_design(s, ph, np.where(ph == 1, "baseline", "treatment"), "AB")
    assert des.model == LEVEL_AND_TREND
    t = s - 1
    D = (ph == 2).astype(float)
    np.testing.assert_array_equal(des.X, np.column_stack([np.ones(12), t, D, (t - 6) * D]))
    np.testing.assert_array_equal(des.contrast, [0, 0, 1, 0])


def test_design_falls_back_to_level_only_when_df_would_drop_below_five():
    s = np.arange(1, 13, dtype=float)
    ph = np.repeat([1, 2, 3, 4], 3)
    cond = np.where(ph % 2 == 1, "baseline", "treatment")
    des = case_design(s, ph, cond, "ABAB")
    assert des.model == LEVEL_ONLY and des.df_resid == 7  # full model would leave 12 - 8 = 4
    # signs: A->B +1, B->A -1, A->B +1, averaged over three transitions
    np.testing.assert_allclose(des.contrast, [0, 0, 1 / 3, -1 / 3, 1 / 3])


def test_abab_effect_is_the_signed_average_of_level_changes():
    rng = np.random.default_rng(3)
    labels = ["A"] * 5 + ["B"] * 5 + ["A2"] * 5 + ["B2"] * 5
    level = np.array([0 if lab.startswith("A") else 4.0 for lab in labels])
    y = 10 + level + 1e-3 * rng.normal(size=20)
    out = diagnose_cases(_obs({"c": (list(y), labels)}, design="ABAB"))["cases"].iloc[0]
    assert out["effect_ols_estimate"] == pytest.approx(4.0, abs=0.01)  # by construction: every level change is 4


def test_ols_and_hac_equal_statsmodels(fixture_tables):
    obs, tables = fixture_tables
    cases = tables["cases"].set_index("case_key")
    checked = 0
    for key, part in obs.groupby("case_key"):
        des = case_design(part["session"].to_numpy(), part["phase_index"].to_numpy(),
                          part["condition"].to_numpy(), part["design"].iloc[0], part["phase"].to_numpy())
        y = part["outcome"].to_numpy()
        fit = sm.OLS(y, des.X).fit()
        t = fit.t_test(des.contrast)
        row = cases.loc[key]
        # source: statsmodels OLS t_test of the contrast
        assert row["effect_ols_estimate"] == pytest.approx(float(np.squeeze(t.effect)), rel=1e-8, abs=1e-10)
        assert row["effect_ols_std_error"] == pytest.approx(float(np.squeeze(t.sd)), rel=1e-8)
        assert row["effect_ols_p_value"] == pytest.approx(float(np.squeeze(t.pvalue)), rel=1e-8, abs=1e-12)
        lags = int(row["effect_hac_lags"])
        hac = sm.OLS(y, des.X).fit(cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": True}, use_t=True)
        th = hac.t_test(des.contrast)
        # source: statsmodels OLS(cov_type='HAC', use_correction=True, use_t=True)
        assert row["effect_hac_std_error"] == pytest.approx(float(np.squeeze(th.sd)), rel=1e-8)
        assert row["effect_hac_p_value"] == pytest.approx(float(np.squeeze(th.pvalue)), rel=1e-8, abs=1e-12)
        # source: statsmodels durbin_watson on the same residuals
        assert row["dw_statistic"] == pytest.approx(durbin_watson(fit.resid), rel=1e-10)
        checked += 1
    assert checked == len(cases) >= 10


def test_batched_path_equals_per_case_reference(fixture_tables):
    obs, tables = fixture_tables
    cases = tables["cases"].set_index("case_key")
    for key, part in obs.groupby("case_key"):
        ref = diagnose_case(part["session"], part["outcome"], part["phase_index"], part["condition"],
                            part["design"].iloc[0], part["phase"])
        row = cases.loc[key]
        for col, value in ref.items():
            if isinstance(value, str):
                assert row[col] == value, col
            else:
                np.testing.assert_allclose(row[col], value, rtol=1e-9, atol=1e-9, err_msg=col)


def test_tables_match_their_schemas(fixture_tables):
    _, tables = fixture_tables
    CaseResults.validate(tables["cases"], lazy=True)
    PhaseResults.validate(tables["phases"], lazy=True)
    assert tables["cases"]["case_key"].is_unique


def test_supplied_rho_zero_reproduces_ols(fixture_tables):
    obs, _ = fixture_tables
    out = diagnose_cases(obs, supplied_rho=0.0)["cases"]
    # GLS with rho = 0 is OLS (Prais-Winsten transform is the identity)
    np.testing.assert_allclose(out["effect_gls_supplied_p_value"], out["effect_ols_p_value"], rtol=1e-10)
    assert not out["flip_gls_supplied"].fillna(False).any()


def test_omitted_level_change_shows_up_as_autocorrelation():
    # Monte Carlo (seeded, 300 cases): independent errors with a level change of 5 SD. The
    # session-only regression leaves the level change in its residuals and DW flags it; the phase
    # model does not (its exact test keeps its size).
    rng = np.random.default_rng(11)
    labels = ["A"] * 10 + ["B"] * 10
    cases = {f"c{i}": (list(5.0 * (np.arange(20) >= 10) + rng.normal(size=20)), labels) for i in range(300)}
    out = diagnose_cases(_obs(cases))["cases"]
    session_only = (out["dw_session_only_p_positive"] < 0.05).mean()
    model = (out["dw_p_positive"] < 0.05).mean()
    assert session_only > 0.6
    assert 0.02 <= model <= 0.09  # 0.05 +- about 3 binomial SE at n=300


def test_degenerate_cases_give_nan_and_reason_not_exceptions():
    labels = ["A"] * 4 + ["B"] * 4
    out = diagnose_cases(_obs({
        "constant": ([5.0] * 8, labels),
        "exact_fit": ([1, 2, 3, 4, 9, 10, 11, 12], labels),
        "normal": ([1, 3, 2, 4, 9, 12, 10, 11], labels),
    }))["cases"].set_index("case_key")
    for key in ("constant", "exact_fit"):
        row = out.loc[key]
        assert np.isnan(row["effect_ols_p_value"]) and np.isnan(row["dw_p_positive"])
        assert row["reason"] != "" and row["dw_zone"] == "unknown"
    assert out.loc["normal", "reason"] == ""
    assert np.isfinite(out.loc["normal", "dw_p_positive"])


def test_zone_matches_common_practice_rule():
    # common practice: one predictor, about 15 points: d below about 1.08 flags positive
    # autocorrelation, above about 2.92 negative (Savin & White 1977, n=15, k'=1: dL = 1.077, from memory)
    rng = np.random.default_rng(5)
    n = 15
    s = np.arange(1, n + 1, dtype=float)
    y_pos = 5 * np.sin(np.arange(n) * 0.8) + 0.1 * rng.normal(size=n)  # slow wave: strong positive dependence
    y_neg = np.array([(-1) ** t * 3.0 for t in range(n)]) + 0.1 * rng.normal(size=n)
    from audit.durbin_watson import critical_bounds, dw_test
    X = np.column_stack([np.ones(n), s])
    dl, du = critical_bounds(n, 1, 0.05)
    assert dl == pytest.approx(1.08, abs=0.01) and 4 - dl == pytest.approx(2.92, abs=0.01)
    for y, zone in ((y_pos, "positive"), (y_neg, "negative")):
        e = y - X @ np.linalg.lstsq(X, y, rcond=None)[0]
        assert dw_test(e, X).zone == zone


@pytest.mark.slow
def test_gls_keeps_type_one_error_closer_to_nominal_than_ols_under_ar1():
    # Monte Carlo calibration, 2000 seeded AB cases (n = 10 + 10), AR(1) errors with rho 0.4, no effect.
    rng = np.random.default_rng(2026)
    labels = ["A"] * 10 + ["B"] * 10
    cases = {f"c{i}": (list(_ar1(rng, 20, 0.4)), labels) for i in range(2000)}
    out = diagnose_cases(_obs(cases))["cases"]
    ols = (out["effect_ols_p_value"] < 0.05).mean()
    gls = (out["effect_gls_reml_p_value"] < 0.05).mean()
    assert abs(gls - 0.05) < abs(ols - 0.05)
    assert ols > 0.08  # OLS is liberal under positive dependence (Monte Carlo SE about 0.006)


def test_effect_sizes_and_baseline_trend_join_the_case_table(fixture_tables):
    from scipy.stats import mannwhitneyu

    obs, tables = fixture_tables
    cases = tables["cases"].set_index("case_key")
    ab = cases[(cases["design"] == "AB") | (cases["design"] == "multiple_baseline")]
    assert len(ab) >= 2
    for key, row in ab.iterrows():
        part = obs[obs["case_key"] == key]
        a = part.loc[part["condition"] == "baseline", "outcome"].to_numpy()
        b = part.loc[part["condition"] == "treatment", "outcome"].to_numpy()
        if row["desired_direction"] == "decrease":
            a, b = -a, -b
        u = mannwhitneyu(b, a).statistic
        # source: scipy.stats.mannwhitneyu; NAP = U / (nA nB) and Tau = 2 NAP - 1
        assert row["nap"] == pytest.approx(u / (len(a) * len(b)), abs=1e-12)
        assert row["tau"] == pytest.approx(2 * row["nap"] - 1, abs=1e-12)
    assert set(cases["baseline_moves_in_therapeutic_direction"]) <= {"yes", "no", "unknown"}
    assert {"case_key", "contrast", "nap", "tau"} <= set(tables["contrasts"].columns)


def test_phase_table_equals_the_group_by_on_the_key_columns(fixture_tables):
    from audit.diagnose import _phase_table_grouped, phase_table

    obs, _ = fixture_tables
    rng = np.random.default_rng(11)
    srt = obs.sort_values(["case_key", "session"], kind="stable").reset_index(drop=True)
    shuffled = obs.iloc[rng.permutation(len(obs))].reset_index(drop=True)
    repeats = srt.assign(session=np.floor(srt["session"] / 2))  # sessions repeated within phases
    for frame in (srt, shuffled, repeats):
        pd.testing.assert_frame_equal(phase_table(frame), _phase_table_grouped(frame), check_exact=True)


def test_row_order_of_the_input_does_not_change_the_tables(fixture_tables):
    from audit.batch_effects import baseline_trends_batch

    obs, tables = fixture_tables
    shuffled = obs.iloc[np.random.default_rng(12).permutation(len(obs))].reset_index(drop=True)
    again = diagnose_cases(shuffled)
    for name in ("cases", "phases", "contrasts"):
        pd.testing.assert_frame_equal(again[name], tables[name], check_exact=True)
    # the trend columns of the phase table are those of the baseline-trend table, joined by key
    srt = obs.sort_values(["case_key", "session"], kind="stable").reset_index(drop=True)
    trends = baseline_trends_batch(srt)
    per_phase = trends[trends["scope"] == "phase"].drop(columns="scope")
    merged = tables["phases"][["case_key", "phase_index"]].merge(
        per_phase.assign(phase_index=per_phase["phase_index"].astype("int64")), on=["case_key", "phase_index"],
        how="left")
    for col in ("ols_slope", "theil_sen_slope", "mann_kendall_p_value", "reason"):
        pd.testing.assert_series_equal(tables["phases"][f"trend_{col}"], merged[col], check_names=False,
                                       check_exact=True)
