"""Numerical robustness: every diagnostic on adversarial series returns finite values or NaN with a
reason code, never raises and never warns (warnings are errors in this module).

Adversarial inputs: constant series, one outlier of 1e12, alternating +-1, all ties, n equal to
k + 1, values near the float limits (1e300, 1e-300, -1e300, the largest double), and tiny and
huge session numbers; plus random short series from a wide float strategy (hypothesis).
The property checked is the house rule (RULES.md: degenerate input returns NaN plus a reason
code, never raises), not any statistical value.
"""

from __future__ import annotations

import dataclasses
import math
import sys

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import audit.diagnose as diagnose_module
from audit import reasons as R
from audit.ar1 import ar1_batch, ar1_ml, ar1_reml, gls_ar1_table
from audit.asymptotic_tests import breusch_godfrey, breusch_godfrey_batch, ljung_box, ljung_box_batch
from audit.autocorrelation import phase_lag1, phase_lag1_batch, residual_lag1, residual_lag1_batch
from audit.design import case_design
from audit.diagnose import diagnose_cases, diagnose_group, phase_table
from audit.durbin_watson import dw_power, dw_pvalues_batch, dw_statistic, dw_test
from audit.regression import (
    gls_contrast_batch,
    gls_contrast_test,
    hac_contrast_batch,
    hac_contrast_test,
    ols_contrast_batch,
    ols_contrast_test,
    ols_fit,
)

pytestmark = pytest.mark.filterwarnings("error")

KNOWN_REASONS = {v for k, v in vars(R).items() if k.isupper() and isinstance(v, str) and v}

N_A, N_B = 6, 6
N = N_A + N_B
BASE = np.array([3.0, 4.0, 2.0, 5.0, 3.5, 4.5, 8.0, 9.5, 7.0, 8.5, 10.0, 9.0])  # an ordinary AB series

# Adversarial outcome series of length N (AB, 6 + 6 points).
SERIES = {
    "constant": np.full(N, 5.0),
    "outlier_1e12": np.where(np.arange(N) == 7, 1e12, BASE),
    "alternating_pm1": np.array([(-1.0) ** i for i in range(N)]),
    "all_ties": np.r_[np.full(N_A, 3.0), np.full(N_B, 7.0)],
    "zeros": np.zeros(N),
    "huge_1e300": BASE * 1e300 / 10.0,
    "huge_negative_1e300": -BASE * 1e300 / 10.0,
    "huge_alternating": np.array([1e300 * (-1.0) ** i for i in range(N)]),
    "largest_double": np.where(np.arange(N) % 3 == 0, sys.float_info.max, -sys.float_info.max),
    "tiny_1e-300": BASE * 1e-300,
    "subnormal": BASE * 5e-324,
    "mixed_scales": np.array([1e-300, 1e300, 0.0, -1e300, 1.0, 1e-300, 2.0, 1e300, -1.0, 0.5, 1e12, -1e12]),
    "constant_huge": np.full(N, 1e300),
    "constant_tiny": np.full(N, 1e-300),
}
# Session numbers (increasing) for n points.
SESSION_MAKERS = {
    "ordinary": lambda n: np.arange(1.0, n + 1),
    "negative_start": lambda n: np.arange(-5.0, n - 5),
    "offset_1e15": lambda n: 1e15 + np.arange(n),
    "spaced_1e200": lambda n: 1e200 * np.arange(1.0, n + 1),
    "spaced_1e-300": lambda n: 1e-300 * np.arange(1.0, n + 1),
    "near_max": lambda n: sys.float_info.max * np.linspace(0.5, 1.0, n),
}
SESSIONS = {name: make(N) for name, make in SESSION_MAKERS.items()}


# --------------------------------------------------------------------------- the property


def _float_fields(obj) -> dict[str, float]:
    out = {}
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        if isinstance(v, (float, np.floating)):
            out[f.name] = float(v)
        elif isinstance(v, np.ndarray) and v.dtype.kind == "f":
            for i, x in enumerate(v.ravel()):
                out[f"{f.name}[{i}]"] = float(x)
    return out


def _check_reason_text(reason: str, where: str) -> None:
    for part in str(reason).split(";"):
        assert part == "" or part in KNOWN_REASONS, f"{where}: unknown reason code {part!r}"


# Fields that are NaN by definition when the method does not use them (not a failure).
NOT_APPLICABLE = {"rho"}


def check_result(obj, where: str) -> None:
    """Finite values, or NaN with a non-empty reason; never an infinity."""
    fields = _float_fields(obj)
    if getattr(obj, "method", "") in ("ols", "hac"):
        fields = {k: v for k, v in fields.items() if k not in NOT_APPLICABLE}
    inf = [k for k, v in fields.items() if math.isinf(v)]
    assert not inf, f"{where}: infinite fields {inf} in {obj}"
    nan = [k for k, v in fields.items() if math.isnan(v)]
    reason = getattr(obj, "reason", "")
    _check_reason_text(reason, where)
    if nan:
        assert reason, f"{where}: NaN fields {nan} without a reason: {obj}"


def check_frame(df: pd.DataFrame, where: str, reason_cols=None, skip=()) -> None:
    """Row-wise check_result for batch outputs (float columns vs the row's reason columns)."""
    reason_cols = reason_cols or [c for c in df.columns if c == "reason" or c.endswith("_reason")]
    floats = [c for c in df.columns if df[c].dtype.kind == "f" and c not in skip]
    for i in range(len(df)):
        row = df.iloc[i]
        vals = {c: float(row[c]) for c in floats}
        inf = [c for c, v in vals.items() if math.isinf(v)]
        assert not inf, f"{where} row {i}: infinite columns {inf}"
        nan = [c for c, v in vals.items() if math.isnan(v)]
        reasons = ";".join(str(row[c]) for c in reason_cols if isinstance(row[c], str) and row[c])
        _check_reason_text(reasons, where)
        if nan:
            assert reasons, f"{where} row {i}: NaN columns {nan} without a reason"


# --------------------------------------------------------------------------- per-function checks


def _ab_design(session=None):
    s = SESSIONS["ordinary"] if session is None else session
    ph = np.r_[np.ones(N_A, int), np.full(N_B, 2)]
    return case_design(s, ph, np.where(ph == 1, "baseline", "treatment"), "AB")


def run_all_functions(y: np.ndarray, X: np.ndarray, c: np.ndarray, where: str) -> None:
    """Call every public diagnostic on one series with design X and contrast c."""
    y = np.asarray(y, dtype=float)
    Y = np.vstack([y, BASE[: y.size] if y.size <= BASE.size else np.resize(BASE, y.size)])
    fit = ols_fit(y, X)
    check_result(fit, f"{where} ols_fit")
    e = fit.residuals
    check_result(ols_contrast_test(y, X, c), f"{where} ols_contrast_test")
    check_result(gls_contrast_test(y, X, c, 0.4), f"{where} gls_contrast_test")
    check_result(hac_contrast_test(y, X, c), f"{where} hac_contrast_test")
    check_frame(ols_contrast_batch(Y, X, c), f"{where} ols_contrast_batch", skip=NOT_APPLICABLE)
    check_frame(gls_contrast_batch(Y, X, c, np.array([0.4, -0.3])), f"{where} gls_contrast_batch")
    check_frame(hac_contrast_batch(Y, X, c), f"{where} hac_contrast_batch", skip=NOT_APPLICABLE)
    check_result(ar1_reml(y, X), f"{where} ar1_reml")
    check_result(ar1_ml(y, X), f"{where} ar1_ml")
    check_frame(ar1_batch(Y, X, "REML"), f"{where} ar1_batch REML")
    check_frame(ar1_batch(Y, X, "ML"), f"{where} ar1_batch ML")
    check_frame(gls_ar1_table(y, X, 0.3), f"{where} gls_ar1_table")
    # residual-based statistics: on the OLS residuals (zeros where ols_fit gave NaN)
    e_used = np.where(np.isfinite(e), e, 0.0)
    E = np.vstack([e_used, e_used[::-1]])
    check_result(dw_test(e_used, X, scale=float(np.max(np.abs(y))) if np.all(np.isfinite(y)) else None),
                 f"{where} dw_test")
    check_result(dw_test(e_used, X), f"{where} dw_test (no scale)")
    d = dw_statistic(e_used)
    assert math.isnan(d) or math.isfinite(d), f"{where} dw_statistic {d}"
    p_pos, p_neg = dw_pvalues_batch(np.array([d, 2.0]), X)
    assert not np.any(np.isinf(p_pos)) and not np.any(np.isinf(p_neg)), f"{where} dw_pvalues_batch"
    check_result(residual_lag1(e_used, X, y), f"{where} residual_lag1")
    check_frame(residual_lag1_batch(E, X, np.vstack([y, y[::-1]])), f"{where} residual_lag1_batch")
    check_result(breusch_godfrey(e_used, X, y), f"{where} breusch_godfrey")
    check_frame(breusch_godfrey_batch(E, X, np.vstack([y, y[::-1]])), f"{where} breusch_godfrey_batch")
    check_result(ljung_box(e_used, y=y), f"{where} ljung_box")
    check_frame(ljung_box_batch(E, None, np.vstack([y, y[::-1]])), f"{where} ljung_box_batch")
    check_result(phase_lag1(y), f"{where} phase_lag1")
    check_frame(phase_lag1_batch(Y), f"{where} phase_lag1_batch")


@pytest.mark.parametrize("name", list(SERIES))
def test_every_function_on_adversarial_outcomes(name):
    des = _ab_design()
    run_all_functions(SERIES[name], des.X, des.contrast, name)


@pytest.mark.parametrize("name", list(SESSIONS))
def test_every_function_on_adversarial_sessions(name):
    des = _ab_design(SESSIONS[name])
    for series in ("outlier_1e12", "alternating_pm1", "huge_1e300"):
        run_all_functions(SERIES[series] if series != "outlier_1e12" else BASE, des.X, des.contrast,
                          f"sessions {name}, {series}")


@pytest.mark.parametrize("k", [1, 2, 3, 4])
def test_n_equal_to_k_plus_one(k):
    rng = np.random.default_rng(k)
    n = k + 1
    X = np.column_stack([np.ones(n)] + [np.arange(n, dtype=float) ** j for j in range(1, k)])
    c = np.zeros(k)
    c[-1] = 1.0
    for y in (rng.normal(size=n), np.full(n, 2.0), np.array([(-1.0) ** i for i in range(n)])):
        run_all_functions(y, X, c, f"n=k+1={n}")
    check_result(dw_test(rng.normal(size=n), X), "dw_test n=k+1")
    p = dw_power(X, 0.3)
    assert math.isnan(p) or 0.0 <= p <= 1.0


def test_singular_and_non_finite_designs():
    X = np.column_stack([np.ones(N), np.ones(N), np.arange(N, dtype=float)])  # two equal columns
    c = np.array([0.0, 0.0, 1.0])
    run_all_functions(BASE, X, c, "singular design")
    Xn = _ab_design().X.copy()
    Xn[3, 1] = np.nan
    run_all_functions(BASE, Xn, _ab_design().contrast, "NaN in design")
    y = BASE.copy()
    y[4] = np.inf
    run_all_functions(y, _ab_design().X, _ab_design().contrast, "inf in y")
    y[4] = np.nan
    run_all_functions(y, _ab_design().X, _ab_design().contrast, "NaN in y")


# --------------------------------------------------------------------------- the whole engine


def _observations(cases: dict[str, tuple[np.ndarray, np.ndarray, list[str]]], design="AB") -> pd.DataFrame:
    """Clean-observations table from {case: (sessions, outcomes, phase labels)}."""
    rows = []
    for name, (sess, ys, labels) in cases.items():
        idx, prev = 0, None
        for s, y, lab in zip(sess, ys, labels):
            if lab != prev:
                idx, prev = idx + 1, lab
            rows.append({"case_key": name, "study": "s", "case": name, "series": "", "session": float(s),
                         "outcome": float(y), "phase": lab, "phase_index": idx,
                         "condition": "baseline" if lab.startswith("A") else "treatment", "design": design,
                         "outcome_scale": None, "desired_direction": "increase", "tier": None})
    return pd.DataFrame(rows)


AB_LABELS = ["A"] * N_A + ["B"] * N_B
# Columns of the cases table made by this engine's own parts (identity + diagnose_group).
OWN_CASE_COLUMNS = set(diagnose_module.CASE_ID_COLUMNS) | set(
    diagnose_group(BASE[None, :], _ab_design(), 0.05, None).columns)


def check_engine(out: dict[str, pd.DataFrame], where: str, others: str = "strict") -> None:
    """The property on every table, strictly: case-model columns (identity + diagnose_group's), the
    phase table, and the effect-size and trend columns (others="ignore": the latter not checked)."""
    cases, phases = out["cases"], out["phases"]
    own = [c for c in cases.columns if c in OWN_CASE_COLUMNS]
    check_frame(cases[own], f"{where} cases")
    trend_cols = [c for c in phases.columns if c.startswith("trend_")]
    check_frame(phases.drop(columns=trend_cols), f"{where} phases")
    if others == "ignore":
        return
    check_frame(cases[[c for c in cases.columns if c not in OWN_CASE_COLUMNS]], f"{where} cases")
    # trends are computed for baseline phases only (treatment rows: not applicable)
    check_frame(phases.loc[phases["condition"] == "baseline", trend_cols], f"{where} baseline phase trends")
    if "contrasts" in out and len(out["contrasts"]):
        check_frame(out["contrasts"], f"{where} contrasts")


def run_engine(obs: pd.DataFrame, where: str) -> dict[str, pd.DataFrame]:
    """diagnose_cases (an exception or warning anywhere fails the test)."""
    return diagnose_cases(obs)


ENGINE_CASES = {
    **{f"outcome_{name}": (SESSIONS["ordinary"], y, AB_LABELS) for name, y in SERIES.items()},
    **{f"sessions_{name}": (s, BASE, AB_LABELS) for name, s in SESSIONS.items()},
    **{f"sessions_{name}_huge": (s, SERIES["huge_1e300"], AB_LABELS) for name, s in SESSIONS.items()},
}
TINY_CASES = {
    "k_plus_1": (np.arange(1.0, 5), np.array([1.0, 2.0, 4.0, 3.0]), ["A", "A", "B", "B"]),  # k = 3, n = 4
    "n_equals_k": (np.arange(1.0, 4), np.array([1.0, 2.0, 4.0]), ["A", "B", "B"]),
    "abab_ones": (np.arange(1.0, 5), np.array([1.0, 5.0, 1.0, 5.0]), ["A", "B", "A", "B"]),
}


@pytest.mark.parametrize("name", list(ENGINE_CASES))
def test_diagnose_cases_adversarial(name):
    obs = _observations({name: ENGINE_CASES[name], "ordinary": (SESSIONS["ordinary"], BASE, AB_LABELS)})
    out = run_engine(obs, name)
    assert len(out["cases"]) == 2
    check_engine(out, name)


@pytest.mark.parametrize("name", list(ENGINE_CASES))
def test_diagnose_group_adversarial(name):
    """The per-design-group path (diagnose_group) on each adversarial case, strictly."""
    sessions, y, labels = ENGINE_CASES[name]
    ph = np.cumsum(np.r_[True, np.asarray(labels[1:]) != np.asarray(labels[:-1])])
    des = case_design(sessions, ph, np.where(np.char.startswith(np.asarray(labels), "A"), "baseline", "treatment"), "AB")
    frame = diagnose_group(np.vstack([y, BASE]), des, 0.05, np.array([0.3, 0.3]))
    check_frame(frame, f"{name} diagnose_group")


def test_diagnose_group_and_phase_table_on_every_adversarial_series():
    des = _ab_design()
    Y = np.vstack(list(SERIES.values()))
    frame = diagnose_group(Y, des, 0.05, np.full(len(SERIES), 0.2))
    check_frame(frame, "diagnose_group")
    # the effect estimate is linear in y: scaling by 2**-k (exact) gives the same estimate / 2**k
    ordinary = diagnose_group(np.vstack([BASE, BASE * 2.0**-990, BASE * 2.0**990]), des, 0.05, None)
    est = ordinary["effect_ols_estimate"].to_numpy()
    np.testing.assert_allclose(est[1:], [est[0] * 2.0**-990, est[0] * 2.0**990], rtol=1e-14)  # up to BLAS rounding
    for col in ("dw_statistic", "dw_p_positive", "ar1_reml_rho", "r1_residual", "effect_ols_p_value"):
        np.testing.assert_allclose(ordinary[col], ordinary[col].iloc[0], rtol=1e-12, err_msg=col)  # scale-free
    obs = _observations({name: (SESSIONS["ordinary"], y, AB_LABELS) for name, y in SERIES.items()})
    table = phase_table(obs.sort_values(["case_key", "session"]).reset_index(drop=True))
    check_frame(table, "phase_table")


def test_diagnose_cases_with_n_equal_to_k_plus_one_and_one_point_phases():
    check_engine(run_engine(_observations(TINY_CASES), "tiny cases"), "tiny cases")


def test_diagnose_cases_alternating_design_adversarial():
    labels = ["A", "B"] * (N // 2)
    obs = _observations({name: (SESSIONS["ordinary"], SERIES[name], labels) for name in
                         ("constant", "alternating_pm1", "huge_1e300", "tiny_1e-300")}, design="alternating")
    check_engine(run_engine(obs, "alternating"), "alternating")


# --------------------------------------------------------------------------- random short series

WIDE = st.floats(allow_nan=False, allow_infinity=False, width=64)
VALUES = st.one_of(WIDE, st.floats(-1e6, 1e6), st.integers(-3, 3).map(float))


@settings(max_examples=150, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(y=st.integers(6, 30).flatmap(lambda n: st.lists(VALUES, min_size=n, max_size=n)), split=st.floats(0.3, 0.7))
def test_random_short_series_every_function(y, split):
    y = np.asarray(y, dtype=float)
    n = y.size
    n_a = min(max(int(round(n * split)), 3), n - 3)
    ph = np.r_[np.ones(n_a, int), np.full(n - n_a, 2)]
    des = case_design(np.arange(1.0, n + 1), ph, np.where(ph == 1, "baseline", "treatment"), "AB")
    run_all_functions(y, des.X, des.contrast, f"random n={n}")


@settings(max_examples=40, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(y=st.integers(6, 30).flatmap(lambda n: st.lists(VALUES, min_size=n, max_size=n)),
       sessions=st.sampled_from(list(SESSION_MAKERS)))
def test_random_short_series_engine(y, sessions):
    """diagnose_cases on random series: every table strictly (case model, effect sizes, trends)."""
    y = np.asarray(y, dtype=float)
    n = y.size
    n_a = n // 2
    s = SESSION_MAKERS[sessions](n)
    obs = _observations({"r": (s, y, ["A"] * n_a + ["B"] * (n - n_a))})
    check_engine(diagnose_cases(obs), f"random engine n={n}")
