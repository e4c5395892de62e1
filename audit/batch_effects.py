"""Effect sizes and baseline trends for many cases at once (vectorised batch path).

Gives the same tables as the per-case reference functions, concatenated over cases:
audit.effect_sizes.case_effect_sizes (case-level dict and per-contrast rows) and
audit.trend.baseline_trends (one row per baseline phase and one for all baseline points).

How: improving/worse/tied pairs and the tie groups of the pooled data from one stable sort of
each contrast's pooled values (contrasts of equal size stacked), Kendall S of the baseline on
(m, nA(nA-1)/2) pair arrays; phase means and SDs, Theil-Sen slopes and
their order-statistic interval (as scipy.stats.theilslopes), Mann-Kendall S and its tie-corrected
variance per series length on (m, n) / (m, n(n-1)/2) arrays, using the same floating-point
operations as the reference (so constant phases give the same values and reason codes); the exact
Mann-Kendall null distribution cached per n; Newcombe's score interval for NAP by Brent's method
(Brent 1973, the steps of scipy.optimize.brentq) run on all distinct (NAP, nA, nB) at once.
Items outside the vectorised path (contrasts or baseline series with non-finite values, baseline
series whose sessions are not strictly increasing) go through the reference functions.
"""

from __future__ import annotations

from dataclasses import asdict, fields

import numpy as np
import pandas as pd
from pandas.api.types import infer_dtype
from scipy import stats

from audit import reasons as R
from audit.effect_sizes import (
    NAP,
    PND,
    RATIO_SCALES,
    RHO_MAX,
    LogResponseRatio,
    MeanDifferenceTest,
    StandardizedMeanDifference,
    TauBetweenPhases,
    TauU,
    contrast_effect_sizes,
    hedges_correction,
    sd_frame,
    tau_u_permutation_variance,
)
from audit.regression import binary_exponents, scale_rows
from audit.trend import (
    MANN_KENDALL_EXACT_MAX_N,
    BaselineTrend,
    baseline_trend,
    mann_kendall_exact_sf,
    normalize_direction,
    scaled_ratio,
    scaling_exponents,
    unscale_checked,
    window_exponents,
)

__all__ = ["case_effects_batch", "baseline_trends_batch", "baseline_trend_parts", "CASE_LEVEL_COLUMNS",
           "ObservationColumns", "TextCodes", "dense_rank", "increasing_within"]

_NAN = float("nan")
_Z_SCREEN = stats.norm.ppf(1.0 - 0.05 / 2.0)  # the lag-1 screen of the Hamed-Rao correction
_BRENT_RTOL = 4.0 * np.finfo(float).eps  # scipy.optimize.brentq default rtol
_BRENT_MAXITER = 100
_PAIR_BUDGET = 1 << 22  # booleans per block of pairwise comparisons (memory bound)
_SERIES_BUDGET = 1 << 20  # series x n^2 per block of trend series (memory bound)

AGGREGATION = ("PND: pooled over treatment points; NAP/Tau/Tau-U: weighted by nA*nB; "
               "LRR: inverse-variance (fixed effect); SMD and mean difference: simple mean")

# keys of the dict returned by case_effect_sizes for a case with at least one contrast, in order
CASE_LEVEL_COLUMNS = [
    "design", "n_contrasts", "desired_direction", "direction_assumed", "outcome_scale", "rho_input",
    "rho_used", "rho_method", "rho_reason", "alpha", "aggregation",
    "pnd_percent", "pnd_reason", "nap", "nap_se_hanley_mcneil", "nap_reason",
    "tau", "tau_p_value", "tau_p_value_adjusted", "tau_flip", "tau_reason",
    "tau_u", "tau_u_p_value", "tau_u_p_value_permutation", "tau_u_p_value_adjusted", "tau_u_flip",
    "tau_u_reason", "lrr_improvement", "lrr_se", "lrr_p_value", "lrr_p_value_adjusted", "lrr_flip",
    "lrr_reason", "smd_baseline_sd", "smd_baseline_sd_hedges", "smd_pooled_sd", "smd_pooled_sd_hedges",
    "smd_reason", "mean_difference", "mean_difference_welch_p_value",
    "mean_difference_welch_p_value_adjusted", "mean_difference_welch_flip", "mean_difference_reason",
    "mean_difference_reason_adjusted", "reason",
]
# absent from the dict of a case without contrasts (a DataFrame of such dicts holds NaN there)
_ABSENT_WITHOUT_CONTRAST = {"pnd_reason", "nap_reason", "tau_reason", "tau_u_reason", "lrr_reason",
                            "smd_reason", "mean_difference_reason", "mean_difference_reason_adjusted"}

# as ContrastEffectSizes.as_row: shared fields once (first measure wins), others prefixed
_MEASURES = (("pnd", PND), ("nap", NAP), ("tau", TauBetweenPhases), ("tau_u", TauU),
             ("lrr", LogResponseRatio), ("smd", StandardizedMeanDifference),
             ("mean_difference", MeanDifferenceTest))
_SHARED = {
    "desired_direction", "direction_assumed", "alpha", "confidence", "rho_used",
    "n_baseline_effective", "n_treatment_effective", "outcome_scale", "n_baseline", "n_treatment",
    "mean_baseline", "mean_treatment", "sd_baseline", "sd_treatment", "mean_difference",
}


# ----------------------------------------------------------------------------------------------
# small vectorised helpers (same operations as the scalar reference helpers)
# ----------------------------------------------------------------------------------------------


def _two_sided_p(z: np.ndarray) -> np.ndarray:
    """min(1, 2 (1 - Phi(z))) where z is finite, NaN elsewhere."""
    z = np.asarray(z, dtype=float)
    out = np.full(z.shape, _NAN)
    ok = np.isfinite(z)
    if ok.any():
        out[ok] = np.minimum(1.0, 2.0 * stats.norm.sf(z[ok]))
    return out


def _t_two_sided(t: np.ndarray, df: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """2 P(T_df > |t|) where ok, NaN elsewhere."""
    out = np.full(t.shape, _NAN)
    if ok.any():
        out[ok] = 2 * stats.t.sf(np.abs(t[ok]), df[ok])
    return out


def _flip(p: np.ndarray, pa: np.ndarray, alpha: float) -> np.ndarray:
    """Object array: None where either p-value is undefined, else whether the decision differs."""
    ok = np.isfinite(p) & np.isfinite(pa)
    out = np.full(p.shape, None, dtype=object)
    out[ok] = ((p[ok] < alpha) != (pa[ok] < alpha)).tolist()
    return out


def _boolean_array(values: np.ndarray) -> pd.api.extensions.ExtensionArray:
    """pd.array(list(values), dtype="boolean") of an object array of True / False / missing."""
    values = np.asarray(values, dtype=object)
    if infer_dtype(values, skipna=True) not in ("boolean", "empty"):
        return pd.array(values.tolist(), dtype="boolean")
    missing = pd.isna(values)
    data = np.zeros(len(values), dtype=bool)
    data[~missing] = values[~missing].astype(bool)
    return pd.arrays.BooleanArray(data, missing)


def _codes(ok: np.ndarray, code: str, other: str = R.OK) -> np.ndarray:
    return np.where(ok, other, code).astype(object)


def _effective(n: np.ndarray, rho_used: np.ndarray) -> np.ndarray:
    """n (1 - rho)/(1 + rho) (audit.effect_sizes.effective_sample_size with rho already bounded)."""
    return n * (1.0 - rho_used) / (1.0 + rho_used)


def _mw_var_s(npairs: np.ndarray, na_e: np.ndarray, nb_e: np.ndarray, f) -> np.ndarray:
    """(nA nB)^2 (nA_e + nB_e + 1) f / (3 nA_e nB_e)."""
    return npairs**2 * (na_e + nb_e + 1.0) * f / (3.0 * na_e * nb_e)


def _z_cc(s: np.ndarray, v: np.ndarray) -> np.ndarray:
    """sign(S)(|S| - 1)/sqrt(Var); 0 for S = 0; NaN unless Var > 0 and both finite."""
    ok = np.isfinite(v) & (v > 0) & np.isfinite(s)
    with np.errstate(all="ignore"):
        z = np.where(s == 0, 0.0, np.sign(s) * (np.abs(s) - 1.0) / np.sqrt(v))
    return np.where(ok, z, _NAN)


def _p_cc(s: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Two-sided continuity-corrected normal p of S (scipy mannwhitneyu asymptotic rule)."""
    ok = np.isfinite(v) & (v > 0) & np.isfinite(s)
    with np.errstate(all="ignore"):
        z = np.where(ok, (np.abs(s) - 1.0) / np.sqrt(v), _NAN)
    return _two_sided_p(z)


def _cached(fn, keys: np.ndarray) -> np.ndarray:
    """fn applied to each distinct row of keys (integer array (m, k)), broadcast back."""
    if len(keys) == 0:
        return np.zeros(0)
    uniq, inv = _unique_rows(keys)
    vals = np.array([fn(*map(int, row)) for row in uniq], dtype=float)
    return vals[inv]


def _unique_rows(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """np.unique(keys, axis=0, return_inverse=True) of an integer array (m, k), the inverse flat;
    rows are coded as one integer (mixed radix, lexicographic) when their ranges allow."""
    keys = np.asarray(keys)
    if keys.ndim == 2 and len(keys) and keys.dtype.kind in "iu":
        lo = keys.min(axis=0).astype(np.int64)
        span = keys.max(axis=0).astype(np.int64) - lo + 1
        if float(np.prod(span.astype(float))) < 2.0**62:
            code = np.zeros(len(keys), dtype=np.int64)
            for c in range(keys.shape[1]):
                code = code * span[c] + (keys[:, c].astype(np.int64) - lo[c])
            _, first, inv = np.unique(code, return_index=True, return_inverse=True)
            return keys[first], inv.ravel()
    uniq, inv = np.unique(keys, axis=0, return_inverse=True)
    return uniq, inv.ravel()


def _join_rows(parts: list[np.ndarray]) -> np.ndarray:
    """R.join of several object arrays of reason codes, element by element (once per distinct
    combination)."""
    n = len(parts[0])
    if n == 0:
        return np.zeros(0, dtype=object)
    cols = [np.asarray(p, dtype=object) for p in parts]
    code = np.zeros(n, dtype=np.int64)
    for col in cols:
        c, u = pd.factorize(col)
        if len(c) and c.min() < 0:  # a missing code: row by row
            return np.array([R.join(*r) for r in zip(*cols)], dtype=object)
        code = code * len(u) + c
    _, first, inv = np.unique(code, return_index=True, return_inverse=True)
    joined = [R.join(*(col[i] for col in cols)) for i in first.tolist()]
    return np.array(joined, dtype=object)[inv.ravel()]


def _smd_columns(md_s, sd_s, e_diff, enough, j):
    """SMD = mean difference / SD (both scaled; ``scaled_ratio``), its Hedges-corrected value (x j)
    and reason: too_few_points without ``enough`` points or a finite j, zero_variance for SD 0,
    numerical_failure when the ratio is not representable."""
    ok = enough & (sd_s > 0)
    smd, bad = scaled_ratio(md_s, sd_s, e_diff)
    bad &= ok
    ok &= ~bad
    smd = np.where(ok, smd, _NAN)
    reason = np.where(~enough, R.TOO_FEW_POINTS, np.where(~(sd_s > 0), R.ZERO_VARIANCE, np.where(
        bad, R.NUMERICAL_FAILURE, np.where(np.isfinite(j), R.OK, R.TOO_FEW_POINTS)))).astype(object)
    return smd, np.where(ok, smd * j, _NAN), reason


def _with_code(codes: np.ndarray, mask: np.ndarray, code: str = R.NUMERICAL_FAILURE) -> np.ndarray:
    """Object array of reason codes with `code` joined in (R.join) where mask; others unchanged."""
    out = np.array(codes, dtype=object)
    for i in np.flatnonzero(mask):
        out[i] = R.join(out[i], code)
    return out


def _segment_moments(values, rows, start, length):
    """Per segment: scaling exponent e (audit.trend.scaling_exponents), mean and SD (ddof=1; NaN
    below 2 points) of the values times 2**-e, max, min, all finite.

    Computed per segment length on (m, n) arrays along the last axis, which performs the same
    summation as numpy on each segment alone (bit-identical means and SDs).
    """
    s = len(start)
    mean, sd, mx, mn = (np.full(s, _NAN) for _ in range(4))
    expo = np.zeros(s, dtype=np.int64)
    finite = np.zeros(s, dtype=bool)
    for n in np.unique(length):
        sel = np.flatnonzero(length == n)
        if n == 0:
            continue
        v = values[rows[start[sel][:, None] + np.arange(n)]]
        e = scaling_exponents(v)
        vs = scale_rows(v, e)
        with np.errstate(all="ignore"):
            mean[sel] = vs.mean(axis=1)
            if n >= 2:
                sd[sel] = vs.std(axis=1, ddof=1)
            mx[sel] = v.max(axis=1)
            mn[sel] = v.min(axis=1)
        expo[sel] = e
        finite[sel] = np.isfinite(v).all(axis=1)
    return expo, mean, sd, mx, mn, finite


# ----------------------------------------------------------------------------------------------
# Brent's root finder on many brackets at once
# ----------------------------------------------------------------------------------------------


def _brentq_many(f, xa: np.ndarray, xb: np.ndarray, xtol: float, rtol: float = _BRENT_RTOL,
                 maxiter: int = _BRENT_MAXITER) -> np.ndarray:
    """Roots of f(x, idx) = 0 in [xa, xb] by Brent's method, element-wise, with the steps of
    scipy.optimize.brentq; NaN where the signs do not bracket a root, f is NaN or it does not converge.

    f(x, idx) evaluates the idx-th function at x (arrays of equal length).
    """
    m = len(xa)
    root = np.full(m, _NAN)
    if m == 0:
        return root
    allidx = np.arange(m)
    xpre, xcur = xa.astype(float).copy(), xb.astype(float).copy()
    fpre, fcur = f(xpre, allidx), f(xcur, allidx)
    done = np.isnan(fpre) | np.isnan(fcur) | (fpre * fcur > 0)
    z = ~done & (fpre == 0)
    root[z], done[z] = xpre[z], True
    z = ~done & (fcur == 0)
    root[z], done[z] = xcur[z], True
    xblk, fblk, spre, scur = (np.zeros(m) for _ in range(4))
    with np.errstate(all="ignore"):
        for _ in range(maxiter):
            act = np.flatnonzero(~done)
            if act.size == 0:
                break
            xp, xc, fp, fc = xpre[act], xcur[act], fpre[act], fcur[act]
            xk, fk, sp, sc = xblk[act], fblk[act], spre[act], scur[act]
            new = fp * fc < 0
            xk, fk = np.where(new, xp, xk), np.where(new, fp, fk)
            step = xc - xp
            sp, sc = np.where(new, step, sp), np.where(new, step, sc)
            swap = np.abs(fk) < np.abs(fc)
            xp, xc, xk = np.where(swap, xc, xp), np.where(swap, xk, xc), np.where(swap, xc, xk)
            fp, fc, fk = np.where(swap, fc, fp), np.where(swap, fk, fc), np.where(swap, fc, fk)
            delta = (xtol + rtol * np.abs(xc)) / 2
            sbis = (xk - xc) / 2
            conv = (fc == 0) | (np.abs(sbis) < delta)
            root[act[conv]] = xc[conv]
            done[act[conv]] = True
            try_step = (np.abs(sp) > delta) & (np.abs(fc) < np.abs(fp))
            interp = -fc * (xc - xp) / (fc - fp)
            dpre = (fp - fc) / (xp - xc)
            dblk = (fk - fc) / (xk - xc)
            extrap = -fc * (fk * dblk - fp * dpre) / (dblk * dpre * (fk - fp))
            stry = np.where(xp == xk, interp, extrap)
            good = try_step & (2 * np.abs(stry) < np.minimum(np.abs(sp), 3 * np.abs(sbis) - delta))
            sp, sc = np.where(good, sc, sbis), np.where(good, stry, sbis)
            xp, fp = xc, fc
            xc = xc + np.where(np.abs(sc) > delta, sc, np.where(sbis > 0, delta, -delta))
            keep = ~conv
            a = act[keep]
            xpre[a], fpre[a], xcur[a] = xp[keep], fp[keep], xc[keep]
            xblk[a], fblk[a], spre[a], scur[a] = xk[keep], fk[keep], sp[keep], sc[keep]
            if a.size:
                fcur[a] = f(xcur[a], a)
                bad = a[np.isnan(fcur[a])]
                done[bad] = True  # NaN function value: scipy raises, the interval becomes NaN
    return root


def _newcombe_many(value: np.ndarray, na: np.ndarray, nb: np.ndarray, confidence: float):
    """Newcombe (2006) method-5 interval for each AUC (audit.effect_sizes.newcombe_nap_interval)."""
    m = len(value)
    low, high = np.full(m, _NAN), np.full(m, _NAN)
    if m == 0:
        return low, high
    z = stats.norm.ppf(0.5 + confidence / 2.0)
    mn = (na * nb).astype(float)
    nstar = (na + nb) / 2.0 - 1.0
    a = value.astype(float)
    eps = 1e-12

    def k(theta, idx):
        return (1.0 + nstar[idx] * ((1.0 - theta) / (2.0 - theta) + theta / (1.0 + theta))) / mn[idx]

    def f_low(theta, idx):
        with np.errstate(all="ignore"):
            g = np.where(theta >= 1.0, 0.0, (a[idx] - theta) / np.sqrt(theta * (1.0 - theta)))
            return g - z * np.sqrt(k(theta, idx))

    def f_high(theta, idx):
        with np.errstate(all="ignore"):
            g = np.where(theta <= 0.0, 0.0, (theta - a[idx]) / np.sqrt(theta * (1.0 - theta)))
            return g - z * np.sqrt(k(theta, idx))

    ok = np.isfinite(a)
    lo_zero, hi_one = ok & (a <= 0.0), ok & (a >= 1.0)
    low[lo_zero], high[hi_one] = 0.0, 1.0
    sel = np.flatnonzero(ok & ~lo_zero)
    if sel.size:
        r = _brentq_many(lambda t, i: f_low(t, sel[i]), np.full(sel.size, eps), a[sel], 1e-14)
        low[sel] = r
    sel = np.flatnonzero(ok & ~hi_one)
    if sel.size:
        r = _brentq_many(lambda t, i: f_high(t, sel[i]), a[sel], np.full(sel.size, 1.0 - eps), 1e-14)
        high[sel] = r
    failed = ~(np.isfinite(low) & np.isfinite(high))
    low[failed], high[failed] = _NAN, _NAN
    return low, high


# ----------------------------------------------------------------------------------------------
# input preparation
# ----------------------------------------------------------------------------------------------


def _case_bounds(obs: pd.DataFrame):
    keys = obs["case_key"].to_numpy()
    n = len(keys)
    if n == 0:
        return keys[:0], np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    start = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    length = np.diff(np.r_[start, n])
    return keys[start], start, length, np.repeat(np.arange(start.size), length)


def _normalise_text(text: np.ndarray, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(codes, normalised distinct strings): str(v).strip().lower() of each value v of text[codes]
    (text: a numpy str array of distinct values), the distinct strings sorted."""
    norm = np.array([u.strip().lower() for u in text], dtype=object)
    nuniq, ninv = np.unique(norm.astype(str), return_inverse=True)
    return ninv.ravel()[codes], nuniq.astype(object)


class TextCodes:
    """A text column as codes into its distinct values: ``text[codes]`` equals
    ``column.to_numpy().astype(str)`` element by element (same numpy str dtype), read once.

    Built from pandas.factorize (no conversion of every row to Python strings); a column with
    missing values is read the plain way (str() of a missing value depends on its kind).
    """

    def __init__(self, column: pd.Series):
        codes, uniques = pd.factorize(column)
        if len(codes) and codes.min() < 0:
            text, codes = np.unique(column.to_numpy().astype(str), return_inverse=True)
        else:
            values = np.asarray(uniques, dtype=object)
            text = np.array([str(v) for v in values]) if len(values) else np.zeros(0, dtype=str)
        self.codes = np.asarray(codes, dtype=np.int64).ravel()
        self.text = text

    def strings(self) -> np.ndarray:
        """column.to_numpy().astype(str)"""
        return self.text[self.codes]

    def normalised(self) -> tuple[np.ndarray, np.ndarray]:
        """(codes, sorted distinct strings) of str(v).strip().lower() of each value."""
        return _normalise_text(self.text, self.codes)


class ObservationColumns:
    """The columns of sorted clean observations that the batch paths read, converted once.

    Cases are runs of equal case_key (as _case_bounds); per-case columns are read at each case's
    first row. ``case_effects_batch``, ``baseline_trends_batch`` and ``audit.diagnose.phase_table``
    accept this in place of the observations frame, so diagnose_cases converts each column once.
    """

    def __init__(self, obs: pd.DataFrame, condition: TextCodes | None = None, key_codes: np.ndarray | None = None):
        key_col = obs["case_key"]
        sortable = True
        if key_codes is not None:
            codes = key_codes
        else:
            try:
                codes = pd.factorize(key_col, sort=True)[0]
            except TypeError:  # keys that cannot be ordered
                codes, sortable = pd.factorize(key_col)[0], False
        n = len(codes)
        if n and codes.min() < 0:  # missing keys: each one a case of its own, as _case_bounds
            self.keys, self.case_start, _, self.case_id = _case_bounds(obs)
            self.key_rank = None
        else:
            codes = np.asarray(codes, dtype=np.int64)
            start = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]]) if n else np.zeros(0, dtype=np.int64)
            length = np.diff(np.r_[start, n]).astype(np.int64)
            self.case_start = start
            self.case_id = np.repeat(np.arange(start.size), length)
            self.keys = key_col.iloc[start].to_numpy() if n else key_col.to_numpy()[:0]
            self.key_rank = codes if sortable else None  # rank of each row's key among the sorted keys
        self.session = obs["session"].to_numpy(dtype=float)
        self.outcome = obs["outcome"].to_numpy(dtype=float)
        self.phase_index = obs["phase_index"].to_numpy()
        self.condition = condition if condition is not None else TextCodes(obs["condition"])
        self.frame = obs
        self._case_values: dict[tuple[str, object], np.ndarray] = {}

    def at_case_start(self, column: str, dtype=None) -> np.ndarray:
        """obs[column].to_numpy(dtype=dtype)[case_start]"""
        key = (column, dtype)
        if key not in self._case_values:
            self._case_values[key] = self.frame[column].iloc[self.case_start].to_numpy(dtype=dtype)
        return self._case_values[key]


def _columns(obs) -> ObservationColumns:
    return obs if isinstance(obs, ObservationColumns) else ObservationColumns(obs)


def _object_array(items: list) -> np.ndarray:
    out = np.empty(len(items), dtype=object)
    out[:] = items
    return out


def _per_distinct(fn, values: np.ndarray) -> np.ndarray:
    """Object array of fn(v) for each v of an object array, computed once per distinct text
    (value by value for missing values and for arrays holding anything but text)."""
    values = np.asarray(values, dtype=object)
    if infer_dtype(values, skipna=True) not in ("string", "empty"):
        return _object_array([fn(v) for v in values])
    codes, uniques = pd.factorize(values)
    out = _object_array([fn(u) for u in uniques] + [None])[codes]
    lost = np.flatnonzero(codes < 0)  # missing values (pandas.factorize gives them no code)
    if lost.size:
        out[lost] = _object_array([fn(v) for v in values[lost]])
    return out


def _normalize_directions(values: np.ndarray) -> np.ndarray:
    """normalize_direction of each value (object array)."""
    return _per_distinct(normalize_direction, values)


def dense_rank(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """np.unique(v, return_inverse=True), the inverse flat (integers: by counting when their range is small)."""
    if v.dtype.kind not in "iu":
        uniq, inv = np.unique(v, return_inverse=True)
        return uniq, inv.ravel()
    if len(v) == 0:
        return v[:0], np.zeros(0, dtype=np.int64)
    lo, hi = int(v.min()), int(v.max())
    if hi - lo > 4 * len(v) + 1024:
        uniq, inv = np.unique(v, return_inverse=True)
        return uniq, inv.ravel()
    present = np.zeros(hi - lo + 1, dtype=bool)
    present[v - lo] = True
    uniq = (np.flatnonzero(present) + lo).astype(v.dtype)
    rank = np.cumsum(present) - 1
    return uniq, rank[v - lo]


def increasing_within(g: np.ndarray, x: np.ndarray, strict: bool = True) -> bool:
    """g non-decreasing and x increasing within each run of equal g (strictly unless ``strict`` is
    False: then (g, x) is in lexicographic order and a stable sort would keep the order)."""
    if len(g) < 2:
        return True
    dg = g[1:] - g[:-1]
    if (dg < 0).any():
        return False
    same = dg == 0
    later, earlier = x[1:][same], x[:-1][same]
    return bool((later > earlier).all() if strict else (later >= earlier).all())


def _is_alternating(design: np.ndarray) -> np.ndarray:
    """Per design text (numpy str array): an alternating-treatments design?"""
    if len(design) == 0:
        return np.zeros(0, dtype=bool)
    uniq, inv = np.unique(design, return_inverse=True)
    alt = np.array([d.strip().lower().replace("-", "_").startswith("alternating") for d in uniq], dtype=bool)
    return alt[inv.ravel()]


# ----------------------------------------------------------------------------------------------
# effect sizes
# ----------------------------------------------------------------------------------------------


def case_effects_batch(obs: pd.DataFrame | ObservationColumns, rho: np.ndarray, alpha: float = 0.05,
                       confidence: float = 0.95) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Case-level and per-contrast effect sizes of all cases (= case_effect_sizes per case).

    obs: clean observations sorted by case_key then session (case_key, session, outcome,
    phase_index, condition, design, desired_direction, outcome_scale); design and condition are
    read as text, direction and scale from each case's first row, as diagnose_cases passes them
    (or those columns read once: ObservationColumns).
    rho: one AR(1) estimate per case in order of appearance; non-finite means "not given" (the
    reference's rho=None: lag-1 autocorrelation of residuals from phase/condition means).
    Returns (case_level: one row per case with the keys of the case dict, per_contrast: the
    per-contrast rows of all cases with a leading case_key column).
    """
    oc = _columns(obs)
    keys, case_id = oc.keys, oc.case_id
    ncase = len(keys)
    rho = np.asarray(rho, dtype=float).ravel()
    if rho.size != ncase:
        raise ValueError(f"rho has {rho.size} values for {ncase} cases; give one per case (NaN when unknown)")
    session = oc.session
    y_raw = oc.outcome
    phase_raw = oc.phase_index
    cond_code, cond_names = oc.condition.normalised()
    design = oc.at_case_start("design").astype(str) if ncase else np.zeros(0, dtype=str)
    direction_raw = oc.at_case_start("desired_direction", object) if ncase else np.zeros(0, dtype=object)
    scale_raw = oc.at_case_start("outcome_scale", object) if ncase else np.zeros(0, dtype=object)
    direction = _normalize_directions(direction_raw)
    assumed = np.array([d is None for d in direction], dtype=bool)
    direction = np.where(assumed, "increase", direction).astype(object)
    decrease = direction == "decrease"
    alt = _is_alternating(design)

    # session order within each case (stable, as the reference's argsort)
    perm = np.arange(len(session)) if increasing_within(case_id, session) else np.lexsort((session, case_id))
    y = y_raw[perm]
    cs = case_id[perm]
    ph = phase_raw[perm]
    cc = cond_code[perm]
    base_code = np.flatnonzero(cond_names == "baseline")
    treat_code = np.flatnonzero(cond_names == "treatment")
    is_a = np.isin(cc, base_code)
    is_b = np.isin(cc, treat_code)
    nrow = len(y)

    # groups: phase (ranked) in ordinary designs, condition text in alternating designs
    ph_uniq, ph_rank = dense_rank(ph)
    alt_row = alt[cs] if nrow else np.zeros(0, dtype=bool)
    gcode = np.where(alt_row, cc, ph_rank)
    if increasing_within(cs, gcode, strict=False):
        seg_order = np.arange(nrow)
    else:  # stable sort by (case, group): one integer key
        seg_order = np.argsort(cs.astype(np.int64) * (int(gcode.max()) + 1) + gcode, kind="stable")
    sc_, sg_ = cs[seg_order], gcode[seg_order]
    new_seg = np.r_[True, (sc_[1:] != sc_[:-1]) | (sg_[1:] != sg_[:-1])] if nrow else np.zeros(0, dtype=bool)
    seg_start = np.flatnonzero(new_seg)
    seg_len = np.diff(np.r_[seg_start, nrow])
    seg_case, seg_g = sc_[seg_start], sg_[seg_start]
    seg_of_row = np.empty(nrow, dtype=np.int64)
    seg_of_row[seg_order] = np.repeat(np.arange(seg_start.size), seg_len)
    seg_na = np.bincount(seg_of_row, weights=is_a, minlength=seg_start.size)
    seg_nb = np.bincount(seg_of_row, weights=is_b, minlength=seg_start.size)
    seg_alt = alt[seg_case] if seg_start.size else np.zeros(0, dtype=bool)
    seg_e, seg_mean, seg_sd, seg_max, seg_min, seg_finite = _segment_moments(y, seg_order, seg_start, seg_len)

    # ---- rho: given, or lag-1 autocorrelation of residuals from group means
    given = np.isfinite(rho)
    rho_input = np.where(given, rho, _NAN)
    rho_reason = np.full(ncase, R.OK, dtype=object)
    rho_method = np.where(given, "given", np.where(alt, "condition_mean_residual_lag1",
                                                   "phase_mean_residual_lag1")).astype(object)
    if (~given).any():
        case_finite = np.bincount(cs, weights=~np.isfinite(y), minlength=ncase) == 0
        # r1 is scale-free: each case scaled by 2**-E (E its scaling exponent), exact
        top = np.zeros(ncase)
        np.maximum.at(top, cs, np.abs(np.where(np.isfinite(y), y, 0.0)))
        case_e = window_exponents(np.frexp(top)[1])
        with np.errstate(all="ignore"):
            seg_mean_case = np.ldexp(seg_mean, seg_e - case_e[seg_case])  # segment means in case units
            e = np.ldexp(y, -case_e[cs]) - seg_mean_case[seg_of_row]
            same_case = cs[1:] == cs[:-1]
            same = same_case & (alt_row[1:] | (ph[1:] == ph[:-1]))
            num = np.bincount(cs[1:][same], weights=(e[:-1] * e[1:])[same], minlength=ncase)
            den = np.bincount(cs, weights=e * e, minlength=ncase)
            npair = np.bincount(cs[1:][same], minlength=ncase)
            r1 = num / den
        need = ~given
        bad_f = need & ~case_finite
        few = need & case_finite & (npair == 0)
        zero = need & case_finite & (npair > 0) & ~(den > 0)
        rho_input = np.where(need, r1, rho_input)
        rho_input[bad_f | few | zero] = _NAN
        rho_reason[bad_f] = R.NON_FINITE_INPUT
        rho_reason[few] = R.TOO_FEW_POINTS
        rho_reason[zero] = R.ZERO_VARIANCE
    rho_used = np.where(np.isfinite(rho_input), np.clip(rho_input, 0.0, RHO_MAX), _NAN)

    # ---- contrasts
    con_case, con_bseg, con_tseg, con_label, con_bph, con_tph = _contrasts(
        seg_case, seg_g, seg_len, seg_na, seg_nb, seg_alt, ph_uniq, cond_names, ncase)
    values = y[seg_order]  # values in segment order: segment s is values[seg_start[s]:+seg_len[s]]
    rows_identity = np.arange(nrow)
    cols = _contrast_columns(values, rows_identity, seg_start, seg_len, seg_e, seg_mean, seg_sd, seg_max, seg_min,
                             seg_finite, con_case, con_bseg, con_tseg, decrease, assumed, direction,
                             direction_raw, scale_raw, rho_used, alpha, confidence)
    per_contrast = _per_contrast_frame(keys, con_case, con_label, con_bph, con_tph, cols)
    case_level = _case_level_frame(cols, con_case, ncase, design, direction, assumed, scale_raw, rho_input,
                                   rho_used, rho_method, rho_reason, alpha)
    return case_level, per_contrast


def _contrasts(seg_case, seg_g, seg_len, seg_na, seg_nb, seg_alt, ph_uniq, cond_names, ncase):
    """Baseline -> treatment contrasts (as audit.effect_sizes.phase_contrasts), in case order."""
    nseg = len(seg_case)
    kind_a = (seg_na == seg_len) & (seg_len > 0)
    kind_b = (seg_nb == seg_len) & (seg_len > 0)
    parts = []
    # ordinary designs: baseline phase p followed by treatment phase p + 1
    ordinary = np.flatnonzero(~seg_alt)
    if ordinary.size:
        n_g = len(ph_uniq)
        mult = max(n_g, len(cond_names)) + 1  # segment codes are phase ranks or condition codes
        key = seg_case.astype(np.int64) * mult + seg_g
        base = ordinary[kind_a[ordinary]]
        # the k-th baseline phase of its case (phases in increasing order)
        cum = np.cumsum(kind_a & ~seg_alt)
        first_of_case = np.searchsorted(seg_case, seg_case[base], side="left")
        before = np.where(first_of_case > 0, cum[np.maximum(first_of_case - 1, 0)], 0)
        k_a = cum[base] - before
        nxt_val = ph_uniq[seg_g[base]] + 1
        pos = np.searchsorted(ph_uniq, nxt_val)
        exists = (pos < n_g) & (ph_uniq[np.minimum(pos, n_g - 1)] == nxt_val)
        tkey = seg_case[base].astype(np.int64) * mult + np.where(exists, pos, mult - 1)
        tpos = np.searchsorted(key, tkey)
        found = exists & (tpos < nseg)
        tpos_c = np.minimum(tpos, nseg - 1)
        found &= (key[tpos_c] == tkey) & kind_b[tpos_c] & ~seg_alt[tpos_c]
        b, t, k = base[found], tpos_c[found], k_a[found]
        labels = np.array([f"A{i}B{i}" for i in k.tolist()], dtype=object)
        parts.append((seg_case[b], b, t, labels, ph_uniq[seg_g[b]], ph_uniq[seg_g[t]], np.ones(b.size, bool)))
    # alternating designs: all baseline points vs all treatment points
    altseg = np.flatnonzero(seg_alt)
    if altseg.size:
        is_base_seg = np.isin(seg_g[altseg], np.flatnonzero(cond_names == "baseline"))
        is_treat_seg = np.isin(seg_g[altseg], np.flatnonzero(cond_names == "treatment"))
        bseg = np.full(ncase, -1)
        tseg = np.full(ncase, -1)
        bseg[seg_case[altseg[is_base_seg]]] = altseg[is_base_seg]
        tseg[seg_case[altseg[is_treat_seg]]] = altseg[is_treat_seg]
        c = np.flatnonzero((bseg >= 0) & (tseg >= 0))
        nb_ = c.size
        parts.append((c, bseg[c], tseg[c], np.full(nb_, "A_all_B_all", dtype=object),
                      np.zeros(nb_, dtype=ph_uniq.dtype), np.zeros(nb_, dtype=ph_uniq.dtype), np.zeros(nb_, bool)))
    if not parts:
        z = np.zeros(0, dtype=np.int64)
        return z, z, z, np.zeros(0, dtype=object), z, z
    case = np.concatenate([p[0] for p in parts])
    bs = np.concatenate([p[1] for p in parts])
    order = np.lexsort((bs, case))  # by case, then phase order (segments are in phase order)
    labels = np.concatenate([p[3] for p in parts])[order]
    bph = np.concatenate([p[4] for p in parts])[order]
    tph = np.concatenate([p[5] for p in parts])[order]
    has_phase = np.concatenate([p[6] for p in parts])[order]
    bph_out = pd.array(np.where(has_phase, bph, 0).astype(np.int64), dtype="Int64")
    tph_out = pd.array(np.where(has_phase, tph, 0).astype(np.int64), dtype="Int64")
    bph_out[~has_phase] = pd.NA
    tph_out[~has_phase] = pd.NA
    return (case[order], bs[order], np.concatenate([p[2] for p in parts])[order], labels, bph_out, tph_out)


def _pairwise_counts(values, rows, seg_start, seg_len, bseg, tseg, sign):
    """Per contrast: improving, worse and tied A-B pairs, Kendall S of the baseline in session
    order, and sum(t^3 - t) over tie groups of the pooled data (all oriented by sign)."""
    m = len(bseg)
    pos, neg, ties = (np.zeros(m, dtype=np.int64) for _ in range(3))
    s_trend, tie_sum = np.zeros(m), np.zeros(m)
    if m == 0:
        return pos, neg, ties, s_trend, tie_sum
    na, nb = seg_len[bseg], seg_len[tseg]
    # pooled counts, contrasts of equal pooled size together (bounded memory)
    size = na + nb
    for n in np.unique(size):
        if n == 0:
            continue
        group = np.flatnonzero(size == n)
        step = max(1, _PAIR_BUDGET // int(n) // 8)
        for lo in range(0, group.size, step):
            sel = group[lo:lo + step]
            na_s = na[sel]
            # pooled rows: the baseline values, then the treatment values
            k = np.arange(n)[None, :]
            in_a = k < na_s[:, None]
            src = np.where(in_a, seg_start[bseg[sel]][:, None] + k, seg_start[tseg[sel]][:, None] + k - na_s[:, None])
            P = values[rows[src]] * sign[sel][:, None]
            pos[sel], neg[sel], ties[sel], tie_sum[sel] = _pooled_rank_counts(P, in_a)
    # Kendall S of the baseline, contrasts of equal baseline length together
    for n in np.unique(na):
        if n < 2:
            continue
        group = np.flatnonzero(na == n)
        step = max(1, _PAIR_BUDGET // int(n * n))
        I, J = np.triu_indices(n, 1)  # pairs i < j: later minus earlier
        for lo in range(0, group.size, step):
            sel = group[lo:lo + step]
            A = values[rows[seg_start[bseg[sel]][:, None] + np.arange(n)]] * sign[sel][:, None]
            AI, AJ = A[:, I], A[:, J]
            s_trend[sel] = (AJ > AI).sum(axis=1).astype(float) - (AJ < AI).sum(axis=1)
    return pos, neg, ties, s_trend, tie_sum


def _pooled_rank_counts(P: np.ndarray, is_a: np.ndarray):
    """Per row of P (the baseline values A of a contrast, then its treatment values B; is_a marks
    the baseline ones): #{(i, j): B_j > A_i}, #{B_j < A_i}, #{B_j == A_i} (NaN compares false) and
    sum(t^3 - t) over the tie groups of the finite values of both together, from one stable sort
    of each row (integer counts, exact)."""
    m, L = P.shape
    idx = np.argsort(P, axis=1, kind="stable")  # NaN last; within ties baseline values first
    flat = (idx + (np.arange(m) * L)[:, None]).ravel()
    Ps = P.ravel()[flat]
    valid = ~np.isnan(Ps)
    a = is_a.ravel()[flat] & valid
    b = ~is_a.ravel()[flat] & valid
    pos_all = np.arange(m * L)
    new = np.ones(m * L, dtype=bool)
    new[1:] = Ps[1:] != Ps[:-1]  # a tie group starts (each NaN is a group of its own)
    new[::L] = True
    g_first = np.maximum.accumulate(np.where(new, pos_all, 0))
    cum = np.cumsum(a) - a  # baseline values before each position (all rows)
    row_base = np.repeat(cum[::L], L)
    below = cum[g_first] - row_base  # baseline values below the tie group
    equal = cum - cum[g_first]  # baseline values tied with a treatment value (they sort first)
    a_total = np.repeat(a.reshape(m, L).sum(axis=1), L)
    pos = np.where(b, below, 0).reshape(m, L).sum(axis=1)
    ties = np.where(b, equal, 0).reshape(m, L).sum(axis=1)
    neg = np.where(b, a_total - (cum - row_base), 0).reshape(m, L).sum(axis=1)
    starts = np.flatnonzero(new)
    t = np.diff(np.r_[starts, m * L]).astype(float)
    tie_sum = np.bincount(starts // L, weights=np.where(np.isfinite(Ps[starts]), t * t * t - t, 0.0), minlength=m)
    return pos, neg, ties, tie_sum


def _contrast_columns(values, rows, seg_start, seg_len, seg_e, seg_mean, seg_sd, seg_max, seg_min, seg_finite,
                      con_case, bseg, tseg, decrease_case, assumed_case, direction_case, direction_raw,
                      scale_raw, rho_case, alpha, confidence) -> dict[str, np.ndarray]:
    """Every per-contrast column (ContrastEffectSizes.as_row keys) as arrays over contrasts.

    seg_mean and seg_sd are in units of 2**seg_e (as audit.effect_sizes: scaled near the float
    limits)."""
    m = len(con_case)
    na_i, nb_i = seg_len[bseg], seg_len[tseg]
    na, nb = na_i.astype(float), nb_i.astype(float)
    npairs_i = na_i * nb_i
    npairs = npairs_i.astype(float)
    dec = decrease_case[con_case]
    sign = np.where(dec, -1.0, 1.0)
    direction = direction_case[con_case]
    assumed = assumed_case[con_case]
    rho_used = rho_case[con_case]
    rho_ok = np.isfinite(rho_used)
    rho_code = _codes(rho_ok, R.NON_FINITE_INPUT)
    with np.errstate(all="ignore"):
        na_e, nb_e = _effective(na, rho_used), _effective(nb, rho_used)
    ea, eb = seg_e[bseg], seg_e[tseg]
    ma_s, mb_s = seg_mean[bseg], seg_mean[tseg]  # scaled by 2**-ea, 2**-eb
    sa_s, sb_s = seg_sd[bseg], seg_sd[tseg]
    ma, bad_ma = unscale_checked(ma_s, ea)
    mb, bad_mb = unscale_checked(mb_s, eb)
    sa, bad_sa = unscale_checked(sa_s, ea)
    sb, bad_sb = unscale_checked(sb_s, eb)
    # common frames (audit.effect_sizes._contrast_scales): mean difference in units of 2**e_md,
    # variances in units of 2**(2 e_sd)
    e_md = np.maximum(ea, eb)
    with np.errstate(all="ignore"):
        md_s = sign * (np.ldexp(mb_s, eb - e_md) - np.ldexp(ma_s, ea - e_md))
        md, bad_md = unscale_checked(md_s, e_md)
        e_sd = sd_frame(sa_s, ea, sb_s, eb, e_md)
        sa_f, sb_f = np.ldexp(sa_s, ea - e_sd), np.ldexp(sb_s, eb - e_sd)
    finite = seg_finite[bseg] & seg_finite[tseg]
    pos, neg, ties, s_trend, tie_sum = _pairwise_counts(values, rows, seg_start, seg_len, bseg, tseg, sign)
    const = lambda v, dt=object: np.full(m, v, dtype=dt)  # noqa: E731
    ok_code = const(R.OK)
    f: dict[str, dict[str, np.ndarray]] = {}

    with np.errstate(all="ignore"):
        # ---- PND
        extreme = np.where(dec, -seg_min[bseg], seg_max[bseg])
        beyond = np.zeros(m, dtype=np.int64)
        # count of oriented treatment points strictly beyond the oriented baseline maximum
        beyond[:] = _count_beyond(values, rows, seg_start, seg_len, tseg, sign, extreme)
        raw_extreme = np.where(dec, seg_min[bseg], seg_max[bseg])
        f["pnd"] = dict(pnd_percent=100.0 * beyond / nb, n_treatment_beyond=beyond, n_baseline=na_i,
                        n_treatment=nb_i, baseline_extreme=raw_extreme, desired_direction=direction,
                        direction_assumed=assumed, reason=ok_code)

        # ---- NAP (Hanley-McNeil SE, Wald and Newcombe intervals)
        nap = (pos + 0.5 * ties) / npairs
        q1 = nap / (2.0 - nap)
        q2 = 2.0 * nap * nap / (1.0 + nap)
        var = (nap * (1 - nap) + (nb - 1) * (q1 - nap * nap) + (na - 1) * (q2 - nap * nap)) / (na * nb)
        se = np.sqrt(np.maximum(var, 0.0))
        zc = stats.norm.ppf(0.5 + confidence / 2.0)
        key = np.stack([2 * pos + ties, na_i, nb_i], axis=1) if m else np.zeros((0, 3), dtype=np.int64)
        nlo, nhi = np.full(m, _NAN), np.full(m, _NAN)
        if m:
            uniq, inv = _unique_rows(key)
            first = np.zeros(len(uniq), dtype=np.int64)  # one contrast per distinct (NAP, nA, nB)
            first[inv[::-1]] = np.arange(m)[::-1]
            u_val = nap[first]
            lo_u, hi_u = _newcombe_many(u_val, uniq[:, 1], uniq[:, 2], confidence)
            nlo, nhi = lo_u[inv], hi_u[inv]
        f["nap"] = dict(nap=nap, n_improving_pairs=pos, n_tied_pairs=ties, n_pairs=npairs_i,
                        nap_se_hanley_mcneil=se, nap_ci_low_hanley_mcneil=np.maximum(0.0, nap - zc * se),
                        nap_ci_high_hanley_mcneil=np.minimum(1.0, nap + zc * se), nap_ci_low_newcombe=nlo,
                        nap_ci_high_newcombe=nhi, confidence=const(confidence, float),
                        desired_direction=direction, direction_assumed=assumed, reason=ok_code)

        # ---- Tau (Mann-Whitney, tie-corrected, continuity-corrected)
        s = (pos - neg).astype(float)
        ntot = na + nb
        tie_factor = np.where(ntot > 1, 1.0 - tie_sum / (ntot**3 - ntot), _NAN)
        var_s = _mw_var_s(npairs, na, nb, tie_factor)
        z = _z_cc(s, var_s)
        p = _p_cc(s, var_s)
        reason_ind = _codes(np.isfinite(p), R.join(R.ZERO_VARIANCE, R.CONSTANT_SERIES))
        var_adj = np.where(rho_ok, _mw_var_s(npairs, na_e, nb_e, tie_factor), _NAN)
        z_adj = np.where(rho_ok, _z_cc(s, var_adj), _NAN)
        p_adj = np.where(rho_ok, _p_cc(s, var_adj), _NAN)
        reason_adj = np.where(rho_ok, np.where(np.isfinite(p_adj), R.OK, reason_ind), rho_code).astype(object)
        f["tau"] = dict(tau=s / npairs, s=s, n_pairs=npairs_i, var_s=var_s, z=z, p_value=p, rho_used=rho_used,
                        n_baseline_effective=na_e, n_treatment_effective=nb_e, var_s_adjusted=var_adj,
                        z_adjusted=z_adj, p_value_adjusted=p_adj, flip=_flip(p, p_adj, alpha),
                        alpha=const(alpha, float), desired_direction=direction, direction_assumed=assumed,
                        reason=reason_ind, reason_adjusted=reason_adj)

        # ---- Tau-U
        s_ab = (pos - neg).astype(float)
        s_u = s_ab - s_trend
        v_u = _mw_var_s(npairs, na, nb, 1.0)
        z_u = s_u / np.sqrt(v_u)
        v_perm = _cached(tau_u_permutation_variance, np.stack([na_i, nb_i], axis=1)) if m else np.zeros(0)
        z_perm = s_u / np.sqrt(v_perm)
        v_uadj = np.where(rho_ok, _mw_var_s(npairs, na_e, nb_e, 1.0), _NAN)
        z_uadj = np.where(rho_ok, s_u / np.sqrt(v_uadj), _NAN)
        p_u, p_uadj = _two_sided_p(np.abs(z_u)), _two_sided_p(np.abs(z_uadj))
        f["tau_u"] = dict(tau_u=s_u / npairs, s_a_vs_b=s_ab, s_trend_a=s_trend, s_tau_u=s_u, n_pairs=npairs_i,
                          var_s=v_u, z=z_u, p_value=p_u, var_s_permutation=v_perm, z_permutation=z_perm,
                          p_value_permutation=_two_sided_p(np.abs(z_perm)), rho_used=rho_used,
                          n_baseline_effective=na_e, n_treatment_effective=nb_e, var_s_adjusted=v_uadj,
                          z_adjusted=z_uadj, p_value_adjusted=p_uadj, flip=_flip(p_u, p_uadj, alpha),
                          alpha=const(alpha, float), desired_direction=direction, direction_assumed=assumed,
                          reason=ok_code, reason_adjusted=rho_code)

        # ---- log response ratio
        scale_case = _per_distinct(lambda v: None if v is None else str(v).strip().lower(), scale_raw)
        scale = scale_case[con_case] if m else np.zeros(0, dtype=object)
        ratio = np.isin(scale.astype(str), list(RATIO_SCALES)) & np.array([v is not None for v in scale], bool)
        moments_overflow = bad_ma | bad_mb | bad_sa | bad_sb
        badmean = bad_ma | bad_mb
        posmean = (ma > 0) & (mb > 0)
        two = (na_i >= 2) & (nb_i >= 2)
        b1 = ratio & badmean
        b2 = ratio & ~badmean & ~posmean
        b3 = ratio & ~badmean & posmean & ~two
        b4 = ratio & ~badmean & posmean & two
        lrr = np.where(b3 | b4, np.log(mb) - np.log(ma), _NAN)
        # SD/mean ratios within a phase are scale-free: taken on the scaled values
        lbc = np.where(b4, np.log(mb) + sb_s**2 / (2 * nb * mb_s**2) - np.log(ma) - sa_s**2 / (2 * na * ma_s**2),
                       _NAN)
        lvar = np.where(b4, sa_s**2 / (na * ma_s**2) + sb_s**2 / (nb * mb_s**2), _NAN)
        bad_lv = b4 & ~(np.isfinite(lbc) & np.isfinite(lvar))
        lbc, lvar = np.where(bad_lv, _NAN, lbc), np.where(bad_lv, _NAN, lvar)
        b4 = b4 & ~bad_lv
        lvar_adj = np.where(b4 & rho_ok, sa_s**2 / (na_e * ma_s**2) + sb_s**2 / (nb_e * mb_s**2), _NAN)
        bad_adj = b4 & rho_ok & ~np.isfinite(lvar_adj)
        lvar_adj = np.where(bad_adj, _NAN, lvar_adj)
        code = np.where(~ratio, R.NOT_RATIO_SCALE, np.where(b1 | bad_lv, R.NUMERICAL_FAILURE, np.where(
            b2, R.NONPOSITIVE_MEAN, np.where(b3, R.TOO_FEW_POINTS, np.where(lvar > 0, R.OK, R.ZERO_VARIANCE))))
                        ).astype(object)
        code = _with_code(code, moments_overflow & ~(b1 | bad_lv))
        code_adj = np.where(b4 & ~rho_ok, R.NON_FINITE_INPUT, code).astype(object)
        code_adj = _with_code(code_adj, bad_adj)
        imp = sign * lbc
        lse = np.where(np.isfinite(lvar) & (lvar >= 0), np.sqrt(lvar), _NAN)
        zq = stats.norm.ppf(0.5 + confidence / 2.0)
        lz = np.where(np.isfinite(lse) & (lse > 0), imp / lse, _NAN)
        lp = _two_sided_p(np.abs(lz))
        lz_adj = np.where(np.isfinite(lvar_adj) & (lvar_adj > 0), imp / np.sqrt(lvar_adj), _NAN)
        lp_adj = _two_sided_p(np.abs(lz_adj))
        f["lrr"] = dict(lrr=lrr, lrr_bias_corrected=lbc, lrr_improvement=imp, lrr_variance=lvar, lrr_se=lse,
                        lrr_ci_low=np.where(np.isfinite(lse), imp - zq * lse, _NAN),
                        lrr_ci_high=np.where(np.isfinite(lse), imp + zq * lse, _NAN), z=lz, p_value=lp,
                        rho_used=rho_used, n_baseline_effective=na_e, n_treatment_effective=nb_e,
                        lrr_variance_adjusted=lvar_adj, p_value_adjusted=lp_adj, flip=_flip(lp, lp_adj, alpha),
                        mean_baseline=ma, mean_treatment=mb, sd_baseline=sa, sd_treatment=sb, outcome_scale=scale,
                        alpha=const(alpha, float), confidence=const(confidence, float),
                        desired_direction=direction, direction_assumed=assumed, reason=code,
                        reason_adjusted=code_adj)

        # ---- standardized mean difference (ratios of scaled quantities)
        df_p = na_i + nb_i - 2
        ss = (na - 1) * np.where(na_i > 1, sa_f**2, 0.0) + (nb - 1) * np.where(nb_i > 1, sb_f**2, 0.0)
        sp_s = np.where(df_p >= 1, np.sqrt(ss / df_p), _NAN)  # pooled SD in units of 2**e_sd
        sp, bad_sp = unscale_checked(sp_s, e_sd)
        j_b = _cached(hedges_correction, (na_i - 1)[:, None]) if m else np.zeros(0)
        j_p = _cached(hedges_correction, df_p[:, None]) if m else np.zeros(0)
        smd_b, smd_bh, reason_b = _smd_columns(md_s, sa_s, e_md - ea, na_i >= 2, j_b)
        smd_p, smd_ph, reason_p = _smd_columns(md_s, sp_s, e_md - e_sd, df_p >= 1, j_p)
        reason_b = _with_code(reason_b, bad_md | bad_sa)
        reason_p = _with_code(reason_p, bad_md | bad_sp)
        f["smd"] = dict(mean_difference=md, sd_baseline=sa, sd_pooled=sp, smd_baseline_sd=smd_b,
                        smd_baseline_sd_hedges=smd_bh, smd_pooled_sd=smd_p, smd_pooled_sd_hedges=smd_ph,
                        desired_direction=direction, direction_assumed=assumed, reason_baseline_sd=reason_b,
                        reason_pooled_sd=reason_p)

        # ---- mean difference t-tests
        va, vb = sa_f**2, sb_f**2
        w = _welch(md_s, va, vb, na, nb, e_md, e_sd)
        pl = _pooled(md_s, sp_s, na, nb, e_md, e_sd)
        wa = _welch(md_s, va, vb, na_e, nb_e, e_md, e_sd)
        pa = _pooled(md_s, sp_s, na_e, nb_e, e_md, e_sd)
        for t in (wa, pa):
            for arr in t[:4]:
                arr[~rho_ok] = _NAN
            t[4][~rho_ok] = R.NON_FINITE_INPUT
        if bad_md.any():  # the mean difference itself is not representable
            w, wa, pl, pa = ((*t[:4], _with_code(t[4], bad_md)) for t in (w, wa, pl, pa))
        f["mean_difference"] = dict(
            mean_difference=md, rho_used=rho_used, n_baseline_effective=na_e, n_treatment_effective=nb_e,
            welch_se=w[0], welch_df=w[1], welch_t=w[2], welch_p_value=w[3], welch_se_adjusted=wa[0],
            welch_df_adjusted=wa[1], welch_p_value_adjusted=wa[3], welch_flip=_flip(w[3], wa[3], alpha),
            pooled_se=pl[0], pooled_df=pl[1], pooled_t=pl[2], pooled_p_value=pl[3], pooled_se_adjusted=pa[0],
            pooled_df_adjusted=pa[1], pooled_p_value_adjusted=pa[3], pooled_flip=_flip(pl[3], pa[3], alpha),
            alpha=const(alpha, float), desired_direction=direction, direction_assumed=assumed,
            welch_reason=w[4], welch_reason_adjusted=wa[4], pooled_reason=pl[4], pooled_reason_adjusted=pa[4])

    cols = _as_row_columns(f, na_i, nb_i)
    # contrasts with non-finite values: the reference function, row by row
    for i in np.flatnonzero(~finite):
        a = values[rows[seg_start[bseg[i]]:seg_start[bseg[i]] + seg_len[bseg[i]]]]
        b = values[rows[seg_start[tseg[i]]:seg_start[tseg[i]] + seg_len[tseg[i]]]]
        c = con_case[i]
        row = contrast_effect_sizes(a, b, direction_raw[c], scale_raw[c], rho_used[i], alpha, confidence).as_row()
        for k, v in row.items():
            cols[k][i] = v
    return cols


def _count_beyond(values, rows, seg_start, seg_len, tseg, sign, extreme):
    """#{oriented treatment points > extreme} per contrast, grouped by treatment length."""
    m = len(tseg)
    out = np.zeros(m, dtype=np.int64)
    nb = seg_len[tseg]
    for n in np.unique(nb):
        sel = np.flatnonzero(nb == n)
        v = values[rows[seg_start[tseg[sel]][:, None] + np.arange(n)]] * sign[sel][:, None]
        out[sel] = (v > extreme[sel][:, None]).sum(axis=1)
    return out


def _welch(md, va, vb, na, nb, e_md, e_v):
    """Welch t-test pieces (se, df, t, p, reason) as audit.effect_sizes._welch, element-wise
    (md in units of 2**e_md, va and vb in units of 2**(2 e_v))."""
    ok = (na > 1) & (nb > 1) & np.isfinite(va) & np.isfinite(vb)
    qa, qb = va / na, vb / nb
    se2 = qa + qb
    pos = ok & (se2 > 0)
    se_pos, bad_se = unscale_checked(np.sqrt(se2), e_v)
    t_pos, bad_t = scaled_ratio(md, np.sqrt(se2), e_md - e_v)
    bad_se, bad_t = bad_se & pos, bad_t & pos
    se = np.where(pos, se_pos, np.where(ok, 0.0, _NAN))
    df = np.where(pos, se2**2 / (qa**2 / (na - 1) + qb**2 / (nb - 1)), _NAN)
    t = np.where(pos & ~bad_t, t_pos, _NAN)
    p = _t_two_sided(t, df, pos & ~bad_t)
    reason = np.where(~ok, R.TOO_FEW_POINTS, np.where(~pos, R.ZERO_VARIANCE, np.where(
        bad_t | bad_se, R.NUMERICAL_FAILURE, R.OK))).astype(object)
    return se, df, t, p, reason


def _pooled(md, sp, na, nb, e_md, e_v):
    """Pooled-variance t-test pieces as audit.effect_sizes._pooled, element-wise (md and sp in
    units of 2**e_md and 2**e_v)."""
    df = na + nb - 2
    ok = np.isfinite(sp) & (df > 0)
    pos = ok & (sp > 0)
    se_scaled = sp * np.sqrt(1.0 / na + 1.0 / nb)
    se_pos, bad_se = unscale_checked(se_scaled, e_v)
    t_pos, bad_t = scaled_ratio(md, se_scaled, e_md - e_v)
    bad_se, bad_t = bad_se & pos, bad_t & pos
    se = np.where(pos, se_pos, np.where(ok, 0.0, _NAN))
    df_out = np.where(ok, df, _NAN)
    t = np.where(pos & ~bad_t, t_pos, _NAN)
    p = _t_two_sided(t, df, pos & ~bad_t)
    reason = np.where(~ok, R.TOO_FEW_POINTS, np.where(~pos, R.ZERO_VARIANCE, np.where(
        bad_t | bad_se, R.NUMERICAL_FAILURE, R.OK))).astype(object)
    return se, df_out, t, p, reason


def _as_row_columns(f: dict[str, dict[str, np.ndarray]], na_i, nb_i) -> dict[str, np.ndarray]:
    """Flat columns named as ContrastEffectSizes.as_row names them (checked against the dataclasses)."""
    cols: dict[str, np.ndarray] = {"n_baseline": na_i, "n_treatment": nb_i}
    for prefix, cls in _MEASURES:
        d = f[prefix]
        names = [fl.name for fl in fields(cls)]
        if set(names) != set(d):
            raise RuntimeError(f"batch fields of {cls.__name__} out of step with the dataclass: "
                               f"{sorted(set(names) ^ set(d))}")
        for name in names:
            if name in _SHARED:
                cols.setdefault(name, d[name])
                continue
            key = name if name == prefix or name.startswith(prefix + "_") else f"{prefix}_{name}"
            cols[key] = d[name]
    # writable object/float copies (rows from the reference path are written into them)
    return {k: (np.array(v, dtype=object) if np.asarray(v).dtype == object else np.array(v)) for k, v in cols.items()}


def _per_contrast_frame(keys, con_case, labels, bph, tph, cols) -> pd.DataFrame:
    data = {"case_key": keys[con_case] if len(con_case) else np.zeros(0, dtype=object),
            "contrast": labels, "baseline_phase": bph, "treatment_phase": tph}
    for k, v in cols.items():
        if k.endswith("flip"):
            data[k] = _boolean_array(v)
        elif v.dtype == object:  # text (None -> missing)
            data[k] = pd.array(v, dtype="str")
        else:
            data[k] = v
    frame = pd.DataFrame(data)
    for col in ("baseline_phase", "treatment_phase"):
        frame[col] = frame[col].astype("Int64")
    return frame


# ---- case-level aggregation (audit.effect_sizes._aggregate over each case's contrasts)


def _case_level_frame(cols, ci, ncase, design, direction, assumed, scale_raw, rho_input, rho_used, rho_method,
                      rho_reason, alpha) -> pd.DataFrame:
    k = np.bincount(ci, minlength=ncase) if ncase else np.zeros(0, dtype=np.int64)
    has = k > 0

    def csum(v, mask):
        return np.bincount(ci, weights=np.where(mask, v, 0.0), minlength=ncase)

    def cany(mask):
        return np.bincount(ci, weights=mask.astype(float), minlength=ncase) > 0

    def cexponent(v, mask):
        """Scaling exponent (audit.trend.scaling_exponents) of each case's masked values."""
        top = np.zeros(ncase)
        np.maximum.at(top, ci[mask], np.abs(v[mask]))
        return window_exponents(np.frexp(top)[1])

    def cmean(v, mask):
        """(mean of each case's masked values, not representable), via an exact power-of-two scaling."""
        e = cexponent(v, mask)
        cnt = np.bincount(ci, weights=mask.astype(float), minlength=ncase)
        mean_s = csum(np.ldexp(v, -e[ci]) if len(ci) else v, mask) / cnt
        return unscale_checked(mean_s, e)

    ci_sorted = bool((np.diff(ci) >= 0).all()) if len(ci) else True
    if ci_sorted and len(ci):  # each case's contrasts are ci[c_lo[c]:c_hi[c]]
        c_lo = np.searchsorted(ci, np.arange(ncase), side="left")
        c_hi = np.searchsorted(ci, np.arange(ncase), side="right")

    def cjoin(codes: np.ndarray) -> np.ndarray:
        """R.join of a reason column over each case's contrasts."""
        out = np.full(ncase, R.OK, dtype=object)
        if len(ci) == 0:
            return out
        first = np.zeros(ncase, dtype=np.int64)
        first[ci[::-1]] = np.arange(len(ci))[::-1]
        codes = np.asarray(codes, dtype=object)
        mixed = np.bincount(ci, weights=(codes != codes[first[ci]]).astype(float), minlength=ncase) > 0
        out[has] = codes[first[has]]
        for c in np.flatnonzero(mixed):
            part = codes[c_lo[c]:c_hi[c]] if ci_sorted else codes[ci == c]
            out[c] = R.join(*part.tolist())
        return out

    out: dict[str, np.ndarray] = {}
    with np.errstate(all="ignore"):
        nb = cols["n_treatment"].astype(float)
        w = (cols["n_baseline"] * cols["n_treatment"]).astype(float)

        pnd = cols["pnd_percent"].astype(float)
        ok = np.isfinite(pnd)
        anyok = cany(ok)
        out["pnd_percent"] = np.where(anyok, 100.0 * csum(cols["pnd_n_treatment_beyond"].astype(float), ok)
                                      / csum(nb, ok), _NAN)
        out["pnd_reason"] = np.where(anyok, R.OK, cjoin(cols["pnd_reason"])).astype(object)

        nap = cols["nap"].astype(float)
        okw = np.isfinite(nap) & np.isfinite(w) & (w > 0)
        out["nap"] = np.where(cany(okw), csum(nap * w, okw) / csum(w, okw), _NAN)
        ok = np.isfinite(nap)
        anyok = cany(ok)
        se = cols["nap_se_hanley_mcneil"].astype(float)
        out["nap_se_hanley_mcneil"] = np.where(anyok, np.sqrt(csum((w * se) ** 2, ok)) / csum(w, ok), _NAN)
        out["nap_reason"] = np.where(anyok, R.OK, cjoin(cols["nap_reason"])).astype(object)

        def s_test(s, v, continuity):
            good = np.isfinite(v) & (v > 0) & np.isfinite(s)
            if continuity:
                return np.where(good, _p_cc(s, v), _NAN)
            return np.where(good, _two_sided_p(np.abs(s) / np.sqrt(v)), _NAN)

        for name, s_key, cc in (("tau", "tau_s", True), ("tau_u", "tau_u_s_tau_u", False)):
            s = cols[s_key].astype(float)
            ok = np.isfinite(s)
            anyok = cany(ok)
            S = csum(s, ok)
            out[name] = np.where(anyok, S / csum(w, ok), _NAN)
            p = np.where(anyok, s_test(S, csum(cols[f"{name}_var_s"].astype(float), ok), cc), _NAN)
            pa = np.where(anyok, s_test(S, csum(cols[f"{name}_var_s_adjusted"].astype(float), ok), cc), _NAN)
            out[f"{name}_p_value"] = p
            if name == "tau_u":
                out["tau_u_p_value_permutation"] = np.where(
                    anyok, s_test(S, csum(cols["tau_u_var_s_permutation"].astype(float), ok), False), _NAN)
            out[f"{name}_p_value_adjusted"] = pa
            out[f"{name}_flip"] = _flip(p, pa, alpha)
            out[f"{name}_reason"] = np.where(np.isfinite(p), R.OK, cjoin(cols[f"{name}_reason"])).astype(object)

        est = cols["lrr_improvement"].astype(float)
        var = cols["lrr_variance"].astype(float)
        var_adj = cols["lrr_variance_adjusted"].astype(float)
        ok = np.isfinite(est) & np.isfinite(var) & (var > 0)
        anyok = cany(ok)
        wl = np.where(ok, 1.0 / var, 0.0)
        sw = csum(wl, ok)
        lrr = np.where(anyok, csum(wl * est, ok) / sw, _NAN)
        lse = np.where(anyok, 1.0 / np.sqrt(sw), _NAN)
        lp = np.where(anyok, _two_sided_p(np.abs(lrr) / lse), _NAN)
        v_adj = csum(wl**2 * var_adj, ok) / sw**2
        lpa = np.where(anyok & np.isfinite(v_adj) & (v_adj > 0), _two_sided_p(np.abs(lrr) / np.sqrt(v_adj)), _NAN)
        out.update(lrr_improvement=lrr, lrr_se=lse, lrr_p_value=lp, lrr_p_value_adjusted=lpa,
                   lrr_flip=np.where(anyok, _flip(lp, lpa, alpha), None),
                   lrr_reason=np.where(anyok, R.OK, cjoin(cols["lrr_reason"])).astype(object))

        smd_overflow = np.zeros(ncase, dtype=bool)
        for key in ("smd_baseline_sd", "smd_baseline_sd_hedges", "smd_pooled_sd", "smd_pooled_sd_hedges"):
            v = cols[key].astype(float)
            ok = np.isfinite(v)
            cnt = np.bincount(ci, weights=ok.astype(float), minlength=ncase)
            mean, bad = cmean(v, ok)
            out[key] = np.where(cnt > 0, mean, _NAN)
            smd_overflow |= bad & (cnt > 0)
        out["smd_reason"] = _with_code(cjoin(cols["smd_reason_baseline_sd"]), smd_overflow)

        md = cols["mean_difference"].astype(float)
        okm = np.isfinite(md)
        cnt = np.bincount(ci, weights=okm.astype(float), minlength=ncase)
        md_mean, md_bad = cmean(md, okm)
        out["mean_difference"] = np.where(cnt > 0, md_mean, _NAN)
        md_overflow = md_bad & (cnt > 0)

        def combined_welch(se_key, df_key):
            """(p, not representable) per case; standard errors scaled by 2**-g per case (exact)."""
            se_c = cols[se_key].astype(float)
            df_c = cols[df_key].astype(float)
            okc = okm & np.isfinite(se_c) & np.isfinite(df_c) & (se_c > 0)
            kk = np.bincount(ci, weights=okc.astype(float), minlength=ncase)
            d, bad_d = cmean(md, okc)
            g = cexponent(se_c, okc)
            var_c = np.ldexp(se_c, -g[ci]) ** 2 if len(ci) else se_c
            sv = csum(var_c, okc)
            se_tot = np.sqrt(sv) / kk
            df_tot = sv**2 / csum(np.where(okc, var_c**2 / df_c, 0.0), okc)
            t, bad_t = scaled_ratio(np.abs(d), se_tot, -g)
            good = (kk > 0) & np.isfinite(t)
            p = _t_two_sided(t, df_tot, good) if ncase else np.zeros(0)
            return p, (kk > 0) & ~good & (bad_d | bad_t)

        p, bad_p = combined_welch("mean_difference_welch_se", "mean_difference_welch_df")
        pa, bad_pa = combined_welch("mean_difference_welch_se_adjusted", "mean_difference_welch_df_adjusted")
        out["mean_difference_welch_p_value"] = p
        out["mean_difference_welch_p_value_adjusted"] = pa
        out["mean_difference_welch_flip"] = _flip(p, pa, alpha)
        out["mean_difference_reason"] = _with_code(np.where(
            np.isfinite(p), R.OK, cjoin(cols["mean_difference_welch_reason"])), md_overflow | bad_p)
        out["mean_difference_reason_adjusted"] = _with_code(np.where(
            np.isfinite(pa), R.OK, cjoin(cols["mean_difference_welch_reason_adjusted"])),
            md_overflow | bad_pa)

    # cases without contrasts: NaN, flips None, reason fields absent (NaN in a frame of dicts)
    for key, v in out.items():
        if key in _ABSENT_WITHOUT_CONTRAST:
            v = v.astype(object)
            v[~has] = _NAN
        elif key.endswith("flip"):
            v = v.astype(object)
            v[~has] = None
        else:
            v = v.astype(float)
            v[~has] = _NAN
        out[key] = v

    data = {
        "design": design.astype(object), "n_contrasts": k.astype(np.int64),
        "desired_direction": direction, "direction_assumed": assumed, "outcome_scale": scale_raw,
        "rho_input": rho_input.astype(float), "rho_used": rho_used.astype(float), "rho_method": rho_method,
        "rho_reason": rho_reason, "alpha": np.full(ncase, alpha), "aggregation": np.full(ncase, AGGREGATION, dtype=object),
        **out, "reason": np.where(has, R.OK, R.NO_CONTRAST).astype(object),
    }
    for col in [c for c in CASE_LEVEL_COLUMNS if c.endswith("flip")]:
        data[col] = _boolean_array(data[col])
    return pd.DataFrame({c: data[c] for c in CASE_LEVEL_COLUMNS})


# ----------------------------------------------------------------------------------------------
# baseline trends
# ----------------------------------------------------------------------------------------------

_TREND_FIELDS = [fl.name for fl in fields(BaselineTrend)]
def baseline_trends_batch(obs: pd.DataFrame | ObservationColumns, alpha: float = 0.05,
                          confidence: float = 0.95) -> pd.DataFrame:
    """Baseline trend rows of all cases (= audit.trend.baseline_trends per case, concatenated).

    obs sorted by case_key then session; per case, one row per baseline phase (scope 'phase',
    phases in increasing order) then one for all baseline points (scope 'all_baseline'), with a
    leading case_key column. Series are used in the row order of obs, as the reference does.
    """
    data, _ = _baseline_trend_data(_columns(obs), alpha, confidence)
    frame = pd.DataFrame(data)
    frame["phase_index"] = frame["phase_index"].astype("Int64")
    return frame


def baseline_trend_parts(obs: pd.DataFrame | ObservationColumns, columns: list[str], alpha: float = 0.05,
                         confidence: float = 0.95):
    """The rows of ``baseline_trends_batch`` split by scope without building the whole table:
    (all_baseline rows in case order, phase rows with phase_index (int64) and case: the case's
    position), each with ``columns`` of the same dtypes as in the whole table. None when a text
    column would not be read as text there (the caller then uses the whole table).
    """
    data, out = _baseline_trend_data(_columns(obs), alpha, confidence, fields=columns)
    out_all, out_case, out_phase = out
    is_phase = ~out_all
    every, phase = {}, {"phase_index": out_phase[is_phase].astype(np.int64)}
    for name in columns:
        v = data[name]
        if not isinstance(v, np.ndarray):
            return None
        if v.dtype == object:
            if infer_dtype(v, skipna=True) != "string":
                return None
            every[name], phase[name] = pd.array(v[out_all], dtype="str"), pd.array(v[is_phase], dtype="str")
        else:
            every[name], phase[name] = v[out_all], v[is_phase]
    frame = pd.DataFrame(phase)
    frame["case"] = out_case[is_phase]
    return pd.DataFrame(every), frame


def _baseline_trend_data(oc: ObservationColumns, alpha: float, confidence: float, fields: list[str] | None = None):
    """(columns of the baseline_trends_batch table, (all-baseline row, case position, phase) per row);
    of the BaselineTrend fields only ``fields`` when given."""
    keys, case_id = oc.keys, oc.case_id
    ncase = len(keys)
    x_all = oc.session
    y_all = oc.outcome
    phase = oc.phase_index
    cond_code, cond_names = oc.condition.normalised()
    is_base = np.isin(cond_code, np.flatnonzero(cond_names == "baseline"))
    direction_raw = oc.at_case_start("desired_direction", object) if ncase else np.zeros(0, dtype=object)
    direction = _normalize_directions(direction_raw)

    base_rows = np.flatnonzero(is_base)
    bc = case_id[base_rows]
    ph_uniq, prank = dense_rank(phase[base_rows])
    order = np.lexsort((base_rows, prank, bc))
    seg_rows = base_rows[order]
    sbc, spr = bc[order], prank[order]
    nbr = len(seg_rows)
    new = np.r_[True, (sbc[1:] != sbc[:-1]) | (spr[1:] != spr[:-1])] if nbr else np.zeros(0, dtype=bool)
    p_start = np.flatnonzero(new)
    p_len = np.diff(np.r_[p_start, nbr])
    p_case = sbc[p_start]
    p_phase = ph_uniq[spr[p_start]]
    n_phases = np.bincount(p_case, minlength=ncase) if ncase else np.zeros(0, dtype=np.int64)
    # all baseline points of a case, in obs order
    a_len = np.bincount(bc, minlength=ncase) if ncase else np.zeros(0, dtype=np.int64)
    a_start = np.r_[0, np.cumsum(a_len)[:-1]] if ncase else np.zeros(0, dtype=np.int64)
    # series to compute: every baseline phase, plus all-baseline where not equal to its only phase
    need_all = np.flatnonzero(n_phases != 1)
    rows_flat = np.concatenate([seg_rows, base_rows])
    s_start = np.r_[p_start, nbr + a_start[need_all]].astype(np.int64)
    s_len = np.r_[p_len, a_len[need_all]].astype(np.int64)
    s_case = np.r_[p_case, need_all].astype(np.int64)
    res = _trend_series(x_all, y_all, rows_flat, s_start, s_len, s_case, direction, direction_raw, alpha,
                        confidence)

    # output rows: per case its phases, then all_baseline
    n_p = len(p_start)
    all_src = np.full(ncase, -1, dtype=np.int64)
    all_src[need_all] = n_p + np.arange(need_all.size)
    single = np.flatnonzero(n_phases == 1)
    first_phase_of_case = np.searchsorted(p_case, np.arange(ncase)) if ncase else np.zeros(0, dtype=np.int64)
    all_src[single] = first_phase_of_case[single]
    out_case = np.r_[p_case, np.arange(ncase)].astype(np.int64)
    out_src = np.r_[np.arange(n_p), all_src].astype(np.int64)
    out_all = np.r_[np.zeros(n_p, bool), np.ones(ncase, bool)]
    out_phase = np.r_[p_phase if n_p else np.zeros(0, dtype=np.int64), np.zeros(ncase, dtype=np.int64)]
    o = np.lexsort((out_all, out_case))
    out_case, out_src, out_all, out_phase = out_case[o], out_src[o], out_all[o], out_phase[o]

    data: dict[str, object] = {
        "case_key": keys[out_case] if len(out_case) else np.zeros(0, dtype=object),
        "scope": np.where(out_all, "all_baseline", "phase").astype(object),
    }
    ph_col = pd.array(out_phase.astype(np.int64), dtype="Int64")
    ph_col[out_all] = pd.NA
    data["phase_index"] = ph_col
    data["n_phases"] = np.where(out_all, n_phases[out_case] if len(out_case) else 0, 1).astype(np.int64)
    for name in _TREND_FIELDS if fields is None else [f for f in _TREND_FIELDS if f in fields]:
        data[name] = res[name][out_src]
    if "desired_direction" in data and None in data["desired_direction"].tolist():  # as a frame of rows holding None
        data["desired_direction"] = pd.Series(data["desired_direction"], dtype=object)
    no_phase = out_all & (n_phases[out_case] == 0) if len(out_case) else np.zeros(0, dtype=bool)
    if no_phase.any() and "reason" in data:
        reason = np.asarray(data["reason"], dtype=object).copy()
        for i in np.flatnonzero(no_phase):
            reason[i] = R.join(R.EMPTY_PHASE, reason[i])
        data["reason"] = reason
    return data, (out_all, out_case, out_phase)


def _trend_series(x_all, y_all, rows, start, length, case, direction, direction_raw, alpha, confidence):
    """BaselineTrend fields for each series (rows[start:start+length]), vectorised per length."""
    ns = len(start)
    res: dict[str, np.ndarray] = {}
    obj = ("desired_direction", "moves_in_therapeutic_direction", "moves_in_therapeutic_direction_hamed_rao_lag1",
           "ols_reason", "theil_sen_reason", "mann_kendall_reason", "hamed_rao_reason", "reason")
    for name in _TREND_FIELDS:
        if name == "n":
            res[name] = length.astype(np.int64).copy()
        elif name in obj:
            res[name] = np.full(ns, None, dtype=object)
        else:
            res[name] = np.full(ns, _NAN)
    res["alpha"][:] = alpha
    res["theil_sen_confidence"][:] = confidence
    res["desired_direction"] = direction[case] if ns else np.zeros(0, dtype=object)
    # set by _trend_block, turned into p-values for all its series at once below
    res["_ols_t"], res["_hamed_rao_z"] = np.full(ns, _NAN), np.full(ns, _NAN)
    a = 1.0 - confidence if confidence > 0.5 else confidence
    zq = stats.norm.ppf(a / 2.0)
    fallback = []
    blocks = []  # series computed by _trend_block
    for n in np.unique(length):
        sel = np.flatnonzero(length == n)
        idx = rows[start[sel][:, None] + np.arange(n)]
        X, Y = x_all[idx], y_all[idx]
        # strictly increasing also after the exact scaling (no two sessions merged by underflow)
        Xs = scale_rows(X, binary_exponents(X))
        regular = np.isfinite(X).all(axis=1) & np.isfinite(Y).all(axis=1) & (np.diff(Xs, axis=1) > 0).all(axis=1)
        fallback.extend(sel[~regular].tolist())
        sel, X, Y = sel[regular], X[regular], Y[regular]
        if sel.size == 0:
            continue
        if n < 2:  # every statistic undefined
            res["reason"][sel] = R.TOO_FEW_POINTS
            for name in ("ols_reason", "theil_sen_reason", "mann_kendall_reason", "hamed_rao_reason"):
                res[name][sel] = R.TOO_FEW_POINTS
            res["moves_in_therapeutic_direction"][sel] = "unknown"
            res["moves_in_therapeutic_direction_hamed_rao_lag1"][sel] = "unknown"
            continue
        step = max(1, _SERIES_BUDGET // (n * n))  # bounded memory: (m, n, n) and (m, n(n-1)/2) arrays
        for lo in range(0, sel.size, step):
            part = slice(lo, lo + step)
            _trend_block(int(n), X[part], Y[part], sel[part], res, zq)
            blocks.append(sel[part])
    if blocks:
        done = np.concatenate(blocks)
        with np.errstate(all="ignore"):
            t = res["_ols_t"][done]
            p = np.full(done.size, _NAN)
            k = ~np.isnan(t)
            p[k] = 2 * stats.t.sf(np.abs(t[k]), (res["n"][done][k] - 2).astype(float))
            res["ols_slope_p_value"][done] = p
            res["mann_kendall_p_value"][done] = 2.0 * stats.norm.sf(np.abs(res["mann_kendall_z"][done]))
            res["mann_kendall_hamed_rao_lag1_p_value"][done] = 2.0 * stats.norm.sf(np.abs(res["_hamed_rao_z"][done]))
        d, ts = direction[case[done]], res["theil_sen_slope"][done]
        res["moves_in_therapeutic_direction"][done] = _therapeutic(d, ts, res["mann_kendall_p_value"][done], alpha)
        res["moves_in_therapeutic_direction_hamed_rao_lag1"][done] = _therapeutic(
            d, ts, res["mann_kendall_hamed_rao_lag1_p_value"][done], alpha)
        res["reason"][done] = _join_rows([res[name][done] for name in (
            "ols_reason", "theil_sen_reason", "mann_kendall_reason", "hamed_rao_reason")])
    for i in fallback:
        r = rows[start[i]:start[i] + length[i]]
        bt = asdict(baseline_trend(x_all[r], y_all[r], direction_raw[case[i]], alpha=alpha, confidence=confidence))
        for name, v in bt.items():
            res[name][i] = v
    return res


def _trend_block(n, X, Y, sel, res, zq):
    """OLS, Theil-Sen, Mann-Kendall and lag-1 Hamed-Rao for m series of length n >= 2 with
    strictly increasing sessions and finite values (audit.trend.baseline_trend, element-wise).
    Sums of squares and slopes on X / 2**ex and Y / 2**ey row by row (exact), scaled back.
    zq: the normal quantile of the Theil-Sen interval. The caller sets the p-values (from the t
    statistic res["_ols_t"] and the z statistics, NaN where the p-value is), the
    therapeutic-direction flags and the joined reason."""
    m = len(sel)
    I, J = np.tril_indices(n, -1)  # pairs i > j: later minus earlier
    ex, ey = binary_exponents(X), binary_exponents(Y)
    Xs, Ys = scale_rows(X, ex), scale_rows(Y, ey)
    with np.errstate(all="ignore"):
        # ---- OLS
        xm = Xs.mean(axis=1)
        xc = Xs - xm[:, None]
        sxx = (xc * xc).sum(axis=1)
        ym = Ys.mean(axis=1)
        yc = Ys - ym[:, None]
        b = (xc * yc).sum(axis=1) / sxx
        singular = ~(sxx > 0)
        slope, bad_s = unscale_checked(b, ey - ex)
        intercept, bad_i = unscale_checked(ym - b * xm, ey)
        overflow = bad_s | bad_i
        df = float(n - 2)
        resid = yc - b[:, None] * xc
        ssr = (resid * resid).sum(axis=1)
        sst = (yc * yc).sum(axis=1)
        if n == 2:  # a line through two points: no residual degrees of freedom
            se, t = np.full(m, _NAN), np.full(m, _NAN)
            ols_reason = _with_code(np.full(m, R.NO_RESIDUAL_DF, dtype=object), overflow)
        else:
            degenerate = (ssr <= 1e-20 * sst) | (sst == 0.0)
            se_scaled = np.sqrt(ssr / df / sxx)
            se, bad_se = unscale_checked(se_scaled, ey - ex)
            se = np.where(degenerate, 0.0, se)
            t = np.where(degenerate, _NAN, b / se_scaled)
            ols_reason = np.where(degenerate, np.where(sst == 0.0, R.join(R.ZERO_RESIDUAL_VARIANCE, R.CONSTANT_SERIES),
                                                       R.ZERO_RESIDUAL_VARIANCE), R.OK).astype(object)
            overflow = overflow | (bad_se & ~degenerate)
            ols_reason = _with_code(ols_reason, overflow)
        ols_reason = np.where(singular, R.SINGULAR_DESIGN, ols_reason).astype(object)
        for arr in (slope, intercept, se, t):
            arr[singular] = _NAN
        res["ols_slope"][sel], res["ols_intercept"][sel] = slope, intercept
        res["ols_slope_se"][sel], res["_ols_t"][sel] = se, t
        res["ols_reason"][sel] = ols_reason

        # ---- ties in y: c_i = size of the tie group of y_i
        cnt = (Y[:, :, None] == Y[:, None, :]).sum(axis=2).astype(float)
        ties_mk = ((cnt - 1) * (2 * cnt + 5)).sum(axis=1)  # sum over groups t(t-1)(2t+5)
        n1 = ((cnt - 1) / 2.0).sum(axis=1)  # sum over groups t(t-1)/2
        untied = (cnt == 1).all(axis=1)

        # ---- Theil-Sen (median of pairwise slopes of the scaled series, order-statistic interval)
        slopes = np.sort((Ys[:, I] - Ys[:, J]) / (Xs[:, I] - Xs[:, J]), axis=1)
        nt = I.size
        if nt % 2:
            tsb = slopes[:, nt // 2] / 1.0
        else:
            tsb = (slopes[:, nt // 2 - 1] + slopes[:, nt // 2]) / 2.0
        ts, _ = unscale_checked(tsb, ey - ex)
        ts_int, _ = unscale_checked(np.median(Ys, axis=1) - tsb * np.median(Xs, axis=1), ey)
        sigsq = (n * (n - 1) * (2 * n + 5) - ties_mk) / 18.0
        sigma = np.sqrt(sigsq)
        upper = np.minimum(np.round((nt - zq * sigma) / 2.0), nt - 1).astype(np.int64)
        lower = np.maximum(np.round((nt + zq * sigma) / 2.0) - 1, 0).astype(np.int64)
        rr = np.arange(m)
        low, _ = unscale_checked(slopes[rr, lower], ey - ex)
        high, _ = unscale_checked(slopes[rr, upper], ey - ex)
        ts, ts_int, low, high = (np.where(np.isfinite(v), v, _NAN) for v in (ts, ts_int, low, high))
        ts_bad = ~(np.isfinite(ts) & np.isfinite(ts_int) & np.isfinite(low) & np.isfinite(high))
        res["theil_sen_slope"][sel], res["theil_sen_intercept"][sel] = ts, ts_int
        res["theil_sen_slope_low"][sel] = low
        res["theil_sen_slope_high"][sel] = high
        ts_reason = _codes(~ts_bad, R.NUMERICAL_FAILURE)
        res["theil_sen_reason"][sel] = ts_reason

        # ---- Mann-Kendall (signs by comparison: no overflow near the float limits)
        s = (Y[:, I] > Y[:, J]).sum(axis=1).astype(float) - (Y[:, I] < Y[:, J]).sum(axis=1)
        var_s = (n * (n - 1) * (2 * n + 5) - ties_mk) / 18.0
        n0 = n * (n - 1) / 2.0
        denom_b = (n0 - n1) * (n0 - 0.0)
        tau_b = np.where(denom_b > 0, s / np.sqrt(denom_b), _NAN)
        varok = var_s > 0
        z = np.where(varok, _mk_z(s, var_s), _NAN)
        p_exact = np.full(m, _NAN)
        exact = untied & varok
        if n <= MANN_KENDALL_EXACT_MAX_N and exact.any():
            s_abs, inv = np.unique(np.abs(s[exact]), return_inverse=True)
            sf = np.array([min(1.0, 2.0 * mann_kendall_exact_sf(float(v), n)) for v in s_abs])
            p_exact[exact] = sf[inv.ravel()]
        mk_reason = np.where(varok, R.OK, R.join(R.CONSTANT_SERIES, R.ZERO_VARIANCE)).astype(object)
        res["mann_kendall_s"][sel], res["mann_kendall_var_s"][sel] = s, var_s
        res["mann_kendall_tau_a"][sel], res["mann_kendall_tau_b"][sel] = s / n0, tau_b
        res["mann_kendall_z"][sel] = z
        res["mann_kendall_p_value_exact"][sel] = p_exact
        res["mann_kendall_reason"][sel] = mk_reason

        # ---- lag-1 Hamed-Rao (ranks of the Theil-Sen-detrended series, screened r1)
        if n < 3:
            res["hamed_rao_reason"][sel] = R.TOO_FEW_POINTS
        else:
            _hamed_rao_block(n, Xs, Ys, tsb, s, var_s, mk_reason, sel, res)


def _hamed_rao_block(n, Xs, Ys, tsb, s, var_s, mk_reason, sel, res):
    """Lag-1 Hamed-Rao columns for series of length n >= 3 (audit.trend.mann_kendall_hamed_rao_lag1);
    Xs, Ys the scaled series and tsb their Theil-Sen slope (same ranks as the unscaled ones)."""
    with np.errstate(all="ignore"):
        slope_ok = np.isfinite(tsb)
        ranks = stats.rankdata(np.where(slope_ok[:, None], Ys - tsb[:, None] * Xs, 0.0), axis=1)
        vc = ranks - ranks.mean(axis=1)[:, None]
        den = (vc * vc).sum(axis=1)
        r1 = np.where(den > 0, (vc[:, :-1] * vc[:, 1:]).sum(axis=1) / den, _NAN)
        r_ok = np.isfinite(r1)
        screened = np.abs(r1) <= _Z_SCREEN / np.sqrt(n)
        r1_used = np.where(screened, 0.0, r1)
        factor = 1.0 + 2.0 * (n - 3) * r1_used / n
        f_ok = r_ok & (factor > 0)
        v_ok = f_ok & np.isfinite(var_s) & (var_s > 0)
        var_star = np.where(v_ok, var_s * factor, _NAN)
        z_hr = np.where(v_ok, _mk_z(s, var_star), _NAN)
        r1 = np.where(slope_ok, r1, _NAN)
        r_ok = r_ok & slope_ok
        f_ok, v_ok = f_ok & slope_ok, v_ok & slope_ok
        var_star, z_hr = (np.where(slope_ok, v, _NAN) for v in (var_star, z_hr))
        hr_reason = np.where(~slope_ok, R.NUMERICAL_FAILURE, np.where(~r_ok, R.ZERO_VARIANCE, np.where(
            ~f_ok, R.NUMERICAL_FAILURE, np.where(~v_ok, np.where(mk_reason == R.OK, R.ZERO_VARIANCE, mk_reason),
                                                 R.OK)))).astype(object)
        res["hamed_rao_lag1_rank_autocorrelation"][sel] = r1
        res["hamed_rao_lag1_correction_factor"][sel] = np.where(r_ok, factor, _NAN)
        res["mann_kendall_hamed_rao_lag1_var_s"][sel] = var_star
        res["_hamed_rao_z"][sel] = z_hr
        res["hamed_rao_reason"][sel] = hr_reason


def _mk_z(s, v):
    """Continuity-corrected Mann-Kendall z: (S - 1)/sqrt(V) for S > 0, (S + 1)/sqrt(V) for S < 0, 0."""
    return np.where(s > 0, (s - 1.0) / np.sqrt(v), np.where(s < 0, (s + 1.0) / np.sqrt(v), 0.0))


def _therapeutic(direction, slope, p, alpha) -> np.ndarray:
    """'yes' / 'no' / 'unknown' as audit.trend._therapeutic_flag, element-wise."""
    inc = direction == "increase"
    dec = direction == "decrease"
    known = (inc | dec) & np.isfinite(slope)
    in_dir = np.where(inc, slope > 0, slope < 0)
    code = np.where(~known, 0, np.where(~in_dir, 1, np.where(~np.isfinite(p), 0, np.where(p < alpha, 2, 1))))
    return _FLAGS[code]


_FLAGS = np.array(["unknown", "no", "yes"], dtype=object)
