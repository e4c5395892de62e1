"""Case regression and tests of the case effect c'beta under three error assumptions.

Methods (the ``method`` label of every result):
  "ols"     independent errors: Var(c'b) = s2 c'(X'X)^-1 c, s2 = RSS/(n-k), t with n-k df.
  "gls_ar1" AR(1) errors with a given rho, Prais-Winsten form (full transform, the first
            observation kept and scaled by sqrt(1-rho^2)); s2 from the transformed
            residuals with n-k df; t with n-k df.  Same estimate and standard error as GLS
            with Sigma = R(rho).
  "hac"     OLS estimate with the Newey-West (1987) HAC covariance, Bartlett weights
            1 - l/(L+1), default L = floor(4 (n/100)^(2/9)) (Newey & West 1994 rule of
            thumb, common practice); small-sample options: covariance scaled by n/(n-k)
            and a t reference with n-k df.
All p-values are two-sided.  Degenerate input gives NaN plus a reason code from
``audit.reasons``; only shape mismatches between arguments (programming errors) raise.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy import stats

from audit import reasons as R

__all__ = [
    "OLSFit",
    "ContrastTest",
    "ols_fit",
    "ols_contrast_test",
    "gls_contrast_test",
    "hac_contrast_test",
    "contrast_test",
    "ols_contrast_batch",
    "gls_contrast_batch",
    "hac_contrast_batch",
    "contrast_batch",
    "prais_winsten_transform",
    "newey_west_default_lags",
    "design_reason",
    "series_reasons",
    "binary_exponents",
    "scale_rows",
    "unscale",
]

# Residual norm below this fraction of the data norm counts as an exact fit.
_ZERO_FIT_RTOL = 1e-10
# Range below this fraction of the largest |value| counts as a constant series.
_CONSTANT_RTOL = 1e-12


@dataclass(frozen=True, eq=False)
class OLSFit:
    """Ordinary least squares fit of y on X (coefficients, standard errors, residuals)."""

    coef: np.ndarray
    std_error: np.ndarray
    residuals: np.ndarray
    sigma2: float
    df_resid: int
    rank: int
    reason: str = R.OK


@dataclass(frozen=True)
class ContrastTest:
    """Test of the case effect c'beta (two-sided t test)."""

    estimate: float
    std_error: float
    statistic: float
    df: float
    p_value: float
    significant: bool | None
    method: str
    rho: float = float("nan")
    reason: str = R.OK
    lags: int | None = None


# ----------------------------------------------------------------------------- helpers


def _as_design(X) -> np.ndarray:
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2:
        raise ValueError(f"X must be 2-D (n x k), got shape {X.shape}")
    return X


def _as_batch(Y, n: int) -> np.ndarray:
    Y = np.asarray(Y, dtype=float)
    if Y.ndim == 1:
        Y = Y[None, :]
    if Y.ndim != 2 or Y.shape[1] != n:
        raise ValueError(f"Y must have shape (m, {n}) to match X, got {Y.shape}")
    return Y


def _as_contrast(c, k: int) -> np.ndarray:
    c = np.asarray(c, dtype=float).ravel()
    if c.shape != (k,):
        raise ValueError(f"contrast c must have length k={k}, got {c.shape}")
    return c


def binary_exponents(Y) -> np.ndarray | int:
    """Binary exponent e of the largest finite |value| of each row (of a 1-D series: an int).

    Dividing a row by 2**e (``scale_rows``) is exact and brings its largest magnitude into
    [0.5, 1), so sums of squares neither overflow nor underflow for values near the float limits
    (1e300, 1e-300).  Rows without a nonzero finite value get 0.
    """
    Y = np.asarray(Y, dtype=float)
    A = np.abs(np.where(np.isfinite(Y), Y, 0.0))
    top = A.max(axis=-1) if A.shape[-1] else np.zeros(A.shape[:-1])
    e = np.frexp(top)[1].astype(np.int64)
    return int(e) if e.ndim == 0 else e


def scale_rows(Y, e) -> np.ndarray:
    """Y * 2**-e row by row (exact; e from ``binary_exponents``)."""
    Y = np.asarray(Y, dtype=float)
    e = np.asarray(e)
    return np.ldexp(Y, -(e[..., None] if e.ndim else e))


def unscale(values, e) -> np.ndarray:
    """values * 2**e (undoes ``scale_rows`` for quantities linear in the data); inf on overflow."""
    with np.errstate(over="ignore"):
        return np.ldexp(np.asarray(values, dtype=float), np.asarray(e))


def unscale_effect_columns(out: dict, ex) -> np.ndarray:
    """The ``effect_*_estimate`` / ``effect_*_std_error`` arrays of ``out`` back in the data's units
    (``unscale``), in place.  A value beyond the float range becomes NaN and numerical_failure is
    joined to its ``effect_*_reason`` (when ``out`` has one).  Returns the rows that overflowed."""
    ex = np.asarray(ex)
    overflow = np.zeros(ex.shape, dtype=bool)
    for col in [c for c in out if c.startswith("effect_") and c.endswith(("_estimate", "_std_error"))]:
        values = unscale(out[col], ex)
        bad = np.isfinite(out[col]) & ~np.isfinite(values)
        out[col] = np.where(bad, np.nan, values)
        overflow |= bad
        reason_col = col.rsplit("_estimate", 1)[0].rsplit("_std_error", 1)[0] + "_reason"
        if bad.any() and reason_col in out:
            out[reason_col] = np.array([R.join(r, R.NUMERICAL_FAILURE) if b else r
                                        for r, b in zip(out[reason_col], bad)], dtype=object)
    return overflow


def design_reason(X: np.ndarray) -> str:
    """Reason code for a design that cannot be used (NaN, n <= k, rank < k), else ''."""
    X = _as_design(X)
    n, k = X.shape
    if not np.all(np.isfinite(X)):
        return R.NON_FINITE_INPUT
    if n <= k:
        return R.NO_RESIDUAL_DF
    if np.linalg.matrix_rank(X) < k:
        return R.SINGULAR_DESIGN
    return R.OK


def series_reasons(Y: np.ndarray, E: np.ndarray | None = None) -> np.ndarray:
    """Per-row reason codes for a batch of series: NaN, constant, exact fit (residuals E).

    Rows with non-finite values must already have finite placeholders in E.  Both are scaled
    by the same power of two per row first (exact), so extreme magnitudes cannot overflow.
    """
    Y = np.asarray(Y, dtype=float)
    out = np.full(Y.shape[0], R.OK, dtype=object)
    finite = np.all(np.isfinite(Y), axis=1)
    ex = binary_exponents(Y)
    Yf = scale_rows(np.where(np.isfinite(Y), Y, 0.0), ex)
    scale = np.max(np.abs(Yf), axis=1)
    constant = np.ptp(Yf, axis=1) <= _CONSTANT_RTOL * scale
    if E is not None:
        Es = scale_rows(E, ex)
        with np.errstate(over="ignore", invalid="ignore"):
            rss = np.sum(Es**2, axis=1)
        exact = rss <= (_ZERO_FIT_RTOL**2) * np.sum(Yf**2, axis=1)
        out[exact] = R.ZERO_RESIDUAL_VARIANCE
    out[constant] = R.CONSTANT_SERIES
    out[~finite] = R.NON_FINITE_INPUT
    return out


def newey_west_default_lags(n: int) -> int:
    """floor(4 (n/100)^(2/9)) (Newey & West 1994 rule of thumb; common practice)."""
    return int(np.floor(4.0 * (n / 100.0) ** (2.0 / 9.0)))


def prais_winsten_transform(A: np.ndarray, rho) -> np.ndarray:
    """Prais-Winsten transform along the time axis (axis -1 for 1-D/2-D series, axis 0 for X).

    (P a)_1 = sqrt(1 - rho^2) a_1,  (P a)_t = a_t - rho a_{t-1}, t >= 2;  P'P = (1 - rho^2) R^-1.
    ``A`` of shape (n,) or (n, k) with scalar rho; or (m, n) with rho of shape (m,).
    """
    A = np.asarray(A, dtype=float)
    rho = np.asarray(rho, dtype=float)
    if A.ndim == 2 and rho.ndim == 1:  # batch of series (m, n), one rho each
        out = np.empty_like(A)
        out[:, 0] = np.sqrt(1.0 - rho**2) * A[:, 0]
        out[:, 1:] = A[:, 1:] - rho[:, None] * A[:, :-1]
        return out
    out = np.empty_like(A)
    out[0] = np.sqrt(1.0 - rho**2) * A[0]
    out[1:] = A[1:] - rho * A[:-1]
    return out


def _two_sided_t(stat: np.ndarray, df: float) -> np.ndarray:
    return 2.0 * stats.t.sf(np.abs(stat), df)


def _significance(p: np.ndarray, alpha: float) -> pd.Series:
    sig = pd.array(np.asarray(p) < alpha, dtype="boolean")
    sig[np.isnan(np.asarray(p, dtype=float))] = pd.NA
    return sig


def _nan_test(method: str, reason: str, df=np.nan, rho=np.nan, lags=None) -> ContrastTest:
    nan = float("nan")
    return ContrastTest(nan, nan, nan, float(df), nan, None, method, float(rho), reason, lags)


def _frame(est, se, df, alpha, method, rho, lags, reason, ex=None) -> pd.DataFrame:
    """Result table; ``ex``: binary exponents the rows of Y were scaled by (est, se undone)."""
    est = np.asarray(est, dtype=float)
    se = np.asarray(se, dtype=float)
    reason = pd.Series(reason, dtype=object).to_numpy().copy()
    bad = np.array([bool(r) for r in reason], dtype=bool)
    est = np.where(bad, np.nan, est)
    se = np.where(bad, np.nan, se)
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = est / se
    if ex is not None:
        est, se = unscale(est, ex), unscale(se, ex)
        over = ~bad & ~(np.isfinite(est) & np.isfinite(se))
        if over.any():  # the result in the data's units exceeds the float range
            reason[over] = R.NUMERICAL_FAILURE
            est[over] = se[over] = stat[over] = np.nan
    p = _two_sided_t(stat, df) if np.isfinite(df) else np.full_like(est, np.nan)
    m = est.shape[0]
    return pd.DataFrame(
        {
            "estimate": est,
            "std_error": se,
            "statistic": stat,
            "df": np.full(m, float(df)),
            "p_value": p,
            "significant": _significance(p, alpha),
            "method": np.full(m, method, dtype=object),
            "rho": np.broadcast_to(np.asarray(rho, dtype=float), (m,)).copy(),
            "lags": pd.array([lags] * m, dtype="Int64"),
            "reason": reason,
        }
    )


# ----------------------------------------------------------------------------- per case


def ols_fit(y, X) -> OLSFit:
    """OLS of y on X: b = (X'X)^-1 X'y, s2 = e'e/(n-k), se_j = sqrt(s2 [(X'X)^-1]_jj).

    Coefficients are returned whenever X has full column rank; standard errors and sigma2
    are NaN when the reason is not empty (constant series, exact fit).
    """
    X = _as_design(X)
    y = np.asarray(y, dtype=float).ravel()
    n, k = X.shape
    if y.shape[0] != n:
        raise ValueError(f"y has {y.shape[0]} points but X has {n} rows")
    nan_k = np.full(k, np.nan)
    reason = design_reason(X)
    if reason == R.OK and not np.all(np.isfinite(y)):
        reason = R.NON_FINITE_INPUT
    if reason:
        rank = int(np.linalg.matrix_rank(X)) if np.all(np.isfinite(X)) else 0
        return OLSFit(nan_k, nan_k.copy(), np.full(n, np.nan), np.nan, n - k, rank, reason)
    ex = binary_exponents(y)
    y = scale_rows(y, ex)  # exact; undone below (values near the float limits)
    coef, _, rank, _ = np.linalg.lstsq(X, y, rcond=None)
    resid = y - X @ coef
    df_resid = n - k
    sigma2 = float(resid @ resid / df_resid)
    reason = series_reasons(y[None, :], resid[None, :])[0]
    se = nan_k
    if not reason:
        se = np.sqrt(sigma2 * np.diag(np.linalg.inv(X.T @ X)))
    coef, resid, se = unscale(coef, ex), unscale(resid, ex), unscale(se, ex)
    sigma2 = float(unscale(sigma2, 2 * ex)) if not reason else np.nan
    if not (np.all(np.isfinite(coef)) and np.all(np.isfinite(resid))
            and (reason or (np.all(np.isfinite(se)) and np.isfinite(sigma2)))):
        return OLSFit(nan_k, nan_k.copy(), np.full(n, np.nan), np.nan, df_resid, int(rank),
                      R.NUMERICAL_FAILURE)
    return OLSFit(coef, se, resid, sigma2, df_resid, int(rank), reason)


def _rescaled(test: ContrastTest, ex: int) -> ContrastTest:
    """Estimate and standard error back in the data's units (the series was scaled by 2**-ex)."""
    if ex == 0 or test.reason:
        return test
    est, se = float(unscale(test.estimate, ex)), float(unscale(test.std_error, ex))
    if not (np.isfinite(est) and np.isfinite(se)):
        return _nan_test(test.method, R.NUMERICAL_FAILURE, test.df, test.rho, test.lags)
    return replace(test, estimate=est, std_error=se)


def _contrast_from_fit(coef, cov, c, df, alpha, method, rho=np.nan, lags=None) -> ContrastTest:
    est = float(c @ coef)
    var = float(c @ cov @ c)
    if not np.isfinite(var):
        return _nan_test(method, R.NUMERICAL_FAILURE, df, rho, lags)
    if var <= 0.0:
        return _nan_test(method, R.ZERO_VARIANCE, df, rho, lags)
    se = float(np.sqrt(var))
    stat = est / se
    p = float(_two_sided_t(stat, df))
    return ContrastTest(est, se, stat, float(df), p, bool(p < alpha), method, float(rho),
                        R.OK, lags)


def _prechecks(y, X, c):
    X = _as_design(X)
    y = np.asarray(y, dtype=float).ravel()
    n, k = X.shape
    if y.shape[0] != n:
        raise ValueError(f"y has {y.shape[0]} points but X has {n} rows")
    c = _as_contrast(c, k)
    reason = design_reason(X)
    if reason == R.OK and not np.all(np.isfinite(y)):
        reason = R.NON_FINITE_INPUT
    if reason == R.OK and not np.any(c != 0):
        reason = R.NO_CONTRAST
    return y, X, c, reason


def ols_contrast_test(y, X, c, alpha: float = 0.05) -> ContrastTest:
    """t test of c'beta under independent errors: t = c'b / sqrt(s2 c'(X'X)^-1 c), df n-k."""
    y, X, c, reason = _prechecks(y, X, c)
    n, k = X.shape
    if reason:
        return _nan_test("ols", reason, n - k)
    ex = binary_exponents(y)
    fit = ols_fit(scale_rows(y, ex), X)
    if fit.reason:
        return _nan_test("ols", fit.reason, n - k)
    cov = fit.sigma2 * np.linalg.inv(X.T @ X)
    return _rescaled(_contrast_from_fit(fit.coef, cov, c, n - k, alpha, "ols"), ex)


def gls_contrast_test(y, X, c, rho: float, alpha: float = 0.05) -> ContrastTest:
    """t test of c'beta by GLS with AR(1) correlation rho (Prais-Winsten form), df n-k.

    OLS of P y on P X (first row scaled by sqrt(1-rho^2)); s2 = RSS*/(n-k);
    Var(c'b) = s2 c'(X'P'PX)^-1 c.  Requires |rho| < 1.
    """
    y, X, c, reason = _prechecks(y, X, c)
    n, k = X.shape
    rho = float(rho)
    if reason:
        return _nan_test("gls_ar1", reason, n - k, rho)
    if not np.isfinite(rho):
        return _nan_test("gls_ar1", R.NON_FINITE_INPUT, n - k, rho)
    if abs(rho) >= 1.0:
        return _nan_test("gls_ar1", R.NUMERICAL_FAILURE, n - k, rho)
    ex = binary_exponents(y)
    y = scale_rows(y, ex)
    base = series_reasons(y[None, :], (y - X @ np.linalg.lstsq(X, y, rcond=None)[0])[None, :])[0]
    if base:
        return _nan_test("gls_ar1", base, n - k, rho)
    ys = prais_winsten_transform(y, rho)
    Xs = prais_winsten_transform(X, rho)
    coef = np.linalg.lstsq(Xs, ys, rcond=None)[0]
    resid = ys - Xs @ coef
    s2 = float(resid @ resid) / (n - k)
    cov = s2 * np.linalg.inv(Xs.T @ Xs)
    return _rescaled(_contrast_from_fit(coef, cov, c, n - k, alpha, "gls_ar1", rho), ex)


def hac_contrast_test(y, X, c, alpha: float = 0.05, maxlags: int | None = None) -> ContrastTest:
    """t test of c'beta with Newey-West HAC covariance (Bartlett), n/(n-k) scaling, df n-k.

    Cov = n/(n-k) (X'X)^-1 S (X'X)^-1, S = sum_{|t-s|<=L} w_|t-s| u_t u_s x_t x_s',
    w_l = 1 - l/(L+1); L default floor(4 (n/100)^(2/9)) (Newey & West 1994; common practice).
    """
    y, X, c, reason = _prechecks(y, X, c)
    n, k = X.shape
    L = newey_west_default_lags(n) if maxlags is None else int(maxlags)
    L = max(0, min(L, n - 1))
    if reason:
        return _nan_test("hac", reason, n - k, lags=L)
    ex = binary_exponents(y)
    fit = ols_fit(scale_rows(y, ex), X)
    if fit.reason:
        return _nan_test("hac", fit.reason, n - k, lags=L)
    scores = X * fit.residuals[:, None]
    S = scores.T @ scores
    for lag in range(1, L + 1):
        w = 1.0 - lag / (L + 1.0)
        G = scores[lag:].T @ scores[:-lag]
        S += w * (G + G.T)
    bread = np.linalg.inv(X.T @ X)
    cov = bread @ S @ bread * (n / (n - k))
    return _rescaled(_contrast_from_fit(fit.coef, cov, c, n - k, alpha, "hac", lags=L), ex)


def contrast_test(y, X, c, method: str = "ols", alpha: float = 0.05, rho: float | None = None,
                  maxlags: int | None = None) -> ContrastTest:
    """Dispatch to the "ols", "gls_ar1" (needs rho) or "hac" contrast test."""
    if method == "ols":
        return ols_contrast_test(y, X, c, alpha)
    if method == "gls_ar1":
        if rho is None:
            raise ValueError("method 'gls_ar1' needs rho")
        return gls_contrast_test(y, X, c, rho, alpha)
    if method == "hac":
        return hac_contrast_test(y, X, c, alpha, maxlags)
    raise ValueError(f"unknown method {method!r}; use 'ols', 'gls_ar1' or 'hac'")


# ----------------------------------------------------------------------------- batches


def _batch_prechecks(Y, X, c):
    X = _as_design(X)
    n, k = X.shape
    Y = _as_batch(Y, n)
    c = _as_contrast(c, k)
    m = Y.shape[0]
    xreason = design_reason(X)
    if xreason == R.OK and not np.any(c != 0):
        xreason = R.NO_CONTRAST
    ex = binary_exponents(Y)
    return scale_rows(Y, ex), X, c, m, n, k, xreason, ex


def _ols_pieces(Y, X):
    """Orthonormal basis Q of col(X), triangular factor, residuals (NaN rows zero-filled)."""
    Q, Rf = np.linalg.qr(X)
    Yf = np.where(np.isfinite(Y), Y, 0.0)
    E = Yf - (Yf @ Q) @ Q.T
    return Q, Rf, Yf, E


def ols_contrast_batch(Y, X, c, alpha: float = 0.05) -> pd.DataFrame:
    """Vectorised ``ols_contrast_test`` for m series (rows of Y) sharing the design X."""
    Y, X, c, m, n, k, xreason, ex = _batch_prechecks(Y, X, c)
    if xreason:
        return _frame(np.full(m, np.nan), np.full(m, np.nan), n - k, alpha, "ols", np.nan, None,
                      [xreason] * m)
    Q, Rf, Yf, E = _ols_pieces(Y, X)
    a = np.linalg.solve(Rf.T, c)  # c'(X'X)^-1 c = a'a
    h = Q @ a  # X (X'X)^-1 c
    est = Yf @ h
    s2 = np.sum(E**2, axis=1) / (n - k)
    se = np.sqrt(s2 * (a @ a))
    reason = series_reasons(Y, E)
    reason = np.where((reason == R.OK) & ~(se > 0), R.ZERO_VARIANCE, reason)
    return _frame(est, se, n - k, alpha, "ols", np.nan, None, reason, ex)


def gls_contrast_batch(Y, X, c, rho, alpha: float = 0.05) -> pd.DataFrame:
    """Vectorised ``gls_contrast_test``: row i of Y with its own AR(1) coefficient rho[i]."""
    Y, X, c, m, n, k, xreason, ex = _batch_prechecks(Y, X, c)
    rho = np.broadcast_to(np.asarray(rho, dtype=float), (m,)).copy()
    if xreason:
        return _frame(np.full(m, np.nan), np.full(m, np.nan), n - k, alpha, "gls_ar1", rho, None,
                      [xreason] * m)
    _, _, Yf, E = _ols_pieces(Y, X)
    reason = series_reasons(Y, E)
    bad_rho = ~np.isfinite(rho)
    reason = np.where((reason == R.OK) & bad_rho, R.NON_FINITE_INPUT, reason)
    reason = np.where((reason == R.OK) & (np.abs(np.where(bad_rho, 0, rho)) >= 1.0),
                      R.NUMERICAL_FAILURE, reason)
    r = np.where(reason == R.OK, rho, 0.0)
    # Transformed data: ys (m, n), Xs (m, n, k)
    ys = prais_winsten_transform(Yf, r)
    Xs = np.empty((m, n, k))
    Xs[:, 0, :] = np.sqrt(1.0 - r**2)[:, None] * X[0]
    Xs[:, 1:, :] = X[None, 1:, :] - r[:, None, None] * X[None, :-1, :]
    Qs, Rs = np.linalg.qr(Xs)
    qy = np.einsum("mnk,mn->mk", Qs, ys)
    resid = ys - np.einsum("mnk,mk->mn", Qs, qy)
    coef = np.linalg.solve(Rs, qy[..., None])[..., 0]
    a = np.linalg.solve(np.swapaxes(Rs, 1, 2), np.broadcast_to(c, (m, k))[..., None])[..., 0]
    est = coef @ c
    s2 = np.sum(resid**2, axis=1) / (n - k)
    se = np.sqrt(s2 * np.sum(a**2, axis=1))
    reason = np.where((reason == R.OK) & ~(se > 0), R.ZERO_VARIANCE, reason)
    return _frame(est, se, n - k, alpha, "gls_ar1", rho, None, reason, ex)


def hac_contrast_batch(Y, X, c, alpha: float = 0.05, maxlags: int | None = None) -> pd.DataFrame:
    """Vectorised ``hac_contrast_test``: Var(c'b) = n/(n-k) v'Wv, v_t = h_t u_t,
    h = X(X'X)^-1 c, W Toeplitz with Bartlett weights 1 - |t-s|/(L+1) for |t-s| <= L.
    """
    Y, X, c, m, n, k, xreason, ex = _batch_prechecks(Y, X, c)
    L = newey_west_default_lags(n) if maxlags is None else int(maxlags)
    L = max(0, min(L, n - 1))
    if xreason:
        return _frame(np.full(m, np.nan), np.full(m, np.nan), n - k, alpha, "hac", np.nan, L,
                      [xreason] * m)
    Q, Rf, Yf, E = _ols_pieces(Y, X)
    a = np.linalg.solve(Rf.T, c)
    h = Q @ a
    est = Yf @ h
    V = E * h[None, :]
    var = np.sum(V**2, axis=1)
    for lag in range(1, L + 1):
        w = 1.0 - lag / (L + 1.0)
        var = var + 2.0 * w * np.sum(V[:, lag:] * V[:, :-lag], axis=1)
    var = var * (n / (n - k))
    reason = series_reasons(Y, E)
    se = np.sqrt(np.where(var > 0, var, np.nan))
    reason = np.where((reason == R.OK) & ~(var > 0), R.ZERO_VARIANCE, reason)
    return _frame(est, se, n - k, alpha, "hac", np.nan, L, reason, ex)


def contrast_batch(Y, X, c, method: str = "ols", alpha: float = 0.05, rho=None,
                   maxlags: int | None = None) -> pd.DataFrame:
    """Dispatch to the batch "ols", "gls_ar1" (needs rho per row) or "hac" contrast test."""
    if method == "ols":
        return ols_contrast_batch(Y, X, c, alpha)
    if method == "gls_ar1":
        if rho is None:
            raise ValueError("method 'gls_ar1' needs rho")
        return gls_contrast_batch(Y, X, c, rho, alpha)
    if method == "hac":
        return hac_contrast_batch(Y, X, c, alpha, maxlags)
    raise ValueError(f"unknown method {method!r}; use 'ols', 'gls_ar1' or 'hac'")
