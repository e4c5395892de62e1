"""Large-sample residual autocorrelation tests: Breusch-Godfrey (lag 1) and Ljung-Box.

Both reference chi-square distributions that hold only as n grows; in series of 6-40
points their size can be far from nominal, so every result carries ``asymptotic=True``
(a field and in the method label).

Breusch-Godfrey (Breusch 1978; Godfrey 1978), lag 1: auxiliary OLS of the residuals e on
[X, e_{t-1}] (e_0 = 0; a constant column added when X has none), LM = n R^2 (centred R^2)
~ chi2(1); the F form tests the lag coefficient, F ~ F(1, n - k_aux).

Ljung-Box (Ljung & Box 1978): Q(h) = n(n+2) sum_{j=1}^h r_j^2 / (n-j), r_j the lag-j
autocorrelation of the demeaned residuals (denominator the full sum of squares),
Q(h) ~ chi2(h); default h = max(1, n // 4).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from audit import reasons as R
from audit.regression import _as_batch, _as_design, binary_exponents, design_reason, scale_rows, series_reasons

__all__ = [
    "BreuschGodfrey",
    "LjungBox",
    "bg_lm_rows",
    "breusch_godfrey",
    "breusch_godfrey_batch",
    "ljung_box",
    "ljung_box_batch",
    "ljung_box_default_lags",
    "ljung_box_rows",
]

BG_METHOD = "Breusch-Godfrey LM, lag 1, asymptotic=True"
LB_METHOD = "Ljung-Box Q, asymptotic=True"


@dataclass(frozen=True)
class BreuschGodfrey:
    """Breusch-Godfrey lag-1 test of residual autocorrelation (LM and F forms)."""

    statistic: float
    df: int
    p_value: float
    f_statistic: float
    f_df_denom: float
    f_p_value: float
    lags: int = 1
    method: str = BG_METHOD
    asymptotic: bool = True
    reason: str = R.OK


@dataclass(frozen=True)
class LjungBox:
    """Ljung-Box portmanteau test of residual autocorrelation up to lag ``lags``."""

    statistic: float
    df: int
    p_value: float
    lags: int
    method: str = LB_METHOD
    asymptotic: bool = True
    reason: str = R.OK


def ljung_box_default_lags(n: int) -> int:
    """max(1, n // 4) (common practice for short series)."""
    return max(1, n // 4)


def _data_reasons(E: np.ndarray, y) -> np.ndarray:
    """Per-row codes from the data y (NaN, constant, exact fit) when y is given."""
    if y is None:
        return np.full(E.shape[0], R.OK, dtype=object)
    Y = _as_batch(y, E.shape[1])
    if Y.shape != E.shape:
        raise ValueError(f"y has shape {Y.shape} but residuals have {E.shape}")
    return series_reasons(Y, np.where(np.isfinite(E), E, 0.0))


def _has_constant(X: np.ndarray) -> bool:
    return bool(np.any(np.all(X == X[:1], axis=0) & (X[0] != 0)))


def breusch_godfrey_batch(E, X, y=None) -> pd.DataFrame:
    """``breusch_godfrey`` for each row of E (OLS residuals of series sharing the design X);
    ``y`` (optional, same shape) lets constant series and exact fits be recognised.

    By Frisch-Waugh: with M the annihilator of X_aux (X plus a constant if it has none),
    l = Me_{-1}, u = Me:  SSR = u'u - (u'l)^2 / l'l,  LM = n (1 - SSR / sum (e - mean e)^2).
    """
    X = _as_design(X)
    n, k = X.shape
    E = _as_batch(E, n)
    m = E.shape[0]
    nanm = np.full(m, np.nan)
    Xa = X if _has_constant(X) else np.column_stack([np.ones(n), X])
    ka = Xa.shape[1] + 1
    df_denom = float(n - ka)
    xreason = design_reason(X)
    if xreason == R.OK and n - ka < 1:
        xreason = R.NO_RESIDUAL_DF
    reason = np.full(m, xreason, dtype=object)
    if xreason:
        return _bg_frame(nanm, nanm, nanm, nanm, df_denom, reason)
    finite = np.all(np.isfinite(E), axis=1)
    Ef = np.where(np.isfinite(E), E, 0.0)
    Ef = scale_rows(Ef, binary_exponents(Ef))  # exact; LM and F are scale-free
    lag = np.zeros_like(Ef)
    lag[:, 1:] = Ef[:, :-1]
    Q = np.linalg.qr(Xa)[0]
    U = Ef - (Ef @ Q) @ Q.T
    Lr = lag - (lag @ Q) @ Q.T
    lm, reason, ul, ll, ssr = bg_lm_rows(U, Lr, Ef, _data_reasons(E, y), finite)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(reason == R.OK, (ul**2 / ll) / (ssr / df_denom), np.nan)
    return _bg_frame(lm, stats.chi2.sf(lm, 1), f, stats.f.sf(f, 1, df_denom), df_denom, reason)


def bg_lm_rows(U, Lr, Ef, data_reasons, finite):
    """Breusch-Godfrey LM = n (1 - SSR / SST) per row from u = Me, l = Me_{-1} (M the annihilator of
    the auxiliary design) and the scaled residuals Ef, with reasons: zero residual variance,
    singular auxiliary design (l = 0), the series' own reasons, non-finite input.  Returns
    (lm, reason, u'l, l'l, SSR); lm is NaN wherever the reason is set."""
    n = Ef.shape[1]
    ll = np.sum(Lr**2, axis=1)
    ul = np.sum(U * Lr, axis=1)
    uu = np.sum(U**2, axis=1)
    sst = np.sum((Ef - Ef.mean(axis=1, keepdims=True)) ** 2, axis=1)
    scale = np.sum(Ef**2, axis=1)
    reason = np.full(Ef.shape[0], R.OK, dtype=object)
    reason[~(sst > 1e-20 * np.maximum(scale, 1e-300)) | ~(scale > 0)] = R.ZERO_RESIDUAL_VARIANCE
    reason[(reason == R.OK) & ~(ll > 1e-20 * np.maximum(scale, 1e-300))] = R.SINGULAR_DESIGN
    reason = np.where(data_reasons != R.OK, data_reasons, reason)
    reason[~finite] = R.NON_FINITE_INPUT
    with np.errstate(divide="ignore", invalid="ignore"):
        ssr = uu - ul**2 / ll
        lm = n * (1.0 - ssr / sst)
    reason[(reason == R.OK) & ~(ssr > 0)] = R.ZERO_RESIDUAL_VARIANCE
    return np.where(reason == R.OK, lm, np.nan), reason, ul, ll, ssr


def _bg_frame(lm, p, f, fp, df_denom, reason) -> pd.DataFrame:
    m = len(reason)
    return pd.DataFrame({
        "statistic": lm,
        "df": np.full(m, 1),
        "p_value": p,
        "f_statistic": f,
        "f_df_denom": np.full(m, df_denom),
        "f_p_value": fp,
        "lags": np.full(m, 1),
        "method": BG_METHOD,
        "asymptotic": np.full(m, True),
        "reason": reason,
    })


def breusch_godfrey(residuals, X, y=None) -> BreuschGodfrey:
    """Breusch-Godfrey lag-1 LM test (asymptotic chi2(1)) and its F form on OLS residuals.

    Auxiliary OLS of e_t on [X, e_{t-1}] with e_0 = 0; LM = n R^2.  Pass ``y`` so that a
    constant series or an exact fit (rounding-level residuals) gets its reason code.
    """
    X = _as_design(X)
    e = np.asarray(residuals, dtype=float).ravel()
    n, k = X.shape
    if e.shape[0] != n:
        raise ValueError(f"residuals have {e.shape[0]} points but X has {n} rows")
    nan = float("nan")
    Xa = X if (np.all(np.isfinite(X)) and _has_constant(X)) else np.column_stack([np.ones(n), X])
    df_denom = float(n - Xa.shape[1] - 1)
    reason = design_reason(X)
    if reason == R.OK and df_denom < 1:
        reason = R.NO_RESIDUAL_DF
    if reason == R.OK and not np.all(np.isfinite(e)):
        reason = R.NON_FINITE_INPUT
    if reason == R.OK:
        reason = str(_data_reasons(e[None, :], None if y is None else np.ravel(y))[0])
    if reason == R.OK:
        e = scale_rows(e, binary_exponents(e))  # exact; LM and F are scale-free
        scale = float(e @ e)
        sst = float(np.sum((e - e.mean()) ** 2))
        if not (scale > 0 and sst > 1e-20 * scale):
            reason = R.ZERO_RESIDUAL_VARIANCE
    if reason:
        return BreuschGodfrey(nan, 1, nan, nan, df_denom, nan, reason=reason)
    Z = np.column_stack([Xa, np.concatenate([[0.0], e[:-1]])])
    if np.linalg.matrix_rank(Z) < Z.shape[1]:
        return BreuschGodfrey(nan, 1, nan, nan, df_denom, nan, reason=R.SINGULAR_DESIGN)
    coef = np.linalg.lstsq(Z, e, rcond=None)[0]
    u = e - Z @ coef
    ssr = float(u @ u)
    if not ssr > 0:
        return BreuschGodfrey(nan, 1, nan, nan, df_denom, nan, reason=R.ZERO_RESIDUAL_VARIANCE)
    lm = n * (1.0 - ssr / sst)
    cov = ssr / df_denom * np.linalg.inv(Z.T @ Z)
    f = coef[-1] ** 2 / cov[-1, -1]
    return BreuschGodfrey(float(lm), 1, float(stats.chi2.sf(lm, 1)), float(f), df_denom,
                          float(stats.f.sf(f, 1, df_denom)))


def ljung_box_rows(E, h: int, y=None, data_reasons=None) -> tuple[np.ndarray, np.ndarray]:
    """Ljung-Box Q(h) and reason per row of E (series of equal length n), without a frame.

    The arrays of ``ljung_box_batch`` (statistic, reason); Q is NaN wherever a reason is set.
    ``data_reasons``: the codes ``_data_reasons(E, y)`` when the caller already has them.
    """
    E = np.asarray(E, dtype=float)
    if E.ndim == 1:
        E = E[None, :]
    m, n = E.shape
    h = int(h)
    reason = np.full(m, R.OK, dtype=object)
    finite = np.all(np.isfinite(E), axis=1)
    Ef = np.where(np.isfinite(E), E, 0.0)
    Ef = scale_rows(Ef, binary_exponents(Ef))  # exact; Q is scale-free
    D = Ef - Ef.mean(axis=1, keepdims=True)
    den = np.sum(D**2, axis=1)
    scale = np.sum(Ef**2, axis=1)
    reason[~(den > 1e-20 * scale) | ~(scale > 0)] = R.ZERO_RESIDUAL_VARIANCE
    data = _data_reasons(E, y) if data_reasons is None else np.asarray(data_reasons, dtype=object)
    reason = np.where(data != R.OK, data, reason)
    if n < 3 or h < 1 or h >= n:
        reason[:] = R.TOO_FEW_POINTS
    reason[~finite] = R.NON_FINITE_INPUT
    ok = reason == R.OK
    q = np.zeros(m)
    if n >= 3 and 1 <= h < n:
        safe = np.where(ok, den, 1.0)
        for j in range(1, h + 1):
            rj = np.sum(D[:, j:] * D[:, :-j], axis=1) / safe
            q += rj**2 / (n - j)
        q *= n * (n + 2.0)
    return np.where(ok, q, np.nan), reason


def ljung_box_batch(E, lags: int | None = None, y=None) -> pd.DataFrame:
    """``ljung_box`` for each row of E (series of equal length n); optional ``y`` as in
    ``breusch_godfrey_batch``."""
    E = np.asarray(E, dtype=float)
    if E.ndim == 1:
        E = E[None, :]
    m, n = E.shape
    h = ljung_box_default_lags(n) if lags is None else int(lags)
    q, reason = ljung_box_rows(E, h, y)
    return pd.DataFrame({
        "statistic": q,
        "df": np.full(m, h),
        "p_value": stats.chi2.sf(q, h) if h >= 1 else np.full(m, np.nan),
        "lags": np.full(m, h),
        "method": LB_METHOD,
        "asymptotic": np.full(m, True),
        "reason": reason,
    })


def ljung_box(residuals, lags: int | None = None, y=None) -> LjungBox:
    """Ljung-Box Q(h) = n(n+2) sum_{j<=h} r_j^2/(n-j) ~ chi2(h), h default max(1, n//4).

    ``y`` (optional): the series the residuals came from, to recognise constant series.
    """
    e = np.asarray(residuals, dtype=float).ravel()
    n = e.shape[0]
    h = ljung_box_default_lags(n) if lags is None else int(lags)
    nan = float("nan")
    if not np.all(np.isfinite(e)):
        return LjungBox(nan, h, nan, h, reason=R.NON_FINITE_INPUT)
    if n < 3 or h < 1 or h >= n:
        return LjungBox(nan, h, nan, h, reason=R.TOO_FEW_POINTS)
    code = str(_data_reasons(e[None, :], None if y is None else np.ravel(y))[0])
    if code:
        return LjungBox(nan, h, nan, h, reason=code)
    e = scale_rows(e, binary_exponents(e))  # exact; Q is scale-free
    d = e - e.mean()
    den = float(d @ d)
    if not (float(e @ e) > 0 and den > 1e-20 * float(e @ e)):
        return LjungBox(nan, h, nan, h, reason=R.ZERO_RESIDUAL_VARIANCE)
    r = np.array([float(d[j:] @ d[:-j]) / den for j in range(1, h + 1)])
    q = n * (n + 2.0) * float(np.sum(r**2 / (n - np.arange(1, h + 1))))
    return LjungBox(q, h, float(stats.chi2.sf(q, h)), h)
