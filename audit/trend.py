"""Baseline trend diagnostics: OLS slope, Theil-Sen slope, Mann-Kendall test (with a lag-1
Hamed-Rao variance correction) and a flag for baselines already moving in the therapeutic direction.

All functions take plain arrays and return frozen dataclasses; degenerate input gives NaN plus a
reason code from :mod:`audit.reasons`, never an exception.

Values near the float limits: sessions and outcomes are each divided by a power of two
(``audit.regression.binary_exponents``, exact) before sums of squares and pairwise slopes, and the
results are scaled back; for ordinary data this gives the same bits as the unscaled arithmetic.
A slope, intercept or standard error beyond the largest double is NaN with reason
``numerical_failure``; scale-free results (t, p-values, Mann-Kendall, Hamed-Rao) are still given.
"""

from __future__ import annotations

import functools

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import stats

from audit import reasons as R
from audit.regression import binary_exponents, scale_rows, unscale

__all__ = [
    "OLSSlope",
    "TheilSenSlope",
    "MannKendall",
    "MannKendallHamedRaoLag1",
    "BaselineTrend",
    "ols_slope",
    "theil_sen_slope",
    "mann_kendall",
    "mann_kendall_exact_sf",
    "mann_kendall_hamed_rao_lag1",
    "baseline_trend",
    "baseline_trends",
    "normalize_direction",
    "unscale_checked",
    "scaled_ratio",
    "scaling_exponents",
    "window_exponents",
    "SAFE_EXPONENT",
]

_NAN = float("nan")
MANN_KENDALL_EXACT_MAX_N = 50


def normalize_direction(desired_direction: object) -> str | None:
    """Return 'increase', 'decrease' or None (anything else, including NaN, counts as None)."""
    if desired_direction is None:
        return None
    if isinstance(desired_direction, str):
        d = desired_direction.strip().lower()
        if d in ("increase", "decrease"):
            return d
    return None


def _as_float(a) -> np.ndarray:
    return np.asarray(a, dtype=float).ravel()


def _finite_pair(x, y) -> tuple[np.ndarray, np.ndarray, str]:
    x, y = _as_float(x), _as_float(y)
    if x.shape != y.shape:
        return x, y, R.SINGULAR_DESIGN
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        return x, y, R.NON_FINITE_INPUT
    return x, y, R.OK


# Values whose binary exponent is within +-SAFE_EXPONENT are used unscaled by the effect sizes:
# their squares and fourth powers (also divided by a squared phase size up to 2**30) stay normal.
SAFE_EXPONENT = 240


def window_exponents(e):
    """Binary exponents with those within +-SAFE_EXPONENT replaced by 0 (no scaling needed)."""
    e = np.asarray(e, dtype=np.int64)
    out = np.where(np.abs(e) <= SAFE_EXPONENT, 0, e)
    return int(out) if out.ndim == 0 else out


def scaling_exponents(Y):
    """``audit.regression.binary_exponents`` of Y (row by row), 0 where within +-SAFE_EXPONENT:
    ordinary data keep exactly the unscaled arithmetic (libm pow, used by x**2 on scalars, is not
    exactly scale-equivariant), data near the float limits are scaled."""
    return window_exponents(binary_exponents(Y))


def unscale_checked(values, e):
    """(values * 2**e, not_representable): NaN where a finite value would exceed the largest double.

    Undoes an exact power-of-two scaling (``audit.regression.scale_rows``); works on scalars and arrays.
    """
    v = np.asarray(values, dtype=float)
    out = unscale(v, e)
    bad = np.isfinite(v) & ~np.isfinite(out)
    out = np.where(bad, np.nan, out)
    if out.ndim == 0:
        return float(out), bool(bad)
    return out, bad


def scaled_ratio(num, den, e):
    """((num / den) * 2**e, not_representable) for a ratio of exactly scaled quantities: NaN where
    finite num and den give a result beyond the largest double (works on scalars and arrays)."""
    num, den = np.asarray(num, dtype=float), np.asarray(den, dtype=float)
    with np.errstate(over="ignore", divide="ignore", invalid="ignore", under="ignore"):
        out = unscale(num / den, e)
    bad = np.isfinite(num) & np.isfinite(den) & ~np.isfinite(out)
    out = np.where(bad, np.nan, out)
    if out.ndim == 0:
        return float(out), bool(bad)
    return out, bad


def _scaled(v: np.ndarray) -> tuple[int, np.ndarray]:
    """(e, v * 2**-e) with e the binary exponent of max |v| (exact)."""
    e = binary_exponents(v)
    return e, scale_rows(v, e)


def _sign_of_difference(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """sign(u - v) by comparison (no overflow for values near the float limits)."""
    return (u > v).astype(float) - (u < v).astype(float)


def _tie_groups(values: np.ndarray) -> np.ndarray:
    """Sizes (>1) of groups of exactly equal values."""
    if values.size == 0:
        return np.zeros(0, dtype=float)
    _, counts = np.unique(values, return_counts=True)
    return counts[counts > 1].astype(float)


# ----------------------------------------------------------------------------------------------
# OLS slope
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class OLSSlope:
    """Ordinary least squares line y = intercept + slope * x with the slope's t-test."""

    n: int
    ols_slope: float
    ols_intercept: float
    ols_slope_se: float
    ols_slope_t: float
    ols_df: float
    ols_slope_p_value: float  # two-sided, Student t with n - 2 df
    reason: str


def ols_slope(x, y) -> OLSSlope:
    """OLS slope of y on x, its standard error and two-sided t-test p-value (n - 2 df).

    Computed on x / 2**ex and y / 2**ey (exact) and scaled back; slope, intercept or standard error
    beyond the largest double are NaN with reason numerical_failure (t and p are scale-free).
    """
    x, y, reason = _finite_pair(x, y)
    n = int(x.size)
    if reason:
        return OLSSlope(n, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, reason)
    if n < 2:
        return OLSSlope(n, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, R.TOO_FEW_POINTS)
    ex, xs = _scaled(x)
    ey, ys = _scaled(y)
    xm, ym = xs.mean(), ys.mean()
    xc = xs - xm
    # sums of products as the batch path forms them (np.sum of the products, not a BLAS dot,
    # whose rounding differs: an exactly zero slope must stay zero in both)
    sxx = float(np.sum(xc * xc))
    if not sxx > 0:
        return OLSSlope(n, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, R.SINGULAR_DESIGN)
    yc = ys - ym
    b = float(np.sum(xc * yc)) / sxx  # slope * 2**(ex - ey)
    slope, bad_slope = unscale_checked(b, ey - ex)
    intercept, bad_intercept = unscale_checked(float(ym - b * xm), ey)
    overflow = R.NUMERICAL_FAILURE if (bad_slope or bad_intercept) else R.OK
    df = n - 2
    if df < 1:
        return OLSSlope(n, slope, intercept, _NAN, _NAN, float(df), _NAN, R.join(R.NO_RESIDUAL_DF, overflow))
    resid = yc - b * xc
    ssr = float(np.sum(resid * resid))
    sst = float(np.sum(yc * yc))
    if ssr <= 1e-20 * sst or sst == 0.0:
        code = R.join(R.ZERO_RESIDUAL_VARIANCE, R.CONSTANT_SERIES if sst == 0.0 else "", overflow)
        return OLSSlope(n, slope, intercept, 0.0, _NAN, float(df), _NAN, code)
    se_scaled = float(np.sqrt(ssr / df / sxx))
    se, bad_se = unscale_checked(se_scaled, ey - ex)
    t = b / se_scaled
    p = float(2.0 * stats.t.sf(abs(t), df))
    return OLSSlope(n, slope, intercept, se, t, float(df), p,
                    R.join(overflow, R.NUMERICAL_FAILURE if bad_se else R.OK))


# ----------------------------------------------------------------------------------------------
# Theil-Sen
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TheilSenSlope:
    """Theil-Sen slope (median of pairwise slopes) with Sen's (1968) distribution-free interval."""

    n: int
    theil_sen_slope: float
    theil_sen_intercept: float  # median(y) - slope * median(x)
    theil_sen_slope_low: float
    theil_sen_slope_high: float
    theil_sen_confidence: float
    reason: str


def _pairwise_slopes_scaled(x: np.ndarray, y: np.ndarray):
    """(ex, ey, x / 2**ex, y / 2**ey, sorted pairwise slopes of the scaled values over pairs with
    x_j > x_i); a scaled slope times 2**(ey - ex) is the slope."""
    ex, xs = _scaled(x)
    ey, ys = _scaled(y)
    dx = xs[:, None] - xs[None, :]
    dy = ys[:, None] - ys[None, :]
    keep = dx > 0
    with np.errstate(over="ignore"):
        slopes = np.sort(dy[keep] / dx[keep])
    return ex, ey, xs, ys, slopes


def _median_sorted(v: np.ndarray) -> float:
    """Median of a sorted non-empty array (as np.median)."""
    k = v.size
    with np.errstate(over="ignore"):
        return float(v[k // 2]) if k % 2 else float((v[k // 2 - 1] + v[k // 2]) / 2.0)


def theil_sen_slope(x, y, confidence: float = 0.95) -> TheilSenSlope:
    """Theil-Sen slope and Sen (1968, eq. 2.6) interval, computed as scipy.stats.theilslopes does.

    The interval takes the order statistics of the N pairwise slopes at ranks
    round((N -/+ z * sigma) / 2), sigma^2 = [n(n-1)(2n+5) - sum_x t(t-1)(2t+5)
    - sum_y t(t-1)(2t+5)] / 18 (ties in x and in y), z the normal quantile.
    Slopes are taken between x / 2**ex and y / 2**ey (exact) and scaled back; a slope or intercept
    beyond the largest double is NaN with reason numerical_failure.
    """
    x, y, reason = _finite_pair(x, y)
    n = int(x.size)
    if reason:
        return TheilSenSlope(n, _NAN, _NAN, _NAN, _NAN, confidence, reason)
    if n < 2:
        return TheilSenSlope(n, _NAN, _NAN, _NAN, _NAN, confidence, R.TOO_FEW_POINTS)
    ex, ey, xs, ys, slopes = _pairwise_slopes_scaled(x, y)
    if slopes.size == 0:
        return TheilSenSlope(n, _NAN, _NAN, _NAN, _NAN, confidence, R.SINGULAR_DESIGN)
    b = _median_sorted(slopes)
    slope, bad = unscale_checked(b, ey - ex)
    with np.errstate(over="ignore", invalid="ignore"):
        intercept_scaled = float(np.median(ys) - b * np.median(xs))
    intercept, bad_i = unscale_checked(intercept_scaled, ey)
    if not np.isfinite(intercept_scaled):
        intercept, bad_i = _NAN, True
    overflow = R.NUMERICAL_FAILURE if (bad or bad_i or not np.isfinite(b)) else R.OK
    if not np.isfinite(b):
        slope = _NAN
    a = 1.0 - confidence if confidence > 0.5 else confidence
    z = stats.norm.ppf(a / 2.0)
    ties = float(sum(t * (t - 1) * (2 * t + 5) for t in _tie_groups(x)))
    ties += float(sum(t * (t - 1) * (2 * t + 5) for t in _tie_groups(y)))
    sigsq = (n * (n - 1) * (2 * n + 5) - ties) / 18.0
    nt = slopes.size
    if not sigsq >= 0:
        return TheilSenSlope(n, slope, intercept, _NAN, _NAN, confidence, R.join(R.NUMERICAL_FAILURE, overflow))
    sigma = np.sqrt(sigsq)
    upper = min(int(np.round((nt - z * sigma) / 2.0)), nt - 1)
    lower = max(int(np.round((nt + z * sigma) / 2.0)) - 1, 0)
    low, bad_low = unscale_checked(slopes[lower], ey - ex)
    high, bad_high = unscale_checked(slopes[upper], ey - ex)
    low, high = (low if np.isfinite(low) else _NAN), (high if np.isfinite(high) else _NAN)
    if not (np.isfinite(low) and np.isfinite(high)):
        overflow = R.NUMERICAL_FAILURE
    return TheilSenSlope(n, slope, intercept, low, high, confidence, overflow)


# ----------------------------------------------------------------------------------------------
# Mann-Kendall
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class MannKendall:
    """Mann-Kendall trend test of y against x (time)."""

    n: int
    mann_kendall_s: float  # sum_{i<j} sign(x_j - x_i) sign(y_j - y_i)
    mann_kendall_var_s: float  # [n(n-1)(2n+5) - sum_ties t(t-1)(2t+5)] / 18 (ties in y)
    mann_kendall_tau_a: float  # S / (n(n-1)/2)
    mann_kendall_tau_b: float  # S / sqrt((n0 - n1)(n0 - n2)), = scipy.stats.kendalltau
    mann_kendall_z: float  # normal approximation, continuity-corrected unless continuity=False
    mann_kendall_p_value: float  # two-sided, 2 * (1 - Phi(|Z|))
    mann_kendall_p_value_exact: float  # two-sided exact permutation p; NaN with ties or n > 50
    continuity_correction: bool
    reason: str


@functools.lru_cache(maxsize=256)
def _inversion_distribution(n: int) -> np.ndarray:
    """P(I = i) of the number of inversions of n untied values (Mahonian), built by convolution."""
    probs = np.array([1.0])
    for k in range(2, n + 1):
        new = np.zeros(probs.size + k - 1)
        for j in range(k):
            new[j : j + probs.size] += probs
        probs = new / k
    probs.flags.writeable = False  # shared by the cache
    return probs


@functools.lru_cache(maxsize=4096)
def mann_kendall_exact_sf(s: float, n: int) -> float:
    """P(S >= s) for Kendall's S under H0 with n untied values (Mahonian inversion distribution;
    S = n(n-1)/2 - 2I).  Cached: the batch path asks for the same (s, n) many times."""
    if n < 1:
        return _NAN
    probs = _inversion_distribution(n)
    n0 = n * (n - 1) // 2
    s_values = n0 - 2 * np.arange(probs.size)
    return float(min(1.0, probs[s_values >= s - 1e-9].sum()))


def _kendall_s(x: np.ndarray, y: np.ndarray) -> float:
    sx = _sign_of_difference(x[None, :], x[:, None])
    sy = _sign_of_difference(y[None, :], y[:, None])
    return float(np.triu(sx * sy, 1).sum())


def _mk_z(s: float, var_s: float, continuity: bool) -> float:
    if not var_s > 0:
        return _NAN
    if continuity:
        if s > 0:
            return (s - 1.0) / np.sqrt(var_s)
        if s < 0:
            return (s + 1.0) / np.sqrt(var_s)
        return 0.0
    return s / np.sqrt(var_s)


def mann_kendall(x, y, continuity: bool = True) -> MannKendall:
    """Mann-Kendall test (Mann 1945; Kendall 1975; procedure as in Gilbert 1987, ch. 16).

    S = sum_{i<j} sign(y_j - y_i) (times sign(x_j - x_i), which is 1 for sorted distinct
    sessions); Var(S) with the tie correction for tied y values; Z = (S - 1)/sqrt(Var) for S > 0,
    (S + 1)/sqrt(Var) for S < 0, 0 for S = 0 (continuity correction); p two-sided normal.
    The exact p-value uses the permutation distribution of S, only without ties and for n <= 50.
    """
    x, y, reason = _finite_pair(x, y)
    n = int(x.size)
    nan_result = lambda code: MannKendall(  # noqa: E731
        n, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, continuity, code
    )
    if reason:
        return nan_result(reason)
    if n < 2:
        return nan_result(R.TOO_FEW_POINTS)
    if np.unique(x).size < 2:
        return nan_result(R.SINGULAR_DESIGN)
    s = _kendall_s(x, y)
    y_ties = _tie_groups(y)
    x_ties = _tie_groups(x)
    var_s = (n * (n - 1) * (2 * n + 5) - float(np.sum(y_ties * (y_ties - 1) * (2 * y_ties + 5)))) / 18.0
    n0 = n * (n - 1) / 2.0
    tau_a = s / n0
    n1 = float(np.sum(y_ties * (y_ties - 1) / 2.0))
    n2 = float(np.sum(x_ties * (x_ties - 1) / 2.0))
    denom_b = (n0 - n1) * (n0 - n2)
    tau_b = float(s / np.sqrt(denom_b)) if denom_b > 0 else _NAN
    if not var_s > 0:
        return MannKendall(
            n, s, var_s, tau_a, tau_b, _NAN, _NAN, _NAN, continuity,
            R.join(R.CONSTANT_SERIES, R.ZERO_VARIANCE),
        )
    z = _mk_z(s, var_s, continuity)
    p = float(2.0 * stats.norm.sf(abs(z)))
    p_exact = _NAN
    if y_ties.size == 0 and x_ties.size == 0 and n <= MANN_KENDALL_EXACT_MAX_N:
        p_exact = min(1.0, 2.0 * mann_kendall_exact_sf(abs(s), n))
    return MannKendall(n, s, var_s, tau_a, tau_b, float(z), p, p_exact, continuity, R.OK)


@dataclass(frozen=True)
class MannKendallHamedRaoLag1:
    """Mann-Kendall test with the Hamed & Rao (1998) variance correction restricted to lag 1."""

    n: int
    hamed_rao_lag1_rank_autocorrelation: float  # r1 of the ranks of y - theil_sen_slope * x
    hamed_rao_lag1_screened: bool  # True: r1 set to 0 because |r1| <= z_(1-alpha/2)/sqrt(n)
    hamed_rao_lag1_correction_factor: float  # n / n*_s = 1 + 2 (n - 3) r1 / n
    mann_kendall_hamed_rao_lag1_var_s: float  # Var(S) * correction factor
    mann_kendall_hamed_rao_lag1_z: float
    mann_kendall_hamed_rao_lag1_p_value: float
    reason: str


def _lag1_autocorrelation(v: np.ndarray) -> float:
    vc = v - v.mean()
    den = float(vc @ vc)
    if not den > 0:
        return _NAN
    return float(vc[:-1] @ vc[1:]) / den


def mann_kendall_hamed_rao_lag1(
    x, y, continuity: bool = True, screen: bool = True, screen_alpha: float = 0.05
) -> MannKendallHamedRaoLag1:
    """Mann-Kendall p-value with the Hamed & Rao (1998) variance correction truncated at lag 1.

    Hamed & Rao: Var*(S) = Var(S) * n/n*_s, n/n*_s = 1 + 2/(n(n-1)(n-2)) *
    sum_{i=1}^{n-1} (n-i)(n-i-1)(n-i-2) rho_s(i), rho_s(i) the autocorrelation of the ranks of
    the series detrended by Sen's slope. Only i = 1 is kept here, so
    n/n*_s = 1 + 2 (n-3) rho_s(1) / n, with rho_s(1) = sum (R_t - Rbar)(R_{t+1} - Rbar) /
    sum (R_t - Rbar)^2 (average ranks for ties); Var(S) is the tie-corrected one.
    As in Hamed & Rao, only a significant rho_s(1) is used: with screen=True (default) it is set
    to 0 when |rho_s(1)| <= z_(1-screen_alpha/2)/sqrt(n) (large-sample white-noise bound);
    screen=False uses the estimate as is. A correction factor <= 0 gives NaN.
    """
    x, y, reason = _finite_pair(x, y)
    n = int(x.size)

    def nan_result(code: str, r1: float = _NAN, factor: float = _NAN) -> MannKendallHamedRaoLag1:
        return MannKendallHamedRaoLag1(n, r1, False, factor, _NAN, _NAN, _NAN, code)

    if reason:
        return nan_result(reason)
    if n < 3:
        return nan_result(R.TOO_FEW_POINTS)
    mk = mann_kendall(x, y, continuity=continuity)
    _, _, xs, ys, slopes = _pairwise_slopes_scaled(x, y)
    if slopes.size == 0:
        return nan_result(R.join(R.SINGULAR_DESIGN, mk.reason))
    b = _median_sorted(slopes)  # Sen's slope of the scaled series: same ranks after detrending
    if not np.isfinite(b):
        return nan_result(R.NUMERICAL_FAILURE)
    detrended = ys - b * xs
    ranks = stats.rankdata(detrended)
    r1 = _lag1_autocorrelation(ranks)
    if not np.isfinite(r1):  # detrended series constant (y exactly linear in x)
        return nan_result(R.ZERO_VARIANCE)
    screened = False
    r1_used = r1
    if screen and abs(r1) <= stats.norm.ppf(1.0 - screen_alpha / 2.0) / np.sqrt(n):
        r1_used = 0.0
        screened = True
    factor = 1.0 + 2.0 * (n - 3) * r1_used / n
    if not factor > 0:
        return MannKendallHamedRaoLag1(n, r1, screened, factor, _NAN, _NAN, _NAN, R.NUMERICAL_FAILURE)
    if not np.isfinite(mk.mann_kendall_var_s) or not mk.mann_kendall_var_s > 0:
        return MannKendallHamedRaoLag1(
            n, r1, screened, factor, _NAN, _NAN, _NAN, mk.reason or R.ZERO_VARIANCE
        )
    var_star = mk.mann_kendall_var_s * factor
    z = _mk_z(mk.mann_kendall_s, var_star, continuity)
    p = float(2.0 * stats.norm.sf(abs(z)))
    return MannKendallHamedRaoLag1(n, r1, screened, factor, var_star, float(z), p, R.OK)


# ----------------------------------------------------------------------------------------------
# Baseline trend summary
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BaselineTrend:
    """Trend diagnostics for one baseline series (x = session, y = outcome)."""

    n: int
    ols_slope: float
    ols_intercept: float
    ols_slope_se: float
    ols_slope_p_value: float
    theil_sen_slope: float
    theil_sen_intercept: float
    theil_sen_slope_low: float
    theil_sen_slope_high: float
    theil_sen_confidence: float
    mann_kendall_s: float
    mann_kendall_var_s: float
    mann_kendall_tau_a: float
    mann_kendall_tau_b: float
    mann_kendall_z: float
    mann_kendall_p_value: float
    mann_kendall_p_value_exact: float
    hamed_rao_lag1_rank_autocorrelation: float
    hamed_rao_lag1_correction_factor: float
    mann_kendall_hamed_rao_lag1_var_s: float
    mann_kendall_hamed_rao_lag1_p_value: float
    desired_direction: str | None
    alpha: float
    moves_in_therapeutic_direction: str  # "yes" / "no" / "unknown" (rule in baseline_trend)
    moves_in_therapeutic_direction_hamed_rao_lag1: str  # same rule with the corrected p-value
    ols_reason: str
    theil_sen_reason: str
    mann_kendall_reason: str
    hamed_rao_reason: str
    reason: str  # all component reasons joined


def _therapeutic_flag(direction: str | None, slope: float, p_value: float, alpha: float) -> str:
    if direction is None or not np.isfinite(slope):
        return "unknown"
    in_direction = slope > 0 if direction == "increase" else slope < 0
    if not in_direction:
        return "no"
    if not np.isfinite(p_value):
        return "unknown"
    return "yes" if p_value < alpha else "no"


def baseline_trend(
    session,
    outcome,
    desired_direction: str | None,
    alpha: float = 0.05,
    confidence: float = 0.95,
    continuity: bool = True,
    hamed_rao_screen: bool = True,
) -> BaselineTrend:
    """OLS, Theil-Sen and Mann-Kendall trend of a baseline series, plus a therapeutic-trend flag.

    moves_in_therapeutic_direction: "unknown" when desired_direction is None or the Theil-Sen
    slope is undefined; "yes" when the Theil-Sen slope is strictly in the desired direction
    (> 0 for "increase", < 0 for "decrease") AND the two-sided Mann-Kendall p-value (normal
    approximation, continuity-corrected) is < alpha; "unknown" when the slope points the desired
    way but the p-value is undefined; otherwise "no". The *_hamed_rao_lag1 flag applies the same
    rule with the lag-1 Hamed-Rao corrected p-value.
    """
    direction = normalize_direction(desired_direction)
    ols = ols_slope(session, outcome)
    ts = theil_sen_slope(session, outcome, confidence=confidence)
    mk = mann_kendall(session, outcome, continuity=continuity)
    hr = mann_kendall_hamed_rao_lag1(session, outcome, continuity=continuity, screen=hamed_rao_screen)
    flag = _therapeutic_flag(direction, ts.theil_sen_slope, mk.mann_kendall_p_value, alpha)
    flag_hr = _therapeutic_flag(
        direction, ts.theil_sen_slope, hr.mann_kendall_hamed_rao_lag1_p_value, alpha
    )
    return BaselineTrend(
        n=mk.n,
        ols_slope=ols.ols_slope,
        ols_intercept=ols.ols_intercept,
        ols_slope_se=ols.ols_slope_se,
        ols_slope_p_value=ols.ols_slope_p_value,
        theil_sen_slope=ts.theil_sen_slope,
        theil_sen_intercept=ts.theil_sen_intercept,
        theil_sen_slope_low=ts.theil_sen_slope_low,
        theil_sen_slope_high=ts.theil_sen_slope_high,
        theil_sen_confidence=ts.theil_sen_confidence,
        mann_kendall_s=mk.mann_kendall_s,
        mann_kendall_var_s=mk.mann_kendall_var_s,
        mann_kendall_tau_a=mk.mann_kendall_tau_a,
        mann_kendall_tau_b=mk.mann_kendall_tau_b,
        mann_kendall_z=mk.mann_kendall_z,
        mann_kendall_p_value=mk.mann_kendall_p_value,
        mann_kendall_p_value_exact=mk.mann_kendall_p_value_exact,
        hamed_rao_lag1_rank_autocorrelation=hr.hamed_rao_lag1_rank_autocorrelation,
        hamed_rao_lag1_correction_factor=hr.hamed_rao_lag1_correction_factor,
        mann_kendall_hamed_rao_lag1_var_s=hr.mann_kendall_hamed_rao_lag1_var_s,
        mann_kendall_hamed_rao_lag1_p_value=hr.mann_kendall_hamed_rao_lag1_p_value,
        desired_direction=direction,
        alpha=alpha,
        moves_in_therapeutic_direction=flag,
        moves_in_therapeutic_direction_hamed_rao_lag1=flag_hr,
        ols_reason=ols.reason,
        theil_sen_reason=ts.reason,
        mann_kendall_reason=mk.reason,
        hamed_rao_reason=hr.reason,
        reason=R.join(ols.reason, ts.reason, mk.reason, hr.reason),
    )


def _is_baseline(condition) -> np.ndarray:
    return np.array([str(c).strip().lower() == "baseline" for c in np.asarray(condition).ravel()])


def baseline_trends(
    session,
    outcome,
    phase_index,
    condition,
    desired_direction: str | None,
    alpha: float = 0.05,
    **kwargs,
) -> pd.DataFrame:
    """One row per baseline phase (scope 'phase') and one for all baseline points (scope 'all_baseline').

    Columns: scope, phase_index (<NA> for 'all_baseline'), n_phases, then the BaselineTrend fields.
    Extra keyword arguments go to baseline_trend.
    """
    session = _as_float(session)
    outcome = _as_float(outcome)
    phase = np.asarray(phase_index).ravel()
    is_base = _is_baseline(condition)
    rows: list[dict] = []
    base_phases = [p for p in pd.unique(phase[is_base])]
    base_phases = sorted(base_phases)
    for p in base_phases:
        m = is_base & (phase == p)
        bt = baseline_trend(session[m], outcome[m], desired_direction, alpha=alpha, **kwargs)
        rows.append({"scope": "phase", "phase_index": int(p), "n_phases": 1, **asdict(bt)})
    bt = baseline_trend(session[is_base], outcome[is_base], desired_direction, alpha=alpha, **kwargs)
    row = {"scope": "all_baseline", "phase_index": pd.NA, "n_phases": len(base_phases), **asdict(bt)}
    if not base_phases:
        row["reason"] = R.join(R.EMPTY_PHASE, row["reason"])
    rows.append(row)
    df = pd.DataFrame(rows)
    df["phase_index"] = df["phase_index"].astype("Int64")
    return df
