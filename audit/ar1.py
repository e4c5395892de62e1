"""AR(1) coefficient of the case-model errors by REML (and profile ML), and GLS tables.

Model: y = X b + e, e stationary AR(1) with correlation matrix R(rho)_{ts} = rho^|t-s|,
|R| = (1 - rho^2)^(n-1), and Prais-Winsten factor P with P'P = (1 - rho^2) R^-1.

REML (Harville 1974): the log density of the error contrasts w = K'y (K an orthonormal basis
of the null space of X'), profiled over sigma^2,
    l_R(rho) = -1/2 [ (n-k) log s2(rho) + log|R| + log|X'R^-1X| - log|X'X| + (n-k)(1 + log 2 pi) ],
    s2(rho) = (y - X b_GLS)' R^-1 (y - X b_GLS) / (n-k).
Profile ML: l(rho) = -1/2 [ n log(Q/n) + log|R| + n (1 + log 2 pi) ], Q the same quadratic form.

Maximisation over |rho| <= 0.95: a grid with step 0.025, then bisection on the analytic
score inside the grid bracket around the best grid point (a bounded refinement that locates
the maximum to ~1e-13 in rho; a golden-section search on the likelihood values alone stalls
near 1e-8 because of rounding in the function values).  The batch path evaluates everything
from (k+1) x (k+1) cross-product matrices that are quadratic in rho; the per-case path
(reference for tests) transforms the data at every rho.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import optimize, stats

from audit import reasons as R
from audit.regression import (
    _as_batch,
    _as_design,
    binary_exponents,
    design_reason,
    prais_winsten_transform,
    scale_rows,
    series_reasons,
    unscale,
)

__all__ = [
    "AR1Fit",
    "RHO_BOUND",
    "ar1_reml",
    "ar1_ml",
    "ar1_batch",
    "ar1_reml_batch",
    "ar1_ml_batch",
    "ar1_loglik",
    "ar1_correlation_matrix",
    "gls_ar1_table",
]

RHO_BOUND = 0.95
_GRID = np.linspace(-RHO_BOUND, RHO_BOUND, 77)  # step 0.025
_LOG2PI1 = 1.0 + np.log(2.0 * np.pi)
_BISECT_ITERS = 60


@dataclass(frozen=True)
class AR1Fit:
    """AR(1) coefficient of the regression errors with the maximised log-likelihood."""

    rho: float
    method: str
    loglik: float
    converged: bool
    at_bound: bool
    reason: str = R.OK


def ar1_correlation_matrix(n: int, rho: float) -> np.ndarray:
    """R_{ts} = rho^|t-s| (stationary AR(1) correlation matrix)."""
    idx = np.arange(n)
    return float(rho) ** np.abs(idx[:, None] - idx[None, :])


# ----------------------------------------------------------------------------- checks


def _fit_reasons(Y: np.ndarray, X: np.ndarray) -> tuple[str, np.ndarray, np.ndarray]:
    """Design reason, per-row reasons and OLS residuals (NaN rows zero-filled).

    Y must already be scaled to moderate magnitudes (``scale_rows``); rho does not depend on
    the scale of y, the log-likelihood shifts by -(n-k) e log 2 (REML) or -n e log 2 (ML).
    """
    n, k = X.shape
    m = Y.shape[0]
    xreason = design_reason(X)
    if xreason == R.OK and n - k < 2:
        xreason = R.TOO_FEW_POINTS  # fewer than 2 error contrasts: no information on rho
    if xreason:
        return xreason, np.full(m, xreason, dtype=object), np.zeros_like(Y)
    Q = np.linalg.qr(X)[0]
    Yf = np.where(np.isfinite(Y), Y, 0.0)
    E = Yf - (Yf @ Q) @ Q.T
    return xreason, series_reasons(Y, E), E


# ----------------------------------------------------------------------------- batch path


class _Moments:
    """Cross products of [Q, e] (Q orthonormal basis of col X, e OLS residuals) such that
    [PQ, Pe]'[PQ, Pe] = G0 - rho G1 + rho^2 G2 (Prais-Winsten P)."""

    def __init__(self, E: np.ndarray, X: np.ndarray):
        Q = np.linalg.qr(X)[0]
        self.n, self.k = X.shape
        A1 = Q[1:].T @ Q[:-1]
        self.A1 = A1 + A1.T
        self.A2 = Q[1:-1].T @ Q[1:-1]
        self.qe1 = E[:, :-1] @ Q[1:] + E[:, 1:] @ Q[:-1]
        self.qe2 = E[:, 1:-1] @ Q[1:-1]
        self.ee0 = np.sum(E**2, axis=1)
        self.ee1 = 2.0 * np.sum(E[:, 1:] * E[:, :-1], axis=1)
        self.ee2 = np.sum(E[:, 1:-1] ** 2, axis=1)

    def xx(self, rho):
        """Mxx = (PQ)'(PQ) and its rho-derivative; rho of any shape -> (..., k, k)."""
        r = np.asarray(rho, dtype=float)[..., None, None]
        eye = np.eye(self.k)
        return eye - r * self.A1 + r**2 * self.A2, -self.A1 + 2.0 * r * self.A2


def _objective_from_pieces(method, n, k, rho, rss, drss, logdet, dlogdet):
    """-2 loglik and its derivative in rho."""
    f = _objective_value(method, n, k, rho, rss, logdet)
    one = 1.0 - rho**2
    if method == "REML":
        df = (n - k) * drss / rss + 2.0 * rho / one + dlogdet
    else:
        df = n * drss / rss + 2.0 * rho / one
    return f, df


def _objective_value(method, n, k, rho, rss, logdet):
    """-2 loglik alone (``_objective_from_pieces`` without the derivative)."""
    one = 1.0 - rho**2
    if method == "REML":
        return (n - k) * np.log(rss / (n - k)) - np.log(one) + logdet + (n - k) * _LOG2PI1
    return n * np.log(rss / n) - np.log(one) + n * _LOG2PI1


def _batch_objective_grid(mom: _Moments, method: str):
    """-2 loglik and derivative for every row at every grid point: arrays (m, G)."""
    g = _GRID
    Mxx, dMxx = mom.xx(g)  # (G, k, k)
    Minv = np.linalg.inv(Mxx)
    logdet = np.linalg.slogdet(Mxx)[1]  # (G,)
    dlogdet = np.einsum("gij,gji->g", Minv, dMxx)
    mxe = -g[None, :, None] * mom.qe1[:, None, :] + (g**2)[None, :, None] * mom.qe2[:, None, :]
    dmxe = -mom.qe1[:, None, :] + 2.0 * g[None, :, None] * mom.qe2[:, None, :]
    mee = mom.ee0[:, None] - g[None, :] * mom.ee1[:, None] + (g**2)[None, :] * mom.ee2[:, None]
    dmee = -mom.ee1[:, None] + 2.0 * g[None, :] * mom.ee2[:, None]
    b = np.einsum("gij,mgj->mgi", Minv, mxe)
    rss = mee - np.sum(mxe * b, axis=2)
    drss = dmee - 2.0 * np.sum(b * dmxe, axis=2) + np.einsum("mgi,gij,mgj->mg", b, dMxx, b)
    return _objective_from_pieces(method, mom.n, mom.k, g[None, :], rss, drss,
                                  logdet[None, :], dlogdet[None, :])


def _batch_objective(mom: _Moments, method: str, rho: np.ndarray):
    """-2 loglik and derivative, row i at rho[i]: arrays (m,)."""
    Mxx, dMxx = mom.xx(rho)  # (m, k, k)
    Minv = np.linalg.inv(Mxx)
    logdet = np.linalg.slogdet(Mxx)[1]
    dlogdet = np.einsum("mij,mji->m", Minv, dMxx)
    _, rss, drss = gls_rss_pieces(Minv, dMxx, mom.qe1, mom.qe2, mom.ee0, mom.ee1, mom.ee2, rho)
    return _objective_from_pieces(method, mom.n, mom.k, rho, rss, drss, logdet, dlogdet)


def gls_rss_pieces(Minv, dM, qe1, qe2, ee0, ee1, ee2, rho):
    """b = M^-1 m, RSS* = (Pe)'Pe - m'M^-1 m and dRSS*/drho, row i at rho[i], from the cross
    products of the Prais-Winsten form (m = (PQ)'Pe = -rho qe1 + rho^2 qe2, (Pe)'Pe = ee0 - rho ee1
    + rho^2 ee2; ``_Moments``).  Minv = M(rho)^-1 and dM = dM/drho, (m, k, k)."""
    r = rho[:, None]
    mxe = -r * qe1 + r**2 * qe2
    dmxe = -qe1 + 2.0 * r * qe2
    mee = ee0 - rho * ee1 + rho**2 * ee2
    dmee = -ee1 + 2.0 * rho * ee2
    b = np.einsum("mij,mj->mi", Minv, mxe)
    rss = mee - np.sum(mxe * b, axis=1)
    drss = dmee - 2.0 * np.sum(b * dmxe, axis=1) + np.einsum("mi,mij,mj->m", b, dM, b)
    return b, rss, drss


def _brackets(f_grid: np.ndarray, d_grid: np.ndarray):
    """From grid values of -2 loglik (m, G) and its derivative: bracket [lo, hi] around the
    best grid point on the side where the derivative points, plus boundary solutions.

    Returns lo, hi, done (solution known: at a bound or a zero derivative on the grid),
    done_rho, at_bound, bracket_ok (derivative changes sign - to + across [lo, hi]).
    """
    G = _GRID.size
    m = f_grid.shape[0]
    rows = np.arange(m)
    j = np.argmin(f_grid, axis=1)
    dj = d_grid[rows, j]
    right = dj < 0
    jl = np.where(right, j, j - 1)
    jh = np.where(right, j + 1, j)
    at_upper = right & (j == G - 1)
    at_lower = (dj > 0) & (j == 0)
    zero = dj == 0
    at_bound = at_upper | at_lower
    done = at_bound | zero
    jl = np.clip(jl, 0, G - 1)
    jh = np.clip(jh, 0, G - 1)
    lo, hi = _GRID[jl], _GRID[jh]
    bracket_ok = done | ((d_grid[rows, jl] < 0) & (d_grid[rows, jh] > 0))
    done_rho = np.where(at_upper, RHO_BOUND, np.where(at_lower, -RHO_BOUND, _GRID[j]))
    return lo, hi, done, done_rho, at_bound, bracket_ok, f_grid[rows, j]


def ar1_batch(Y, X, method: str = "REML") -> pd.DataFrame:
    """AR(1) coefficient (REML or profile ML) for each row of Y, all sharing the design X.

    Returns a DataFrame with rho, method, loglik, converged, at_bound, reason (one row per series).
    """
    method = _check_method(method)
    X = _as_design(X)
    n, k = X.shape
    Y = _as_batch(Y, n)
    m = Y.shape[0]
    rho = np.full(m, np.nan)
    loglik = np.full(m, np.nan)
    converged = np.zeros(m, dtype=bool)
    at_bound = np.zeros(m, dtype=bool)
    ex = binary_exponents(Y)
    xreason, reason, E = _fit_reasons(scale_rows(Y, ex), X)
    good = reason == R.OK
    if np.any(good):
        mom = _Moments(E[good], X)
        f_grid, d_grid = _batch_objective_grid(mom, method)
        lo, hi, done, done_rho, bound, ok, f_best = _brackets(f_grid, d_grid)
        for _ in range(_BISECT_ITERS):
            mid = 0.5 * (lo + hi)
            _, dmid = _batch_objective(mom, method, mid)
            up = dmid > 0
            hi = np.where(up, mid, hi)
            lo = np.where(up, lo, mid)
            if np.all(hi - lo <= 1e-15):
                break
        est = np.where(done, done_rho, 0.5 * (lo + hi))
        f_est, _ = _batch_objective(mom, method, est)
        worse = ~(f_est <= f_best + 1e-12 * np.abs(f_best))
        conv = ok & ~worse & np.isfinite(f_est)
        rho[good] = est
        loglik[good] = -0.5 * f_est - _loglik_shift(method, n, k) * ex[good]
        converged[good] = conv
        at_bound[good] = bound
        bad_num = ~np.isfinite(f_est)
        if np.any(bad_num):
            idx = np.flatnonzero(good)[bad_num]
            rho[idx] = np.nan
            loglik[idx] = np.nan
            reason[idx] = R.NUMERICAL_FAILURE
    return pd.DataFrame(
        {
            "rho": rho,
            "method": np.full(m, method, dtype=object),
            "loglik": loglik,
            "converged": converged,
            "at_bound": at_bound,
            "reason": reason,
        }
    )


def ar1_reml_batch(Y, X) -> np.ndarray:
    """REML AR(1) coefficient for each row of Y (shared design X); NaN where degenerate."""
    return ar1_batch(Y, X, "REML")["rho"].to_numpy()


def ar1_ml_batch(Y, X) -> np.ndarray:
    """Profile-ML AR(1) coefficient for each row of Y (shared design X); NaN where degenerate."""
    return ar1_batch(Y, X, "ML")["rho"].to_numpy()


# ----------------------------------------------------------------------------- per-case path


def _check_method(method: str) -> str:
    m = method.upper()
    if m not in ("REML", "ML"):
        raise ValueError(f"method must be 'REML' or 'ML', got {method!r}")
    return m


def _direct_objective(y: np.ndarray, X: np.ndarray, rho: float, method: str):
    """-2 loglik and its derivative at rho by transforming the data (reference path)."""
    n, k = X.shape
    one = 1.0 - rho**2
    s = np.sqrt(one)
    ys = prais_winsten_transform(y, rho)
    Xs = prais_winsten_transform(X, rho)
    coef = np.linalg.lstsq(Xs, ys, rcond=None)[0]
    u = y - X @ coef
    r = ys - Xs @ coef
    rss = float(r @ r)
    dPu = np.concatenate([[-rho / s * u[0]], -u[:-1]])
    drss = 2.0 * float(r @ dPu)  # envelope theorem: b_GLS minimises rss
    quad = rss / one  # (y - Xb)' R^-1 (y - Xb)
    dquad = drss / one + rss * 2.0 * rho / one**2
    logdetR = (n - 1) * np.log(one)
    dlogdetR = -(n - 1) * 2.0 * rho / one
    if method == "REML":
        XtRiX = Xs.T @ Xs / one
        dXs = np.vstack([-rho / s * X[:1], -X[:-1]])
        dXtRiX = (dXs.T @ Xs + Xs.T @ dXs) / one + Xs.T @ Xs * 2.0 * rho / one**2
        logdetXRX = np.linalg.slogdet(XtRiX)[1]
        dlogdetXRX = float(np.trace(np.linalg.solve(XtRiX, dXtRiX)))
        logdetXX = np.linalg.slogdet(X.T @ X)[1]
        p = n - k
        f = p * np.log(quad / p) + logdetR + logdetXRX - logdetXX + p * _LOG2PI1
        df = p * dquad / quad + dlogdetR + dlogdetXRX
    else:
        f = n * np.log(quad / n) + logdetR + n * _LOG2PI1
        df = n * dquad / quad + dlogdetR
    return float(f), float(df)


def ar1_loglik(y, X, rho: float, method: str = "REML") -> float:
    """Restricted (REML) or profile (ML) log-likelihood of the AR(1) regression at rho."""
    method = _check_method(method)
    X = _as_design(X)
    y = np.asarray(y, dtype=float).ravel()
    return -0.5 * _direct_objective(y, X, float(rho), method)[0]


def _ar1_single(y, X, method: str) -> AR1Fit:
    method = _check_method(method)
    X = _as_design(X)
    y = np.asarray(y, dtype=float).ravel()
    n, k = X.shape
    if y.shape[0] != n:
        raise ValueError(f"y has {y.shape[0]} points but X has {n} rows")
    nan = float("nan")
    ex = binary_exponents(y)
    y = scale_rows(y, ex)  # exact; rho is scale-free, the log-likelihood is shifted back below
    _, reason, _ = _fit_reasons(y[None, :], X)
    if reason[0]:
        return AR1Fit(nan, method, nan, False, False, str(reason[0]))
    try:
        vals = np.array([_direct_objective(y, X, g, method) for g in _GRID])
        lo, hi, done, done_rho, bound, ok, f_best = _brackets(vals[None, :, 0], vals[None, :, 1])
        lo, hi, done, ok = float(lo[0]), float(hi[0]), bool(done[0]), bool(ok[0])
        if done:
            rho = float(done_rho[0])
        elif ok:
            rho = optimize.brentq(lambda r: _direct_objective(y, X, r, method)[1], lo, hi,
                                  xtol=1e-15, rtol=4 * np.finfo(float).eps, maxiter=200)
        else:
            res = optimize.minimize_scalar(lambda r: _direct_objective(y, X, r, method)[0],
                                           bounds=(lo, hi), method="bounded",
                                           options={"xatol": 1e-12})
            rho = float(res.x)
        f_est = _direct_objective(y, X, rho, method)[0]
    except (np.linalg.LinAlgError, ValueError, FloatingPointError):
        return AR1Fit(nan, method, nan, False, False, R.NUMERICAL_FAILURE)
    if not np.isfinite(f_est):
        return AR1Fit(nan, method, nan, False, False, R.NUMERICAL_FAILURE)
    worse = not (f_est <= f_best[0] + 1e-12 * abs(f_best[0]))
    loglik = -0.5 * f_est - _loglik_shift(method, n, k) * ex
    return AR1Fit(float(rho), method, float(loglik), ok and not worse, bool(bound[0]), R.OK)


def _loglik_shift(method: str, n: int, k: int) -> float:
    """Change of the log-likelihood per factor 2 in the scale of y: (n-k) log 2 or n log 2."""
    return (n - k if method == "REML" else n) * np.log(2.0)


def ar1_reml(y, X) -> AR1Fit:
    """REML AR(1) coefficient of the errors of y = X b + e over |rho| <= 0.95 (Harville 1974).

    loglik is the log density of the error contrasts K'y (K orthonormal, K'X = 0).
    """
    return _ar1_single(y, X, "REML")


def ar1_ml(y, X) -> AR1Fit:
    """Profile maximum-likelihood AR(1) coefficient over |rho| <= 0.95 (for cross-checks)."""
    return _ar1_single(y, X, "ML")


# ----------------------------------------------------------------------------- GLS table


def gls_ar1_table(y, X, rho: float, names=None) -> pd.DataFrame:
    """GLS coefficient table for AR(1) errors with known rho, in Prais-Winsten form.

    OLS of Py on PX (first row scaled by sqrt(1-rho^2)); s2 = RSS*/(n-k); se_j =
    sqrt(s2 [(X'P'PX)^-1]_jj); t = coef/se with n-k df; two-sided p.  Columns: coef,
    std_error, t, p_value, df, reason; index: ``names`` or the columns of a DataFrame X.
    """
    if names is None and isinstance(X, pd.DataFrame):
        names = [str(c) for c in X.columns]
    X = _as_design(X)
    y = np.asarray(y, dtype=float).ravel()
    n, k = X.shape
    if y.shape[0] != n:
        raise ValueError(f"y has {y.shape[0]} points but X has {n} rows")
    names = list(names) if names is not None else [f"x{j}" for j in range(k)]
    rho = float(rho)
    ex = binary_exponents(y)
    y = scale_rows(y, ex)  # exact; coef and std_error are scaled back below
    reason = design_reason(X)
    if reason == R.OK:
        if not np.isfinite(rho):
            reason = R.NON_FINITE_INPUT
        elif abs(rho) >= 1.0:
            reason = R.NUMERICAL_FAILURE
    if reason == R.OK:
        yf = np.where(np.isfinite(y), y, 0.0)
        e = yf - X @ np.linalg.lstsq(X, yf, rcond=None)[0]
        reason = str(series_reasons(y[None, :], e[None, :])[0])
    nan = np.full(k, np.nan)
    if reason:
        return pd.DataFrame({"coef": nan, "std_error": nan, "t": nan, "p_value": nan,
                             "df": float(n - k), "reason": reason}, index=names)
    ys = prais_winsten_transform(y, rho)
    Xs = prais_winsten_transform(X, rho)
    coef = np.linalg.lstsq(Xs, ys, rcond=None)[0]
    resid = ys - Xs @ coef
    s2 = float(resid @ resid) / (n - k)
    se = np.sqrt(s2 * np.diag(np.linalg.inv(Xs.T @ Xs)))
    t = coef / se
    p = 2.0 * stats.t.sf(np.abs(t), n - k)
    coef, se = unscale(coef, ex), unscale(se, ex)
    if not (np.all(np.isfinite(coef)) and np.all(np.isfinite(se))):
        return pd.DataFrame({"coef": nan, "std_error": nan, "t": nan, "p_value": nan,
                             "df": float(n - k), "reason": R.NUMERICAL_FAILURE}, index=names)
    return pd.DataFrame({"coef": coef, "std_error": se, "t": t, "p_value": p,
                         "df": float(n - k), "reason": R.OK}, index=names)
