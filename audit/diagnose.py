"""Per-case serial-dependence diagnostics for a whole review, batched by design signature.

Cases whose design matrix and effect contrast are equal (same session pattern, phase lengths
and model) are stacked into one matrix Y (cases x sessions) and every diagnostic that depends
only on the design (DW null distribution, bounds, power, null moments of r1) is computed once
for the group. ``diagnose_case`` is the straightforward per-case reference path used in tests.

Output tables (columns documented in README and schemas/results.py):
  cases   one row per case: model, effect under OLS / GLS-AR(1) REML / GLS at a supplied rho /
          HAC, flips against OLS, exact DW, residual lag-1 autocorrelation, REML and ML AR(1),
          Breusch-Godfrey and Ljung-Box, DW for the session-only regression, baseline trend
          and effect sizes.
  phases  one row per case and phase: n, mean, raw r1 and Huitema-McKean r1+ with its test.
  contrasts one row per baseline->treatment contrast: effect sizes (see audit.effect_sizes).
"""

from __future__ import annotations

from collections import defaultdict
from typing import Callable

import numpy as np
import pandas as pd

from audit import reasons as R
from audit.ar1 import ar1_batch
from audit.asymptotic_tests import breusch_godfrey_batch, ljung_box_batch
from audit.autocorrelation import phase_lag1_r1, phase_r1_plus, residual_lag1_batch
from audit.design import CaseDesign, case_design
from audit.batch_effects import (
    ObservationColumns,
    TextCodes,
    baseline_trend_parts,
    baseline_trends_batch,
    case_effects_batch,
    dense_rank,
    increasing_within,
)
from audit.stacked import diagnose_series
from audit.durbin_watson import dw_statistic_rows as _dw_rows, dw_zones as _zone
from audit.durbin_watson import critical_bounds, dw_power, dw_pvalues_batch, dw_statistic
from audit.regression import (
    binary_exponents,
    gls_contrast_batch,
    hac_contrast_batch,
    ols_contrast_batch,
    scale_rows,
    unscale,
    unscale_effect_columns,
)

DEFAULT_POWER_RHO = 0.3
CASE_ID_COLUMNS = ["case_key", "study", "case", "series", "design", "outcome_scale", "desired_direction"]

ProgressFn = Callable[[int, int], None]


def diagnose_group(Y: np.ndarray, design: CaseDesign, alpha: float, supplied_rho: np.ndarray | float | None,
                   power_rho: float = DEFAULT_POWER_RHO) -> pd.DataFrame:
    """All regression-based diagnostics for cases that share one design (rows of Y)."""
    X, c = design.X, design.contrast
    m, n = Y.shape
    k = X.shape[1]
    # Each series is scaled by a power of two (exact) so that values near the float limits cannot
    # overflow; every statistic below is scale-free except the effect estimates and standard
    # errors, which are scaled back at the end.
    ex = binary_exponents(Y)
    Y = scale_rows(Y, ex)
    out: dict[str, np.ndarray] = {}
    out["model"] = np.full(m, design.model, dtype=object)
    out["n_obs"] = np.full(m, n)
    out["n_params"] = np.full(m, k)
    out["df_resid"] = np.full(m, n - k)
    out["n_transitions"] = np.full(m, design.n_transitions)

    # OLS fit and residuals (shared projection)
    pinv = np.linalg.pinv(X)
    E = Y - (Y @ pinv.T) @ X.T
    no_effect = design.n_transitions == 0

    ols = ols_contrast_batch(Y, X, c, alpha)
    _put(out, "effect_ols", ols, ["estimate", "std_error", "p_value", "significant", "reason"])

    # AR(1): REML (primary) and ML (cross-check)
    reml = ar1_batch(Y, X, "REML")
    ml = ar1_batch(Y, X, "ML")
    out["ar1_reml_rho"] = reml["rho"].to_numpy()
    out["ar1_reml_at_bound"] = reml["at_bound"].to_numpy()
    out["ar1_reml_reason"] = reml["reason"].to_numpy()
    out["ar1_ml_rho"] = ml["rho"].to_numpy()

    rho_reml = np.nan_to_num(reml["rho"].to_numpy(), nan=0.0)
    gls = gls_contrast_batch(Y, X, c, rho_reml, alpha)
    gls_reason = np.where(reml["reason"].to_numpy() != R.OK, reml["reason"].to_numpy(), gls["reason"].to_numpy())
    gls.loc[gls_reason != R.OK, ["estimate", "std_error", "p_value"]] = np.nan
    gls["reason"] = gls_reason
    _put(out, "effect_gls_reml", gls, ["estimate", "std_error", "p_value", "significant", "reason"])

    if supplied_rho is not None:
        rho_s = np.broadcast_to(np.asarray(supplied_rho, dtype=float), (m,)).copy()
        gls_s = gls_contrast_batch(Y, X, c, np.nan_to_num(rho_s), alpha)
        gls_s.loc[~np.isfinite(rho_s), ["estimate", "std_error", "p_value"]] = np.nan
        out["effect_gls_supplied_rho"] = rho_s
        _put(out, "effect_gls_supplied", gls_s, ["estimate", "std_error", "p_value", "significant"])

    hac = hac_contrast_batch(Y, X, c, alpha)
    _put(out, "effect_hac", hac, ["std_error", "p_value", "significant"])
    out["effect_hac_lags"] = hac["lags"].to_numpy()

    if no_effect:
        for col in [k_ for k_ in out if k_.startswith("effect_")]:
            if out[col].dtype.kind == "f":
                out[col] = np.full(m, np.nan)
        out["effect_ols_reason"] = np.full(m, R.NO_CONTRAST, dtype=object)

    # flips against the OLS decision
    base = _decision(out["effect_ols_p_value"], alpha)
    for alt in ("gls_reml", "hac") + (("gls_supplied",) if supplied_rho is not None else ()):
        out[f"flip_{alt}"] = _flip(base, _decision(out[f"effect_{alt}_p_value"], alpha))
    flips = [out[f"flip_{a}"] for a in ("gls_reml", "hac")]
    out["flip_any"] = np.logical_or.reduce([f.fillna(False).to_numpy(dtype=bool) for f in flips])

    # Durbin-Watson, exact, on the model residuals
    d = _dw_rows(E, Y)
    p_pos, p_neg = dw_pvalues_batch(d, X)
    d_lower, d_upper = critical_bounds(n, k - 1, alpha)
    out["dw_statistic"] = d
    out["dw_p_positive"] = np.asarray(p_pos, dtype=float)
    out["dw_p_negative"] = np.asarray(p_neg, dtype=float)
    out["dw_d_lower"] = np.full(m, d_lower)
    out["dw_d_upper"] = np.full(m, d_upper)
    out["dw_zone"] = _zone(d, d_lower, d_upper)
    out["dw_significant_positive"] = out["dw_p_positive"] < alpha
    out["dw_significant_negative"] = out["dw_p_negative"] < alpha
    out["dw_power_rho"] = np.full(m, power_rho)
    out["dw_power"] = np.full(m, _safe_power(X, power_rho, alpha))

    # DW for the outcome on session alone (what published studies usually report)
    X0 = X[:, :2]  # intercept and session: the first two columns of every case model
    E0 = Y - (Y @ np.linalg.pinv(X0).T) @ X0.T
    d0 = _dw_rows(E0, Y)
    p0_pos, _ = dw_pvalues_batch(d0, X0)
    out["dw_session_only_statistic"] = d0
    out["dw_session_only_p_positive"] = np.asarray(p0_pos, dtype=float)

    # residual lag-1 autocorrelation with its exact null moments
    r1 = residual_lag1_batch(E, X, Y)
    out["r1_residual"] = r1["r1"].to_numpy()
    out["r1_null_mean"] = r1["null_mean"].to_numpy()
    out["r1_null_variance"] = r1["null_variance"].to_numpy()
    out["r1_corrected"] = r1["r1_corrected"].to_numpy()
    out["r1_z"] = r1["z"].to_numpy()
    out["r1_p_value"] = r1["p_value"].to_numpy()

    # asymptotic tests
    bg = breusch_godfrey_batch(E, X, Y)
    out["bg_statistic"] = bg["statistic"].to_numpy()
    out["bg_p_value"] = bg["p_value"].to_numpy()
    lb = ljung_box_batch(E, None, Y)
    out["lb_statistic"] = lb["statistic"].to_numpy()
    out["lb_lags"] = lb["lags"].to_numpy()
    out["lb_p_value"] = lb["p_value"].to_numpy()

    # degenerate series: statistics that need residual variance become NaN with a reason
    dead = ~(np.isfinite(d))
    if dead.any():
        for col in ("dw_p_positive", "dw_p_negative"):
            out[col] = np.where(dead, np.nan, out[col])
        out["dw_zone"] = np.where(dead, "unknown", out["dw_zone"])
    overflow = unscale_effect_columns(out, ex)
    out["reason"] = np.array([R.join(a, b, c_, R.NUMERICAL_FAILURE if o else R.OK) for a, b, c_, o in zip(
        out["effect_ols_reason"], out["ar1_reml_reason"], r1["reason"].to_numpy(), overflow)], dtype=object)
    return pd.DataFrame(out)


def _safe_power(X: np.ndarray, rho: float, alpha: float) -> float:
    try:
        return float(dw_power(X, rho, alpha))
    except (ValueError, np.linalg.LinAlgError):
        return float("nan")


def _put(out: dict, prefix: str, frame: pd.DataFrame, cols: list[str]) -> None:
    for col in cols:
        out[f"{prefix}_{col}"] = frame[col].to_numpy()


def _decision(p: np.ndarray, alpha: float) -> pd.Series:
    p = np.asarray(p, dtype=float)
    return pd.Series(pd.array(np.where(np.isfinite(p), p < alpha, False), dtype="boolean")).where(np.isfinite(p), pd.NA)


def _flip(a: pd.Series, b: pd.Series) -> pd.Series:
    return (a != b).astype("boolean")


def diagnose_cases(observations: pd.DataFrame, alpha: float = 0.05, supplied_rho: float | pd.Series | None = None,
                   power_rho: float = DEFAULT_POWER_RHO, progress: ProgressFn | None = None) -> dict[str, pd.DataFrame]:
    """Diagnose every case of clean observations; returns {"cases", "phases"} tables.

    ``supplied_rho``: one AR(1) coefficient for all cases, or a Series indexed by case_key
    (the review-wide shrunken value, a sensitivity grid point), for the extra GLS test.
    """
    obs, key_codes = _sorted_by_case_and_session(observations)
    condition = TextCodes(obs["condition"])
    oc = ObservationColumns(obs, condition=condition, key_codes=key_codes)
    case_rows = oc.case_start.astype(np.int64)
    ident = obs[CASE_ID_COLUMNS].iloc[case_rows].reset_index(drop=True)
    if isinstance(supplied_rho, pd.Series):
        rho_per_case = ident["case_key"].map(supplied_rho).to_numpy(dtype=float)
    elif supplied_rho is not None:
        rho_per_case = np.full(len(case_rows), float(supplied_rho))
    else:
        rho_per_case = None
    if not len(case_rows):
        return _empty_tables(obs)

    # regression-based diagnostics: cases stacked by (n, k), batched linear algebra (audit.stacked)
    stats_frame = diagnose_series(
        oc.session, oc.outcome, oc.phase_index, condition.strings(), TextCodes(obs["design"]).strings(),
        TextCodes(obs["phase"]).strings(), case_rows, alpha, rho_per_case, power_rho, progress)
    cases = pd.concat([ident, stats_frame.reset_index(drop=True)], axis=1)

    # effect sizes and baseline trends, vectorised over cases (audit.batch_effects)
    rho_for_effects = cases["ar1_reml_rho"].to_numpy(dtype=float)
    case_es, contrasts = case_effects_batch(oc, rho_for_effects, alpha)
    phases, phase_case = _phase_table(oc)
    # baseline trends: by scope straight from the arrays when the phase table has case positions
    parts = baseline_trend_parts(oc, TREND_COLUMNS, alpha) if phase_case is not None else None
    joined = None
    if parts is not None:
        trend_rows, per_phase = parts
        joined = _with_phase_trends(phases, phase_case, per_phase)
    if joined is None:
        trends = baseline_trends_batch(oc, alpha)
        overall = trends[trends["scope"] == "all_baseline"].drop_duplicates("case_key").set_index("case_key")
        trend_rows = overall.reindex(ident["case_key"]).reset_index(drop=True)
        per_phase = trends[trends["scope"] == "phase"]
        if len(per_phase):
            keep = ["case_key", "phase_index"] + [c for c in TREND_COLUMNS if c in per_phase]
            pt = per_phase[keep].rename(columns={c: f"trend_{c}" for c in TREND_COLUMNS})
            pt = pt.assign(phase_index=pt["phase_index"].astype("int64"))
            phases = phases.merge(pt, on=["case_key", "phase_index"], how="left")
    else:
        phases = joined
    cases = pd.concat([cases, _effect_columns(case_es), _trend_columns(trend_rows)], axis=1)
    return {"cases": cases, "phases": phases, "contrasts": contrasts.reset_index(drop=True)}


def _with_phase_trends(phases: pd.DataFrame, phase_case: np.ndarray, per_phase: pd.DataFrame) -> pd.DataFrame | None:
    """phases with the trend_* columns of its baseline phases, as a left merge on (case, phase_index)
    gives them (NaN elsewhere); None when the rows cannot be matched that way (the caller merges)."""
    if not len(per_phase):
        return phases
    cols = [c for c in TREND_COLUMNS if c in per_phase]
    if any(per_phase[c].dtype not in (np.float64, "str") for c in cols):
        return None
    ph = phases["phase_index"].to_numpy()
    tp = per_phase["phase_index"].to_numpy()
    if ph.dtype.kind not in "iu" or not len(ph):
        return None
    lo = min(int(ph.min()), int(tp.min()))
    width = max(int(ph.max()), int(tp.max())) - lo + 1
    pk = phase_case.astype(np.int64) * width + (ph - lo)
    tk = per_phase["case"].to_numpy().astype(np.int64) * width + (tp - lo)
    order = np.argsort(tk, kind="stable")
    tks = tk[order]
    if (tks[1:] == tks[:-1]).any():
        return None
    pos = np.minimum(np.searchsorted(tks, pk), len(tks) - 1)
    take = np.where(tks[pos] == pk, order[pos], -1)
    out = phases.copy(deep=False)
    for c in cols:
        out[f"trend_{c}"] = per_phase[c].array.take(take, allow_fill=True)
    return out


def _sorted_by_case_and_session(observations: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray | None]:
    """(observations sorted by case_key then session (stable) with a fresh index, codes of the
    sorted distinct case keys of its rows or None). Input already in that order with strictly
    increasing sessions within each case (clean observations) is used as it is."""
    try:
        codes = np.asarray(pd.factorize(observations["case_key"], sort=True)[0], dtype=np.int64)
    except TypeError:  # keys that cannot be ordered: as the sort reports them
        codes = np.zeros(0, dtype=np.int64)
    if len(codes) and codes.min() >= 0:
        session = observations["session"].to_numpy(dtype=float)
        dk = codes[1:] - codes[:-1]
        same = dk == 0
        if not (dk < 0).any() and (session[1:][same] > session[:-1][same]).all():
            return observations.reset_index(drop=True), codes
    return observations.sort_values(["case_key", "session"], kind="stable").reset_index(drop=True), None


def _empty_tables(obs: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """Tables of a review without accepted cases (columns of identity only)."""
    return {"cases": obs.iloc[0:0][CASE_ID_COLUMNS].reset_index(drop=True),
            "phases": pd.DataFrame({"case_key": pd.Series([], dtype=object),
                                    "phase_index": pd.Series([], dtype="int64")}),
            "contrasts": pd.DataFrame({"case_key": pd.Series([], dtype=object)})}


TREND_COLUMNS = [
    "ols_slope", "ols_slope_p_value", "theil_sen_slope", "theil_sen_slope_low", "theil_sen_slope_high",
    "mann_kendall_s", "mann_kendall_tau_b", "mann_kendall_p_value", "mann_kendall_hamed_rao_lag1_p_value",
    "moves_in_therapeutic_direction", "moves_in_therapeutic_direction_hamed_rao_lag1", "reason",
]
_EFFECT_RENAMES = {
    "tau_flip": "flip_tau", "tau_u_flip": "flip_tau_u", "lrr_flip": "flip_lrr",
    "mean_difference_welch_flip": "flip_mean_difference", "lrr_improvement": "lrr", "reason": "effect_sizes_reason",
}
_EFFECT_DROP = ["design", "desired_direction", "outcome_scale", "alpha", "aggregation"]


def _effect_columns(rows: pd.DataFrame | list[dict]) -> pd.DataFrame:
    """Case-level effect sizes (audit.effect_sizes.case_effect_sizes), flips named flip_*."""
    frame = pd.DataFrame(rows).reset_index(drop=True)
    frame = frame.drop(columns=_EFFECT_DROP, errors="ignore").rename(columns=_EFFECT_RENAMES)
    if "lrr_se" in frame:
        frame["lrr_variance"] = frame["lrr_se"] ** 2
    for col in [c for c in frame if c.startswith("flip_")]:
        frame[col] = frame[col].astype("boolean")
    return frame


def _trend_columns(rows: pd.DataFrame) -> pd.DataFrame:
    """Trend of all baseline points together (audit.trend.baseline_trends, scope all_baseline)."""
    frame = rows.reindex(columns=TREND_COLUMNS).reset_index(drop=True)
    frame = frame.rename(columns={c: f"baseline_{c}" for c in TREND_COLUMNS})
    frame["baseline_moves_in_therapeutic_direction"] = frame["baseline_moves_in_therapeutic_direction"].fillna("unknown")
    return frame


def phase_table(obs: pd.DataFrame | ObservationColumns) -> pd.DataFrame:
    """One row per case and phase: size, mean, sd, raw r1 and Huitema-McKean r1+ (batched by phase length).

    ``obs``: observations, or their columns as diagnose_cases reads them once (ObservationColumns).
    """
    return _phase_table(obs if isinstance(obs, ObservationColumns) else ObservationColumns(obs))[0]


def _phase_table(oc: ObservationColumns) -> tuple[pd.DataFrame, np.ndarray | None]:
    """(phase_table, position of each row's case among oc's cases, or None on the group-by path)."""
    frame = oc.frame
    ph = oc.phase_index
    if (oc.key_rank is None or ph.dtype.kind not in "iu" or frame["session"].dtype != np.float64
            or frame["phase"].hasnans or frame["condition"].hasnans):
        return _phase_table_grouped(frame), None
    # groups (case_key, phase_index) as one integer, in the order of both keys
    ph_uniq, ph_rank = dense_rank(ph)
    g = oc.key_rank * max(len(ph_uniq), 1) + ph_rank
    x = oc.session
    yv = oc.outcome
    # rows by group, then session (stable); equal sessions within a group go the general way
    if len(g) > 1 and not increasing_within(g, x):
        order = np.lexsort((x, g))
        if not increasing_within(g[order], x[order]):
            return _phase_table_grouped(frame), None
        gs = g[order]
    else:
        order, gs = None, g
    nrow = len(gs)
    if nrow == 0:
        return _phase_table_grouped(frame), None
    starts = np.flatnonzero(np.r_[True, gs[1:] != gs[:-1]])
    sizes = np.diff(np.r_[starts, nrow])
    first_row = starts if order is None else order[starts]
    ys = yv if order is None else yv[order]
    # mean and sd from the outcomes scaled by a power of two per phase (exact): no overflow near
    # the float limits; the scale is undone afterwards
    top = np.maximum.reduceat(np.abs(np.where(np.isfinite(ys), ys, 0.0)), starts)
    ex_group = np.frexp(top)[1].astype(np.int64)
    ex_sorted = np.repeat(ex_group, sizes)
    if order is None:
        ex_row = ex_sorted
    else:
        ex_row = np.empty(nrow, dtype=np.int64)
        ex_row[order] = ex_sorted
    # mean and sd by pandas on the integer group key (the same kernels and row order as a group-by
    # on the two key columns); sessions increase strictly within a group: first and last are its
    # min and max
    by_group = pd.Series(np.ldexp(yv, -ex_row)).groupby(g, sort=True)
    xs = x if order is None else x[order]
    table = pd.DataFrame({
        "case_key": frame["case_key"].array.take(first_row),
        "phase_index": ph[first_row],
        "phase": frame["phase"].array.take(first_row),
        "condition": frame["condition"].array.take(first_row),
        "n": sizes.astype(np.int64),
        "first_session": xs[starts],
        "last_session": xs[starts + sizes - 1],
        "mean": by_group.mean().to_numpy(),
        "sd": by_group.std().to_numpy(),
    })
    return _phase_r1(table, ex_group, ys, starts), oc.case_id[first_row]


def _phase_r1(table: pd.DataFrame, ex_group: np.ndarray, y: np.ndarray, starts: np.ndarray) -> pd.DataFrame:
    """Undo the scaling of mean and sd, add raw r1 and r1+ per phase (y: outcomes by phase, in
    session order; phase i is y[starts[i]:starts[i] + n])."""
    overflow = np.zeros(len(table), dtype=bool)
    for col in ("mean", "sd"):
        values = unscale(table[col].to_numpy(dtype=float), ex_group)
        overflow |= np.isfinite(table[col].to_numpy(dtype=float)) & ~np.isfinite(values)
        table[col] = np.where(np.isfinite(values), values, np.nan)
    sizes = table["n"].to_numpy()
    r1 = np.full(len(table), np.nan)
    reason = np.full(len(table), R.OK, dtype=object)
    for n_len in np.unique(sizes):
        rows = np.flatnonzero(sizes == n_len)
        r1[rows], reason[rows] = phase_lag1_r1(y[starts[rows][:, None] + np.arange(n_len)])
    # r1+ and its test for all phases at once (NaN wherever r1 is)
    r1_plus, _, z, _, p_two = phase_r1_plus(sizes, r1)
    for name, values in (("r1", r1), ("r1_plus", r1_plus), ("r1_plus_z", z), ("r1_plus_p_value", p_two)):
        table[name] = values
    reason[overflow] = [R.join(r, R.NUMERICAL_FAILURE) for r in reason[overflow]]
    table["r1_reason"] = reason
    return table


def _phase_table_grouped(obs: pd.DataFrame) -> pd.DataFrame:
    """phase_table by a pandas group-by on the key columns (any input, e.g. missing keys or labels)."""
    yv = obs["outcome"].to_numpy(dtype=float)
    work = obs.assign(_abs=np.abs(np.where(np.isfinite(yv), yv, 0.0)))
    top = work.groupby(["case_key", "phase_index"], sort=False)["_abs"].transform("max").to_numpy()
    ex = np.frexp(top)[1].astype(np.int64)
    work = work.assign(_scaled=np.ldexp(yv, -ex), _ex=ex)
    g = work.groupby(["case_key", "phase_index"], sort=True)
    table = g.agg(phase=("phase", "first"), condition=("condition", "first"), n=("outcome", "size"),
                  first_session=("session", "min"), last_session=("session", "max"),
                  mean=("_scaled", "mean"), sd=("_scaled", "std"), _ex=("_ex", "first")).reset_index()
    ex_group = table["_ex"].to_numpy()
    table = table.drop(columns="_ex")
    y = obs.sort_values(["case_key", "phase_index", "session"], kind="stable")["outcome"].to_numpy(dtype=float)
    starts = np.r_[0, np.cumsum(table["n"].to_numpy())[:-1]].astype(np.int64)
    return _phase_r1(table, ex_group, y, starts)


def diagnose_case(session, outcome, phase_index, condition, design: str, phase_label=None, alpha: float = 0.05,
                  supplied_rho: float | None = None, power_rho: float = DEFAULT_POWER_RHO) -> dict:
    """Per-case reference path: the same diagnostics from the per-case functions (no batching).

    Used in tests to check the batched path; slower, and it returns the main columns only.
    """
    from audit.ar1 import ar1_ml, ar1_reml
    from audit.autocorrelation import residual_lag1
    from audit.durbin_watson import dw_test
    from audit.regression import gls_contrast_test, hac_contrast_test, ols_contrast_test, ols_fit

    des = case_design(np.asarray(session, float), np.asarray(phase_index), np.asarray(condition).astype(str), design,
                      None if phase_label is None else np.asarray(phase_label).astype(str))
    y = np.asarray(outcome, float)
    X, c = des.X, des.contrast
    fit = ols_fit(y, X)
    ols = ols_contrast_test(y, X, c, alpha)
    reml = ar1_reml(y, X)
    gls = gls_contrast_test(y, X, c, reml.rho, alpha)
    hac = hac_contrast_test(y, X, c, alpha)
    dw = dw_test(fit.residuals, X, alpha, scale=float(np.max(np.abs(y))))
    r1 = residual_lag1(fit.residuals, X, y)
    out = {
        "model": des.model, "n_obs": des.n_obs, "n_params": des.n_params,
        "effect_ols_estimate": ols.estimate, "effect_ols_std_error": ols.std_error, "effect_ols_p_value": ols.p_value,
        "ar1_reml_rho": reml.rho, "ar1_ml_rho": ar1_ml(y, X).rho,
        "effect_gls_reml_estimate": gls.estimate, "effect_gls_reml_std_error": gls.std_error,
        "effect_gls_reml_p_value": gls.p_value,
        "effect_hac_std_error": hac.std_error, "effect_hac_p_value": hac.p_value,
        "dw_statistic": dw.statistic, "dw_p_positive": dw.p_positive, "dw_p_negative": dw.p_negative,
        "dw_d_lower": dw.d_lower, "dw_d_upper": dw.d_upper, "dw_zone": dw.zone,
        "dw_power": dw_power(X, power_rho, alpha),
        "r1_residual": r1.r1, "r1_null_mean": r1.null_mean, "r1_null_variance": r1.null_variance,
        "r1_corrected": r1.r1_corrected,
    }
    if supplied_rho is not None:
        sup = gls_contrast_test(y, X, c, supplied_rho, alpha)
        out.update({"effect_gls_supplied_estimate": sup.estimate, "effect_gls_supplied_p_value": sup.p_value})
    return out
