"""AR(1) coefficient of a case from its residual lag-1 autocorrelation r1, by inverting the exact
expectation of r1 under AR(1) errors (used by the review summary, ``audit.summary``).

    rho_i = m_i^{-1}(r1_i),   m_i(rho) = E_rho[e'Le / e'e],  e = M x,  x ~ N(0, R(rho)).

With N a basis of the residual space of the case's design X, w = N'x ~ N(0, G), G = N'R(rho)N,
and r1 = w'Aw / w'w with A = N'LN.  The integral of Sawa (1978) / Magnus (1986),

    E[w'Aw / w'w] = int_0^inf prod_j (1 + 2t g_j)^(-1/2) sum_j g_j (q_j'Aq_j) / (1 + 2t g_j) dt,

(g_j, q_j) the eigenpairs of G, is evaluated by Gauss-Legendre quadrature in s with
t = s / (1 - s) / (2 g_geo) (g_geo the geometric mean of the g_j).  At rho = 0 it is the exact
null mean tr(ML)/(n-k) (Pitman-Koopmans).

Two paths, equal to the root tolerance (tests/test_r1_calibration.py):

* ``ar1_from_residual_lag1`` (reference, one design and many r1): m on a grid of rho in
  [-0.95, 0.95] (step 0.025) to bracket each root, then ``scipy.optimize.brentq`` on m inside
  the bracket;
* ``ar1_from_residual_lag1_rows`` (many cases, each with its own design, stacked by (n, k)):
  safeguarded secant steps on all rows at once from the first-order value.

Rows with r1 beyond m(+-0.95) get +-0.95 and ``at_bound``.  m is increasing in rho for usual
designs; for a few designs with few residual degrees of freedom it turns slightly near +-0.95,
and then both paths take the root nearest the first-order value (they agree when that root is
unique, which the tests check).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from audit import reasons as R
from audit.autocorrelation import lag_matrix

__all__ = [
    "RHO_BOUND",
    "AR1FromResidualLag1",
    "residual_lag1_mean_from_covariance",
    "residual_lag1_mean_under_ar1",
    "residual_lag1_mean_rows",
    "ar1_from_residual_lag1",
    "ar1_from_residual_lag1_rows",
]

RHO_BOUND = 0.95
ROOT_XTOL = 1e-10  # tolerance on rho of both root finders
_GRID = np.round(np.linspace(-RHO_BOUND, RHO_BOUND, 77), 6)  # step 0.025 (reference bracketing)
_SECANT_MAX_ITER = 100


@functools.lru_cache(maxsize=4)
def _gauss_legendre_unit(nodes: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on (0, 1) (cached: leggauss solves an eigenproblem)."""
    x, w = np.polynomial.legendre.leggauss(nodes)
    return (x + 1.0) / 2.0, w / 2.0


def residual_lag1_mean_from_covariance(G: np.ndarray, A: np.ndarray) -> np.ndarray:
    """E[w'Aw / w'w] for w ~ N(0, G): G (..., p, p) positive definite, A (p, p) or (..., p, p)."""
    p = G.shape[-1]
    g, Q = np.linalg.eigh(0.5 * (G + np.swapaxes(G, -1, -2)))
    g = np.clip(g, 1e-300, None)
    a = g * np.sum(Q * (A @ Q), axis=-2)  # g_j * q_j' A q_j
    s, wq = _gauss_legendre_unit(128 if p <= 100 else 256)
    scale = np.exp(np.mean(np.log(g), axis=-1))
    t = s / (1.0 - s) / (2.0 * scale[..., None])
    jac = (1.0 / (1.0 - s) ** 2) / (2.0 * scale[..., None])
    D = 1.0 + 2.0 * t[..., :, None] * g[..., None, :]
    f = np.exp(-0.5 * np.sum(np.log(D), axis=-1)) * np.sum(a[..., None, :] / D, axis=-1) * jac
    return f @ wq


def _residual_basis(X: np.ndarray) -> np.ndarray:
    """Orthonormal basis N (n x (n-k)) of the residual space of X."""
    n, k = X.shape
    q = np.linalg.qr(X, mode="complete")[0]
    return q[:, k:]


def _lags(n: int) -> np.ndarray:
    return np.abs(np.subtract.outer(np.arange(n), np.arange(n)))


def residual_lag1_mean_under_ar1(X, rhos) -> np.ndarray:
    """Exact E_rho[r1] of OLS residuals on X under stationary AR(1) errors, for each rho
    (NaN for |rho| >= 1, no residual df or a rank-deficient X)."""
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    n, k = X.shape
    r = np.atleast_1d(np.asarray(rhos, dtype=float))
    out = np.full(r.shape, np.nan)
    use = np.isfinite(r) & (np.abs(r) < 1)
    if n - k < 1 or not use.any() or np.linalg.matrix_rank(X) < k:
        return out
    N = _residual_basis(X)
    A = N.T @ lag_matrix(n) @ N
    G = N.T[None] @ (r[use][:, None, None] ** _lags(n)[None]) @ N[None]
    out[use] = residual_lag1_mean_from_covariance(G, A)
    return out


def residual_lag1_mean_rows(N: np.ndarray, A: np.ndarray, rho: np.ndarray) -> np.ndarray:
    """E_rho[r1] for rows with their own residual basis N (m, n, p), A = N'LN (m, p, p), rho (m,)."""
    n = N.shape[1]
    powers = np.asarray(rho, dtype=float)[:, None] ** np.arange(n)[None, :]  # rho^0 .. rho^(n-1)
    S = powers[:, _lags(n)]  # R(rho)_ij = rho^|i-j|
    G = np.swapaxes(N, 1, 2) @ (S @ N)
    return residual_lag1_mean_from_covariance(G, A)


@dataclass(frozen=True)
class AR1FromResidualLag1:
    """AR(1) coefficient from the residual lag-1 autocorrelation by inverting E_rho[r1]."""

    rho: np.ndarray
    variance: np.ndarray
    at_bound: np.ndarray
    method: str
    reason: np.ndarray


EXACT = "exact mean inversion"
FIRST_ORDER = "first order"


def _finish(r1, rho, at_bound, df, v0, mu0, slope_only: bool, reason, method) -> AR1FromResidualLag1:
    """Variance 1/((n-k)^2 V0), first-order rho where asked, NaN and reasons for unusable rows."""
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = df * v0
        variance = np.where(slope > 0, 1.0 / (df * slope), np.nan)
        if slope_only:
            raw = (r1 - mu0) / slope
            rho = np.clip(raw, -RHO_BOUND, RHO_BOUND)
            at_bound = np.isfinite(raw) & (np.abs(raw) >= RHO_BOUND)
    bad = ~np.isfinite(r1)
    reason[bad & (reason == R.OK)] = R.NON_FINITE_INPUT
    novar = ~(slope > 0)
    reason[novar & (reason == R.OK)] = R.ZERO_VARIANCE
    rho = np.where(bad | novar, np.nan, rho)
    variance = np.where(bad | novar, np.nan, variance)
    return AR1FromResidualLag1(rho, variance, at_bound & ~bad, method, reason)


def ar1_from_residual_lag1(r1, X=None, *, null_mean=None, null_variance=None, n_obs=None, n_params=None
                           ) -> AR1FromResidualLag1:
    """AR(1) coefficient(s) from residual r1 of cases sharing design X (exact mean inversion).

    With X: rho solves m(rho) = r1 in [-0.95, 0.95]: the grid interval where m - r1 changes sign
    (the one nearest the first-order value if m is not monotone there), then brentq to
    ``ROOT_XTOL``; +-0.95 with ``at_bound`` when r1 is beyond m on the whole grid on that side.
    Reason ``numerical_failure`` (rho NaN) when m is not finite on the grid, m(0.95) <= m(-0.95)
    or V0 = 0 (r1 fixed by the design).
    Without X (first order): rho = (r1 - E0) / ((n-k) V0) from the null moments given.
    Variance (both): 1 / ((n-k)^2 V0), the exact null variance carried by the exact slope at 0.
    """
    r1 = np.atleast_1d(np.asarray(r1, dtype=float))
    m = r1.shape[0]
    reason = np.full(m, R.OK, dtype=object)
    if X is None:
        df = np.broadcast_to(np.asarray(n_obs, float) - np.asarray(n_params, float), (m,)).astype(float)
        v0 = np.broadcast_to(np.asarray(null_variance, dtype=float), (m,)).astype(float)
        mu0 = np.broadcast_to(np.asarray(null_mean, dtype=float), (m,)).astype(float)
        return _finish(r1, np.full(m, np.nan), np.zeros(m, bool), df, v0, mu0, True, reason, FIRST_ORDER)

    from audit.autocorrelation import residual_lag1_null_moments

    X = np.asarray(X, dtype=float)
    n, k = X.shape
    mu0, v0 = residual_lag1_null_moments(X)
    curve = residual_lag1_mean_under_ar1(X, _GRID)
    rho = np.full(m, np.nan)
    at_bound = np.zeros(m, dtype=bool)
    if not (np.all(np.isfinite(curve)) and curve[-1] > curve[0] and v0 > 0):
        reason[:] = R.NUMERICAL_FAILURE
    else:
        start = np.clip((r1 - mu0) / ((n - k) * v0), -0.9, 0.9)  # first-order value
        centre = 0.5 * (_GRID[1:] + _GRID[:-1])
        for i in np.flatnonzero(np.isfinite(r1)):
            f_grid = curve - r1[i]
            cross = np.flatnonzero(f_grid[:-1] * f_grid[1:] <= 0)
            if cross.size == 0:  # beyond m(+-0.95): the bound on that side
                rho[i] = RHO_BOUND if r1[i] > curve[-1] else -RHO_BOUND
                at_bound[i] = True
                continue
            j = cross[np.argmin(np.abs(centre[cross] - start[i]))]  # the crossing nearest the start
            if f_grid[j] == 0 or f_grid[j + 1] == 0:
                rho[i] = _GRID[j] if f_grid[j] == 0 else _GRID[j + 1]
            else:
                f = lambda x, target=r1[i]: residual_lag1_mean_under_ar1(X, [x])[0] - target  # noqa: E731
                rho[i] = optimize.brentq(f, _GRID[j], _GRID[j + 1], xtol=ROOT_XTOL, rtol=4 * np.finfo(float).eps)
            at_bound[i] = abs(rho[i]) >= RHO_BOUND
    return _finish(r1, rho, at_bound, np.full(m, float(n - k)), np.full(m, v0), np.full(m, mu0), False,
                   reason, EXACT)


def ar1_from_residual_lag1_rows(r1, N, A, null_variance) -> AR1FromResidualLag1:
    """``ar1_from_residual_lag1`` for rows with their own design: N (m, n, p) residual bases,
    A = N'LN (m, p, p), V0 (m,) exact null variances of r1.

    Safeguarded secant steps on all active rows at once (``_secant_roots``), from the first-order
    value.  Rows with V0 = 0 (r1 fixed by the design) or a non-finite E_rho[r1] get reason
    ``numerical_failure`` (the caller may then use the first-order path), as in the reference.
    """
    r1 = np.atleast_1d(np.asarray(r1, dtype=float))
    N = np.asarray(N, dtype=float)
    A = np.asarray(A, dtype=float)
    v0 = np.asarray(null_variance, dtype=float)
    m, n, p = N.shape
    reason = np.full(m, R.OK, dtype=object)
    rho = np.full(m, np.nan)
    at_bound = np.zeros(m, dtype=bool)
    if m and p >= 1:
        slope0 = p * v0  # exact slope of E_rho[r1] at rho = 0
        broken = ~(slope0 > 0)
        fin = np.isfinite(r1) & ~broken
        act = np.flatnonzero(fin)
        if act.size:
            root, bound, failed = _secant_roots(r1[act], N[act], A[act], slope0[act])
            rho[act], at_bound[act] = root, bound
            broken[act[failed]] = True
            rho[act[failed]] = np.nan
        reason[broken] = R.NUMERICAL_FAILURE
    else:
        reason[:] = R.NO_RESIDUAL_DF
    df = np.full(m, float(p))  # n - k
    return _finish(r1, rho, at_bound, df, v0, np.zeros(m), False, reason, EXACT)


def _secant_roots(target, N, A, slope0):
    """Roots of f(rho) = E_rho[r1] - target in [-0.95, 0.95] for all rows at once (f increasing).

    Start: x0 = the first-order value (r1 - E_0[r1]) / slope0 clipped to +-0.9, and one Newton step
    with the slope at 0; then secant steps kept inside the bracket known so far (a step out of it
    goes to the bound when f is not known there yet, else bisects the bracket).  A row whose root lies beyond a bound stops there once
    f(bound) has the sign that shows it (``at_bound``).  Converged when the step or the bracket
    is below ``ROOT_XTOL``.  Returns (root, at_bound, failed).
    """
    m = target.size
    mean0 = np.trace(A, axis1=1, axis2=2) / A.shape[1]  # E_0[r1] = tr(N'LN) / (n-k)
    x_prev = np.clip((target - mean0) / slope0, -0.9, 0.9)
    f_prev = residual_lag1_mean_rows(N, A, x_prev) - target
    lo = np.where(f_prev < 0, x_prev, -RHO_BOUND)
    hi = np.where(f_prev > 0, x_prev, RHO_BOUND)
    lo_seen = f_prev < 0  # f evaluated at lo (else lo is the bound, not yet evaluated)
    hi_seen = f_prev > 0
    x = np.clip(x_prev - f_prev / slope0, -RHO_BOUND, RHO_BOUND)
    root = x_prev.copy()
    bound = np.zeros(m, dtype=bool)
    failed = ~np.isfinite(f_prev)
    done = failed | (f_prev == 0)
    live = np.flatnonzero(~done)
    for _ in range(_SECANT_MAX_ITER):
        if live.size == 0:
            break
        xl = x[live]
        fl = residual_lag1_mean_rows(N[live], A[live], xl) - target[live]
        bad = ~np.isfinite(fl)
        failed[live[bad]] = True
        root[live] = xl
        at_hi = (xl >= RHO_BOUND) & (fl <= 0)
        at_lo = (xl <= -RHO_BOUND) & (fl >= 0)
        bound[live] = at_hi | at_lo
        up, down = fl < 0, fl > 0
        lo[live] = np.where(up, np.maximum(lo[live], xl), lo[live])
        hi[live] = np.where(down, np.minimum(hi[live], xl), hi[live])
        lo_seen[live] |= up
        hi_seen[live] |= down
        with np.errstate(divide="ignore", invalid="ignore"):
            step = fl * (xl - x_prev[live]) / (fl - f_prev[live])
        nxt = xl - step
        L, H = lo[live], hi[live]
        inside = np.isfinite(nxt) & (nxt > L) & (nxt < H)
        # a step out of the bracket: try the bound itself if f is not known there, else bisect
        beyond_hi = np.isfinite(nxt) & (nxt >= H) & ~hi_seen[live]
        beyond_lo = np.isfinite(nxt) & (nxt <= L) & ~lo_seen[live]
        nxt = np.where(inside, nxt, np.where(beyond_hi, H, np.where(beyond_lo, L, 0.5 * (L + H))))
        x_prev[live], f_prev[live] = xl, fl
        x[live] = nxt
        conv = ((np.abs(nxt - xl) <= ROOT_XTOL) | (H - L <= ROOT_XTOL) | (fl == 0)) & ~bad
        fin_step = conv & ~(at_hi | at_lo) & (fl != 0)
        root[live[fin_step]] = nxt[fin_step]
        finished = bad | at_hi | at_lo | conv
        live = live[~finished]
    return root, bound, failed
