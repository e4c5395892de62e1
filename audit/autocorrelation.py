"""Lag-1 autocorrelation: of case-model residuals (exact null moments) and of raw phases.

Residuals.  r1 = e'Le / e'e with L the symmetric lag matrix (1/2 on the first
off-diagonals), i.e. r1 = sum_t e_t e_{t+1} / sum_t e_t^2.  Under independent normal errors
e = Mz (M = I - X(X'X)^-1X'), and r1 = z'Az / z'Mz with A = MLM.  Because the ratio is
independent of its denominator (Pitman-Koopmans), its moments are ratios of moments:
    E0[r1]   = tr(A) / (n-k) = tr(ML) / (n-k),
    E0[r1^2] = (2 tr(A^2) + tr(A)^2) / ((n-k)(n-k+2)),     V0 = E0[r1^2] - E0[r1]^2.
Reported: r1, the corrected value r1 - E0, z = (r1 - E0)/sqrt(V0) and a two-sided normal
p-value (an approximation: the null distribution of r1 is not normal in short series).

Phases.  Raw r1 of a phase about its mean, and Huitema & McKean (1991):
    r1+ = r1 + 1/n,  Var(r1+) ~ (n-2)^2 / (n^2 (n-1)),  z = r1+ / sqrt((n-2)^2/(n^2 (n-1)))
(formulas recalled from memory), with one-sided (H1: rho > 0) and two-sided normal p-values.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from audit import reasons as R
from audit.regression import _as_batch, _as_design, binary_exponents, design_reason, scale_rows, series_reasons

__all__ = [
    "ResidualLag1",
    "PhaseLag1",
    "lag_matrix",
    "residual_lag1_null_moments",
    "residual_lag1",
    "residual_lag1_batch",
    "phase_lag1",
    "phase_lag1_batch",
    "phase_lag1_columns",
    "phase_lag1_r1",
    "phase_r1_plus",
]

RESIDUAL_METHOD = ("residual lag-1 autocorrelation; exact null mean/variance (Pitman-Koopmans); "
                   "approximate normal p")
PHASE_METHOD = "Huitema-McKean r1+ (1991); approximate normal p"


@dataclass(frozen=True)
class ResidualLag1:
    """Lag-1 autocorrelation of regression residuals with its exact null mean and variance."""

    r1: float
    null_mean: float
    null_variance: float
    r1_corrected: float
    z: float
    p_value: float
    method: str = RESIDUAL_METHOD
    reason: str = R.OK


@dataclass(frozen=True)
class PhaseLag1:
    """Lag-1 autocorrelation of one phase: raw r1 and Huitema-McKean r1+ with its z test."""

    n: int
    r1: float
    r1_plus: float
    std_error: float
    z: float
    p_value_one_sided: float
    p_value_two_sided: float
    method: str = PHASE_METHOD
    reason: str = R.OK


def lag_matrix(n: int) -> np.ndarray:
    """Symmetric lag matrix L, 1/2 on the first off-diagonals: e'Le = sum e_t e_{t+1}."""
    L = np.zeros((n, n))
    i = np.arange(n - 1)
    L[i, i + 1] = 0.5
    L[i + 1, i] = 0.5
    return L


def residual_lag1_null_moments(X) -> tuple[float, float]:
    """Exact null mean tr(ML)/(n-k) and variance of r1 of OLS residuals on X (normal errors)."""
    X = _as_design(X)
    n, k = X.shape
    Q = np.linalg.qr(X)[0]
    M = np.eye(n) - Q @ Q.T
    A = M @ lag_matrix(n) @ M
    p = n - k
    trA = float(np.trace(A))
    mean = trA / p
    if p == 1:  # r1 is fixed by the design (rounding would leave a variance of about 1e-17)
        return mean, 0.0
    second = (2.0 * float(np.sum(A * A)) + trA**2) / (p * (p + 2.0))
    return mean, max(second - mean**2, 0.0)


def _r1_rows(E: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    den = np.sum(E**2, axis=1)
    num = np.sum(E[:, 1:] * E[:, :-1], axis=1)
    return num, den


def _residual_reasons(E: np.ndarray, den: np.ndarray, Y) -> np.ndarray:
    """NaN; zero residuals (exactly, or below 1e-10 of the data norm when Y is given);
    constant data when Y is given."""
    reason = np.full(E.shape[0], R.OK, dtype=object)
    reason[~(den > 0)] = R.ZERO_RESIDUAL_VARIANCE
    if Y is not None:
        Y = _as_batch(Y, E.shape[1])
        if Y.shape != E.shape:
            raise ValueError(f"y has shape {Y.shape} but residuals have {E.shape}")
        reason = np.where(reason == R.OK, series_reasons(Y, np.where(np.isfinite(E), E, 0.0)),
                          reason)
    reason[~np.all(np.isfinite(E), axis=1)] = R.NON_FINITE_INPUT
    return reason


def residual_lag1_batch(E, X, y=None) -> pd.DataFrame:
    """``residual_lag1`` for each row of E (residuals of series sharing the design X);
    ``y`` (optional, same shape) lets constant series and exact fits be recognised."""
    X = _as_design(X)
    n, k = X.shape
    E = _as_batch(E, n)
    m = E.shape[0]
    nanm = np.full(m, np.nan)
    reason = np.full(m, R.OK, dtype=object)
    xreason = design_reason(X)
    if xreason:
        reason[:] = xreason
        return pd.DataFrame({"r1": nanm, "null_mean": nanm, "null_variance": nanm,
                             "r1_corrected": nanm, "z": nanm, "p_value": nanm,
                             "method": RESIDUAL_METHOD, "reason": reason})
    mean, var = residual_lag1_null_moments(X)
    Ef = np.where(np.isfinite(E), E, 0.0)
    num, den = _r1_rows(scale_rows(Ef, binary_exponents(Ef)))  # exact scaling; r1 is scale-free
    reason = _residual_reasons(E, den, y)
    ok = reason == R.OK
    with np.errstate(divide="ignore", invalid="ignore"):
        r1 = np.where(ok, num / np.where(ok, den, 1.0), np.nan)
    corrected = r1 - mean
    if var > 0:
        z = corrected / np.sqrt(var)
        p = 2.0 * stats.norm.sf(np.abs(z))
    else:  # n - k = 1: r1 is fixed by the design
        z = np.full(m, np.nan)
        p = np.full(m, np.nan)
        reason[ok] = R.ZERO_VARIANCE
    return pd.DataFrame({
        "r1": r1,
        "null_mean": np.where(reason == R.NON_FINITE_INPUT, np.nan, mean),
        "null_variance": np.where(reason == R.NON_FINITE_INPUT, np.nan, var),
        "r1_corrected": corrected,
        "z": z,
        "p_value": p,
        "method": RESIDUAL_METHOD,
        "reason": reason,
    })


def residual_lag1(residuals, X, y=None) -> ResidualLag1:
    """Lag-1 autocorrelation of residuals of y on X, corrected by its exact null mean
    tr(ML)/(n-k), with z = (r1 - E0)/sqrt(V0) (exact V0, Pitman-Koopmans) and approximate
    two-sided normal p-value.  ``residuals`` should be the OLS residuals of y on X; pass ``y``
    so that a constant series or an exact fit (rounding-level residuals) gets its reason code.
    """
    X = _as_design(X)
    e = np.asarray(residuals, dtype=float).ravel()
    n, k = X.shape
    if e.shape[0] != n:
        raise ValueError(f"residuals have {e.shape[0]} points but X has {n} rows")
    nan = float("nan")
    reason = design_reason(X)
    if reason:
        return ResidualLag1(nan, nan, nan, nan, nan, nan, RESIDUAL_METHOD, reason)
    if not np.all(np.isfinite(e)) or (y is not None and not np.all(np.isfinite(y))):
        return ResidualLag1(nan, nan, nan, nan, nan, nan, RESIDUAL_METHOD, R.NON_FINITE_INPUT)
    mean, var = residual_lag1_null_moments(X)
    ex = binary_exponents(e)
    es = scale_rows(e, ex)  # exact scaling (values near the float limits); r1 is scale-free
    den = float(es @ es)
    if not den > 0:
        return ResidualLag1(nan, mean, var, nan, nan, nan, RESIDUAL_METHOD,
                            R.ZERO_RESIDUAL_VARIANCE)
    if y is not None:
        yv = np.asarray(y, dtype=float).ravel()
        if yv.shape != e.shape:
            raise ValueError(f"y has {yv.shape[0]} points but residuals have {n}")
        code = str(series_reasons(yv[None, :], e[None, :])[0])
        if code:
            return ResidualLag1(nan, mean, var, nan, nan, nan, RESIDUAL_METHOD, code)
    r1 = float(es[1:] @ es[:-1]) / den
    if not var > 0:
        return ResidualLag1(r1, mean, var, r1 - mean, nan, nan, RESIDUAL_METHOD, R.ZERO_VARIANCE)
    z = (r1 - mean) / np.sqrt(var)
    p = float(2.0 * stats.norm.sf(abs(z)))
    return ResidualLag1(r1, mean, var, r1 - mean, float(z), p, RESIDUAL_METHOD, R.OK)


# ----------------------------------------------------------------------------- phases


def _phase_from_r1(n: int | np.ndarray, r1: np.ndarray):
    """(r1+, its standard error, z, one-sided p, two-sided p) from r1 of phases of n points."""
    se = (n - 2.0) / (n * np.sqrt(n - 1.0))
    r1p = r1 + 1.0 / n
    z = r1p / se
    return r1p, se, z, stats.norm.sf(z), 2.0 * stats.norm.sf(np.abs(z))


def phase_lag1(y) -> PhaseLag1:
    """Raw lag-1 autocorrelation of a phase about its mean and Huitema & McKean's r1+ test.

    r1 = sum_{t<n} (y_t - m)(y_{t+1} - m) / sum_t (y_t - m)^2;  r1+ = r1 + 1/n;
    z = r1+ / sqrt((n-2)^2 / (n^2 (n-1)))  (Huitema & McKean 1991, from memory).
    p_value_one_sided is for H1: rho > 0; p_value_two_sided for rho != 0 (normal reference).
    """
    y = np.asarray(y, dtype=float).ravel()
    n = int(y.shape[0])
    nan = float("nan")
    if not np.all(np.isfinite(y)):
        return PhaseLag1(n, nan, nan, nan, nan, nan, nan, PHASE_METHOD, R.NON_FINITE_INPUT)
    if n < 3:
        return PhaseLag1(n, nan, nan, nan, nan, nan, nan, PHASE_METHOD, R.TOO_FEW_POINTS)
    y = scale_rows(y, binary_exponents(y))  # exact; r1 is scale-free
    d = y - y.mean()
    den = float(d @ d)
    if np.ptp(y) <= 1e-12 * np.max(np.abs(y)) or not den > 0:
        return PhaseLag1(n, nan, nan, nan, nan, nan, nan, PHASE_METHOD, R.CONSTANT_SERIES)
    r1 = float(d[1:] @ d[:-1]) / den
    r1p, se, z, p1, p2 = _phase_from_r1(n, r1)
    return PhaseLag1(n, r1, float(r1p), float(se), float(z), float(p1), float(p2),
                     PHASE_METHOD, R.OK)


def phase_lag1_batch(Y) -> pd.DataFrame:
    """``phase_lag1`` for each row of Y (phases of equal length n)."""
    cols = phase_lag1_columns(Y)
    cols["method"] = PHASE_METHOD
    return pd.DataFrame(cols)


def phase_lag1_columns(Y) -> dict[str, np.ndarray]:
    """The columns of ``phase_lag1_batch`` as numpy arrays (no frame)."""
    Y = np.asarray(Y, dtype=float)
    if Y.ndim == 1:
        Y = Y[None, :]
    m, n = Y.shape
    r1, reason = phase_lag1_r1(Y)
    ok = reason == R.OK
    if n >= 3:
        r1p, se, z, p1, p2 = _phase_from_r1(n, r1)
    else:
        r1p = z = p1 = p2 = np.full(m, np.nan)
        se = np.nan
    return {
        "n": np.full(m, n),
        "r1": r1,
        "r1_plus": r1p,
        "std_error": np.where(ok, se, np.nan),
        "z": z,
        "p_value_one_sided": p1,
        "p_value_two_sided": p2,
        "method": np.full(m, PHASE_METHOD, dtype=object),
        "reason": reason,
    }


def phase_r1_plus(n: np.ndarray, r1: np.ndarray):
    """(r1+, standard error, z, one-sided p, two-sided p) of ``phase_lag1_batch`` for phases of
    sizes n (array) with raw r1 (NaN where undefined, then all NaN), all phase sizes at once."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return _phase_from_r1(np.asarray(n, dtype=float), r1)


def phase_lag1_r1(Y) -> tuple[np.ndarray, np.ndarray]:
    """(raw r1, reason code) of ``phase_lag1_batch`` for each row of Y (2-D, phases of equal length)."""
    m, n = Y.shape
    reason = np.full(m, R.OK, dtype=object)
    finite = np.all(np.isfinite(Y), axis=1)
    Yf = np.where(np.isfinite(Y), Y, 0.0)
    Yf = scale_rows(Yf, binary_exponents(Yf))  # exact; r1 is scale-free
    D = Yf - Yf.mean(axis=1, keepdims=True)
    num, den = _r1_rows(D)
    const = (np.ptp(Yf, axis=1) <= 1e-12 * np.max(np.abs(Yf), axis=1)) | ~(den > 0)
    reason[const] = R.CONSTANT_SERIES
    if n < 3:
        reason[:] = R.TOO_FEW_POINTS
    reason[~finite] = R.NON_FINITE_INPUT
    ok = reason == R.OK
    return np.where(ok, num / np.where(ok, den, 1.0), np.nan), reason
