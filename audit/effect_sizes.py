"""Direction-aware effect sizes for single-case baseline -> treatment contrasts.

Non-overlap: PND, NAP (Parker & Vannest 2009), Tau between phases, Tau-U with baseline-trend
correction (Parker, Vannest, Davis & Sauber 2011). Parametric: log response ratio (Pustejovsky
2018), within-case standardized mean difference (baseline SD, Busk & Serlin 1992 style; pooled SD),
mean difference with Welch and pooled t-tests.

Improvement always counts positive: for desired_direction "decrease" the comparison is reversed
(values are negated before the non-overlap counts; signed differences are flipped). When the
direction is None, "increase" is assumed and direction_assumed=True is recorded.

Dependence-adjusted inference: given an AR(1) coefficient rho (bounded to [0, 0.95]), each
phase's size n is replaced by the effective size n_eff = n (1 - rho) / (1 + rho) in the variance
(the large-n AR(1) variance inflation of a mean, Bayley & Hammersley 1946; Zwiers & von Storch
1995, eq. for the "equivalent sample size"). Negative rho is set to 0: a negative estimate would
shrink variances below the independence ones, and lag-1 estimates from short series are biased
downwards, so the adjustment is only ever conservative. rho = 0 reproduces the independence
p-values exactly.

Values near the float limits: a phase whose largest |value| has a binary exponent beyond +-240
(``audit.trend.scaling_exponents``) is divided by that power of two (exact) before means and sums
of squares; differences and pooled variances of a contrast are formed in a common power-of-two
frame, and ratios (SMD, t statistics, LRR terms) are taken between scaled quantities. Ordinary
magnitudes are not scaled, so their results are unchanged to the bit. A reported quantity beyond
the largest double (an SD or mean difference of values near 1.8e308, a t statistic or SMD too
large to represent) is NaN and the reason of its result gets ``numerical_failure``; scale-free
results are still given.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import pandas as pd
from scipy import optimize, special, stats

from audit import reasons as R
from audit.regression import scale_rows
from audit.trend import normalize_direction, scaled_ratio, scaling_exponents, unscale_checked, window_exponents

__all__ = [
    "RATIO_SCALES",
    "RHO_MAX",
    "PND",
    "NAP",
    "TauBetweenPhases",
    "TauU",
    "LogResponseRatio",
    "StandardizedMeanDifference",
    "MeanDifferenceTest",
    "ContrastEffectSizes",
    "resolve_direction",
    "sd_frame",
    "bound_rho",
    "effective_sample_size",
    "hanley_mcneil_se",
    "newcombe_nap_interval",
    "hedges_correction",
    "tau_u_permutation_variance",
    "pnd",
    "nap",
    "tau_between_phases",
    "tau_u",
    "log_response_ratio",
    "standardized_mean_difference",
    "mean_difference_test",
    "contrast_effect_sizes",
    "phase_contrasts",
    "phase_mean_residual_lag1",
    "case_effect_sizes",
]

_NAN = float("nan")
RATIO_SCALES = ("count", "rate", "percent", "duration")
RHO_MAX = 0.95


# ----------------------------------------------------------------------------------------------
# helpers
# ----------------------------------------------------------------------------------------------


def resolve_direction(desired_direction: object) -> tuple[str, bool]:
    """(direction used, direction_assumed): None or unknown values become ("increase", True)."""
    d = normalize_direction(desired_direction)
    return ("increase", True) if d is None else (d, False)


def bound_rho(rho: float | None) -> float:
    """AR(1) coefficient clipped to [0, RHO_MAX]; None counts as 0, NaN stays NaN."""
    if rho is None:
        return 0.0
    rho = float(rho)
    if not np.isfinite(rho):
        return _NAN
    return float(min(max(rho, 0.0), RHO_MAX))


def effective_sample_size(n: float, rho: float | None) -> float:
    """n_eff = n (1 - rho)/(1 + rho), rho bounded to [0, 0.95].

    Large-n variance inflation of the mean of an AR(1) series (Bayley & Hammersley 1946;
    Zwiers & von Storch 1995).
    """
    r = bound_rho(rho)
    return float(n) * (1.0 - r) / (1.0 + r)


def _prepare(baseline, treatment) -> tuple[np.ndarray, np.ndarray, str]:
    a = np.asarray(baseline, dtype=float).ravel()
    b = np.asarray(treatment, dtype=float).ravel()
    if a.size == 0 or b.size == 0:
        return a, b, R.EMPTY_PHASE
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        return a, b, R.NON_FINITE_INPUT
    return a, b, R.OK


def _orient(values: np.ndarray, direction: str) -> np.ndarray:
    return -values if direction == "decrease" else values


def _flip(p: float, p_adjusted: float, alpha: float) -> bool | None:
    """Whether the decision at alpha differs; None when either p-value is undefined."""
    if not (np.isfinite(p) and np.isfinite(p_adjusted)):
        return None
    return bool((p < alpha) != (p_adjusted < alpha))


def _rho_reason(rho_used: float) -> str:
    return R.OK if np.isfinite(rho_used) else R.NON_FINITE_INPUT


def _sd(x: np.ndarray) -> float:
    return float(np.std(x, ddof=1)) if x.size >= 2 else _NAN


def _scaled_moments(x: np.ndarray) -> tuple[int, float, float]:
    """(e, mean, SD) of x * 2**-e, e the binary exponent of max |x| (``scaling_exponents``: 0 for
    ordinary magnitudes; exact scaling): the mean and SD of x are these times 2**e, and the sums of
    squares cannot overflow."""
    e = int(scaling_exponents(x))
    xs = scale_rows(x, e)
    return e, (float(xs.mean()) if xs.size else _NAN), _sd(xs)


_NO_EXPONENT = -(1 << 30)


def sd_frame(sd_a, e_a, sd_b, e_b, fallback):
    """Binary exponent F of the larger of two SDs given as sd_a * 2**e_a and sd_b * 2**e_b (F =
    fallback where neither is positive; 0 within +-SAFE_EXPONENT of audit.trend); element-wise on
    arrays. Pooled variances in units of 2**(2F) neither overflow nor lose the smaller SD."""
    def exponent(sd, e):
        sd = np.asarray(sd, dtype=float)
        pos = sd > 0
        return np.where(pos, np.asarray(e) + np.frexp(np.where(pos, sd, 1.0))[1], _NO_EXPONENT)

    f = np.maximum(exponent(sd_a, e_a), exponent(sd_b, e_b))
    return window_exponents(np.where(f == _NO_EXPONENT, fallback, f))


def _scaled_mean(v: np.ndarray) -> tuple[float, bool]:
    """Mean of the finite non-empty array v via an exact power-of-two scaling; (NaN, True) if it
    is not representable."""
    e = scaling_exponents(v)
    return unscale_checked(float(scale_rows(v, e).mean()), e)


def _two_sided_normal_p(z: float) -> float:
    return float(min(1.0, 2.0 * stats.norm.sf(z))) if np.isfinite(z) else _NAN


# ----------------------------------------------------------------------------------------------
# PND
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PND:
    """Percent of treatment points beyond the most extreme baseline point (in the improving direction)."""

    pnd_percent: float
    n_treatment_beyond: int
    n_baseline: int
    n_treatment: int
    baseline_extreme: float  # max(baseline) for "increase", min(baseline) for "decrease"
    desired_direction: str
    direction_assumed: bool
    reason: str


def pnd(baseline, treatment, desired_direction: str | None = None) -> PND:
    """PND = 100 * #{treatment points strictly beyond the most extreme baseline point} / nB.

    A treatment point equal to the baseline extreme does not count as non-overlapping.
    """
    direction, assumed = resolve_direction(desired_direction)
    a, b, reason = _prepare(baseline, treatment)
    if reason:
        return PND(_NAN, 0, a.size, b.size, _NAN, direction, assumed, reason)
    ao, bo = _orient(a, direction), _orient(b, direction)
    extreme = float(ao.max())
    k = int(np.sum(bo > extreme))
    raw_extreme = float(a.max() if direction == "increase" else a.min())
    return PND(100.0 * k / b.size, k, a.size, b.size, raw_extreme, direction, assumed, R.OK)


# ----------------------------------------------------------------------------------------------
# NAP
# ----------------------------------------------------------------------------------------------


def hanley_mcneil_se(auc: float, n_baseline: float, n_treatment: float) -> float:
    """Hanley & McNeil (1982) standard error of an AUC (= NAP).

    SE^2 = [A(1-A) + (nB - 1)(Q1 - A^2) + (nA - 1)(Q2 - A^2)] / (nA nB),
    Q1 = A/(2 - A), Q2 = 2A^2/(1 + A); the treatment phase plays the "abnormal" group.
    """
    a = float(auc)
    if not (np.isfinite(a) and n_baseline >= 1 and n_treatment >= 1):
        return _NAN
    q1 = a / (2.0 - a)
    q2 = 2.0 * a * a / (1.0 + a)
    var = (a * (1 - a) + (n_treatment - 1) * (q1 - a * a) + (n_baseline - 1) * (q2 - a * a)) / (
        n_baseline * n_treatment
    )
    return float(np.sqrt(max(var, 0.0)))


def newcombe_nap_interval(
    auc: float, n_baseline: int, n_treatment: int, confidence: float = 0.95
) -> tuple[float, float]:
    """Score-type interval for an AUC (Newcombe 2006, Stat Med 25:559-573, "method 5").

    Solves (A - theta)^2 = z^2 V(theta), V(theta) = theta(1-theta)/(nA nB) *
    [1 + N* ((1-theta)/(2-theta) + theta/(1+theta))], N* = (nA + nB)/2 - 1 (the Hanley-McNeil
    variance evaluated at theta, with both (n - 1) replaced by N*). Never degenerate at 0 or 1.
    """
    a = float(auc)
    if not (np.isfinite(a) and n_baseline >= 1 and n_treatment >= 1):
        return _NAN, _NAN
    z = stats.norm.ppf(0.5 + confidence / 2.0)
    mn = float(n_baseline * n_treatment)
    nstar = (n_baseline + n_treatment) / 2.0 - 1.0

    def k(theta: float) -> float:  # V(theta) / (theta (1 - theta))
        return (1.0 + nstar * ((1.0 - theta) / (2.0 - theta) + theta / (1.0 + theta))) / mn

    def f_low(theta: float) -> float:  # decreasing on (0, A]
        g = 0.0 if theta >= 1.0 else (a - theta) / np.sqrt(theta * (1.0 - theta))
        return g - z * np.sqrt(k(theta))

    def f_high(theta: float) -> float:  # increasing on [A, 1)
        g = 0.0 if theta <= 0.0 else (theta - a) / np.sqrt(theta * (1.0 - theta))
        return g - z * np.sqrt(k(theta))

    eps = 1e-12
    try:
        low = 0.0 if a <= 0.0 else optimize.brentq(f_low, eps, a, xtol=1e-14)
        high = 1.0 if a >= 1.0 else optimize.brentq(f_high, a, 1.0 - eps, xtol=1e-14)
    except (ValueError, RuntimeError):
        return _NAN, _NAN
    return float(low), float(high)


@dataclass(frozen=True)
class NAP:
    """Non-overlap of all pairs (Parker & Vannest 2009)."""

    nap: float  # (#improving pairs + 0.5 #tied pairs) / (nA nB)
    n_improving_pairs: int
    n_tied_pairs: int
    n_pairs: int
    nap_se_hanley_mcneil: float
    nap_ci_low_hanley_mcneil: float  # Wald interval, clipped to [0, 1]
    nap_ci_high_hanley_mcneil: float
    nap_ci_low_newcombe: float  # score interval, Newcombe (2006) method 5
    nap_ci_high_newcombe: float
    confidence: float
    desired_direction: str
    direction_assumed: bool
    reason: str


def _pair_counts(ao: np.ndarray, bo: np.ndarray) -> tuple[int, int, int]:
    """(#b > a, #b < a, #b == a) over all pairs (compared, not subtracted: no overflow)."""
    bb, aa = bo[:, None], ao[None, :]
    return int(np.sum(bb > aa)), int(np.sum(bb < aa)), int(np.sum(bb == aa))


def nap(baseline, treatment, desired_direction: str | None = None, confidence: float = 0.95) -> NAP:
    """NAP = (#improving pairs + 0.5 #ties)/(nA nB) with Hanley-McNeil and Newcombe intervals."""
    direction, assumed = resolve_direction(desired_direction)
    a, b, reason = _prepare(baseline, treatment)
    if reason:
        return NAP(_NAN, 0, 0, a.size * b.size, _NAN, _NAN, _NAN, _NAN, _NAN, confidence,
                   direction, assumed, reason)
    pos, _, ties = _pair_counts(_orient(a, direction), _orient(b, direction))
    npairs = a.size * b.size
    value = (pos + 0.5 * ties) / npairs
    se = hanley_mcneil_se(value, a.size, b.size)
    z = stats.norm.ppf(0.5 + confidence / 2.0)
    lo_n, hi_n = newcombe_nap_interval(value, a.size, b.size, confidence)
    return NAP(value, pos, ties, npairs, se, float(max(0.0, value - z * se)), float(min(1.0, value + z * se)),
               lo_n, hi_n, confidence, direction, assumed, R.OK)


# ----------------------------------------------------------------------------------------------
# Tau between phases
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TauBetweenPhases:
    """Tau for A vs B non-overlap: (P - N)/(nA nB) = 2 NAP - 1, with Mann-Whitney inference."""

    tau: float
    s: float  # P - N = 2U - nA nB
    n_pairs: int
    var_s: float  # 4 Var(U), Mann-Whitney null variance with tie correction
    z: float  # (|S| - 1)/sqrt(Var(S)) (continuity correction 0.5 on U), signed like S
    p_value: float  # two-sided normal approximation
    rho_used: float
    n_baseline_effective: float
    n_treatment_effective: float
    var_s_adjusted: float  # same variance with nA_eff, nB_eff (tie factor kept)
    z_adjusted: float
    p_value_adjusted: float
    flip: bool | None
    alpha: float
    desired_direction: str
    direction_assumed: bool
    reason: str
    reason_adjusted: str


def _mw_tie_factor(values: np.ndarray) -> float:
    """f = 1 - sum(t^3 - t) / (N^3 - N) over groups of tied values in the pooled sample."""
    n = values.size
    _, counts = np.unique(values, return_counts=True)
    t = counts.astype(float)
    return 1.0 - float(np.sum(t**3 - t)) / (n**3 - n) if n > 1 else _NAN


def _mw_var_s(na: int, nb: int, na_e: float, nb_e: float, tie_factor: float) -> float:
    """Var(S) = (nA nB)^2 (nA_e + nB_e + 1) f / (3 nA_e nB_e); equals nA nB (N+1) f / 3 when n_e = n."""
    return (na * nb) ** 2 * (na_e + nb_e + 1.0) * tie_factor / (3.0 * na_e * nb_e)


def _z_cc(s: float, var_s: float) -> float:
    """Continuity-corrected z: sign(S)(|S| - 1)/sqrt(Var(S)); 0 for S = 0; NaN for Var <= 0."""
    if not (np.isfinite(var_s) and var_s > 0 and np.isfinite(s)):
        return _NAN
    if s == 0:
        return 0.0
    return float(np.sign(s) * (abs(s) - 1.0) / np.sqrt(var_s))


def _p_cc(s: float, var_s: float) -> float:
    """min(1, 2(1 - Phi((|S| - 1)/sqrt(Var(S))))), the scipy mannwhitneyu asymptotic rule."""
    if not (np.isfinite(var_s) and var_s > 0 and np.isfinite(s)):
        return _NAN
    return _two_sided_normal_p((abs(s) - 1.0) / np.sqrt(var_s))


def tau_between_phases(
    baseline,
    treatment,
    desired_direction: str | None = None,
    rho: float | None = 0.0,
    alpha: float = 0.05,
) -> TauBetweenPhases:
    """Tau = (P - N)/(nA nB) with a two-sided Mann-Whitney normal-approximation p-value.

    Var(S) = nA nB (N + 1) f / 3, f = 1 - sum(t^3 - t)/(N^3 - N) (ties in the pooled data);
    Z = sign(S)(|S| - 1)/sqrt(Var(S)) (continuity correction, as scipy.stats.mannwhitneyu with
    method='asymptotic'); p = min(1, 2(1 - Phi(Z))) using |S|. The adjusted p uses
    Var_adj(S) = (nA nB)^2 (nA_eff + nB_eff + 1) f / (3 nA_eff nB_eff).
    """
    direction, assumed = resolve_direction(desired_direction)
    a, b, reason = _prepare(baseline, treatment)
    rho_used = bound_rho(rho)
    na, nb = a.size, b.size
    if reason:
        return TauBetweenPhases(_NAN, _NAN, na * nb, _NAN, _NAN, _NAN, rho_used, _NAN, _NAN, _NAN,
                                _NAN, _NAN, None, alpha, direction, assumed, reason, reason)
    ao, bo = _orient(a, direction), _orient(b, direction)
    pos, neg, _ = _pair_counts(ao, bo)
    s = float(pos - neg)
    tau = s / (na * nb)
    f = _mw_tie_factor(np.concatenate([ao, bo]))
    var_s = _mw_var_s(na, nb, float(na), float(nb), f)
    z = _z_cc(s, var_s)
    p = _p_cc(s, var_s)
    reason_ind = R.OK if np.isfinite(p) else R.join(R.ZERO_VARIANCE, R.CONSTANT_SERIES)
    na_e, nb_e = effective_sample_size(na, rho_used), effective_sample_size(nb, rho_used)
    reason_adj = _rho_reason(rho_used)
    var_adj = z_adj = p_adj = _NAN
    if not reason_adj:
        var_adj = _mw_var_s(na, nb, na_e, nb_e, f)
        z_adj = _z_cc(s, var_adj)
        p_adj = _p_cc(s, var_adj)
        reason_adj = R.OK if np.isfinite(p_adj) else reason_ind
    return TauBetweenPhases(tau, s, na * nb, var_s, z, p, rho_used, na_e, nb_e, var_adj, z_adj, p_adj,
                            _flip(p, p_adj, alpha), alpha, direction, assumed, reason_ind, reason_adj)


# ----------------------------------------------------------------------------------------------
# Tau-U (baseline-trend corrected)
# ----------------------------------------------------------------------------------------------


def tau_u_permutation_variance(n_baseline: int, n_treatment: int) -> float:
    """Exact null variance of S_AvsB - S_trendA when all nA + nB values are i.i.d. continuous.

    Hoeffding decomposition of T = sum_pairs w_ij sign(y_j - y_i): Var(T) = [sum_k c_k^2 +
    sum w_ij^2] / 3, with c_k = nA - 2k + 1 - nB for the k-th baseline point, c = nA for
    treatment points, and sum w^2 = nA nB + nA(nA - 1)/2. (Checks: all w = 1 gives Kendall's
    n(n-1)(2n+5)/18; A-vs-B only gives nA nB (nA + nB + 1)/3.)
    """
    na, nb = int(n_baseline), int(n_treatment)
    k = np.arange(1, na + 1, dtype=float)
    c_a = na - 2.0 * k + 1.0 - nb
    sum_c2 = float(np.sum(c_a**2)) + nb * float(na) ** 2
    sum_w2 = na * nb + na * (na - 1) / 2.0
    return (sum_c2 + sum_w2) / 3.0


@dataclass(frozen=True)
class TauU:
    """Tau-U with baseline-trend correction (Parker, Vannest, Davis & Sauber 2011)."""

    tau_u: float  # (S_AvsB - S_trendA) / (nA nB)
    s_a_vs_b: float  # sum over A-B pairs of sign(b - a) (improvement-oriented)
    s_trend_a: float  # Kendall S of the baseline in time order (improvement-oriented)
    s_tau_u: float  # S_AvsB - S_trendA
    n_pairs: int
    var_s: float  # nA nB (nA + nB + 1)/3 (null variance of S_AvsB without ties)
    z: float  # S_tau_u / sqrt(var_s), no continuity correction
    p_value: float  # two-sided normal
    var_s_permutation: float  # exact i.i.d.-null variance of S_tau_u (tau_u_permutation_variance)
    z_permutation: float
    p_value_permutation: float
    rho_used: float
    n_baseline_effective: float
    n_treatment_effective: float
    var_s_adjusted: float  # (nA nB)^2 (nA_eff + nB_eff + 1)/(3 nA_eff nB_eff)
    z_adjusted: float
    p_value_adjusted: float
    flip: bool | None  # p_value vs p_value_adjusted
    alpha: float
    desired_direction: str
    direction_assumed: bool
    reason: str
    reason_adjusted: str


def tau_u(
    baseline,
    treatment,
    desired_direction: str | None = None,
    rho: float | None = 0.0,
    alpha: float = 0.05,
) -> TauU:
    """Tau-U = (S_AvsB - S_trendA)/(nA nB); baseline must be in session order.

    p_value: Z = S/sqrt(nA nB (nA + nB + 1)/3), the A-vs-B null variance (our reading of
    Parker et al. 2011, recalled from memory; it ignores the variability of S_trendA).
    p_value_permutation: same S with its exact variance under i.i.d. data
    (tau_u_permutation_variance); ties are not corrected for in either.
    """
    direction, assumed = resolve_direction(desired_direction)
    a, b, reason = _prepare(baseline, treatment)
    rho_used = bound_rho(rho)
    na, nb = a.size, b.size
    if reason:
        return TauU(_NAN, _NAN, _NAN, _NAN, na * nb, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, rho_used,
                    _NAN, _NAN, _NAN, _NAN, _NAN, None, alpha, direction, assumed, reason, reason)
    ao, bo = _orient(a, direction), _orient(b, direction)
    pos, neg, _ = _pair_counts(ao, bo)
    s_ab = float(pos - neg)
    later, earlier = ao[None, :], ao[:, None]
    s_trend = float(np.triu((later > earlier).astype(float) - (later < earlier), 1).sum())
    s = s_ab - s_trend
    npairs = na * nb
    var_s = _mw_var_s(na, nb, float(na), float(nb), 1.0)
    z = s / np.sqrt(var_s)
    p = _two_sided_normal_p(abs(z))
    var_perm = tau_u_permutation_variance(na, nb)
    z_perm = s / np.sqrt(var_perm)
    p_perm = _two_sided_normal_p(abs(z_perm))
    na_e, nb_e = effective_sample_size(na, rho_used), effective_sample_size(nb, rho_used)
    reason_adj = _rho_reason(rho_used)
    var_adj = z_adj = p_adj = _NAN
    if not reason_adj:
        var_adj = _mw_var_s(na, nb, na_e, nb_e, 1.0)
        z_adj = s / np.sqrt(var_adj)
        p_adj = _two_sided_normal_p(abs(z_adj))
    return TauU(s / npairs, s_ab, s_trend, s, npairs, var_s, float(z), p, var_perm, float(z_perm),
                p_perm, rho_used, na_e, nb_e, var_adj, float(z_adj), p_adj, _flip(p, p_adj, alpha),
                alpha, direction, assumed, R.OK, reason_adj)


# ----------------------------------------------------------------------------------------------
# Log response ratio
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LogResponseRatio:
    """Log response ratio (Pustejovsky 2018) with its small-sample bias correction."""

    lrr: float  # ln(mB) - ln(mA), raw sign
    lrr_bias_corrected: float  # ln(mB) + sB^2/(2 nB mB^2) - ln(mA) - sA^2/(2 nA mA^2), raw sign
    lrr_improvement: float  # lrr_bias_corrected, sign flipped for "decrease"
    lrr_variance: float  # sA^2/(nA mA^2) + sB^2/(nB mB^2)
    lrr_se: float
    lrr_ci_low: float  # normal interval for lrr_improvement
    lrr_ci_high: float
    z: float  # lrr_improvement / lrr_se
    p_value: float
    rho_used: float
    n_baseline_effective: float
    n_treatment_effective: float
    lrr_variance_adjusted: float  # same with nA_eff, nB_eff
    p_value_adjusted: float
    flip: bool | None
    mean_baseline: float
    mean_treatment: float
    sd_baseline: float
    sd_treatment: float
    outcome_scale: str | None
    alpha: float
    confidence: float
    desired_direction: str
    direction_assumed: bool
    reason: str
    reason_adjusted: str


def log_response_ratio(
    baseline,
    treatment,
    outcome_scale: str | None,
    desired_direction: str | None = None,
    rho: float | None = 0.0,
    alpha: float = 0.05,
    confidence: float = 0.95,
) -> LogResponseRatio:
    """Bias-corrected log response ratio and its variance (Pustejovsky 2018).

    Only for ratio-scale outcomes (count, rate, percent, duration) with positive phase means;
    otherwise NaN with not_ratio_scale / nonpositive_mean. With a single point in a phase the raw
    LRR is kept and the bias correction and variance are NaN (too_few_points).
    """
    direction, assumed = resolve_direction(desired_direction)
    scale = None if outcome_scale is None else str(outcome_scale).strip().lower()
    a, b, reason = _prepare(baseline, treatment)
    rho_used = bound_rho(rho)
    na, nb = a.size, b.size
    if reason:
        ea = eb = 0
        ma_s = mb_s = sa_s = sb_s = _NAN
    else:
        ea, ma_s, sa_s = _scaled_moments(a)
        eb, mb_s, sb_s = _scaled_moments(b)
    ma, bad_ma = unscale_checked(ma_s, ea)
    mb, bad_mb = unscale_checked(mb_s, eb)
    sa, bad_sa = unscale_checked(sa_s, ea)
    sb, bad_sb = unscale_checked(sb_s, eb)
    overflow = R.NUMERICAL_FAILURE if (bad_ma or bad_mb or bad_sa or bad_sb) else R.OK
    na_e, nb_e = effective_sample_size(na, rho_used), effective_sample_size(nb, rho_used)

    def out(lrr=_NAN, lbc=_NAN, var=_NAN, var_adj=_NAN, code=R.OK, code_adj=None):
        sign = -1.0 if direction == "decrease" else 1.0
        imp = sign * lbc
        se = float(np.sqrt(var)) if np.isfinite(var) and var >= 0 else _NAN
        zq = stats.norm.ppf(0.5 + confidence / 2.0)
        lo, hi = (float(imp - zq * se), float(imp + zq * se)) if np.isfinite(se) else (_NAN, _NAN)
        z = imp / se if np.isfinite(se) and se > 0 else _NAN
        p = _two_sided_normal_p(abs(z))
        z_adj = imp / np.sqrt(var_adj) if np.isfinite(var_adj) and var_adj > 0 else _NAN
        p_adj = _two_sided_normal_p(abs(z_adj))
        if code_adj is None:
            code_adj = code
        return LogResponseRatio(lrr, lbc, imp, var, se, lo, hi, float(z), p, rho_used, na_e, nb_e,
                                var_adj, p_adj, _flip(p, p_adj, alpha), ma, mb, sa, sb, scale, alpha,
                                confidence, direction, assumed, code, code_adj)

    if scale not in RATIO_SCALES:
        return out(code=R.join(R.NOT_RATIO_SCALE, reason, overflow))
    if reason:
        return out(code=reason)
    if bad_ma or bad_mb:
        return out(code=R.NUMERICAL_FAILURE)
    if not (ma > 0 and mb > 0):
        return out(code=R.join(R.NONPOSITIVE_MEAN, overflow))
    lrr = float(np.log(mb) - np.log(ma))
    if na < 2 or nb < 2:
        return out(lrr=lrr, code=R.join(R.TOO_FEW_POINTS, overflow))
    # SD/mean ratios within a phase are scale-free: taken on the scaled values (numpy scalars, so
    # that a ratio beyond the float range gives inf, not an exception)
    sa_s, sb_s, ma_s, mb_s = (np.float64(v) for v in (sa_s, sb_s, ma_s, mb_s))
    with np.errstate(over="ignore", divide="ignore", invalid="ignore", under="ignore"):
        lbc = float(np.log(mb) + sb_s**2 / (2 * nb * mb_s**2) - np.log(ma) - sa_s**2 / (2 * na * ma_s**2))
        var = float(sa_s**2 / (na * ma_s**2) + sb_s**2 / (nb * mb_s**2))
    if not (np.isfinite(lbc) and np.isfinite(var)):
        return out(lrr=lrr, code=R.NUMERICAL_FAILURE)
    code = R.join(R.OK if var > 0 else R.ZERO_VARIANCE, overflow)
    code_adj = _rho_reason(rho_used) or code
    var_adj = _NAN
    if np.isfinite(rho_used):
        with np.errstate(over="ignore", divide="ignore", invalid="ignore", under="ignore"):
            var_adj = float(sa_s**2 / (na_e * ma_s**2) + sb_s**2 / (nb_e * mb_s**2))
        if not np.isfinite(var_adj):
            var_adj, code_adj = _NAN, R.join(code_adj, R.NUMERICAL_FAILURE)
    return out(lrr, lbc, var, var_adj, code, code_adj)


# ----------------------------------------------------------------------------------------------
# Standardized mean difference
# ----------------------------------------------------------------------------------------------


def hedges_correction(df: float) -> float:
    """Hedges (1981) exact small-sample factor J(df) = Gamma(df/2) / (sqrt(df/2) Gamma((df-1)/2)).

    NaN for df < 2 (J(1) = 0 would zero the estimate).
    """
    if not (np.isfinite(df) and df >= 2):
        return _NAN
    return float(np.exp(special.gammaln(df / 2.0) - special.gammaln((df - 1) / 2.0)) / np.sqrt(df / 2.0))


@dataclass(frozen=True)
class StandardizedMeanDifference:
    """Within-case standardized mean difference, improvement-signed."""

    mean_difference: float  # mB - mA ("increase") or mA - mB ("decrease")
    sd_baseline: float
    sd_pooled: float  # sqrt(((nA-1) sA^2 + (nB-1) sB^2)/(nA + nB - 2))
    smd_baseline_sd: float  # mean_difference / sA (Busk & Serlin 1992 style)
    smd_baseline_sd_hedges: float  # times J(nA - 1), Hedges (1981)
    smd_pooled_sd: float  # mean_difference / s_pooled
    smd_pooled_sd_hedges: float  # times J(nA + nB - 2), Hedges (1981)
    desired_direction: str
    direction_assumed: bool
    reason_baseline_sd: str
    reason_pooled_sd: str


def standardized_mean_difference(
    baseline, treatment, desired_direction: str | None = None
) -> StandardizedMeanDifference:
    """SMD with the baseline SD (Busk & Serlin 1992) and with the pooled SD, plus Hedges' J.

    The SMDs are ratios of scaled quantities (finite for values near the float limits); an SD or
    mean difference beyond the largest double is NaN with numerical_failure in both reasons.
    """
    direction, assumed = resolve_direction(desired_direction)
    a, b, reason = _prepare(baseline, treatment)
    if reason:
        return StandardizedMeanDifference(_NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, direction, assumed,
                                          reason, reason)
    sign = -1.0 if direction == "decrease" else 1.0
    na, nb = a.size, b.size
    c = _contrast_scales(a, b, sign)
    md, sa = c["md"], c["sa"]
    df_p = na + nb - 2
    sp, bad_sp = unscale_checked(c["sp"], c["e_sd"])
    md_code = R.NUMERICAL_FAILURE if c["bad_md"] else R.OK
    if na < 2:
        smd_b, smd_bh, reason_b = _NAN, _NAN, R.TOO_FEW_POINTS
    elif not c["sa_scaled"] > 0:
        smd_b, smd_bh, reason_b = _NAN, _NAN, R.ZERO_VARIANCE
    else:
        smd_b, bad = scaled_ratio(c["md_scaled"], c["sa_scaled"], c["e_md"] - c["e_a"])
        j = hedges_correction(na - 1)
        smd_bh = smd_b * j
        reason_b = R.NUMERICAL_FAILURE if bad else (R.OK if np.isfinite(j) else R.TOO_FEW_POINTS)
    if df_p < 1:
        smd_p, smd_ph, reason_p = _NAN, _NAN, R.TOO_FEW_POINTS
    elif not c["sp"] > 0:
        smd_p, smd_ph, reason_p = _NAN, _NAN, R.ZERO_VARIANCE
    else:
        smd_p, bad = scaled_ratio(c["md_scaled"], c["sp"], c["e_md"] - c["e_sd"])
        j = hedges_correction(df_p)
        smd_ph = smd_p * j
        reason_p = R.NUMERICAL_FAILURE if bad else (R.OK if np.isfinite(j) else R.TOO_FEW_POINTS)
    reason_b = R.join(reason_b, md_code, R.NUMERICAL_FAILURE if c["bad_sa"] else R.OK)
    reason_p = R.join(reason_p, md_code, R.NUMERICAL_FAILURE if bad_sp else R.OK)
    return StandardizedMeanDifference(md, sa, sp, smd_b, smd_bh, smd_p, smd_ph, direction, assumed,
                                      reason_b, reason_p)


def _contrast_scales(a: np.ndarray, b: np.ndarray, sign: float) -> dict:
    """Means, SDs and the pooled SD of a contrast in exact power-of-two frames.

    e_a, e_b: binary exponents of the phases; md_scaled = sign (mB - mA) / 2**e_md with e_md =
    max(e_a, e_b); sa_scaled = sA / 2**e_a; va, vb = sA^2, sB^2 and sp = pooled SD, all in units
    of 2**e_sd (``sd_frame``); md and sa unscaled (NaN when not representable, flagged bad_*).
    """
    na, nb = a.size, b.size
    ea, ma_s, sa_s = _scaled_moments(a)
    eb, mb_s, sb_s = _scaled_moments(b)
    e_md = max(ea, eb)
    md_s = sign * float(np.ldexp(mb_s, eb - e_md) - np.ldexp(ma_s, ea - e_md))
    md, bad_md = unscale_checked(md_s, e_md)
    sa, bad_sa = unscale_checked(sa_s, ea)
    e_sd = sd_frame(sa_s, ea, sb_s, eb, e_md)
    va = float(np.ldexp(sa_s, ea - e_sd)) ** 2
    vb = float(np.ldexp(sb_s, eb - e_sd)) ** 2
    df_p = na + nb - 2
    sp = _NAN
    if df_p >= 1:
        ss = (na - 1) * (va if na > 1 else 0.0) + (nb - 1) * (vb if nb > 1 else 0.0)
        sp = float(np.sqrt(ss / df_p))
    return {"e_a": ea, "e_md": e_md, "e_sd": e_sd, "md_scaled": md_s, "md": md, "bad_md": bad_md,
            "sa_scaled": sa_s, "sa": sa, "bad_sa": bad_sa, "va": va, "vb": vb, "sp": sp}


# ----------------------------------------------------------------------------------------------
# Mean difference t-tests (independence and AR(1)-adjusted)
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class MeanDifferenceTest:
    """Welch and pooled-variance t-tests of the improvement-signed mean difference."""

    mean_difference: float
    rho_used: float
    n_baseline_effective: float
    n_treatment_effective: float
    welch_se: float
    welch_df: float  # Welch-Satterthwaite
    welch_t: float
    welch_p_value: float
    welch_se_adjusted: float  # sqrt(sA^2/nA_eff + sB^2/nB_eff)
    welch_df_adjusted: float  # Welch-Satterthwaite with nA_eff, nB_eff
    welch_p_value_adjusted: float
    welch_flip: bool | None
    pooled_se: float  # s_pooled sqrt(1/nA + 1/nB)
    pooled_df: float  # nA + nB - 2
    pooled_t: float
    pooled_p_value: float
    pooled_se_adjusted: float  # s_pooled sqrt(1/nA_eff + 1/nB_eff), s_pooled from the data
    pooled_df_adjusted: float  # nA_eff + nB_eff - 2
    pooled_p_value_adjusted: float
    pooled_flip: bool | None
    alpha: float
    desired_direction: str
    direction_assumed: bool
    welch_reason: str
    welch_reason_adjusted: str
    pooled_reason: str
    pooled_reason_adjusted: str


def _welch(md: float, va: float, vb: float, na: float, nb: float, e_md: int = 0, e_v: int = 0,
           ) -> tuple[float, float, float, float, str]:
    """Welch t-test pieces (se, df, t, p, reason); md in units of 2**e_md, va and vb in units of
    2**(2 e_v) (exact scalings; se returned unscaled, NaN with numerical_failure if too large)."""
    if not (na > 1 and nb > 1) or not (np.isfinite(va) and np.isfinite(vb)):
        return _NAN, _NAN, _NAN, _NAN, R.TOO_FEW_POINTS
    qa, qb = va / na, vb / nb
    se2 = qa + qb
    if not se2 > 0:
        return 0.0, _NAN, _NAN, _NAN, R.ZERO_VARIANCE
    df = se2**2 / (qa**2 / (na - 1) + qb**2 / (nb - 1))
    se, bad_se = unscale_checked(np.sqrt(se2), e_v)
    t, bad_t = scaled_ratio(md, np.sqrt(se2), e_md - e_v)
    if bad_t:
        return se, float(df), _NAN, _NAN, R.NUMERICAL_FAILURE
    code = R.NUMERICAL_FAILURE if bad_se else R.OK
    return se, float(df), float(t), float(2 * stats.t.sf(abs(t), df)), code


def _pooled(md: float, sp: float, na: float, nb: float, e_md: int = 0, e_v: int = 0,
            ) -> tuple[float, float, float, float, str]:
    """Pooled-variance t-test pieces (se, df, t, p, reason); md and sp in units of 2**e_md and 2**e_v."""
    df = na + nb - 2
    if not (np.isfinite(sp) and df > 0):
        return _NAN, _NAN, _NAN, _NAN, R.TOO_FEW_POINTS
    if not sp > 0:
        return 0.0, float(df), _NAN, _NAN, R.ZERO_VARIANCE
    se_scaled = sp * np.sqrt(1.0 / na + 1.0 / nb)
    se, bad_se = unscale_checked(se_scaled, e_v)
    t, bad_t = scaled_ratio(md, se_scaled, e_md - e_v)
    if bad_t:
        return se, float(df), _NAN, _NAN, R.NUMERICAL_FAILURE
    code = R.NUMERICAL_FAILURE if bad_se else R.OK
    return se, float(df), float(t), float(2 * stats.t.sf(abs(t), df)), code


def mean_difference_test(
    baseline,
    treatment,
    desired_direction: str | None = None,
    rho: float | None = 0.0,
    alpha: float = 0.05,
) -> MeanDifferenceTest:
    """Welch and pooled t-tests of mB - mA, under independence and with AR(1) effective sizes.

    Adjusted: nA, nB replaced by n_eff = n(1 - rho)/(1 + rho) in the standard error and the
    degrees of freedom; the phase variances themselves are not bias-corrected.
    """
    direction, assumed = resolve_direction(desired_direction)
    a, b, reason = _prepare(baseline, treatment)
    rho_used = bound_rho(rho)
    na, nb = a.size, b.size
    na_e, nb_e = effective_sample_size(na, rho_used), effective_sample_size(nb, rho_used)
    if reason:
        n4 = (_NAN,) * 4
        return MeanDifferenceTest(_NAN, rho_used, na_e, nb_e, *n4, *n4[:3], None, *n4, *n4[:3], None,
                                  alpha, direction, assumed, reason, reason, reason, reason)
    sign = -1.0 if direction == "decrease" else 1.0
    c = _contrast_scales(a, b, sign)
    md, md_s, e_md, e_sd = c["md"], c["md_scaled"], c["e_md"], c["e_sd"]
    va, vb, sp = c["va"], c["vb"], c["sp"]
    w = _welch(md_s, va, vb, float(na), float(nb), e_md, e_sd)
    pl = _pooled(md_s, sp, float(na), float(nb), e_md, e_sd)
    rr = _rho_reason(rho_used)
    if rr:
        wa = (_NAN, _NAN, _NAN, _NAN, rr)
        pa = (_NAN, _NAN, _NAN, _NAN, rr)
    else:
        wa = _welch(md_s, va, vb, na_e, nb_e, e_md, e_sd)
        pa = _pooled(md_s, sp, na_e, nb_e, e_md, e_sd)
    if c["bad_md"]:  # the mean difference itself is not representable
        w, wa, pl, pa = ((*t[:4], R.join(t[4], R.NUMERICAL_FAILURE)) for t in (w, wa, pl, pa))
    return MeanDifferenceTest(
        md, rho_used, na_e, nb_e,
        w[0], w[1], w[2], w[3], wa[0], wa[1], wa[3], _flip(w[3], wa[3], alpha),
        pl[0], pl[1], pl[2], pl[3], pa[0], pa[1], pa[3], _flip(pl[3], pa[3], alpha),
        alpha, direction, assumed, w[4], wa[4], pl[4], pa[4],
    )


# ----------------------------------------------------------------------------------------------
# One contrast
# ----------------------------------------------------------------------------------------------

_SHARED = {
    "desired_direction", "direction_assumed", "alpha", "confidence", "rho_used",
    "n_baseline_effective", "n_treatment_effective", "outcome_scale", "n_baseline", "n_treatment",
    "mean_baseline", "mean_treatment", "sd_baseline", "sd_treatment", "mean_difference",
}


@dataclass(frozen=True)
class ContrastEffectSizes:
    """All effect sizes for one baseline -> treatment contrast."""

    n_baseline: int
    n_treatment: int
    pnd: PND
    nap: NAP
    tau: TauBetweenPhases
    tau_u: TauU
    lrr: LogResponseRatio
    smd: StandardizedMeanDifference
    mean_difference: MeanDifferenceTest

    def as_row(self) -> dict:
        """Flat dict: shared fields once, other fields prefixed by the measure's name."""
        row: dict = {"n_baseline": self.n_baseline, "n_treatment": self.n_treatment}
        for prefix in ("pnd", "nap", "tau", "tau_u", "lrr", "smd", "mean_difference"):
            obj = getattr(self, prefix)
            for f in fields(obj):
                v = getattr(obj, f.name)
                if f.name in _SHARED:
                    row.setdefault(f.name, v)
                    continue
                key = f.name if f.name == prefix or f.name.startswith(prefix + "_") else f"{prefix}_{f.name}"
                row[key] = v
        return row


def contrast_effect_sizes(
    baseline,
    treatment,
    desired_direction: str | None = None,
    outcome_scale: str | None = None,
    rho: float | None = 0.0,
    alpha: float = 0.05,
    confidence: float = 0.95,
) -> ContrastEffectSizes:
    """Every effect size for one contrast; baseline and treatment in session order."""
    a = np.asarray(baseline, dtype=float).ravel()
    b = np.asarray(treatment, dtype=float).ravel()
    return ContrastEffectSizes(
        n_baseline=int(a.size),
        n_treatment=int(b.size),
        pnd=pnd(a, b, desired_direction),
        nap=nap(a, b, desired_direction, confidence),
        tau=tau_between_phases(a, b, desired_direction, rho, alpha),
        tau_u=tau_u(a, b, desired_direction, rho, alpha),
        lrr=log_response_ratio(a, b, outcome_scale, desired_direction, rho, alpha, confidence),
        smd=standardized_mean_difference(a, b, desired_direction),
        mean_difference=mean_difference_test(a, b, desired_direction, rho, alpha),
    )


# ----------------------------------------------------------------------------------------------
# Case level
# ----------------------------------------------------------------------------------------------


def _condition_is(condition: np.ndarray, label: str) -> np.ndarray:
    return np.array([str(c).strip().lower() == label for c in condition])


def _is_alternating(design: object) -> bool:
    return isinstance(design, str) and design.strip().lower().replace("-", "_").startswith("alternating")


def phase_contrasts(phase_index, condition, design: str | None) -> list[dict]:
    """Baseline -> treatment contrasts of a case.

    Each baseline phase immediately followed (next phase index) by a treatment phase forms one
    contrast (A1B1, A2B2 in ABAB). For an "alternating" design all baseline points vs all
    treatment points form one contrast. Returns dicts with label, baseline/treatment phase
    indices and boolean masks.
    """
    phase = np.asarray(phase_index).ravel()
    cond = np.asarray(condition).ravel()
    is_a, is_b = _condition_is(cond, "baseline"), _condition_is(cond, "treatment")
    if _is_alternating(design):
        if is_a.any() and is_b.any():
            return [{"contrast": "A_all_B_all", "baseline_phase": pd.NA, "treatment_phase": pd.NA,
                     "baseline_mask": is_a, "treatment_mask": is_b}]
        return []
    phases = sorted(pd.unique(phase))
    kind = {}
    for p in phases:
        m = phase == p
        kind[p] = "baseline" if is_a[m].all() else ("treatment" if is_b[m].all() else "mixed")
    out = []
    n_a = 0
    for p in phases:
        if kind[p] == "baseline":
            n_a += 1
            nxt = p + 1
            if nxt in kind and kind[nxt] == "treatment":
                out.append({"contrast": f"A{n_a}B{n_a}", "baseline_phase": int(p),
                            "treatment_phase": int(nxt), "baseline_mask": phase == p,
                            "treatment_mask": phase == nxt})
    return out


def phase_mean_residual_lag1(outcome, phase_index, within_groups_only: bool = True) -> tuple[float, str]:
    """Lag-1 autocorrelation of residuals from group (phase) means, in session order.

    r1 = sum_{t, t+1} e_t e_{t+1} / sum_t e_t^2, lag pairs taken within groups only unless
    within_groups_only=False (used with condition groups for alternating designs).
    """
    y = np.asarray(outcome, dtype=float).ravel()
    phase = np.asarray(phase_index).ravel()
    if not np.all(np.isfinite(y)):
        return _NAN, R.NON_FINITE_INPUT
    y = scale_rows(y, scaling_exponents(y))  # r1 is scale-free: exact scaling, no overflow in e'e
    e = y.copy()
    for p in pd.unique(phase):
        m = phase == p
        e[m] = y[m] - y[m].mean()
    same = phase[1:] == phase[:-1] if within_groups_only else np.ones(max(y.size - 1, 0), dtype=bool)
    if not same.any():
        return _NAN, R.TOO_FEW_POINTS
    den = float(e @ e)
    if not den > 0:
        return _NAN, R.ZERO_VARIANCE
    return float(np.sum((e[:-1] * e[1:])[same]) / den), R.OK


def _weighted(values, weights) -> float:
    v, w = np.asarray(values, float), np.asarray(weights, float)
    ok = np.isfinite(v) & np.isfinite(w) & (w > 0)
    return float(np.sum(v[ok] * w[ok]) / np.sum(w[ok])) if ok.any() else _NAN


def case_effect_sizes(
    session,
    outcome,
    phase_index,
    condition,
    design: str | None,
    desired_direction: str | None,
    outcome_scale: str | None,
    rho: float | None = None,
    alpha: float = 0.05,
    confidence: float = 0.95,
) -> tuple[pd.DataFrame, dict]:
    """Effect sizes per contrast (DataFrame) and aggregated over the case's contrasts (dict).

    Aggregation over contrasts: PND pooled over treatment points (weight nB); NAP, Tau and Tau-U
    weighted by nA*nB (Tau and Tau-U = sum S / sum nA nB, Var = sum Var_c, contrasts independent);
    LRR fixed-effect inverse-variance with the independence weights (its adjusted variance is
    sum w^2 Var_adj / (sum w)^2, so the estimate is the same); SMDs and the mean difference simple
    means (mean difference: Var = sum SE_c^2 / K^2, Welch-Satterthwaite df).
    rho: the case's AR(1) estimate; when None, the lag-1 autocorrelation of residuals from phase
    means (phase_mean_residual_lag1; condition means over all lags for alternating designs) is
    used and so recorded in rho_method.
    """
    session = np.asarray(session, dtype=float).ravel()
    y = np.asarray(outcome, dtype=float).ravel()
    phase = np.asarray(phase_index).ravel()
    cond = np.asarray(condition).ravel()
    order = np.argsort(session, kind="stable")
    session, y, phase, cond = session[order], y[order], phase[order], cond[order]
    direction, assumed = resolve_direction(desired_direction)

    if rho is None and _is_alternating(design):
        groups = np.array([str(c).strip().lower() for c in cond])
        rho_input, rho_reason = phase_mean_residual_lag1(y, groups, within_groups_only=False)
        rho_method = "condition_mean_residual_lag1"
    elif rho is None:
        rho_input, rho_reason = phase_mean_residual_lag1(y, phase)
        rho_method = "phase_mean_residual_lag1"
    else:
        rho_input, rho_reason = float(rho), R.OK
        rho_method = "given"
    rho_used = bound_rho(rho_input)

    contrasts = phase_contrasts(phase, cond, design)
    rows: list[dict] = []
    results: list[ContrastEffectSizes] = []
    for c in contrasts:
        res = contrast_effect_sizes(y[c["baseline_mask"]], y[c["treatment_mask"]], desired_direction,
                                    outcome_scale, rho_used, alpha, confidence)
        results.append(res)
        rows.append({"contrast": c["contrast"], "baseline_phase": c["baseline_phase"],
                     "treatment_phase": c["treatment_phase"], **res.as_row()})
    if rows:
        per_contrast = pd.DataFrame(rows)
    else:
        empty = contrast_effect_sizes([], [], desired_direction, outcome_scale, 0.0, alpha, confidence)
        cols = ["contrast", "baseline_phase", "treatment_phase", *empty.as_row().keys()]
        per_contrast = pd.DataFrame({k: pd.Series(dtype=object) for k in cols})
    for col in ("baseline_phase", "treatment_phase"):
        per_contrast[col] = per_contrast[col].astype("Int64")
    for col in [c for c in per_contrast.columns if c.endswith("flip")]:
        per_contrast[col] = per_contrast[col].astype("boolean")

    case: dict = {
        "design": design,
        "n_contrasts": len(results),
        "desired_direction": direction,
        "direction_assumed": assumed,
        "outcome_scale": outcome_scale,
        "rho_input": rho_input,
        "rho_used": rho_used,
        "rho_method": rho_method,
        "rho_reason": rho_reason,
        "alpha": alpha,
        "aggregation": "PND: pooled over treatment points; NAP/Tau/Tau-U: weighted by nA*nB; "
                       "LRR: inverse-variance (fixed effect); SMD and mean difference: simple mean",
    }
    case.update(_aggregate(results, alpha))
    case["reason"] = R.OK if results else R.NO_CONTRAST
    return per_contrast, case


def _aggregate(results: list[ContrastEffectSizes], alpha: float) -> dict:
    out: dict = {}
    if not results:
        keys = ["pnd_percent", "nap", "nap_se_hanley_mcneil", "tau", "tau_p_value", "tau_p_value_adjusted",
                "tau_flip", "tau_u", "tau_u_p_value", "tau_u_p_value_permutation", "tau_u_p_value_adjusted",
                "tau_u_flip", "lrr_improvement", "lrr_se", "lrr_p_value", "lrr_p_value_adjusted", "lrr_flip",
                "smd_baseline_sd", "smd_baseline_sd_hedges", "smd_pooled_sd", "smd_pooled_sd_hedges",
                "mean_difference", "mean_difference_welch_p_value",
                "mean_difference_welch_p_value_adjusted", "mean_difference_welch_flip"]
        out.update({k: (None if k.endswith("flip") else _NAN) for k in keys})
        return out

    nb = np.array([r.n_treatment for r in results], float)
    w_pairs = np.array([r.n_baseline * r.n_treatment for r in results], float)

    # PND pooled over treatment points
    ok = np.array([np.isfinite(r.pnd.pnd_percent) for r in results])
    beyond = np.array([r.pnd.n_treatment_beyond for r in results], float)
    out["pnd_percent"] = float(100.0 * beyond[ok].sum() / nb[ok].sum()) if ok.any() else _NAN
    out["pnd_reason"] = R.OK if ok.any() else R.join(*[r.pnd.reason for r in results])

    # NAP weighted by nA nB, SE by propagation of the Hanley-McNeil SEs
    navals = np.array([r.nap.nap for r in results])
    ok = np.isfinite(navals)
    out["nap"] = _weighted(navals, w_pairs)
    se = np.array([r.nap.nap_se_hanley_mcneil for r in results])
    out["nap_se_hanley_mcneil"] = (
        float(np.sqrt(np.sum((w_pairs[ok] * se[ok]) ** 2)) / w_pairs[ok].sum()) if ok.any() else _NAN
    )
    out["nap_reason"] = R.OK if ok.any() else R.join(*[r.nap.reason for r in results])

    # Tau and Tau-U: sums of S and of variances
    def s_test(s, v, continuity: bool) -> float:
        if not (np.isfinite(v) and v > 0 and np.isfinite(s)):
            return _NAN
        if continuity:
            return _p_cc(s, v)
        return _two_sided_normal_p(abs(s) / np.sqrt(v))

    for name, attr, cc in (("tau", "tau", True), ("tau_u", "tau_u", False)):
        objs = [getattr(r, attr) for r in results]
        s_field = "s" if name == "tau" else "s_tau_u"
        s = np.array([getattr(o, s_field) for o in objs], float)
        ok = np.isfinite(s)
        out[name] = float(s[ok].sum() / w_pairs[ok].sum()) if ok.any() else _NAN
        v = np.array([o.var_s for o in objs], float)
        va = np.array([o.var_s_adjusted for o in objs], float)
        p = s_test(s[ok].sum(), v[ok].sum(), cc) if ok.any() else _NAN
        pa = s_test(s[ok].sum(), va[ok].sum(), cc) if ok.any() else _NAN
        out[f"{name}_p_value"] = p
        if name == "tau_u":
            vp = np.array([o.var_s_permutation for o in objs], float)
            out["tau_u_p_value_permutation"] = s_test(s[ok].sum(), vp[ok].sum(), False) if ok.any() else _NAN
        out[f"{name}_p_value_adjusted"] = pa
        out[f"{name}_flip"] = _flip(p, pa, alpha)
        out[f"{name}_reason"] = R.OK if np.isfinite(p) else R.join(*[o.reason for o in objs])

    # LRR: inverse-variance with independence weights
    est = np.array([r.lrr.lrr_improvement for r in results], float)
    var = np.array([r.lrr.lrr_variance for r in results], float)
    var_adj = np.array([r.lrr.lrr_variance_adjusted for r in results], float)
    ok = np.isfinite(est) & np.isfinite(var) & (var > 0)
    if ok.any():
        w = 1.0 / var[ok]
        lrr = float(np.sum(w * est[ok]) / w.sum())
        se = float(1.0 / np.sqrt(w.sum()))
        p = _two_sided_normal_p(abs(lrr) / se)
        v_adj = float(np.sum(w**2 * var_adj[ok]) / w.sum() ** 2)
        pa = _two_sided_normal_p(abs(lrr) / np.sqrt(v_adj)) if np.isfinite(v_adj) and v_adj > 0 else _NAN
        out.update(lrr_improvement=lrr, lrr_se=se, lrr_p_value=p, lrr_p_value_adjusted=pa,
                   lrr_flip=_flip(p, pa, alpha), lrr_reason=R.OK)
    else:
        out.update(lrr_improvement=_NAN, lrr_se=_NAN, lrr_p_value=_NAN, lrr_p_value_adjusted=_NAN,
                   lrr_flip=None, lrr_reason=R.join(*[r.lrr.reason for r in results]))

    # SMD: simple means over contrasts where defined (means via an exact power-of-two scaling)
    smd_overflow = False
    for key in ("smd_baseline_sd", "smd_baseline_sd_hedges", "smd_pooled_sd", "smd_pooled_sd_hedges"):
        v = np.array([getattr(r.smd, key) for r in results], float)
        out[key], bad = _scaled_mean(v[np.isfinite(v)]) if np.isfinite(v).any() else (_NAN, False)
        smd_overflow |= bad
    out["smd_reason"] = R.join(*[r.smd.reason_baseline_sd for r in results],
                               R.NUMERICAL_FAILURE if smd_overflow else R.OK)

    # mean difference: simple mean, Welch-Satterthwaite over contrasts
    md = np.array([r.mean_difference.mean_difference for r in results], float)
    out["mean_difference"], md_overflow = (_scaled_mean(md[np.isfinite(md)]) if np.isfinite(md).any()
                                           else (_NAN, False))

    def combined_welch(se_field: str, df_field: str) -> tuple[float, bool]:
        """(p, not representable); standard errors scaled by 2**-g (g: scaling exponent of the
        largest), exact, so their squares and fourth powers neither overflow nor underflow."""
        se_c = np.array([getattr(r.mean_difference, se_field) for r in results], float)
        df_c = np.array([getattr(r.mean_difference, df_field) for r in results], float)
        okc = np.isfinite(md) & np.isfinite(se_c) & np.isfinite(df_c) & (se_c > 0)
        if not okc.any():
            return _NAN, False
        k = okc.sum()
        d, bad_d = _scaled_mean(md[okc])
        g = scaling_exponents(se_c[okc])
        var_c = scale_rows(se_c[okc], g) ** 2
        se_tot = np.sqrt(var_c.sum()) / k
        df_tot = var_c.sum() ** 2 / np.sum(var_c**2 / df_c[okc])
        t, bad_t = scaled_ratio(abs(d), se_tot, -g)
        if not np.isfinite(t):
            return _NAN, bool(bad_d or bad_t)
        return float(2 * stats.t.sf(t, df_tot)), False

    p, bad_p = combined_welch("welch_se", "welch_df")
    pa, bad_pa = combined_welch("welch_se_adjusted", "welch_df_adjusted")
    out["mean_difference_welch_p_value"] = p
    out["mean_difference_welch_p_value_adjusted"] = pa
    out["mean_difference_welch_flip"] = _flip(p, pa, alpha)
    overflow = R.NUMERICAL_FAILURE if md_overflow else R.OK
    out["mean_difference_reason"] = R.join(overflow) if np.isfinite(p) else R.join(
        *[r.mean_difference.welch_reason for r in results], R.NUMERICAL_FAILURE if bad_p else R.OK, overflow)
    out["mean_difference_reason_adjusted"] = R.join(overflow) if np.isfinite(pa) else R.join(
        *[r.mean_difference.welch_reason_adjusted for r in results], R.NUMERICAL_FAILURE if bad_pa else R.OK,
        overflow)
    return out
