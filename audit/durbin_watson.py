"""Durbin-Watson test with exact p-values, bounds, exact critical values and exact power.

d = sum_{t>=2} (e_t - e_{t-1})^2 / sum_t e_t^2 = e'Ae / e'e on the OLS residuals e = M y,
M = I - X(X'X)^-1 X', A the n x n first-difference matrix (tridiagonal: 1, 2, ..., 2, 1 on the
diagonal, -1 beside it).  Under independent normal errors, with N an orthonormal basis of the
complement of col(X) and mu_1..mu_{n-k} the eigenvalues of N'AN (the nonzero eigenvalues of
MAM), d has the distribution of sum mu_j w_j^2 / sum w_j^2, w iid N(0, 1), so

    P(d <= c) = P(sum (mu_j - c) w_j^2 < 0),

computed by Imhof's (1961) method (``audit.quadform``; absolute error below 4e-10).

Bounds (Durbin & Watson 1950, 1951): with nu_j = 2(1 - cos(pi j / n)), j = 1..n-1, the
eigenvalues of A other than 0, and k = k' + 1 columns including the intercept,
d_L ~ sum_{i=1}^{n-k} nu_i z_i^2 / sum z_i^2 and d_U ~ sum_{i=1}^{n-k} nu_{i+k-1} z_i^2 / sum z_i^2;
d_lower and d_upper are their lower-tail alpha quantiles (the tabulated bounds, e.g. Savin &
White 1977).  Without an intercept in col(X) (Farebrother 1980), the same interlacing argument
with nu_0 = 0 gives d_L over nu_0..nu_{n-k-1} and d_U over nu_k..nu_{n-1}.

Power against AR(1) errors (sign convention): for rho > 0 the test is the lower-tail test
"reject when d < c" with P0(d < c) = alpha; for rho < 0 it is the upper-tail test "reject when
d > c'" with P0(d > c') = alpha; power is the rejection probability when the errors are
stationary AR(1) with correlation matrix S_ij = rho^|i-j|:
P_rho(d < c) = P(z' S^1/2 M (A - cI) M S^1/2 z < 0).  rho = 0 returns alpha.

Degenerate input (non-finite values, singular design, n - k < 2, zero residual variance)
gives NaN plus a reason code from ``audit.reasons``; only shape mismatches between the
arguments (programming errors) raise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import optimize

from audit import reasons as R
from audit.quadform import prob_quadform_below_zero, ratio_quantile
from audit.regression import binary_exponents, scale_rows

__all__ = [
    "DurbinWatsonResult",
    "METHOD",
    "dw_statistic",
    "dw_null_eigenvalues",
    "dw_test",
    "critical_bounds",
    "dw_exact_critical_values",
    "dw_power",
    "dw_pvalues_batch",
    "dw_power_grid",
    "ZONES",
]

METHOD = "Durbin-Watson, exact (Imhof 1961)"
ZONES = ("positive", "inconclusive_positive", "none", "inconclusive_negative", "negative")

# Smallest / largest singular value of X below this counts as a singular design.
_RANK_RTOL = 1e-10
# ||N'1|| below this (1 = unit vector of ones) means the intercept lies in col(X).
_INTERCEPT_ATOL = 1e-8
# Residual RMS below this fraction of `scale` counts as zero residual variance.
_ZERO_RESID_RTOL = 1e-10
# Eigenvalues below this fraction of the largest are rounding noise of exact zeros.
_EIG_ZERO_RTOL = 1e-12


@dataclass(frozen=True)
class DurbinWatsonResult:
    """Durbin-Watson test of lag-1 autocorrelation of regression residuals (exact, Imhof)."""

    statistic: float
    p_positive: float  # P(d <= d_obs | H0): small for positive autocorrelation
    p_negative: float  # P(d >= d_obs | H0): small for negative autocorrelation
    n_obs: int
    n_regressors: int  # k', columns excluding the intercept
    alpha: float
    d_lower: float  # bound d_L for (n, k', alpha)
    d_upper: float  # bound d_U for (n, k', alpha)
    zone: str  # one of ZONES, "" when not computed
    critical_lower_exact: float  # c with P0(d < c) = alpha for this design
    critical_upper_exact: float  # c' with P0(d > c') = alpha for this design
    method: str = METHOD
    reason: str = R.OK


# ----------------------------------------------------------------------------- helpers


def _as_design(design) -> np.ndarray:
    x = np.asarray(design, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise ValueError(f"design must be a 2-D array (n x k), got shape {x.shape}")
    return x


def _design_basis(x: np.ndarray) -> tuple[np.ndarray | None, bool, str]:
    """Orthonormal basis N (n x (n-k)) of the complement of col(X), intercept flag, reason."""
    n, k = x.shape
    if not np.all(np.isfinite(x)):
        return None, False, R.NON_FINITE_INPUT
    if n - k < 1:
        return None, False, R.NO_RESIDUAL_DF
    if k == 0:
        return np.eye(n), False, R.OK
    u, s, _ = np.linalg.svd(x, full_matrices=True)
    if s[0] == 0 or s[-1] <= _RANK_RTOL * s[0]:
        return None, False, R.SINGULAR_DESIGN
    basis = u[:, k:]
    ones = np.full(n, 1.0 / math.sqrt(n))
    has_intercept = bool(np.linalg.norm(basis.T @ ones) <= _INTERCEPT_ATOL)
    return basis, has_intercept, R.OK


def _null_eigs_from_basis(basis: np.ndarray) -> np.ndarray:
    """Eigenvalues (ascending) of N'AN = (DN)'(DN), D the (n-1) x n difference operator."""
    dn = np.diff(basis, axis=0)
    return np.clip(np.linalg.eigvalsh(dn.T @ dn), 0.0, 4.0)


def _ar1_corr(n: int, rho: np.ndarray) -> np.ndarray:
    """Stack of AR(1) correlation matrices rho^|i-j| for each rho, shape (r, n, n)."""
    lag = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    return np.power(rho[:, None, None], lag[None, :, :])


def _zone(d: float, d_lower: float, d_upper: float) -> str:
    if not (np.isfinite(d) and np.isfinite(d_lower) and np.isfinite(d_upper)):
        return ""
    if d < d_lower:
        return "positive"
    if d <= d_upper:
        return "inconclusive_positive"
    if 4.0 - d < d_lower:
        return "negative"
    if 4.0 - d <= d_upper:
        return "inconclusive_negative"
    return "none"


def _nan_result(n_obs: int, n_regressors: int, alpha: float, reason: str,
                statistic: float = math.nan) -> DurbinWatsonResult:
    nan = math.nan
    return DurbinWatsonResult(statistic, nan, nan, n_obs, n_regressors, alpha, nan, nan, "",
                              nan, nan, METHOD, reason)


# ----------------------------------------------------------------------------- public API


def dw_statistic(residuals) -> float:
    """Durbin-Watson d = sum (e_t - e_{t-1})^2 / sum e_t^2 (NaN if undefined)."""
    e = np.asarray(residuals, dtype=float).ravel()
    if e.size < 2 or not np.all(np.isfinite(e)):
        return math.nan
    e = scale_rows(e, binary_exponents(e))  # exact; d is scale-free (no overflow near 1e300)
    ss = float(e @ e)
    if ss == 0.0:
        return math.nan
    de = np.diff(e)
    return float(de @ de) / ss


def dw_null_eigenvalues(design) -> np.ndarray:
    """The n-k nonzero eigenvalues (ascending) of MAM for design X (n x k).

    Computed as eigvalsh(N'AN), N an orthonormal basis of the complement of col(X) (full
    SVD of X).  Returns an empty array for a degenerate design (non-finite, singular, n <= k).
    """
    basis, _, reason = _design_basis(_as_design(design))
    if reason:
        return np.empty(0)
    return _null_eigs_from_basis(basis)


@lru_cache(maxsize=4096)
def _critical_bounds_cached(n: int, kprime: int, alpha: float,
                           intercept: bool) -> tuple[float, float]:
    k = kprime + 1 if intercept else kprime
    if n - k < 2 or kprime < 0 or not (0.0 < alpha < 1.0):
        return (math.nan, math.nan)
    j = np.arange(1, n)
    nu = 2.0 * (1.0 - np.cos(np.pi * j / n))
    if intercept:
        lower_set, upper_set = nu[: n - k], nu[k - 1:]
    else:
        full = np.concatenate([[0.0], nu])
        lower_set, upper_set = full[: n - k], full[k:]
    q = ratio_quantile(np.vstack([lower_set, upper_set]), alpha)
    return (float(q[0]), float(q[1]))


def critical_bounds(n_obs: int, n_regressors: int, alpha: float = 0.05, *,
                    intercept: bool = True) -> tuple[float, float]:
    """Durbin-Watson bounds (d_L, d_U) at level alpha for n observations, k' regressors.

    n_regressors excludes the intercept (k').  Lower-tail alpha quantiles of the bounding
    distributions (module notes), by root finding on the Imhof CDF; cached.  NaN when
    n - k < 2.  intercept=False gives the no-intercept bounds (k = k' columns).
    """
    return _critical_bounds_cached(int(n_obs), int(n_regressors), float(alpha), bool(intercept))


def dw_exact_critical_values(design=None, alpha: float = 0.05, *, null_eigenvalues=None):
    """Exact critical values (c, c') with P0(d < c) = alpha and P0(d > c') = alpha.

    Give the design, or null_eigenvalues as (p,) or (m, p) NaN-padded rows (then arrays of
    length m are returned).  NaN for degenerate designs.
    """
    mu = _resolve_eigs(design, null_eigenvalues)
    one_row = mu.ndim == 1
    rows = np.atleast_2d(mu)
    m = rows.shape[0]
    if rows.shape[1] == 0:
        lo = hi = np.full(m, np.nan)
    else:
        q = ratio_quantile(np.vstack([rows, rows]),
                           np.concatenate([np.full(m, float(alpha)), np.full(m, 1.0 - alpha)]))
        lo, hi = q[:m], q[m:]
    return (float(lo[0]), float(hi[0])) if one_row else (lo, hi.copy())


def dw_test(residuals, design, alpha: float = 0.05, *, exact_critical_values: bool = True,
            scale: float | None = None) -> DurbinWatsonResult:
    """Durbin-Watson test of the OLS residuals of design X with exact p-values (Imhof 1961).

    residuals: the OLS residuals of y on X (length n).  design: X (n x k), full column rank,
    normally with an intercept column.  p_positive = P(d <= d_obs | H0), p_negative =
    P(d >= d_obs | H0) = 1 - p_positive; zone from the bounds d_L, d_U for (n, k', alpha)
    (d < d_L positive, d_L <= d <= d_U inconclusive_positive, the same with 4 - d on the
    negative side, otherwise none).  scale: typical size of the response (e.g. max|y|); if
    given, residuals with RMS <= 1e-10 * scale count as zero variance (otherwise only exact
    zeros do).  exact_critical_values=False skips the two root searches (NaN fields).
    """
    e = np.asarray(residuals, dtype=float).ravel()
    x = _as_design(design)
    n, k = x.shape
    if e.size != n:
        raise ValueError(f"residuals have length {e.size} but the design has {n} rows")
    alpha = float(alpha)
    if not np.all(np.isfinite(e)) or not np.all(np.isfinite(x)):
        return _nan_result(n, max(k - 1, 0), alpha, R.NON_FINITE_INPUT)
    basis, has_intercept, reason = _design_basis(x)
    kprime = k - 1 if has_intercept else k
    if reason:
        return _nan_result(n, max(k - 1, 0), alpha, reason)
    if n - k < 2:
        return _nan_result(n, kprime, alpha, R.NO_RESIDUAL_DF, dw_statistic(e))
    ex = binary_exponents(e)
    e = scale_rows(e, ex)  # exact; d is scale-free
    if scale is not None:
        with np.errstate(over="ignore"):
            scale = float(np.ldexp(abs(float(scale)), -ex))
    ss = float(e @ e)
    if ss == 0.0 or (scale is not None and math.sqrt(ss / n) <= _ZERO_RESID_RTOL * scale):
        return _nan_result(n, kprime, alpha, R.ZERO_RESIDUAL_VARIANCE)
    d = dw_statistic(e)
    mu = _null_eigs_from_basis(basis)
    p_pos = prob_quadform_below_zero(mu - d)
    d_lower, d_upper = critical_bounds(n, kprime, alpha, intercept=has_intercept)
    c_low = c_high = math.nan
    if exact_critical_values and 0.0 < alpha < 1.0:
        q = ratio_quantile(np.vstack([mu, mu]), np.array([alpha, 1.0 - alpha]))
        c_low, c_high = float(q[0]), float(q[1])
    reason = R.OK if np.isfinite(p_pos) else R.NUMERICAL_FAILURE
    return DurbinWatsonResult(
        statistic=d, p_positive=p_pos, p_negative=1.0 - p_pos, n_obs=n, n_regressors=kprime,
        alpha=alpha, d_lower=d_lower, d_upper=d_upper, zone=_zone(d, d_lower, d_upper),
        critical_lower_exact=c_low, critical_upper_exact=c_high, method=METHOD, reason=reason,
    )


def _resolve_eigs(design, null_eigenvalues) -> np.ndarray:
    if (design is None) == (null_eigenvalues is None):
        raise ValueError("give exactly one of design and null_eigenvalues")
    if design is not None:
        return dw_null_eigenvalues(design)
    mu = np.asarray(null_eigenvalues, dtype=float)
    if mu.ndim not in (1, 2):
        raise ValueError(f"null_eigenvalues must be (p,) or (m, p), got shape {mu.shape}")
    return mu


def dw_pvalues_batch(statistics, design=None, *,
                     null_eigenvalues=None) -> tuple[np.ndarray, np.ndarray]:
    """Exact p-values (p_positive, p_negative) for many Durbin-Watson statistics at once.

    statistics: (m,).  Give either the design shared by all cases, or null_eigenvalues as
    (p,) shared or (m, p) one row per case, NaN-padded (see ``dw_null_eigenvalues``).
    p_positive = P(d <= d_obs | H0) by Imhof (1961), p_negative = 1 - p_positive; NaN where
    the statistic is NaN or the design is degenerate.
    """
    d = np.asarray(statistics, dtype=float).ravel()
    mu = _resolve_eigs(design, null_eigenvalues)
    m = d.size
    if mu.ndim == 2 and mu.shape[0] != m:
        raise ValueError(f"null_eigenvalues has {mu.shape[0]} rows for {m} statistics")
    if mu.size == 0 or m == 0:
        nan = np.full(m, np.nan)
        return nan, nan.copy()
    mu2 = np.broadcast_to(mu, (m, mu.shape[-1]))
    lam = mu2 - d[:, None]
    lam = np.where(np.isnan(mu2), 0.0, lam)
    p_pos = prob_quadform_below_zero(lam)  # rows with NaN d stay NaN (non-finite row)
    return p_pos, 1.0 - p_pos


def dw_power(design, rho: float, alpha: float = 0.05) -> float:
    """Exact power of the exact one-sided Durbin-Watson test against AR(1) errors.

    Per-case reference path in n dimensions: c by Brent's method on the Imhof CDF, then the
    eigenvalues of S^1/2 M (A - cI) M S^1/2 (S = rho^|i-j|, S^1/2 by eigh).  rho > 0: P(d < c)
    with P0(d < c) = alpha; rho < 0: P(d > c') with P0(d > c') = alpha; rho = 0: alpha.
    NaN for |rho| >= 1 or a degenerate design.
    """
    x = _as_design(design)
    n, k = x.shape
    rho = float(rho)
    alpha = float(alpha)
    basis, _, reason = _design_basis(x)
    if reason or n - k < 2 or not np.isfinite(rho) or abs(rho) >= 1 or not (0 < alpha < 1):
        return math.nan
    if rho == 0.0:
        return alpha
    mu = _null_eigs_from_basis(basis)
    target = alpha if rho > 0 else 1.0 - alpha

    def excess(c: float) -> float:
        return prob_quadform_below_zero(mu - c) - target

    c = optimize.brentq(excess, mu[0], mu[-1], xtol=1e-14, rtol=4 * np.finfo(float).eps,
                        maxiter=200)
    a = np.diag(np.r_[1.0, np.full(n - 2, 2.0), 1.0]) - np.eye(n, k=1) - np.eye(n, k=-1)
    m_proj = basis @ basis.T
    w, v = np.linalg.eigh(_ar1_corr(n, np.array([rho]))[0])
    s_half = (v * np.sqrt(np.clip(w, 0.0, None))) @ v.T
    form = s_half @ m_proj @ (a - c * np.eye(n)) @ m_proj @ s_half
    lam = np.linalg.eigvalsh(0.5 * (form + form.T))
    lam[np.abs(lam) < _EIG_ZERO_RTOL * np.abs(lam).max()] = 0.0
    return prob_quadform_below_zero(lam if rho > 0 else -lam)


def dw_power_grid(design, rhos, alpha: float = 0.05) -> np.ndarray:
    """Exact power of the exact Durbin-Watson test for a grid of AR(1) coefficients (batch).

    Same definition as ``dw_power``, computed in the (n-k)-dimensional residual space: with
    B = N'AN and G = N'SN = LL' (Cholesky), the form's nonzero eigenvalues are those of
    L'(B - cI)L (stacked over rhos); all rhos go to the Imhof routine in one call.
    Critical values by ``ratio_quantile``.  Returns an array shaped like rhos (NaN where
    |rho| >= 1 or the design is degenerate).
    """
    x = _as_design(design)
    n, k = x.shape
    r = np.asarray(rhos, dtype=float)
    shape = r.shape
    r = r.ravel()
    out = np.full(r.size, np.nan)
    basis, _, reason = _design_basis(x)
    alpha = float(alpha)
    if reason or n - k < 2 or not (0 < alpha < 1):
        return out.reshape(shape)
    out[r == 0.0] = alpha
    use = np.flatnonzero(np.isfinite(r) & (np.abs(r) < 1) & (r != 0.0))
    if use.size:
        dn = np.diff(basis, axis=0)
        b = dn.T @ dn
        mu = np.clip(np.linalg.eigvalsh(b), 0.0, 4.0)
        c_low, c_high = ratio_quantile(np.vstack([mu, mu]), np.array([alpha, 1.0 - alpha]))
        rr = r[use]
        p = b.shape[0]
        s_n = (_ar1_corr(n, rr).reshape(-1, n) @ basis).reshape(rr.size, n, p)
        g = basis.T @ s_n  # N'SN, (u, p, p), positive definite for |rho| < 1
        g = 0.5 * (g + np.swapaxes(g, 1, 2))
        try:
            root = np.linalg.cholesky(g)  # G = LL'; L'CL has the eigenvalues of C G
        except np.linalg.LinAlgError:  # |rho| extremely close to 1: symmetric root instead
            gw, gv = np.linalg.eigh(g)
            root = (gv * np.sqrt(np.clip(gw, 0.0, None))[:, None, :]) @ np.swapaxes(gv, 1, 2)
        c = np.where(rr > 0, c_low, c_high)
        sign = np.where(rr > 0, 1.0, -1.0)
        cmat = sign[:, None, None] * (b[None, :, :] - c[:, None, None] * np.eye(p)[None])
        form = np.swapaxes(root, 1, 2) @ cmat @ root
        lam = np.linalg.eigvalsh(0.5 * (form + np.swapaxes(form, 1, 2)))
        out[use] = prob_quadform_below_zero(lam)
    return out.reshape(shape)


# ----------------------------------------------------------------------------- batch helpers


def dw_statistic_rows(E: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """DW statistic per row; NaN where the residuals are zero relative to the data (exact fit, constant)."""
    num = np.sum(np.diff(E, axis=1) ** 2, axis=1)
    den = np.sum(E**2, axis=1)
    scale = np.max(np.abs(Y), axis=1) ** 2 * E.shape[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        d = num / den
    d[~(den > 1e-20 * scale)] = np.nan
    return d


def dw_zones(d: np.ndarray, d_lower: float, d_upper: float) -> np.ndarray:
    """DW zone from the bounds, vectorised; same rule and precedence as ``dw_test``.

    d < dL positive; dL <= d <= dU inconclusive_positive; then the same with 4 - d on the
    negative side; otherwise none (the positive side wins when both apply, as for small n).
    """
    out = np.full(d.shape, "none", dtype=object)
    if not (np.isfinite(d_lower) and np.isfinite(d_upper)):
        out[:] = "unknown"
        return out
    dn = 4.0 - d
    out[dn <= d_upper] = "inconclusive_negative"
    out[dn < d_lower] = "negative"
    out[d <= d_upper] = "inconclusive_positive"
    out[d < d_lower] = "positive"
    out[~np.isfinite(d)] = "unknown"
    return out
