"""Tests for audit.batch_effects: the vectorised batch path equals the per-case reference path.

The reference is the per-case code (audit.effect_sizes.case_effect_sizes, audit.trend.baseline_trends,
called case by case as audit.diagnose.diagnose_cases calls them), itself checked against scipy,
statsmodels and published values in tests/test_effect_sizes.py and the trend tests. A few batch
values are also checked directly against scipy.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from audit import reasons as R
from audit.batch_effects import CASE_LEVEL_COLUMNS, baseline_trends_batch, case_effects_batch
from audit.effect_sizes import case_effect_sizes
from audit.trend import baseline_trends

ROOT = Path(__file__).resolve().parents[1]
TOL = 1e-9

DESIGN_LAYOUTS = {
    "AB": ["A", "B"],
    "ABAB": ["A", "B", "A", "B"],
    "multiple_baseline": ["A", "B"],
}


# ------------------------------------------------------------------------------------------------
# reference path and comparison
# ------------------------------------------------------------------------------------------------


def reference(obs: pd.DataFrame, rho: np.ndarray, alpha: float = 0.05):
    """Per-case loop as diagnose_cases runs it: (case rows frame, per-contrast concat, trends concat)."""
    keys = obs["case_key"].to_numpy()
    bounds = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1], True])
    sess = obs["session"].to_numpy(dtype=float)
    yv = obs["outcome"].to_numpy(dtype=float)
    ph = obs["phase_index"].to_numpy()
    cond = obs["condition"].to_numpy().astype(str)
    design = obs["design"].to_numpy().astype(str)
    cases, contrasts, trends = [], [], []
    for i, (b, e) in enumerate(zip(bounds[:-1], bounds[1:])):
        sl = slice(b, e)
        first = obs.iloc[b]
        rho_i = rho[i]
        per_contrast, case = case_effect_sizes(
            sess[sl], yv[sl], ph[sl], cond[sl], design[b], first["desired_direction"], first["outcome_scale"],
            rho=float(rho_i) if np.isfinite(rho_i) else None, alpha=alpha)
        cases.append(case)
        per_contrast.insert(0, "case_key", keys[b])
        contrasts.append(per_contrast)
        tr = baseline_trends(sess[sl], yv[sl], ph[sl], cond[sl], first["desired_direction"], alpha=alpha)
        tr.insert(0, "case_key", keys[b])
        trends.append(tr)
    nonempty = [c for c in contrasts if len(c)]
    return (pd.DataFrame(cases), pd.concat(nonempty, ignore_index=True) if nonempty else contrasts[0],
            pd.concat(trends, ignore_index=True))


def _missing(v) -> bool:
    return v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v))


def assert_frames_equal(got: pd.DataFrame, ref: pd.DataFrame, what: str) -> dict:
    """Same columns in the same order, same rows; numbers to TOL (relative above 1) with NaN in the
    same places, text and booleans exactly (None and NaN both count as missing)."""
    assert list(got.columns) == list(ref.columns), f"{what}: columns differ"
    assert len(got) == len(ref), f"{what}: {len(got)} rows vs {len(ref)}"
    worst = {}
    for col in ref.columns:
        g, r = got[col].tolist(), ref[col].tolist()
        gm = np.array([_missing(v) for v in g])
        rm = np.array([_missing(v) for v in r])
        assert np.array_equal(gm, rm), f"{what}.{col}: missing values at different rows {np.flatnonzero(gm != rm)[:5]}"
        vals = [(a, b) for a, b, m in zip(g, r, rm) if not m]
        if not vals:
            continue
        a0 = vals[0][1]
        if isinstance(a0, (bool, np.bool_, str)):
            bad = [(a, b) for a, b in vals if a != b or isinstance(a, (bool, np.bool_)) != isinstance(b, (bool, np.bool_))]
            assert not bad, f"{what}.{col}: {bad[:3]}"
        else:
            ga = np.array([a for a, _ in vals], dtype=float)
            ra = np.array([b for _, b in vals], dtype=float)
            assert np.array_equal(np.isnan(ga), np.isnan(ra)), f"{what}.{col}: NaN positions differ"
            ok = ~np.isnan(ra)
            assert np.array_equal(np.isinf(ga[ok]), np.isinf(ra[ok])) and np.all(ga[ok][np.isinf(ra[ok])] == ra[ok][np.isinf(ra[ok])])
            fin = ok & np.isfinite(ra)
            err = np.abs(ga[fin] - ra[fin]) / np.maximum(1.0, np.abs(ra[fin]))
            worst[col] = float(err.max()) if err.size else 0.0
            assert worst[col] <= TOL, f"{what}.{col}: max error {worst[col]:.3g}"
    return worst


# ------------------------------------------------------------------------------------------------
# synthetic cases
# ------------------------------------------------------------------------------------------------


def synthetic_observations(n_cases: int = 300, seed: int = 7) -> tuple[pd.DataFrame, np.ndarray]:
    """Random invented cases covering the awkward corners: ties, constant phases, short phases,
    gaps, no direction, scales with and without a ratio scale, cases without contrasts."""
    rng = np.random.default_rng(seed)
    rows = []
    rhos = []
    designs = ["AB", "ABAB", "multiple_baseline", "alternating"]
    for c in range(n_cases):
        design = designs[c % 4]
        n = int(rng.integers(6, 41))
        if design == "alternating":
            n_base = int(rng.integers(1, 6))
            cond = ["baseline"] * n_base + list(rng.choice(["baseline", "treatment"], n - n_base, p=[0.45, 0.55]))
            if rng.random() < 0.03:
                cond = ["baseline"] * n  # no treatment point: no contrast
            phase_index, k = [], 0
            for i, cnd in enumerate(cond):
                k += i == 0 or cnd != cond[i - 1]
                phase_index.append(k)
        else:
            layout = list(DESIGN_LAYOUTS[design])
            if rng.random() < 0.05:
                layout = ["B", "A", "B"]  # starts with treatment
            if rng.random() < 0.05:
                layout = ["A", "B", "A"]  # last baseline not followed by treatment
            if rng.random() < 0.03:
                layout = ["A"]  # baseline only
            n = max(n, len(layout))
            cuts = np.sort(rng.choice(np.arange(1, n), len(layout) - 1, replace=False)) if len(layout) > 1 else []
            lengths = np.diff(np.r_[0, cuts, n]).astype(int)
            if rng.random() < 0.15:  # very short phases (1-2 points)
                j = int(rng.integers(len(lengths)))
                extra = lengths[j] - int(rng.integers(1, 3))
                lengths[j] -= extra
                lengths[(j + 1) % len(lengths)] += extra
            cond, phase_index = [], []
            for j, (lab, ln) in enumerate(zip(layout, lengths)):
                cond += ["baseline" if lab == "A" else "treatment"] * int(ln)
                phase_index += [j + 1] * int(ln)
            n = len(cond)
        treat = np.array([cnd == "treatment" for cnd in cond], dtype=float)
        level = rng.choice([0.0, 5.0, 40.0, -3.0])
        y = level + rng.normal(0, 2, n) + treat * rng.normal(3, 2) + rng.normal(0, 0.3) * np.arange(n)
        style = rng.random()
        if style < 0.25:
            y = np.round(y)  # ties
        elif style < 0.35:
            y = np.round(y * 2) / 2
        elif style < 0.5:  # one or more constant phases, values that do not sum exactly in binary
            for p in np.unique(phase_index):
                if rng.random() < 0.6:
                    y[np.array(phase_index) == p] = rng.choice([0.1, 33.3, 7.7, 0.0, 2.0])
        elif style < 0.53:
            y[:] = 0.1  # constant series
        elif style < 0.56:
            y = np.arange(n) * 0.5 + 1.0  # exactly linear
        session = np.arange(1, n + 1, dtype=float)
        if rng.random() < 0.2:
            session = np.r_[1.0, 1.0 + np.cumsum(np.where(rng.random(n - 1) < 0.2, 2.0, 1.0))]
        if rng.random() < 0.03:
            session[2] = session[1]  # a repeated session number
        shift = rng.random()
        if design != "alternating" and shift < 0.05:
            phase_index = [p * 2 for p in phase_index]  # gaps in phase numbers: no p -> p + 1 contrast
        elif shift < 0.1:
            phase_index = [p + 7 for p in phase_index]
        direction = rng.choice(["increase", "decrease", None, " Decrease "], p=[0.4, 0.4, 0.15, 0.05])
        scale = rng.choice(["percent", "count", "rate", "other", "duration", None], p=[0.3, 0.25, 0.2, 0.1, 0.1, 0.05])
        if design == "alternating" and rng.random() < 0.2:
            design_label = "Alternating-treatments"
        else:
            design_label = design
        key = f"case{c:04d}"
        for i in range(n):
            rows.append({"case_key": key, "session": session[i], "outcome": y[i], "phase_index": phase_index[i],
                         "condition": cond[i], "design": design_label, "desired_direction": direction,
                         "outcome_scale": scale})
        rhos.append(rng.choice([np.nan, -0.4, 0.0, 0.3, 0.97, rng.uniform(-0.9, 0.99)]))
    obs = pd.DataFrame(rows)
    obs["phase_index"] = obs["phase_index"].astype("int64")
    return obs, np.array(rhos, dtype=float)


@pytest.fixture(scope="module")
def synthetic():
    obs, rho = synthetic_observations()
    return obs, rho, reference(obs, rho)


@pytest.fixture(scope="module")
def fixture_review():
    from audit.config import AuditConfig
    from audit.diagnose import diagnose_cases
    from audit.intake import load_review

    obs = load_review([ROOT / "fixtures" / "demo_small"], AuditConfig()).prepared.observations
    obs = obs.sort_values(["case_key", "session"], kind="stable").reset_index(drop=True)
    result = diagnose_cases(obs)
    rho = result["cases"]["ar1_reml_rho"].to_numpy(dtype=float)
    return obs, rho, result


# ------------------------------------------------------------------------------------------------
# equality with the per-case path
# ------------------------------------------------------------------------------------------------


def test_synthetic_case_level_equals_per_case(synthetic):
    obs, rho, (ref_cases, _, _) = synthetic
    got, _ = case_effects_batch(obs, rho, alpha=0.05)
    # source: per-case reference audit.effect_sizes.case_effect_sizes (dict per case)
    assert_frames_equal(got, ref_cases[CASE_LEVEL_COLUMNS], "case_level")


def test_synthetic_per_contrast_equals_per_case(synthetic):
    obs, rho, (_, ref_contrasts, _) = synthetic
    _, got = case_effects_batch(obs, rho, alpha=0.05)
    # source: per-case reference audit.effect_sizes.case_effect_sizes (per-contrast DataFrames)
    assert_frames_equal(got, ref_contrasts, "per_contrast")
    for col in ("baseline_phase", "treatment_phase"):
        assert str(got[col].dtype) == "Int64"
    assert all(str(got[c].dtype) == "boolean" for c in got if c.endswith("flip"))


def test_synthetic_trends_equal_per_case(synthetic):
    obs, _, (_, _, ref_trends) = synthetic
    got = baseline_trends_batch(obs, alpha=0.05)
    # source: per-case reference audit.trend.baseline_trends
    assert_frames_equal(got, ref_trends, "trends")
    assert str(got["phase_index"].dtype) == "Int64"


def test_synthetic_set_covers_the_corners(synthetic):
    obs, rho, (ref_cases, ref_contrasts, ref_trends) = synthetic
    # the comparison above is only worth something if the degenerate branches were exercised
    assert (ref_cases["reason"] == R.NO_CONTRAST).any()
    assert set(ref_cases["rho_method"]) == {"given", "phase_mean_residual_lag1", "condition_mean_residual_lag1"}
    assert ref_contrasts["lrr_reason"].isin([R.NOT_RATIO_SCALE, R.NONPOSITIVE_MEAN, R.TOO_FEW_POINTS,
                                             R.ZERO_VARIANCE]).sum() >= 4
    assert (ref_contrasts["smd_reason_baseline_sd"] == R.ZERO_VARIANCE).any()
    assert ref_contrasts["tau_flip"].fillna(False).any()
    assert ref_trends["mann_kendall_p_value_exact"].notna().any()
    assert (ref_trends["n"] < 3).any() and (ref_trends["n"] >= 3).any()
    assert ref_trends["moves_in_therapeutic_direction"].eq("yes").any()


def test_fixture_review_equals_per_case_and_diagnose(fixture_review):
    obs, rho, result = fixture_review
    ref_cases, ref_contrasts, ref_trends = reference(obs, rho)
    cases, contrasts = case_effects_batch(obs, rho, alpha=0.05)
    # source: per-case reference path (case_effect_sizes, baseline_trends)
    assert_frames_equal(cases, ref_cases[CASE_LEVEL_COLUMNS], "fixture case_level")
    assert_frames_equal(contrasts, ref_contrasts, "fixture per_contrast")
    assert_frames_equal(baseline_trends_batch(obs, alpha=0.05), ref_trends, "fixture trends")
    # the contrasts table that diagnose_cases builds from the per-case path
    assert_frames_equal(contrasts, result["contrasts"], "fixture diagnose contrasts")


def test_alpha_and_empty_input(synthetic):
    obs, rho, _ = synthetic
    part = obs[obs["case_key"].isin(obs["case_key"].unique()[:40])]
    ref_cases, ref_contrasts, ref_trends = reference(part, rho[:40], alpha=0.10)
    cases, contrasts = case_effects_batch(part, rho[:40], alpha=0.10)
    assert_frames_equal(cases, ref_cases[CASE_LEVEL_COLUMNS], "alpha=0.10 case_level")
    assert_frames_equal(contrasts, ref_contrasts, "alpha=0.10 per_contrast")
    assert_frames_equal(baseline_trends_batch(part, alpha=0.10), ref_trends, "alpha=0.10 trends")
    empty = obs.iloc[0:0]
    cases, contrasts = case_effects_batch(empty, np.zeros(0))
    assert len(cases) == 0 and list(cases.columns) == CASE_LEVEL_COLUMNS and len(contrasts) == 0
    assert len(baseline_trends_batch(empty)) == 0


def test_non_finite_outcome_goes_through_reference():
    obs, rho = synthetic_observations(12, seed=3)
    obs.loc[5, "outcome"] = np.nan
    obs.loc[60, "outcome"] = np.inf
    ref_cases, ref_contrasts, ref_trends = reference(obs, rho)
    cases, contrasts = case_effects_batch(obs, rho)
    assert_frames_equal(cases, ref_cases[CASE_LEVEL_COLUMNS], "non-finite case_level")
    assert_frames_equal(contrasts, ref_contrasts, "non-finite per_contrast")
    assert_frames_equal(baseline_trends_batch(obs), ref_trends, "non-finite trends")


# ------------------------------------------------------------------------------------------------
# direct checks against scipy
# ------------------------------------------------------------------------------------------------


def test_batch_values_match_scipy(synthetic):
    obs, rho, _ = synthetic
    _, contrasts = case_effects_batch(obs, rho)
    trends = baseline_trends_batch(obs)
    keys = obs["case_key"].to_numpy()
    checked = 0
    for _, row in contrasts[contrasts["contrast"].str.startswith("A1B1")].head(40).iterrows():
        case = obs[keys == row["case_key"]]
        a = case.loc[case["phase_index"] == row["baseline_phase"], "outcome"].to_numpy()
        b = case.loc[case["phase_index"] == row["treatment_phase"], "outcome"].to_numpy()
        if row["desired_direction"] == "decrease":
            a, b = -a, -b
        mw = stats.mannwhitneyu(b, a, alternative="two-sided", method="asymptotic", use_continuity=True)
        # source: scipy.stats.mannwhitneyu (U / (nA nB) = NAP; same asymptotic p as Tau)
        assert row["nap"] == pytest.approx(mw.statistic / (a.size * b.size), abs=1e-12)
        if np.isfinite(row["tau_p_value"]):
            assert row["tau_p_value"] == pytest.approx(mw.pvalue, rel=1e-9, abs=1e-12)
        checked += 1
    assert checked >= 20
    regular = trends[(trends["n"] >= 3) & trends["theil_sen_reason"].eq("")].head(60)
    for _, row in regular.iterrows():
        case = obs[keys == row["case_key"]]
        base = case[case["condition"] == "baseline"]
        if row["scope"] == "phase":
            base = base[base["phase_index"] == row["phase_index"]]
        x, y = base["session"].to_numpy(), base["outcome"].to_numpy()
        ts = stats.theilslopes(y, x, alpha=0.95)
        # source: scipy.stats.theilslopes (slope and Sen interval)
        assert row["theil_sen_slope"] == pytest.approx(ts.slope, rel=1e-12, abs=1e-12)
        assert row["theil_sen_slope_low"] == pytest.approx(ts.low_slope, rel=1e-12, abs=1e-12)
        assert row["theil_sen_slope_high"] == pytest.approx(ts.high_slope, rel=1e-12, abs=1e-12)
        if np.isfinite(row["mann_kendall_tau_b"]):
            # source: scipy.stats.kendalltau (tau-b against time)
            assert row["mann_kendall_tau_b"] == pytest.approx(stats.kendalltau(x, y).statistic, rel=1e-9)


# ------------------------------------------------------------------------------------------------
# values near the float limits: batch equals the per-case path, finite or NaN with a reason
# ------------------------------------------------------------------------------------------------

_BIG = np.finfo(float).max
_Y12 = np.array([3.0, 4.0, 2.0, 5.0, 3.5, 4.5, 8.0, 9.5, 7.0, 8.5, 10.0, 9.0])
EXTREME_OUTCOMES = {
    "ordinary": _Y12,
    "huge": _Y12 * 1e299,
    "huge_negative": -_Y12 * 1e299,
    "huge_alternating": 1e300 * (-1.0) ** np.arange(12),
    "largest_double": np.where(np.arange(12) % 3 == 0, _BIG, -_BIG),
    "opposite_extremes": np.where(np.arange(12) < 6, -_BIG, _BIG) * (0.9 + 0.008 * np.arange(12)),
    "tiny": _Y12 * 1e-300,
    "subnormal": _Y12 * 5e-324,
    "mixed_scales": np.array([1e-300, 1e300, 0.0, -1e300, 1.0, 1e-300, 2.0, 1e300, -1.0, 0.5, 1e12, -1e12]),
    "tiny_vs_huge": np.r_[1e-300 * np.arange(1.0, 7.0), np.full(6, 1e300)],
    "constant_huge": np.full(12, 1e300),
}
EXTREME_SESSIONS = {
    "ordinary": np.arange(1.0, 13.0),
    "offset_1e15": 1e15 + np.arange(12.0),
    "spaced_1e200": 1e200 * np.arange(1.0, 13.0),
    "spaced_1e-300": 1e-300 * np.arange(1.0, 13.0),
    "near_max": _BIG * np.linspace(0.5, 1.0, 12),
}


def extreme_observations() -> tuple[pd.DataFrame, np.ndarray]:
    """Every outcome series on every session spacing, as AB (6 + 6) and ABAB (3 + 3 + 3 + 3)."""
    layouts = {"AB": np.repeat([1, 2], 6), "ABAB": np.repeat([1, 2, 3, 4], 3)}
    rows, rhos, k = [], [], 0
    for s_name, sessions in EXTREME_SESSIONS.items():
        for y_name, y in EXTREME_OUTCOMES.items():
            for design, phase in layouts.items():
                k += 1
                direction = ["increase", "decrease", None][k % 3]
                scale = ["count", "other", "percent"][k % 3]
                for i in range(12):
                    condition = "baseline" if phase[i] % 2 else "treatment"
                    rows.append({"case_key": f"{s_name}/{y_name}/{design}", "session": sessions[i], "outcome": y[i],
                                 "phase_index": int(phase[i]), "condition": condition, "design": design,
                                 "desired_direction": direction, "outcome_scale": scale})
                rhos.append([np.nan, 0.3, 0.0][k % 3])
    return pd.DataFrame(rows), np.array(rhos)


def _finite_or_nan_with_reason(frame: pd.DataFrame, what: str, skip=()) -> None:
    reason_cols = [c for c in frame.columns if c == "reason" or c.endswith("_reason") or "_reason_" in c]
    floats = [c for c in frame.columns if frame[c].dtype.kind == "f" and c not in skip]
    values = frame[floats].to_numpy(dtype=float)
    inf = [c for c in floats if np.isinf(frame[c]).any()]
    assert not inf, f"{what}: infinite values in {inf}"
    reasons = frame[reason_cols].fillna("").astype(str).agg("".join, axis=1).to_numpy()
    bad = np.isnan(values).any(axis=1) & (reasons == "")
    assert not bad.any(), f"{what}: NaN without a reason in rows {np.flatnonzero(bad)[:5]}"


@pytest.mark.filterwarnings("error")
def test_values_near_float_limits_batch_equals_per_case():
    obs, rho = extreme_observations()
    ref_cases, ref_contrasts, ref_trends = reference(obs, rho)
    cases, contrasts = case_effects_batch(obs, rho)
    trends = baseline_trends_batch(obs)
    # source: per-case reference path (case_effect_sizes, baseline_trends), itself checked in
    # tests/test_effect_sizes.py and tests/test_trend.py on the same kinds of series
    assert_frames_equal(cases, ref_cases[CASE_LEVEL_COLUMNS], "extreme case_level")
    assert_frames_equal(contrasts, ref_contrasts, "extreme per_contrast")
    assert_frames_equal(trends, ref_trends, "extreme trends")
    _finite_or_nan_with_reason(cases, "extreme case_level")
    _finite_or_nan_with_reason(contrasts, "extreme per_contrast")
    # the exact Mann-Kendall p-value is NaN by definition with ties
    _finite_or_nan_with_reason(trends, "extreme trends", skip=("mann_kendall_p_value_exact",))
    # the scaled paths were exercised: numerical_failure where a value is not representable
    assert contrasts["smd_reason_baseline_sd"].str.contains(R.NUMERICAL_FAILURE).any()
    assert trends["theil_sen_reason"].str.contains(R.NUMERICAL_FAILURE).any()
    assert trends["ols_reason"].str.contains(R.NUMERICAL_FAILURE).any()
    assert np.isfinite(contrasts.loc[contrasts["case_key"].str.contains("/huge/"), "smd_pooled_sd"]).all()


# ------------------------------------------------------------------------------------------------
# internal shortcuts of the batch path against their plain definitions
# ------------------------------------------------------------------------------------------------


def test_pairwise_counts_equal_plain_pair_loops():
    from audit.batch_effects import _pairwise_counts

    rng = np.random.default_rng(3)
    pool = np.array([0.0, -0.0, 1.0, 2.0, 3.5, np.nan, np.inf, -np.inf, 1e308, -1e308, 5e-324])
    for trial in range(150):
        nseg = int(rng.integers(2, 30))
        seg_len = rng.integers(0 if trial % 5 == 0 else 1, 14, nseg)
        seg_start = np.r_[0, np.cumsum(seg_len)[:-1]].astype(np.int64)
        total = int(seg_len.sum())
        values = (rng.choice(pool[: int(rng.integers(3, len(pool) + 1))], total) if trial % 2
                  else np.round(rng.normal(size=total), 1))
        rows = rng.permutation(total)
        m = int(rng.integers(1, 25))
        bseg, tseg = rng.integers(0, nseg, m), rng.integers(0, nseg, m)
        sign = rng.choice([-1.0, 1.0], m)
        with np.errstate(all="ignore"):
            pos, neg, ties, s_trend, tie_sum = _pairwise_counts(values, rows, seg_start, seg_len, bseg, tseg, sign)
        for i in range(m):
            a = values[rows[seg_start[bseg[i]]:seg_start[bseg[i]] + seg_len[bseg[i]]]] * sign[i]
            b = values[rows[seg_start[tseg[i]]:seg_start[tseg[i]] + seg_len[tseg[i]]]] * sign[i]
            # plain definitions: every (baseline, treatment) pair, every later-earlier baseline pair,
            # tie groups t of the finite pooled values with sum(t^3 - t)
            assert pos[i] == sum(int(y > x) for x in a for y in b)
            assert neg[i] == sum(int(y < x) for x in a for y in b)
            assert ties[i] == sum(int(y == x) for x in a for y in b)
            assert s_trend[i] == sum(np.sign(int(a[j] > a[k]) - int(a[j] < a[k]))
                                     for k in range(len(a)) for j in range(k + 1, len(a)))
            pooled = np.r_[a, b]
            fin = pooled[np.isfinite(pooled)]
            t = np.array([np.sum(fin == v) for v in fin], dtype=float)
            assert tie_sum[i] == np.sum(t * t - 1.0)


def test_column_shortcuts_equal_their_plain_forms():
    from audit.batch_effects import TextCodes, _normalize_directions, _unique_rows, dense_rank
    from audit.trend import normalize_direction

    text = pd.Series(["b", " A ", "b", "nan", "a\x00"] * 3, dtype="str")
    codes = TextCodes(text)
    expected = text.to_numpy().astype(str)
    assert codes.strings().dtype == expected.dtype and np.array_equal(codes.strings(), expected)
    with_missing = pd.Series(["b", None, "c"], dtype=object)
    assert np.array_equal(TextCodes(with_missing).strings(), with_missing.to_numpy().astype(str))
    raw = np.empty(7, dtype=object)
    raw[:] = ["increase", " Decrease ", None, np.nan, "sideways", "increase", pd.NA]
    assert _normalize_directions(raw).tolist() == [normalize_direction(v) for v in raw]
    rng = np.random.default_rng(5)
    keys = rng.integers(-3, 4, size=(200, 3))
    uniq, inv = _unique_rows(keys)
    ref_uniq, ref_inv = np.unique(keys, axis=0, return_inverse=True)
    assert np.array_equal(uniq, ref_uniq) and np.array_equal(inv, ref_inv.ravel())
    v = rng.integers(-5, 9, size=300)
    assert all(np.array_equal(x, y.ravel()) for x, y in zip(dense_rank(v), np.unique(v, return_inverse=True)))


def test_prepared_columns_and_shuffled_input_give_the_same_tables(synthetic):
    from audit.batch_effects import ObservationColumns

    obs, rho, _ = synthetic
    cases, contrasts = case_effects_batch(obs, rho)
    prepared = ObservationColumns(obs)
    got_cases, got_contrasts = case_effects_batch(prepared, rho)
    pd.testing.assert_frame_equal(got_cases, cases, check_exact=True)
    pd.testing.assert_frame_equal(got_contrasts, contrasts, check_exact=True)
    pd.testing.assert_frame_equal(baseline_trends_batch(prepared), baseline_trends_batch(obs), check_exact=True)
    # rows of a case out of session order (cases with distinct sessions): the effect sizes sort
    # them inside the batch path as the reference does
    keys = obs["case_key"].unique()
    repeated = obs.loc[obs.duplicated(["case_key", "session"]), "case_key"].unique()
    keep = ~np.isin(keys, repeated)
    part = obs[obs["case_key"].isin(keys[keep])].reset_index(drop=True)
    case_no = pd.factorize(part["case_key"])[0]
    flipped = part.iloc[np.lexsort((-np.arange(len(part)), case_no))].reset_index(drop=True)
    want_cases, want_contrasts = case_effects_batch(part, rho[keep])
    got_cases, got_contrasts = case_effects_batch(flipped, rho[keep])
    assert not flipped["session"].equals(part["session"])
    pd.testing.assert_frame_equal(got_cases, want_cases, check_exact=True)
    pd.testing.assert_frame_equal(got_contrasts, want_contrasts, check_exact=True)
