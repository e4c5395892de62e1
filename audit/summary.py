"""Meta-analytic summary of serial dependence across a review (DESIGN.md section 7).

Input: the per-case table of ``audit.diagnose.diagnose_cases`` (plus, optionally, the clean
observations, the quarantine and the accepted-cases tables). Output: a dict of DataFrames named
``summary_<part>`` (see ``SUMMARY_TABLES``), ready to be written to the results store.

AR(1) coefficient of a case from its residual lag-1 autocorrelation.  The null-corrected value
r1 - E0[r1] (``r1_corrected``) is unbiased only when rho = 0: under AR(1) errors its expectation
grows with slope (n-k) V0[r1] at rho = 0 (about 0.4 for 15 points and 4 parameters), so pooled
as it is it estimates a fraction of the review's rho.  [Derivation: d/drho E_rho[r1] at 0 equals
E0[r1 x'Lx] (score of the AR(1) density); by Pitman-Koopmans independence of r1 from x'Mx and of
Mx from Px this is (n-k) E0[r1^2] + E0[r1] tr(PL) = (n-k) V0, since tr(PL) = -tr(ML).]
Each case's coefficient is therefore estimated by inverting the exact expectation of its r1,
    rho_i = m_i^{-1}(r1_i),   m_i(rho) = E_rho[e'Le / e'e],  e = M x,  x ~ N(0, R(rho)),
computed for the case's own design by the integral of Sawa (1978) / Magnus (1986),
    E[z'Az / z'Bz] = int_0^inf prod_j (1 + 2 t l_j)^(-1/2) sum_j a_jj / (1 + 2 t l_j) dt
(l_j eigenvalues of B, a_jj the diagonal of A in B's eigenbasis), solved for rho in
[-0.95, 0.95] (a mean-bias correction in the spirit of Andrews 1993, who used the median);
see ``audit.r1_calibration``.  The design-dependent per-case parts (this inversion, DW power,
GLS at given coefficients) run over stacks of cases of equal (n, k): ``audit.summary_stacks``.
Without observations the first-order version rho_i = r1_corrected_i / ((n-k) V0_i) is used.
Within-case sampling variance: the exact null variance of r1 carried to the rho scale by the
exact slope at 0, v_i = V0_i / ((n-k) V0_i)^2 = 1 / ((n-k)^2 V0_i); it depends only on the
design, so the weights do not depend on the estimates.

Pooling: random-effects meta-analysis, DerSimonian & Laird (1986) tau^2, normal confidence
interval, Higgins-Thompson-Spiegelhalter (2009) prediction interval with t(k-2), I^2 from Q
(Higgins & Thompson 2002).  Shrinkage: empirical Bayes toward the pooled mean,
    rho_i* = mu + w_i (rho_i - mu),  w_i = tau^2 / (tau^2 + v_i),  clipped to [-0.95, 0.95].
Proportions: Wilson (1927) score intervals.
"""

from __future__ import annotations

import json
import math
import sys
from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import special

from audit import reasons as R
from audit.r1_calibration import (AR1FromResidualLag1, ar1_from_residual_lag1,  # noqa: F401 (re-exported)
                                  residual_lag1_mean_under_ar1)
from audit.summary_stacks import ReviewStacks, ar1_from_r1, dw_power_at, gls_at
from audit.design import ALTERNATING, CaseDesign, case_design

__all__ = [
    "SUMMARY_TABLES",
    "SENSITIVITY_RHOS",
    "RandomEffectsPooled",
    "random_effects_dersimonian_laird",
    "wilson_interval",
    "empirical_bayes_shrinkage",
    "residual_lag1_mean_under_ar1",
    "ar1_from_residual_lag1",
    "case_designs",
    "make_gls_at_rho",
    "summarize",
    "load_summary",
    "format_summary",
    "cmd_summary",
]

RHO_BOUND = 0.95
SENSITIVITY_RHOS = (0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6)
DEMONSTRATIONS_NEEDED = 3  # common three-demonstrations standard (common practice)
GROUPINGS = ("study", "design", "outcome_scale")

SUMMARY_TABLES = (
    "summary_overall",
    "summary_pooled_autocorrelation",
    "summary_case_shrinkage",
    "summary_durbin_watson",
    "summary_flip_rates",
    "summary_sensitivity",
    "summary_study_verdicts",
    "summary_pooled_effect",
    "summary_screening",
    "summary_notes",
)

ALTERNATIVE_LABELS = {
    "gls_reml": "GLS with the case's own REML AR(1)",
    "gls_shrunken": "GLS with the shrunken (empirical-Bayes) AR(1)",
    "hac": "OLS with Newey-West (HAC) standard errors",
    "tau_adjusted": "Tau with dependence-adjusted variance",
}

DiagnoseAtRho = Callable[[object], pd.DataFrame]


# ----------------------------------------------------------------------------- random effects


@dataclass(frozen=True)
class RandomEffectsPooled:
    """Random-effects pooled estimate (DerSimonian-Laird) with heterogeneity and intervals."""

    n: int
    estimate: float
    std_error: float
    ci_lower: float
    ci_upper: float
    pi_lower: float
    pi_upper: float
    tau2: float
    i2: float
    q: float
    q_df: int
    q_p_value: float
    fixed_estimate: float
    method: str = "random effects, DerSimonian-Laird tau^2; prediction interval t(k-2)"
    reason: str = R.OK


def random_effects_dersimonian_laird(effects, variances, alpha: float = 0.05) -> RandomEffectsPooled:
    """DerSimonian & Laird (1986) random-effects pooling.

    w_i = 1/v_i, Q = sum w_i (y_i - y_FE)^2, tau^2 = max(0, (Q - (k-1)) / (sum w - sum w^2 / sum w)),
    mu = sum w*_i y_i / sum w*_i with w*_i = 1/(v_i + tau^2), SE = (sum w*)^-1/2, CI mu +- z SE,
    PI mu +- t_{k-2} sqrt(tau^2 + SE^2) (Higgins, Thompson & Spiegelhalter 2009),
    I^2 = max(0, (Q - (k-1))/Q).  Pairs with a non-finite effect or variance <= 0 are dropped.
    """
    y = np.asarray(effects, dtype=float).ravel()
    v = np.asarray(variances, dtype=float).ravel()
    ok = np.isfinite(y) & np.isfinite(v) & (v > 0)
    y, v = y[ok], v[ok]
    k = int(y.size)
    nan = math.nan
    if k == 0:
        return RandomEffectsPooled(0, nan, nan, nan, nan, nan, nan, nan, nan, nan, 0, nan, nan,
                                   reason=R.TOO_FEW_POINTS)
    z = float(special.ndtri(1.0 - alpha / 2.0))  # stats.norm.ppf without its per-call overhead
    w = 1.0 / v
    fixed = float(np.sum(w * y) / np.sum(w))
    if k == 1:
        se = float(np.sqrt(v[0]))
        return RandomEffectsPooled(1, float(y[0]), se, float(y[0] - z * se), float(y[0] + z * se),
                                   nan, nan, nan, nan, 0.0, 0, nan, fixed, reason=R.TOO_FEW_POINTS)
    q = float(np.sum(w * (y - fixed) ** 2))
    c = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    tau2 = max(0.0, (q - (k - 1)) / c) if c > 0 else 0.0
    ws = 1.0 / (v + tau2)
    mu = float(np.sum(ws * y) / np.sum(ws))
    se = float(1.0 / np.sqrt(np.sum(ws)))
    i2 = max(0.0, (q - (k - 1)) / q) if q > 0 else 0.0
    q_p = float(special.chdtrc(k - 1, q))  # stats.chi2.sf
    if k >= 3:
        t = float(special.stdtrit(k - 2, 1.0 - alpha / 2.0))  # stats.t.ppf
        half = t * math.sqrt(tau2 + se**2)
        pi = (mu - half, mu + half)
    else:
        pi = (nan, nan)
    return RandomEffectsPooled(k, mu, se, mu - z * se, mu + z * se, pi[0], pi[1], tau2, i2, q, k - 1,
                               q_p, fixed)


# ----------------------------------------------------------------------------- proportions


def wilson_interval(successes, trials, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for binomial proportions (vectorised).

    centre = (p + z^2/(2n)) / (1 + z^2/n), half = z sqrt(p(1-p)/n + z^2/(4n^2)) / (1 + z^2/n);
    NaN where trials = 0.
    """
    x = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    z = special.ndtri(1.0 - alpha / 2.0)  # stats.norm.ppf
    with np.errstate(divide="ignore", invalid="ignore"):
        p = x / n
        denom = 1.0 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
    lo = np.where(x <= 0, 0.0, np.clip(centre - half, 0.0, 1.0))  # exact ends (no rounding residue)
    hi = np.where(x >= n, 1.0, np.clip(centre + half, 0.0, 1.0))
    return np.where(n > 0, lo, np.nan), np.where(n > 0, hi, np.nan)


# ----------------------------------------------------------------------------- shrinkage


def empirical_bayes_shrinkage(raw, variance, mean: float, tau2: float, bound: float = RHO_BOUND) -> pd.DataFrame:
    """Empirical-Bayes shrinkage toward a pooled mean: mu + w (raw - mu), w = tau^2/(tau^2 + v).

    A case without an estimate (NaN raw or variance) gets weight 0, i.e. the pooled mean.
    The result is clipped to [-bound, bound].
    """
    y = np.asarray(raw, dtype=float)
    v = np.asarray(variance, dtype=float)
    have = np.isfinite(y) & np.isfinite(v) & (v >= 0)
    t2 = float(tau2) if np.isfinite(tau2) else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(have, np.where(t2 + v > 0, t2 / (t2 + v), 1.0), 0.0)
    shrunk = float(mean) + w * (np.where(have, y, float(mean)) - float(mean))
    return pd.DataFrame({"raw": y, "weight": w, "shrunken": np.clip(shrunk, -bound, bound)})


# ----------------------------------------------------------------------------- designs


@dataclass
class DesignGroups:
    """Case designs rebuilt from observations, grouped by design signature."""

    designs: dict[bytes, CaseDesign]
    members: dict[bytes, list[str]]  # signature -> case keys
    outcomes: dict[str, np.ndarray]  # case key -> outcome series (sorted by session)
    sessions: dict[str, np.ndarray]
    signature_of: dict[str, bytes]


def case_designs(observations: pd.DataFrame) -> DesignGroups:
    """Rebuild every case's design (as ``audit.diagnose.diagnose_cases`` does), grouped by signature."""
    obs = observations.sort_values(["case_key", "session"], kind="stable").reset_index(drop=True)
    keys = obs["case_key"].astype(str).to_numpy()
    designs: dict[bytes, CaseDesign] = {}
    members: dict[bytes, list[str]] = {}
    outcomes: dict[str, np.ndarray] = {}
    sessions: dict[str, np.ndarray] = {}
    signature_of: dict[str, bytes] = {}
    if len(keys) == 0:
        return DesignGroups(designs, members, outcomes, sessions, signature_of)
    bounds = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1], True])
    sess = obs["session"].to_numpy(dtype=float)
    y = obs["outcome"].to_numpy(dtype=float)
    ph = obs["phase_index"].to_numpy()
    cond = obs["condition"].astype(str).to_numpy()
    label = obs["phase"].astype(str).to_numpy()
    design = obs["design"].astype(str).to_numpy()
    for b, e in zip(bounds[:-1], bounds[1:]):
        key = keys[b]
        des = case_design(sess[b:e], ph[b:e], cond[b:e], design[b], label[b:e])
        designs.setdefault(des.signature, des)
        members.setdefault(des.signature, []).append(key)
        outcomes[key] = y[b:e]
        sessions[key] = sess[b:e]
        signature_of[key] = des.signature
    return DesignGroups(designs, members, outcomes, sessions, signature_of)


def make_gls_at_rho(observations: pd.DataFrame | ReviewStacks, alpha: float = 0.05) -> DiagnoseAtRho:
    """A fast ``diagnose_at_rho``: the GLS AR(1) effect test of every case at a supplied rho.

    Returns f(rho) -> DataFrame(case_key, effect_gls_supplied_rho, _estimate, _std_error,
    _p_value), rho a float or a Series indexed by case_key; the same test as the
    ``effect_gls_supplied_*`` columns of ``diagnose_cases`` (NaN for cases without a
    baseline/treatment contrast), without recomputing the other diagnostics; cases stacked by
    (n, k) (``audit.summary_stacks.gls_at``).  ``f.grid(rhos)`` gives {rho: frame} for several
    common coefficients in one pass.  ``alpha`` is kept for the signature (p-values do not use it).
    """
    stacks = observations if isinstance(observations, ReviewStacks) else ReviewStacks(observations)
    keys = stacks.keys

    def frame(rho_col: np.ndarray, est, se, p) -> pd.DataFrame:
        return pd.DataFrame({
            "case_key": keys,
            "effect_gls_supplied_rho": rho_col,
            "effect_gls_supplied_estimate": est,
            "effect_gls_supplied_std_error": se,
            "effect_gls_supplied_p_value": p,
        })

    def at_rho(rho) -> pd.DataFrame:
        if isinstance(rho, pd.Series):
            r = rho.set_axis(rho.index.astype(str)).reindex(keys).to_numpy(dtype=float)
        else:
            r = np.full(keys.size, float(rho))
        est, se, p = gls_at(stacks, r[:, None])
        return frame(r, est[:, 0], se[:, 0], p[:, 0])

    def grid(rhos) -> dict[float, pd.DataFrame]:
        """``at_rho`` for several common coefficients in one pass over the stacks."""
        rhos = [float(r) for r in rhos]
        est, se, p = gls_at(stacks, np.tile(np.asarray(rhos, dtype=float), (keys.size, 1)))
        return {rho: frame(np.full(keys.size, rho), est[:, j], se[:, j], p[:, j]) for j, rho in enumerate(rhos)}

    at_rho.grid = grid  # type: ignore[attr-defined]
    return at_rho


# ----------------------------------------------------------------------------- helpers


def _col(df: pd.DataFrame, name: str, default=np.nan) -> pd.Series:
    if name in df.columns:
        return df[name]
    return pd.Series(default, index=df.index)


def _num(df: pd.DataFrame, name: str) -> np.ndarray:
    return pd.to_numeric(_col(df, name), errors="coerce").to_numpy(dtype=float)


def _labels(s: pd.Series) -> pd.Series:
    """Group labels as plain strings; missing values become 'unknown'."""
    out = s.astype(object).where(s.notna(), "unknown").astype(str)
    return out.replace({"": "unknown", "nan": "unknown", "None": "unknown", "<NA>": "unknown"})


def _series_label(s: pd.Series) -> pd.Series:
    return s.astype(object).where(s.notna(), "").astype(str).replace({"nan": "", "None": "", "<NA>": ""})


def _group_rows(labels) -> list[tuple[str, np.ndarray]]:
    """(value, row indices) for each distinct label, values sorted (one sort, not one scan per value)."""
    values, codes = np.unique(np.asarray(labels, dtype=str), return_inverse=True)
    order = np.argsort(codes, kind="stable")
    cuts = np.searchsorted(codes[order], np.arange(values.size + 1))
    return [(str(v), order[cuts[j]:cuts[j + 1]]) for j, v in enumerate(values)]


def _groupings(frame: pd.DataFrame, columns=GROUPINGS):
    """Yield (group_by, group, row indices): all cases, then each value of study, design, outcome scale."""
    yield "all", "all", np.arange(len(frame))
    for col in columns:
        if col not in frame.columns:
            continue
        for value, rows in _group_rows(_labels(frame[col]).to_numpy()):
            yield col, value, rows


def _flip_columns(p_ind: np.ndarray, p_alt: np.ndarray, codes: np.ndarray, size: int, alpha: float) -> dict:
    """Per group (``codes`` in 0..size-1): cases with both p-values, significant under each, flips
    (lost + gained), and the flip, lost and gained rates with Wilson intervals; arrays of ``size``."""
    ok = np.isfinite(p_ind) & np.isfinite(p_alt)
    sig_i = ok & (p_ind < alpha)
    sig_a = ok & (p_alt < alpha)
    lost = sig_i & ~sig_a
    gained = sig_a & ~sig_i

    def count(flags):
        return np.bincount(codes, weights=flags, minlength=size).astype(np.int64)

    n = count(ok)
    out = {"n_cases": n, "n_significant_independence": count(sig_i), "n_significant_alternative": count(sig_a),
           "n_flips": count(lost | gained), "n_lost": count(lost), "n_gained": count(gained)}
    for name, key in (("flip", "n_flips"), ("lost", "n_lost"), ("gained", "n_gained")):
        c = out[key]
        lo, hi = wilson_interval(c, n, alpha)
        out[f"{name}_rate"] = np.where(n > 0, c / np.maximum(n, 1), np.nan)
        out[f"{name}_ci_lower"] = lo
        out[f"{name}_ci_upper"] = hi
    return out


def _fmt(x, digits: int = 2) -> str:
    return "NA" if x is None or not np.isfinite(x) else f"{x:.{digits}f}"


def _pct(x) -> str:
    return "NA" if x is None or not np.isfinite(x) else f"{100 * x:.0f}%"


# ----------------------------------------------------------------------------- summary parts


def _shrinkage_table(cases: pd.DataFrame, stacks: ReviewStacks | None, notes: list) -> pd.DataFrame:
    m = len(cases)
    keys = cases["case_key"].astype(str).to_numpy()
    r1 = _num(cases, "r1_residual")
    r1c = _num(cases, "r1_corrected")
    mu0 = _num(cases, "r1_null_mean")
    v0 = _num(cases, "r1_null_variance")
    if not np.isfinite(r1).any() and np.isfinite(r1c).any():
        r1 = r1c + mu0
    rho = np.full(m, np.nan)
    var = np.full(m, np.nan)
    at_bound = np.zeros(m, dtype=bool)
    method = np.full(m, "first order", dtype=object)
    reason = np.full(m, R.OK, dtype=object)
    done = np.zeros(m, dtype=bool)
    if stacks is not None:
        pos = stacks.positions(keys)
        have = pos >= 0
        r1_by_pos = np.full(len(stacks), np.nan)
        r1_by_pos[pos[have]] = r1[have]
        res, covered = ar1_from_r1(stacks, r1_by_pos)
        rows = np.flatnonzero(have & covered[np.where(have, pos, 0)])
        src = pos[rows]
        rho[rows], var[rows], at_bound[rows] = res.rho[src], res.variance[src], res.at_bound[src]
        method[rows] = res.method
        reason[rows] = res.reason[src]
        done[rows] = True
    rest = ~done
    if rest.any():
        res = ar1_from_residual_lag1(r1[rest], null_mean=mu0[rest], null_variance=v0[rest],
                                     n_obs=_num(cases, "n_obs")[rest], n_params=_num(cases, "n_params")[rest])
        rho[rest], var[rest], at_bound[rest], reason[rest] = res.rho, res.variance, res.at_bound, res.reason
        if stacks is None:
            notes.append(("ar1_calibration", "partial",
                          "observations not given: AR(1) per case by the first-order correction "
                          "r1_corrected / ((n-k) V0), which understates large coefficients"))
    frame = pd.DataFrame({
        "case_key": keys,
        "study": cases["study"].astype(str).to_numpy(),
        "series": _series_label(_col(cases, "series", "")).to_numpy(),
        "design": _labels(_col(cases, "design")).to_numpy(),
        "outcome_scale": _labels(_col(cases, "outcome_scale")).to_numpy(),
        "n_obs": _num(cases, "n_obs"),
        "n_params": _num(cases, "n_params"),
        "r1_corrected": r1c,
        "r1_null_variance": v0,
        "calibration": method,
        "raw": rho,
        "raw_variance": var,
        "raw_at_bound": at_bound,
        "ar1_reml_rho": _num(cases, "ar1_reml_rho"),
        "reason": reason,
    })
    return frame


def _pooled_autocorrelation(shrink: pd.DataFrame, alpha: float) -> pd.DataFrame:
    rows = []
    measures = (
        ("ar1_coefficient", "raw", "raw_variance",
         "AR(1) coefficient by exact mean inversion of residual r1; within-case variance "
         "1/((n-k)^2 V0)"),
        ("r1_corrected", "r1_corrected", "r1_null_variance",
         "residual r1 minus its exact null mean; within-case variance = exact null variance "
         "(unbiased for 0 only when rho = 0)"),
    )
    for measure, eff_col, var_col, within in measures:
        eff, var = shrink[eff_col].to_numpy(float), shrink[var_col].to_numpy(float)
        for group_by, group, rows_of in _groupings(shrink):
            res = random_effects_dersimonian_laird(eff[rows_of], var[rows_of], alpha)
            row = {"measure": measure, "group_by": group_by, "group": group}
            row.update({k: v for k, v in asdict(res).items() if k not in ("method",)})
            row["n_cases"] = row.pop("n")
            row["method"] = res.method
            if measure == "ar1_coefficient":  # an AR(1) coefficient lies in (-1, 1): intervals truncated there
                for key in ("ci_lower", "ci_upper", "pi_lower", "pi_upper"):
                    if np.isfinite(row[key]):
                        row[key] = float(np.clip(row[key], -1.0, 1.0))
                row["method"] = res.method + "; intervals truncated to [-1, 1]"
            row["within_variance"] = within
            rows.append(row)
    cols = ["measure", "group_by", "group", "n_cases", "estimate", "std_error", "ci_lower", "ci_upper",
            "pi_lower", "pi_upper", "tau2", "i2", "q", "q_df", "q_p_value", "fixed_estimate", "method",
            "within_variance", "reason"]
    return pd.DataFrame(rows)[cols]


def _durbin_watson_table(cases: pd.DataFrame, stacks: ReviewStacks | None, pooled_rho: float, alpha: float,
                         notes: list) -> pd.DataFrame:
    p_pos = _num(cases, "dw_p_positive")
    p_neg = _num(cases, "dw_p_negative")
    power = np.full(len(cases), np.nan)
    power_rho = pooled_rho
    if stacks is not None and np.isfinite(pooled_rho):
        pos = stacks.positions(cases["case_key"].astype(str).to_numpy())
        by_pos = dw_power_at(stacks, float(np.clip(pooled_rho, -RHO_BOUND, RHO_BOUND)), alpha)
        power = np.where(pos >= 0, by_pos[np.where(pos >= 0, pos, 0)], np.nan)
    else:
        power = _num(cases, "dw_power")
        used = _num(cases, "dw_power_rho")
        power_rho = float(np.mean(used[np.isfinite(used)])) if np.isfinite(used).any() else math.nan
        notes.append(("dw_power", "partial", "observations not given: mean exact DW power is reported at the "
                      f"coefficient used by the diagnostics ({_fmt(power_rho)}), not at the pooled one"))
    frame = cases[[c for c in GROUPINGS if c in cases.columns]].copy()
    rows = []
    for group_by, group, idx in _groupings(frame):
        pp = p_pos[idx]
        ok = np.isfinite(pp)
        n = int(ok.sum())
        npos = int((ok & (pp < alpha)).sum())
        nneg = int((ok & (p_neg[idx] < alpha)).sum())
        lo_p, hi_p = wilson_interval(npos, n, alpha)
        lo_n, hi_n = wilson_interval(nneg, n, alpha)
        pw = power[idx]
        pw = pw[np.isfinite(pw)]
        rows.append({
            "group_by": group_by, "group": group, "n_cases": n,
            "n_significant_positive": npos, "share_significant_positive": npos / n if n else math.nan,
            "positive_ci_lower": float(lo_p), "positive_ci_upper": float(hi_p),
            "n_significant_negative": nneg, "share_significant_negative": nneg / n if n else math.nan,
            "negative_ci_lower": float(lo_n), "negative_ci_upper": float(hi_n),
            "power_rho": power_rho,
            "mean_power": float(pw.mean()) if pw.size else math.nan,
            "min_power": float(pw.min()) if pw.size else math.nan,
            "max_power": float(pw.max()) if pw.size else math.nan,
        })
    return pd.DataFrame(rows)


def _alternatives(cases: pd.DataFrame, shrunken_run: pd.DataFrame | None, notes: list) -> dict[str, tuple]:
    """alternative -> (independence p, alternative p) arrays aligned with cases."""
    out = {}
    p_ols = _num(cases, "effect_ols_p_value")
    if "effect_gls_reml_p_value" in cases:
        out["gls_reml"] = (p_ols, _num(cases, "effect_gls_reml_p_value"))
    if shrunken_run is not None:
        out["gls_shrunken"] = (p_ols, _num(shrunken_run, "effect_gls_supplied_p_value"))
    if "effect_hac_p_value" in cases:
        out["hac"] = (p_ols, _num(cases, "effect_hac_p_value"))
    if "tau_p_value" in cases and "tau_p_value_adjusted" in cases:
        out["tau_adjusted"] = (_num(cases, "tau_p_value"), _num(cases, "tau_p_value_adjusted"))
    else:
        notes.append(("flip_rates", "partial", "columns tau_p_value / tau_p_value_adjusted absent: "
                      "no flip rate for dependence-adjusted Tau"))
    return out


def _group_codes(frame: pd.DataFrame, columns=GROUPINGS):
    """Yield (group_by, sorted group values, code of each row): all cases, then each grouping column."""
    yield "all", np.array(["all"]), np.zeros(len(frame), dtype=np.int64)
    for col in columns:
        if col in frame.columns:
            values, codes = np.unique(_labels(frame[col]).to_numpy().astype(str), return_inverse=True)
            yield col, values, codes.ravel()


def _flip_rates(cases: pd.DataFrame, alts: dict, alpha: float) -> pd.DataFrame:
    """``_flip_columns`` for every alternative and grouping."""
    frame = cases[[c for c in GROUPINGS if c in cases.columns]]
    parts = []
    for alt, (p_ind, p_alt) in alts.items():
        for group_by, values, codes in _group_codes(frame):
            part = {"alternative": alt, "label": ALTERNATIVE_LABELS[alt], "group_by": group_by,
                    "group": values.astype(object)}
            part.update(_flip_columns(p_ind, p_alt, codes, values.size, alpha))
            parts.append(pd.DataFrame(part))
    cols = ["alternative", "label", "group_by", "group", "n_cases", "n_significant_independence",
            "n_significant_alternative", "n_flips", "flip_rate", "flip_ci_lower", "flip_ci_upper", "n_lost",
            "lost_rate", "lost_ci_lower", "lost_ci_upper", "n_gained", "gained_rate", "gained_ci_lower",
            "gained_ci_upper"]
    if not parts:
        return pd.DataFrame(columns=cols)
    return pd.concat(parts, ignore_index=True)[cols]


def _sensitivity(cases: pd.DataFrame, at_rho: DiagnoseAtRho, rhos, alpha: float) -> pd.DataFrame:
    p_ols = _num(cases, "effect_ols_p_value")
    many = getattr(at_rho, "grid", None)
    results = many(rhos) if callable(many) else {float(r): at_rho(float(r)) for r in rhos}
    rows = []
    one_group = np.zeros(len(cases), dtype=np.int64)
    for rho in rhos:
        res = _align(results[float(rho)], cases)
        cols = _flip_columns(p_ols, _num(res, "effect_gls_supplied_p_value"), one_group, 1, alpha)
        rows.append({"assumed_rho": float(rho), **{k: v[0] for k, v in cols.items()}})
    return pd.DataFrame(rows)


def _align(res: pd.DataFrame, cases: pd.DataFrame) -> pd.DataFrame:
    """Rows of a diagnose_at_rho result in the order of cases (by case_key)."""
    res = res.drop_duplicates("case_key").set_index(res["case_key"].astype(str).to_numpy())
    return res.reindex(cases["case_key"].astype(str).to_numpy()).reset_index(drop=True)


def _demonstrations(cases: pd.DataFrame, est: np.ndarray, p: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Per case: demonstrations of an effect in the desired direction, and whether it was testable."""
    direction = _labels(_col(cases, "desired_direction")).str.lower().to_numpy()
    sign = np.where(direction == "increase", 1.0, np.where(direction == "decrease", -1.0, np.nan))
    testable = np.isfinite(p) & np.isfinite(est)
    shows = testable & (p < alpha) & (np.sign(est) == sign)
    n_trans = _num(cases, "n_transitions")
    n_trans = np.where(np.isfinite(n_trans) & (n_trans >= 1), n_trans, 1.0)
    alternating = (_col(cases, "model", "").astype(str).to_numpy() == ALTERNATING) | \
                  (_labels(_col(cases, "design")).str.lower().to_numpy() == ALTERNATING)
    per_case = np.where(alternating, 1.0, n_trans)
    return np.where(shows, per_case, 0.0), testable


def _verdict(demos: float, n_testable: int) -> str:
    if n_testable == 0:
        return "undetermined"
    return "effect" if demos >= DEMONSTRATIONS_NEEDED else "no effect"


def _study_verdicts(cases: pd.DataFrame, shrunken_run: pd.DataFrame | None, alpha: float) -> pd.DataFrame:
    assumptions = {
        "independence": (_num(cases, "effect_ols_estimate"), _num(cases, "effect_ols_p_value")),
        "ar1": (_num(cases, "effect_gls_reml_estimate"), _num(cases, "effect_gls_reml_p_value")),
    }
    if shrunken_run is not None:
        assumptions["shrunken"] = (_num(shrunken_run, "effect_gls_supplied_estimate"),
                                   _num(shrunken_run, "effect_gls_supplied_p_value"))
    demo = {}
    testable = {}
    for name, (est, p) in assumptions.items():
        demo[name], testable[name] = _demonstrations(cases, est, p, alpha)
    frame = pd.DataFrame({"study": cases["study"].astype(str).to_numpy(),
                          "series": _series_label(_col(cases, "series", "")).to_numpy()})
    rows = []
    for (study, series), idx in frame.groupby(["study", "series"], sort=True).indices.items():
        row = {"study": study, "series": series, "n_cases": int(len(idx))}
        for name in assumptions:
            d = float(demo[name][idx].sum())
            row[f"demonstrations_{name}"] = d
            row[f"verdict_{name}"] = _verdict(d, int(testable[name][idx].sum()))
        if "shrunken" not in assumptions:
            row["demonstrations_shrunken"] = math.nan
            row["verdict_shrunken"] = "not computed"
        vi, va = row["verdict_independence"], row["verdict_ar1"]
        vs = row["verdict_shrunken"]
        changes = [v for v in (va, vs) if v in ("effect", "no effect") and vi in ("effect", "no effect") and v != vi]
        row["verdict_changes"] = bool(changes)
        if not changes:
            row["change"] = ""
        elif vi == "effect":
            row["change"] = "effect lost under AR(1)"
        else:
            row["change"] = "effect gained under AR(1)"
        rows.append(row)
    cols = ["study", "series", "n_cases", "demonstrations_independence", "verdict_independence",
            "demonstrations_ar1", "verdict_ar1", "demonstrations_shrunken", "verdict_shrunken",
            "verdict_changes", "change"]
    return pd.DataFrame(rows, columns=cols)


def _first(cases: pd.DataFrame, names) -> str | None:
    for name in names:
        if name in cases.columns and np.isfinite(_num(cases, name)).any():
            return name
    return None


def _pooled_effect(cases: pd.DataFrame, shrink: pd.DataFrame, alpha: float, notes: list) -> pd.DataFrame:
    """Pooled LRR and SMD under independence and with variances inflated by (1+rho)/(1-rho)."""
    rho = np.clip(shrink["shrunken"].to_numpy(float), 0.0, RHO_BOUND)
    inflation = (1.0 + rho) / (1.0 - rho)
    rows = []
    specs = (
        ("lrr", ("lrr", "lrr_improvement"), ("lrr_variance",), ("lrr_se",)),
        ("smd", ("smd", "smd_baseline_sd_hedges", "smd_baseline_sd"), ("smd_variance",), ("smd_se",)),
    )
    for measure, est_names, var_names, se_names in specs:
        est_col = _first(cases, est_names)
        if est_col is None:
            notes.append(("pooled_effect", "skipped", f"no {measure} column ({' / '.join(est_names)}) in the cases table"))
            continue
        var_col = _first(cases, var_names)
        if var_col is not None:
            var = _num(cases, var_col)
        else:
            se_col = _first(cases, se_names)
            if se_col is None:
                notes.append(("pooled_effect", "skipped",
                              f"{measure}: no sampling variance column ({' / '.join(var_names + se_names)})"))
                continue
            var = _num(cases, se_col) ** 2
        est = _num(cases, est_col)
        frame = pd.DataFrame({"study": cases["study"].astype(str).to_numpy()})
        for group_by, group, idx in _groupings(frame, columns=("study",)):
            res = {a: random_effects_dersimonian_laird(est[idx], v[idx], alpha)
                   for a, v in (("independence", var), ("ar1", var * inflation))}
            width_ind = res["independence"].ci_upper - res["independence"].ci_lower
            usable = idx[np.isfinite(est[idx]) & np.isfinite(var[idx]) & (var[idx] > 0)]
            case_ratio = float(np.median(np.sqrt(inflation[usable]))) if usable.size else math.nan
            for assumption, r in res.items():
                width = r.ci_upper - r.ci_lower
                rows.append({
                    "measure": measure, "column": est_col, "group_by": group_by, "group": group,
                    "assumption": assumption, "n_cases": r.n, "estimate": r.estimate, "std_error": r.std_error,
                    "ci_lower": r.ci_lower, "ci_upper": r.ci_upper, "ci_width": width, "tau2": r.tau2, "i2": r.i2,
                    "width_ratio": width / width_ind if width_ind > 0 else math.nan,
                    "median_case_width_ratio": 1.0 if assumption == "independence" else case_ratio,
                    "variance_rule": "as estimated" if assumption == "independence" else
                    "variance x (1+rho)/(1-rho), rho = shrunken AR(1) clipped to [0, 0.95]",
                })
    cols = ["measure", "column", "group_by", "group", "assumption", "n_cases", "estimate", "std_error", "ci_lower",
            "ci_upper", "ci_width", "tau2", "i2", "width_ratio", "median_case_width_ratio", "variance_rule"]
    return pd.DataFrame(rows, columns=cols)


def _five_point(cases: pd.DataFrame, accepted_cases: pd.DataFrame | None, observations: pd.DataFrame | None,
                notes: list) -> np.ndarray:
    """Per case: True when every phase (condition, in alternating designs) has at least 5 points."""
    keys = cases["case_key"].astype(str)
    if accepted_cases is not None and "below_five_point_standard" in accepted_cases:
        flag = accepted_cases.set_index(accepted_cases["case_key"].astype(str))["below_five_point_standard"]
        flag = flag[~flag.index.duplicated()]
        got = keys.map(flag)
        return np.where(got.isna(), np.nan, ~got.astype("boolean").fillna(False).to_numpy(dtype=bool))
    if "below_five_point_standard" in cases:
        got = cases["below_five_point_standard"].astype("boolean")
        return np.where(got.isna(), np.nan, ~got.fillna(False).to_numpy(dtype=bool))
    if observations is not None and len(observations):
        obs = observations.copy()
        alt = obs["design"].astype(str).str.lower() == ALTERNATING
        unit = np.where(alt, "c:" + obs["condition"].astype(str), "p:" + obs["phase_index"].astype(str))
        obs["_unit"] = unit
        smallest = obs.groupby(["case_key", "_unit"]).size().groupby(level=0).min()
        smallest.index = smallest.index.astype(str)
        got = keys.map(smallest)
        return np.where(got.isna(), np.nan, (got >= 5).to_numpy(dtype=float))
    notes.append(("screening", "partial", "neither accepted cases nor observations given: "
                  "the 5-points-per-phase count is missing"))
    return np.full(len(cases), np.nan)


def _quarantined_by_study(quarantine: pd.DataFrame | None) -> pd.Series:
    if quarantine is None or len(quarantine) == 0 or "study" not in quarantine:
        return pd.Series(dtype=float)
    q = quarantine
    if "level" in q:
        q = q[q["level"].astype(str) == "case"]
    q = q[q["study"].notna()]
    cols = [c for c in ("study", "case", "series") if c in q.columns]
    return q[cols].astype(str).drop_duplicates().groupby("study").size()


def _n_quarantined_cases(quarantine: pd.DataFrame | None) -> int:
    """Distinct (study, case, series) quarantined as whole cases."""
    if quarantine is None or len(quarantine) == 0:
        return 0
    q = quarantine[quarantine["level"].astype(str) == "case"] if "level" in quarantine else quarantine
    cols = [c for c in ("study", "case", "series") if c in q.columns]
    return int(len(q[cols].astype(str).drop_duplicates())) if cols else int(len(q))


def _screening(cases: pd.DataFrame, verdicts: pd.DataFrame, alts: dict, pooled: pd.DataFrame,
               five: np.ndarray, quarantined: pd.Series, alpha: float, notes: list) -> pd.DataFrame:
    study = cases["study"].astype(str).to_numpy()
    p_pos = _num(cases, "dw_p_positive")
    p_neg = _num(cases, "dw_p_negative")
    flip_any = np.zeros(len(cases), dtype=bool)
    flip_shr = np.zeros(len(cases), dtype=bool)
    for alt, (p_ind, p_alt) in alts.items():
        ok = np.isfinite(p_ind) & np.isfinite(p_alt)
        f = ok & ((p_ind < alpha) != (p_alt < alpha))
        if alt in ("gls_reml", "hac"):
            flip_any |= f
        if alt == "gls_shrunken":
            flip_shr |= f
    if "baseline_moves_in_therapeutic_direction" in cases:
        trend = _col(cases, "baseline_moves_in_therapeutic_direction").astype(str).str.lower().to_numpy() == "yes"
        have_trend = True
    else:
        trend = np.zeros(len(cases), dtype=bool)
        have_trend = False
        notes.append(("screening", "partial", "column baseline_moves_in_therapeutic_direction absent: "
                      "no baseline-trend flags"))
    pooled_study = pooled[(pooled["measure"] == "ar1_coefficient") & (pooled["group_by"] == "study")]
    pooled_study = pooled_study.set_index("group")
    rows = []
    by_study: dict[str, list[dict]] = {}
    for rec in verdicts.to_dict("records"):  # plain dicts: no DataFrame per study
        by_study.setdefault(str(rec["study"]), []).append(rec)
    pooled_ar1 = pooled_study["estimate"].to_dict()
    for s, m in _group_rows(study):
        v = by_study.get(s, [])
        n = int(m.size)
        n_dw = int(np.isfinite(p_pos[m]).sum())
        dw_pos = int((p_pos[m] < alpha).sum())
        dw_neg = int((p_neg[m] < alpha).sum())
        five_s = five[m]
        n_five = int(np.nansum(five_s)) if np.isfinite(five_s).any() else None
        n_q = int(quarantined.get(s, 0))
        n_trend = int(trend[m].sum()) if have_trend else None

        def join_verdicts(col: str) -> str:
            if len(v) == 1:
                return str(v[0][col])
            return "; ".join(f"{r['series'] or 'outcome'}: {r[col]}" for r in v)

        row = {
            "study": s, "cases_audited": n, "cases_quarantined": n_q,
            "cases_meeting_five_point_standard": n_five,
            "n_significant_dw_positive": dw_pos, "n_significant_dw_negative": dw_neg,
            "share_significant_dw": dw_pos / n_dw if n_dw else math.nan,
            "n_flips": int(flip_any[m].sum()), "n_flips_shrunken": int(flip_shr[m].sum()),
            "n_baseline_trend_flags": n_trend,
            "verdict_independence": join_verdicts("verdict_independence"),
            "verdict_ar1": join_verdicts("verdict_ar1"),
            "verdict_shrunken": join_verdicts("verdict_shrunken"),
            "verdict_changes": any(bool(r["verdict_changes"]) for r in v),
            "pooled_ar1": float(pooled_ar1.get(s, math.nan)),
        }
        row["note"] = _screening_note(row, v)
        rows.append(row)
    out = pd.DataFrame(rows, columns=SCREENING_COLUMNS)
    for col in ("cases_meeting_five_point_standard", "n_baseline_trend_flags"):
        out[col] = pd.array(out[col].tolist(), dtype="Int64")
    return out


SCREENING_COLUMNS = ["study", "cases_audited", "cases_quarantined", "cases_meeting_five_point_standard",
                     "n_significant_dw_positive", "n_significant_dw_negative", "share_significant_dw", "n_flips",
                     "n_flips_shrunken", "n_baseline_trend_flags", "verdict_independence", "verdict_ar1",
                     "verdict_shrunken", "verdict_changes", "pooled_ar1", "note"]


def _plural(n: int, word: str) -> str:
    return f"{int(n):,} {word}" + ("" if n == 1 else "s")


def _screening_note(row: dict, verdicts: list[dict]) -> str:
    """The study's note; ``verdicts`` its rows of the study-verdicts table as dicts."""
    parts = []
    for v in (r for r in verdicts if r["verdict_changes"]):
        what = f"the verdict for {v['series']}" if v["series"] else "the study's verdict"
        if v["verdict_independence"] == "effect":
            parts.append(f"{what} depends on assuming independent observations: it shows an effect "
                         "under independence but not once serial dependence is modelled.")
        else:
            parts.append(f"{what} shows an effect only once serial dependence is modelled.")
    n = row["cases_audited"]
    if row["n_flips"]:
        parts.append(f"In {row['n_flips']} of {_plural(n, 'case')} the decision changes when serial dependence "
                     "is modelled.")
    if row["n_significant_dw_positive"]:
        parts.append(f"The exact Durbin-Watson test finds positive serial dependence in "
                     f"{row['n_significant_dw_positive']} of {_plural(n, 'case')}.")
    if row["n_baseline_trend_flags"]:
        k = row["n_baseline_trend_flags"]
        parts.append(f"{_plural(k, 'case')} already {'improves' if k == 1 else 'improve'} during baseline; "
                     "check that the effect is not a continuing trend.")
    five = row["cases_meeting_five_point_standard"]
    if five is not None and five < n:
        parts.append(f"In {n - five} of {_plural(n, 'case')} a phase has fewer than 5 points "
                     "(below the usual standard).")
    if row["cases_quarantined"]:
        parts.append(f"{_plural(row['cases_quarantined'], 'case')} could not be audited (see quarantine).")
    if not parts:
        parts.append("No sign that serial dependence changes this study's conclusions.")
    text = " ".join(parts)
    return text[0].upper() + text[1:]


def _overall(cases: pd.DataFrame, pooled: pd.DataFrame, dw: pd.DataFrame, flips: pd.DataFrame,
             verdicts: pd.DataFrame, quarantined: pd.Series, quarantine: pd.DataFrame | None, alpha: float) -> pd.DataFrame:
    def pooled_row(measure):
        sel = pooled[(pooled["measure"] == measure) & (pooled["group_by"] == "all")]
        return sel.iloc[0] if len(sel) else None

    ar1 = pooled_row("ar1_coefficient")
    r1c = pooled_row("r1_corrected")
    dw_all = dw[dw["group_by"] == "all"].iloc[0] if len(dw) else None
    row = {
        "alpha": alpha,
        "n_studies": int(cases["study"].nunique()),
        "n_cases": int(len(cases)),
        "n_cases_quarantined": _n_quarantined_cases(quarantine),
        "pooled_ar1": ar1["estimate"] if ar1 is not None else math.nan,
        "pooled_ar1_ci_lower": ar1["ci_lower"] if ar1 is not None else math.nan,
        "pooled_ar1_ci_upper": ar1["ci_upper"] if ar1 is not None else math.nan,
        "pooled_ar1_pi_lower": ar1["pi_lower"] if ar1 is not None else math.nan,
        "pooled_ar1_pi_upper": ar1["pi_upper"] if ar1 is not None else math.nan,
        "pooled_ar1_tau2": ar1["tau2"] if ar1 is not None else math.nan,
        "pooled_ar1_i2": ar1["i2"] if ar1 is not None else math.nan,
        "pooled_r1_corrected": r1c["estimate"] if r1c is not None else math.nan,
        "pooled_r1_corrected_ci_lower": r1c["ci_lower"] if r1c is not None else math.nan,
        "pooled_r1_corrected_ci_upper": r1c["ci_upper"] if r1c is not None else math.nan,
        "share_dw_significant_positive": dw_all["share_significant_positive"] if dw_all is not None else math.nan,
        "share_dw_significant_negative": dw_all["share_significant_negative"] if dw_all is not None else math.nan,
        "mean_dw_power": dw_all["mean_power"] if dw_all is not None else math.nan,
        "dw_power_rho": dw_all["power_rho"] if dw_all is not None else math.nan,
    }
    fa = flips[flips["group_by"] == "all"].set_index("alternative") if len(flips) else pd.DataFrame()
    for alt in ALTERNATIVE_LABELS:
        for stat in ("n_cases", "n_flips", "flip_rate", "flip_ci_lower", "flip_ci_upper", "n_lost", "n_gained"):
            val = fa[stat].get(alt, math.nan) if len(fa) else math.nan
            row[f"{stat}_{alt}"] = val
    row["n_study_outcomes"] = int(len(verdicts))
    row["n_verdict_changes"] = int(verdicts["verdict_changes"].sum()) if len(verdicts) else 0
    row["answer"] = _answer(row)
    out = pd.DataFrame([row])
    for col in out.columns:
        if col.startswith(("n_cases_", "n_flips_", "n_lost_", "n_gained_")):
            out[col] = pd.array([None if not np.isfinite(v) else int(v) for v in out[col].astype(float)], dtype="Int64")
    return out


def _answer(row: dict) -> str:
    parts = [f"Across {_plural(row['n_cases'], 'case')} in {_plural(row['n_studies'], 'study')}".replace(
        "studys", "studies")]
    if np.isfinite(row["pooled_ar1"]):
        parts[0] += (f", the pooled AR(1) coefficient of the case-model errors is {_fmt(row['pooled_ar1'])} "
                     f"(95% CI {_fmt(row['pooled_ar1_ci_lower'])} to {_fmt(row['pooled_ar1_ci_upper'])})")
    parts[0] += "."
    if row.get("n_cases_quarantined"):
        parts.append(f"{_plural(row['n_cases_quarantined'], 'more case')} could not be audited (quarantined).")
    bits = []
    for alt, words in (("gls_reml", "with each case's own REML AR(1)"),
                       ("gls_shrunken", "with the shrunken AR(1)"),
                       ("hac", "with HAC standard errors"),
                       ("tau_adjusted", "for dependence-adjusted Tau")):
        n = row.get(f"n_cases_{alt}")
        if n is None or not np.isfinite(n) or n == 0:
            continue
        k = int(row[f"n_flips_{alt}"])
        bits.append(f"{k:,} of {int(n):,} ({_pct(row[f'flip_rate_{alt}'])}, 95% CI {_pct(row[f'flip_ci_lower_{alt}'])} "
                    f"to {_pct(row[f'flip_ci_upper_{alt}'])}) {words}")
    if bits:
        parts.append(f"Modelling serial dependence changes the case-level decision at alpha = {row['alpha']:g} in "
                     + "; ".join(bits) + ".")
    parts.append(f"{int(row['n_verdict_changes']):,} of {int(row['n_study_outcomes']):,} study outcomes change their verdict under "
                 "the three-demonstrations standard (common practice).")
    if np.isfinite(row["mean_dw_power"]):
        parts.append(f"The exact Durbin-Watson test has mean power {_pct(row['mean_dw_power'])} against an AR(1) of "
                     f"{_fmt(row['dw_power_rho'])}, so a non-significant DW result is weak evidence of independence.")
    return " ".join(parts)


# ----------------------------------------------------------------------------- entry point


def summarize(cases: pd.DataFrame, alpha: float = 0.05, diagnose_at_rho: DiagnoseAtRho | None = None,
              quarantine: pd.DataFrame | None = None, accepted_cases: pd.DataFrame | None = None,
              observations: pd.DataFrame | None = None, sensitivity_rhos=SENSITIVITY_RHOS) -> dict[str, pd.DataFrame]:
    """The meta-analytic summary of a review's per-case diagnostics; {summary_<part>: DataFrame}.

    diagnose_at_rho: f(rho float | Series by case_key) -> frame with case_key and
    effect_gls_supplied_p_value (and _estimate), e.g. ``lambda r: diagnose_cases(obs, alpha,
    supplied_rho=r)["cases"]``; when None and observations are given, ``make_gls_at_rho`` is used.
    Parts that need missing inputs are skipped and listed in summary_notes.
    """
    notes: list[tuple[str, str, str]] = []
    cases = cases.reset_index(drop=True)
    stacks = ReviewStacks(observations) if observations is not None and len(observations) else None
    if diagnose_at_rho is None and stacks is not None:
        diagnose_at_rho = make_gls_at_rho(stacks, alpha)

    shrink = _shrinkage_table(cases, stacks, notes)
    pooled = _pooled_autocorrelation(shrink, alpha)
    overall_ar1 = pooled[(pooled["measure"] == "ar1_coefficient") & (pooled["group_by"] == "all")].iloc[0]
    mu, tau2 = float(overall_ar1["estimate"]), float(overall_ar1["tau2"])
    eb = empirical_bayes_shrinkage(shrink["raw"], shrink["raw_variance"], mu if np.isfinite(mu) else 0.0, tau2)
    shrink["pooled_mean"] = mu
    shrink["tau2"] = tau2
    shrink["weight"] = eb["weight"].to_numpy()
    shrink["shrunken"] = eb["shrunken"].to_numpy()
    shrink = shrink[["case_key", "study", "series", "design", "outcome_scale", "n_obs", "n_params", "r1_corrected",
                     "r1_null_variance", "calibration", "raw", "raw_variance", "raw_at_bound", "pooled_mean", "tau2",
                     "weight", "shrunken", "ar1_reml_rho", "reason"]]

    shrunken_run = None
    sensitivity = pd.DataFrame(columns=["assumed_rho", "n_cases", "n_significant_independence",
                                        "n_significant_alternative", "n_flips", "n_lost", "n_gained", "flip_rate",
                                        "flip_ci_lower", "flip_ci_upper", "lost_rate", "lost_ci_lower",
                                        "lost_ci_upper", "gained_rate", "gained_ci_lower", "gained_ci_upper"])
    if diagnose_at_rho is not None:
        rho_series = pd.Series(shrink["shrunken"].to_numpy(), index=shrink["case_key"].to_numpy())
        shrunken_run = _align(diagnose_at_rho(rho_series), cases)
        sensitivity = _sensitivity(cases, diagnose_at_rho, sensitivity_rhos, alpha)
    else:
        notes.append(("flip_rates", "skipped", "no observations and no diagnose_at_rho: no decision under the "
                      "shrunken AR(1) and no sensitivity curve"))

    dw = _durbin_watson_table(cases, stacks, mu, alpha, notes)
    alts = _alternatives(cases, shrunken_run, notes)
    flips = _flip_rates(cases, alts, alpha)
    verdicts = _study_verdicts(cases, shrunken_run, alpha)
    effect = _pooled_effect(cases, shrink, alpha, notes)
    five = _five_point(cases, accepted_cases, observations, notes)
    quarantined = _quarantined_by_study(quarantine)
    screening = _screening(cases, verdicts, alts, pooled, five, quarantined, alpha, notes)
    overall = _overall(cases, pooled, dw, flips, verdicts, quarantined, quarantine, alpha)
    notes.insert(0, ("ar1_calibration", "done", "AR(1) per case by inverting the exact expectation of the residual "
                     "lag-1 autocorrelation; r1_corrected is also pooled, but it is attenuated when rho != 0"))
    note_frame = pd.DataFrame(notes, columns=["part", "status", "note"]).drop_duplicates()
    return {
        "summary_overall": overall,
        "summary_pooled_autocorrelation": pooled,
        "summary_case_shrinkage": shrink,
        "summary_durbin_watson": dw,
        "summary_flip_rates": flips,
        "summary_sensitivity": sensitivity,
        "summary_study_verdicts": verdicts,
        "summary_pooled_effect": effect,
        "summary_screening": screening,
        "summary_notes": note_frame.reset_index(drop=True),
    }


# ----------------------------------------------------------------------------- store and CLI


def _read_optional(store, name: str, run: str, **filters) -> pd.DataFrame | None:
    try:
        return store.table(name, run=run, **filters).drop(columns="run", errors="ignore")
    except (KeyError, FileNotFoundError):
        return None


def load_summary(store_path, run: str = "latest", alpha: float | None = None) -> dict[str, pd.DataFrame]:
    """Summary tables of a committed run: read from the store, or computed from its cases table."""
    from audit.store import ResultsStore

    store = ResultsStore(store_path)
    info = store.run_info(run)
    run_id = info["run_id"]
    names = set(info.get("tables") or [])
    if set(SUMMARY_TABLES) - {"summary_notes"} <= names:
        return {name: store.table(name, run=run_id).drop(columns="run", errors="ignore")
                for name in SUMMARY_TABLES if name in names}
    cases = _read_optional(store, "cases", run_id)
    if cases is None:
        raise KeyError(f"run {run_id} in {store_path} has neither summary tables nor a cases table")
    params = info.get("parameters") or {}
    a = alpha if alpha is not None else float(params.get("alpha", 0.05)) if isinstance(params, dict) else 0.05
    accepted = None
    for name in ("accepted_cases", "accepted", "cases_accepted"):
        accepted = _read_optional(store, name, run_id)
        if accepted is not None:
            break
    return summarize(cases, a, quarantine=_read_optional(store, "quarantine", run_id), accepted_cases=accepted,
                     observations=_read_optional(store, "observations", run_id))


BY_CHOICES = ("study", "design", "scale")


def format_summary(tables: dict[str, pd.DataFrame], by: str | None = None) -> str:
    """Plain-text summary: the overall answer, then the table chosen by ``by``."""
    lines = []
    overall = tables.get("summary_overall")
    if overall is not None and len(overall):
        lines.append(str(overall["answer"].iloc[0]))
    lines.append("")
    pooled = tables["summary_pooled_autocorrelation"]
    flips = tables["summary_flip_rates"]
    if by is None:
        sel = pooled[(pooled["group_by"] == "all")]
        lines += ["Pooled autocorrelation (random effects, DerSimonian-Laird)",
                  _text_table(sel, ["measure", "n_cases", "estimate", "ci_lower", "ci_upper", "pi_lower", "pi_upper",
                                    "tau2", "i2"])]
        lines += ["", "Flip rates against the OLS decision",
                  _text_table(flips[flips["group_by"] == "all"],
                              ["alternative", "n_cases", "n_flips", "flip_rate", "flip_ci_lower", "flip_ci_upper",
                               "n_lost", "n_gained"])]
        sens = tables.get("summary_sensitivity")
        if sens is not None and len(sens):
            lines += ["", "Sensitivity: flip rate of GLS at an assumed AR(1)",
                      _text_table(sens, ["assumed_rho", "n_cases", "n_flips", "flip_rate", "flip_ci_lower",
                                         "flip_ci_upper", "n_lost", "n_gained"])]
        verdicts = tables.get("summary_study_verdicts")
        if verdicts is not None:
            changed = verdicts[verdicts["verdict_changes"].astype(bool)]
            lines += ["", f"Study outcomes whose verdict changes: {len(changed)} of {len(verdicts)}"]
            if len(changed):
                lines.append(_text_table(changed, ["study", "series", "verdict_independence", "verdict_ar1",
                                                   "verdict_shrunken"]))
    elif by == "study":
        lines.append("Screening table (one block per study; --json for the full table)")
        for _, r in tables["summary_screening"].iterrows():
            five = r["cases_meeting_five_point_standard"]
            trend = r["n_baseline_trend_flags"]
            lines += [
                "",
                str(r["study"]),
                f"  cases: {r['cases_audited']} audited, {r['cases_quarantined']} quarantined, "
                f"{'NA' if pd.isna(five) else int(five)} with 5+ points in every phase",
                f"  exact DW significant (positive): {_pct(r['share_significant_dw'])}; decision flips: {r['n_flips']}"
                f" (shrunken AR(1): {r['n_flips_shrunken']}); baseline-trend flags: {'NA' if pd.isna(trend) else int(trend)}",
                f"  verdict: independence {r['verdict_independence']} | own AR(1) {r['verdict_ar1']} | "
                f"shrunken AR(1) {r['verdict_shrunken']}",
                f"  note: {r['note']}",
            ]
    else:
        col = "outcome_scale" if by == "scale" else by
        sel = pooled[(pooled["measure"] == "ar1_coefficient") & (pooled["group_by"] == col)]
        lines += [f"Pooled AR(1) coefficient by {col.replace('_', ' ')}",
                  _text_table(sel, ["group", "n_cases", "estimate", "ci_lower", "ci_upper", "tau2", "i2"])]
        f = flips[flips["group_by"] == col]
        lines += ["", f"Flip rates by {col.replace('_', ' ')}",
                  _text_table(f, ["alternative", "group", "n_cases", "n_flips", "flip_rate", "flip_ci_lower",
                                  "flip_ci_upper"])]
    notes = tables.get("summary_notes")
    if notes is not None and len(notes[notes["status"] != "done"]):
        lines += ["", "Notes"] + [f"  - {n}" for n in notes.loc[notes["status"] != "done", "note"]]
    return "\n".join(lines)


def _text_table(df: pd.DataFrame, cols: list[str]) -> str:
    cols = [c for c in cols if c in df.columns]
    if df.empty:
        return "  (none)"
    show = df[cols].copy()
    for c in show.columns:
        if pd.api.types.is_float_dtype(show[c]):
            show[c] = show[c].map(lambda x: _fmt(x, 3))
    return show.to_string(index=False)


def _json_default(obj):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return str(obj)


def summary_json(tables: dict[str, pd.DataFrame], by: str | None = None) -> dict:
    """JSON-ready document: every summary table as records (NaN as null)."""
    doc = {name.removeprefix("summary_"): json.loads(df.to_json(orient="records")) for name, df in tables.items()}
    doc["by"] = by
    return doc


def cmd_summary(args) -> int:
    """`sced-audit summary --store DIR [--run ID] [--by study|design|scale] [--json]`."""
    by = getattr(args, "by", None)
    try:
        tables = load_summary(args.store, getattr(args, "run", None) or "latest")
    except (LookupError, FileNotFoundError) as exc:
        print(f"sced-audit: error: {exc}", file=sys.stderr)
        return 2
    if getattr(args, "json", False):
        json.dump(summary_json(tables, by), sys.stdout, indent=2, default=_json_default)
        print()
    else:
        print(format_summary(tables, by))
        print("\nCaution: these diagnostics support, and never replace, visual analysis and professional judgment. "
              "Follow your review protocol and local professional standards.")
    return 0


def _main(argv: list[str] | None = None) -> int:  # pragma: no cover - convenience entry
    import argparse

    p = argparse.ArgumentParser(prog="python -m audit.summary")
    p.add_argument("--store", required=True)
    p.add_argument("--run", default="latest")
    p.add_argument("--by", choices=BY_CHOICES)
    p.add_argument("--json", action="store_true")
    return cmd_summary(p.parse_args(argv))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(_main())
