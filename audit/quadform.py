"""Distribution of quadratic forms in independent standard normal variables.

Q = sum_j lam_j z_j^2, z_j iid N(0, 1).  The main function gives P(Q < 0) for many rows of
eigenvalues at once by Imhof's (1961) inversion formula

    P(Q < 0) = 1/2 - (1/pi) * int_0^inf sin(theta(u)) / (u rho(u)) du,
    theta(u) = 1/2 sum_j arctan(lam_j u),   rho(u) = prod_j (1 + lam_j^2 u^2)^(1/4).

Numerical scheme (error controlled, vectorised over rows; see ``_imhof_rows``):
  * the eigenvalues of a row are divided by sqrt(sum lam^2) (P is scale free), so the
    integrand varies on a scale of order 1 in u whatever p is;
  * every panel is integrated by the 21-point Gauss-Kronrod rule (K21, QUADPACK qk21);
  * u in [0, 2]: one panel (the integrand is analytic in the strip |Im u| < 1, its
    singularities are at u = +-i/|lam_j| and |lam_j| <= 1);
  * u in [2, U]: substitution u = exp(t) (du/u = dt), integrand sin(theta)/rho, initial
    panels in t of width 1.5 (where the integrand changes fastest), ``_PANEL_WIDTH`` (2) up
    to 3.5, then 4 (``_t_panel_edges``); the acceptance rule below is the same on every
    panel.  In t the integrand is analytic in the strip |Im t| < pi/2 (singularities at
    t = -log|lam_j| +- i pi/2), so Gauss-Kronrod converges geometrically on every panel
    whatever the spread of the eigenvalues;
  * tail u > U: |sin theta| <= 1 and rho(u) >= prod_{j in S} (|lam_j| u)^(1/2) for any subset
    S, so int_U^inf <= 2 / (q U^(q/2) prod_{j<=q} |lam_(j)|^(1/2)) for the q largest |lam|;
    U is the smallest over q that makes this bound <= ``_TAIL_TOL`` (1e-12);
  * adaptive refinement, with |K21 - G10| (the difference with the embedded 10-point Gauss
    rule, a conservative estimate of the K21 error) as the error of a panel: a row is finished
    when the errors of all its panels (accepted and just evaluated) add up to at most
    ``_QUAD_TOL`` (1e-9 for the whole integral); in a row that is not, a panel is accepted
    when its error is below its share of _QUAD_TOL (in proportion to panel length), otherwise
    it is split in two (at most ``_MAX_SPLIT`` times).  Either way the errors of a row's
    accepted panels add up to at most _QUAD_TOL: a row finished by the first rule has checked
    the sum, and a row never finished by it has accepted every panel within its share.
  The returned error bound is (tail bound + sum of |K21 - G10|)/pi, at most about 3.5e-10;
  the K21 values themselves are far more accurate (agreement with the reference
  computations below is typically 1e-13 to 1e-15).  The rule and the initial panels were
  chosen for the fewest integrand evaluations at this error control on Durbin-Watson rows
  (residual df 4 to 38): the 10-point Gauss rule is far more accurate than the 7-point one on
  a panel, so wider panels pass and the 21 nodes cover more of the range than 15 nodes do.

Exact cases: rows with all nonzero eigenvalues of one sign give 0 or 1; rows of zeros give
NaN; rows with two nonzero eigenvalues of opposite sign use the closed form
P(a z1^2 - b z2^2 < 0) = (2/pi) arctan(sqrt(b/a)) (z1/z2 is standard Cauchy), because the
Imhof tail decays only like u^(-2) there.

Two independent computations for verification (per row, slow, not for the hot path):
``prob_quadform_below_zero_reference`` (scipy.integrate.quad on the untransformed Imhof
integrand) and ``prob_quadform_below_zero_pan`` (Pan 1968 / Farebrother 1980 finite-interval
formula, distinct eigenvalues).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate

__all__ = [
    "prob_quadform_below_zero",
    "prob_quadform_below_zero_reference",
    "prob_quadform_below_zero_pan",
    "ratio_quantile",
]

# Integral-scale tolerances (P error = integral error / pi).
_TAIL_TOL = 1e-12
_QUAD_TOL = 1e-9
_PANEL_WIDTH = 2.0
_MAX_SPLIT = 12
# Initial t panels (see _t_panel_edges), lengths in t = log u from log(_FIRST_PANEL_END).
_NARROW_SPAN = 1.5
_NARROW_WIDTH = 1.5
_WIDE_START = 3.5
_WIDE_WIDTH = 4.0
_FIRST_PANEL_END = 2.0  # in units of 1 / sqrt(sum lam^2)
# Block size (rows * nodes * p) for the vectorised evaluation: bounds memory use and keeps the
# temporaries of a block (about 200 kB each) in the processor cache.
_BLOCK_ELEMENTS = 24_000

# 15-point Gauss-Kronrod rule on [-1, 1] with its embedded 7-point Gauss rule (QUADPACK qk15;
# the nodes of the fixed Gauss panels of audit.stacked).
_XGK = np.array([
    0.991455371120812639206854697526329, 0.949107912342758524526189684047851,
    0.864864423359769072789712788640926, 0.741531185599394439863864773280788,
    0.586087235467691130294144845693013, 0.405845151377397166906606412076961,
    0.207784955007898467600689403773245, 0.000000000000000000000000000000000,
])
_WGK = np.array([
    0.022935322010529224963732008058970, 0.063092092629978553290700663189204,
    0.104790010322250183839876322541518, 0.140653259715525918745189590510238,
    0.169004726639267902826583426598550, 0.190350578064785409913256402421014,
    0.204432940075298892414161999234649, 0.209482141084727828012999174891714,
])
_WG = np.array([
    0.129484966168869693270611432679082, 0.279705391489276667901467771423780,
    0.381830050505118944950369775488975, 0.417959183673469387755102040816327,
])
# Full node/weight vectors (15 nodes, ascending) and the Gauss weights on the same nodes.
KRONROD_NODES = np.concatenate([-_XGK[:-1], _XGK[::-1]])
KRONROD_WEIGHTS = np.concatenate([_WGK[:-1], _WGK[::-1]])
_wg_full = np.zeros(8)
_wg_full[1::2] = _WG
GAUSS7_WEIGHTS_ON_KRONROD_NODES = np.concatenate([_wg_full[:-1], _wg_full[::-1]])

# 21-point Gauss-Kronrod rule on [-1, 1] with its embedded 10-point Gauss rule (QUADPACK qk21):
# the rule of the error-controlled integral.
_XGK21 = np.array([
    0.995657163025808080735527280689003, 0.973906528517171720077964012084452,
    0.930157491355708226001207180059508, 0.865063366688984510732096688423493,
    0.780817726586416897063717578345042, 0.679409568299024406234327365114874,
    0.562757134668604683339000099272694, 0.433395394129247190799265943165784,
    0.294392862701460198131126603103866, 0.148874338981631210884826001129720,
    0.000000000000000000000000000000000,
])
_WGK21 = np.array([
    0.011694638867371874278064396062192, 0.032558162307964727478818972459390,
    0.054755896574351996031381300244580, 0.075039674810919952767043140916190,
    0.093125454583697605535065465083366, 0.109387158802297641899210590325805,
    0.123491976262065851077958109831074, 0.134709217311473325928054001771707,
    0.142775938577060080797094273138717, 0.147739104901338491374841515972068,
    0.149445554002916905664936468389821,
])
_WG10 = np.array([
    0.066671344308688137593568809893332, 0.149451349150580593145776339657697,
    0.219086362515982043995534934228163, 0.269266719309996355091226921569469,
    0.295524224714752870173892994651338,
])
# Full node/weight vectors (21 nodes, ascending); the 10 Gauss nodes are every second one.
_K21_NODES = np.concatenate([-_XGK21[:-1], _XGK21[::-1]])
_K21_WEIGHTS = np.concatenate([_WGK21[:-1], _WGK21[::-1]])
_wg10_full = np.zeros(11)
_wg10_full[1::2] = _WG10
_K21_DIFF_WEIGHTS = _K21_WEIGHTS - np.concatenate([_wg10_full[:-1], _wg10_full[::-1]])


def _imhof_sin_over_rho(lam: np.ndarray, u: np.ndarray) -> np.ndarray:
    """sin(theta(u)) / rho(u) for rows lam (r, p) and nodes u (r, q); returns (r, q).

    The sums over the eigenvalues are products with a vector of ones (BLAS), much faster
    than ``sum`` along the short last axis.  The products lam_j u_i are formed by ``einsum``
    (the same products, one rounding each): a broadcast multiplication copies both operands
    through buffers first, which costs nearly as much as the arctan.
    """
    x = np.einsum("rq,rp->rqp", u, lam)
    ones = np.ones(lam.shape[1])
    theta = 0.5 * (np.arctan(x) @ ones)
    np.multiply(x, x, out=x)
    log_rho = 0.25 * (np.log1p(x, out=x) @ ones)
    return np.sin(theta) * np.exp(-log_rho)


def _tail_log_u(a_sorted: np.ndarray) -> np.ndarray:
    """log U such that the Imhof tail beyond U is <= _TAIL_TOL (rows of |lam| sorted desc)."""
    r, p = a_sorted.shape
    q = np.arange(1, p + 1, dtype=float)
    with np.errstate(divide="ignore"):
        cum_log = np.cumsum(np.log(a_sorted), axis=1)
    log_u = (2.0 / q) * (math.log(2.0) - np.log(q) - math.log(_TAIL_TOL) - 0.5 * cum_log)
    log_u = np.where(np.isfinite(log_u), log_u, np.inf)
    return log_u.min(axis=1)


def _gk_panels(lam, rows, mid, half, kind_u):
    """K21 value and |K21 - G10| on panels (rows, mid, half); kind_u: panel in u, else in t."""
    x = mid[:, None] + half[:, None] * _K21_NODES
    in_u = np.flatnonzero(kind_u)
    u = np.exp(x)
    if in_u.size:
        u[in_u] = x[in_u]
    vals = _imhof_sin_over_rho(lam[rows], u)
    if in_u.size:
        vals[in_u] /= u[in_u]
    return half * (vals @ _K21_WEIGHTS), half * np.abs(vals @ _K21_DIFF_WEIGHTS)


def _t_panel_edges(span: float) -> np.ndarray:
    """Edges (from 0, in t - log(_FIRST_PANEL_END)) of the initial t panels, covering at least ``span``.

    The integrand changes fastest just after the u panel: there the first ``_NARROW_SPAN`` is
    cut into panels of width ``_NARROW_WIDTH`` (a panel of width _PANEL_WIDTH there fails the
    acceptance rule so often that its evaluation does not pay); then panels of width
    _PANEL_WIDTH up to ``_WIDE_START``, then of width ``_WIDE_WIDTH`` (the integrand decays
    smoothly there, and a panel of width _PANEL_WIDTH is far more accurate than needed).  The
    acceptance rule is the same on every panel, so the starting partition changes how many
    panels are evaluated, not the error control.
    """
    narrow = np.arange(0.0, _NARROW_SPAN - 1e-9, _NARROW_WIDTH)
    middle = np.arange(_NARROW_SPAN, _WIDE_START, _PANEL_WIDTH)
    n_wide = max(int(math.ceil((max(span, 0.0) - _WIDE_START) / _WIDE_WIDTH)), 0) + 1
    wide = _WIDE_START + _WIDE_WIDTH * np.arange(n_wide)
    return np.concatenate([narrow, middle, wide])


def _imhof_rows(lam: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """P(Q < 0) and its error bound for mixed-sign rows lam (r, p) with sum lam^2 = 1.

    Adaptive Gauss-Kronrod over all rows at once: a flat queue of panels (row, centre,
    half-width, kind) is evaluated in blocks; all panels of a row are accepted when the sum
    of |K21 - G10| over the row's panels is at most _QUAD_TOL, otherwise each panel whose
    |K21 - G10| is below its share of _QUAD_TOL (in proportion to its length) is accepted and
    the others are split in two.  The initial panels of most rows pass the first test (the
    errors of a row's panels differ by orders of magnitude, so a panel above its share is
    paid for by the unused shares of the others), so few rows need any split.
    """
    r, p = lam.shape
    t_hi = _tail_log_u(-np.sort(-np.abs(lam), axis=1))
    t0 = math.log(_FIRST_PANEL_END)
    # Initial queue: one u panel [0, _FIRST_PANEL_END] and the t panels of _t_panel_edges up to the first
    # edge at or beyond t_hi (row by row).
    edges = _t_panel_edges(float(np.max(t_hi)) - t0)
    n_t = np.minimum(np.searchsorted(edges, t_hi - t0), edges.size - 1)
    n_t = np.maximum(n_t, 1)
    length = edges[n_t] + 1.0  # the u panel counts as length 1
    total = np.zeros(r)
    err = np.full(r, _TAIL_TOL)
    rows_t = np.repeat(np.arange(r), n_t)
    k = np.arange(rows_t.size) - np.repeat(np.cumsum(n_t) - n_t, n_t)
    width = edges[k + 1] - edges[k]
    half0 = 0.5 * _FIRST_PANEL_END
    rows = np.concatenate([np.arange(r), rows_t])
    mid = np.concatenate([np.full(r, half0), t0 + 0.5 * (edges[k] + edges[k + 1])])
    half = np.concatenate([np.full(r, half0), 0.5 * width])
    kind_u = np.concatenate([np.ones(r, bool), np.zeros(rows_t.size, bool)])
    share = np.concatenate([np.ones(r), width])
    block = max(1, _BLOCK_ELEMENTS // (_K21_NODES.size * max(p, 1)))
    depth = 0
    while rows.size:
        val = np.empty(rows.size)
        e = np.empty(rows.size)
        for s in range(0, rows.size, block):
            sl = slice(s, s + block)
            val[sl], e[sl] = _gk_panels(lam, rows[sl], mid[sl], half[sl], kind_u[sl])
        # rows whose error (tail bound and accepted panels in err, plus these panels) is
        # within the budget are finished; in the others each panel is held to its share
        row_err = err + np.bincount(rows, weights=e, minlength=r)
        row_done = row_err <= _TAIL_TOL + _QUAD_TOL
        accept = row_done[rows] | (e <= _QUAD_TOL * share / length[rows]) | (depth >= _MAX_SPLIT)
        np.add.at(total, rows[accept], val[accept])
        np.add.at(err, rows[accept], e[accept])
        split = ~accept
        rows, mid, half = rows[split], mid[split], 0.5 * half[split]
        kind_u, share = kind_u[split], 0.5 * share[split]
        rows = np.concatenate([rows, rows])
        mid = np.concatenate([mid - half, mid + half])
        half = np.concatenate([half, half])
        kind_u = np.concatenate([kind_u, kind_u])
        share = np.concatenate([share, share])
        depth += 1
    prob = 0.5 - total / math.pi
    return np.clip(prob, 0.0, 1.0), err / math.pi


def _imhof_by_width(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``_imhof_rows`` on rows grouped by their number of nonzero eigenvalues, each row's
    nonzeros moved to the front and the zero columns dropped (zeros contribute nothing to
    theta or rho, but cost as much as any eigenvalue to evaluate): rows padded to a common
    width, such as the main and the session-only Durbin-Watson rows of one stack, are then
    integrated at their own width."""
    nonzero = rows != 0.0
    count = nonzero.sum(axis=1)
    if np.all(count == rows.shape[1]):
        return _imhof_rows(np.ascontiguousarray(rows))
    # stable sort of each row on "is zero": its nonzeros first, in their order
    order = np.argsort(~nonzero, axis=1, kind="stable")
    packed = np.take_along_axis(rows, order, axis=1)
    prob = np.empty(rows.shape[0])
    err = np.empty(rows.shape[0])
    for width in np.unique(count):
        sel = np.flatnonzero(count == width)
        prob[sel], err[sel] = _imhof_rows(np.ascontiguousarray(packed[sel, :width]))
    return prob, err


def prob_quadform_below_zero(eigenvalues, *, return_error: bool = False):
    """P(sum_j lam_j z_j^2 < 0), z iid N(0,1), by Imhof (1961) numerical inversion.

    eigenvalues: shape (p,) or (m, p); rows may be zero-padded (zeros contribute nothing).
    Returns a float for (p,) input, an (m,) array for (m, p) input; with return_error=True
    also the bound on the absolute error (0 for rows computed exactly).  Rows containing
    non-finite values or only zeros give NaN.  Absolute error bound < 4e-10 (module notes).
    """
    lam = np.asarray(eigenvalues, dtype=float)
    one_row = lam.ndim == 1
    lam = np.atleast_2d(lam)
    if lam.ndim != 2:
        raise ValueError(f"eigenvalues must have shape (p,) or (m, p), got {lam.shape}")
    m = lam.shape[0]
    prob = np.full(m, np.nan)
    err = np.full(m, np.nan)
    if lam.shape[1] > 0 and m > 0:
        finite = np.all(np.isfinite(lam), axis=1)
        safe = np.where(finite[:, None], lam, 0.0)
        scale = np.sqrt((safe * safe).sum(axis=1))
        n_pos = (safe > 0).sum(axis=1)
        n_neg = (safe < 0).sum(axis=1)
        ok = finite & (scale > 0)
        only_pos = ok & (n_neg == 0)
        only_neg = ok & (n_pos == 0)
        prob[only_pos], err[only_pos] = 0.0, 0.0
        prob[only_neg], err[only_neg] = 1.0, 0.0
        mixed = ok & (n_pos > 0) & (n_neg > 0)
        two = mixed & (n_pos + n_neg == 2)
        if two.any():
            rows = safe[two]
            a = np.where(rows > 0, rows, 0.0).sum(axis=1)
            b = -np.where(rows < 0, rows, 0.0).sum(axis=1)
            prob[two] = (2.0 / math.pi) * np.arctan(np.sqrt(b / a))
            err[two] = 0.0
        many = np.flatnonzero(mixed & ~two)
        if many.size:
            prob[many], err[many] = _imhof_by_width(safe[many] / scale[many, None])
    if one_row:
        return (float(prob[0]), float(err[0])) if return_error else float(prob[0])
    return (prob, err) if return_error else prob


# ----------------------------------------------------------------------------- references


def _trivial(lam: np.ndarray) -> float | None:
    """Exact answer for rows that need no integral (one-signed, zero, non-finite), else None."""
    if not np.all(np.isfinite(lam)) or not np.any(lam != 0):
        return float("nan")
    if not np.any(lam < 0):
        return 0.0
    if not np.any(lam > 0):
        return 1.0
    return None


def prob_quadform_below_zero_reference(eigenvalues) -> np.ndarray | float:
    """P(sum lam_j z_j^2 < 0) by scipy.integrate.quad on the untransformed Imhof integrand.

    Verification path (one quad call per row, slow).  The range is split at 1/max|lam|,
    [0, 1/max|lam|] by QAGS, [1/max|lam|, inf) by QAGI, epsabs 1e-13, epsrel 1e-12.
    """
    lam = np.asarray(eigenvalues, dtype=float)
    one_row = lam.ndim == 1
    rows = np.atleast_2d(lam)
    out = np.empty(rows.shape[0])
    for i, row in enumerate(rows):
        triv = _trivial(row)
        if triv is not None:
            out[i] = triv
            continue
        row = row[row != 0]

        def f(u, row=row):
            if u == 0.0:
                return 0.5 * row.sum()
            x = row * u
            return math.sin(0.5 * np.arctan(x).sum()) / (u * math.exp(0.25 * np.log1p(x * x).sum()))

        split = 1.0 / np.abs(row).max()
        opts = dict(epsabs=1e-13, epsrel=1e-12, limit=2000)
        i1 = integrate.quad(f, 0.0, split, **opts)[0]
        i2 = integrate.quad(f, split, np.inf, **opts)[0]
        out[i] = 0.5 - (i1 + i2) / math.pi
    return float(out[0]) if one_row else out


def prob_quadform_below_zero_pan(eigenvalues) -> np.ndarray | float:
    """P(sum lam_j z_j^2 < 0) by Pan's (1968) formula (as in Farebrother 1980, AS 153).

    With the positive eigenvalues l_1 > ... > l_r > 0 (l_{r+1} = 0), p nonzero eigenvalues,
    P(Q > 0) = (1/pi) sum_{odd s <= r} (-1)^((s-1)/2) int_{l_{s+1}}^{l_s} x^(p/2-1) /
    sqrt(prod_j |x - lam_j|) dx  (a contour deformation of the Gil-Pelaez integral onto the
    branch cuts of the moment generating function).  Each integral is taken after the
    substitution x = lo + (hi - lo) sin^2(phi), which removes the endpoint singularities,
    by scipy.integrate.quad.  Needs distinct nonzero eigenvalues.  Verification path.
    """
    lam = np.asarray(eigenvalues, dtype=float)
    one_row = lam.ndim == 1
    rows = np.atleast_2d(lam)
    out = np.empty(rows.shape[0])
    for i, row in enumerate(rows):
        triv = _trivial(row)
        if triv is not None:
            out[i] = triv
            continue
        row = row[row != 0] / np.abs(row).max()
        # Integrate over the side with fewer positive eigenvalues: P(Q<0) = P(-Q>0) directly
        # when the positive ones are the majority (few intervals, no cancellation).
        flip = (row > 0).sum() > (row < 0).sum()
        if flip:
            row = -row
        p = row.size
        pos = np.sort(row[row > 0])[::-1]
        r = pos.size
        ends = np.concatenate([pos, [0.0]])
        total = 0.0
        for s in range(1, r + 1, 2):
            hi, lo = ends[s - 1], ends[s]
            last = s == r
            others = np.delete(row, np.flatnonzero((row == hi) | (row == lo)))

            def g(phi, hi=hi, lo=lo, others=others, last=last):
                x = lo + (hi - lo) * math.sin(phi) ** 2
                power = 0.5 * (p - 1) if last else 0.5 * p - 1.0
                return 2.0 * x**power / math.sqrt(np.prod(np.abs(x - others)))

            val = integrate.quad(g, 0.0, 0.5 * math.pi, epsabs=1e-14, epsrel=1e-13, limit=500)[0]
            total += (-1) ** ((s - 1) // 2) * val
        upper = total / math.pi  # P(Q' > 0) for the (possibly sign-flipped) row Q'
        out[i] = upper if flip else 1.0 - upper
    return float(out[0]) if one_row else out


# ----------------------------------------------------------------------------- quantiles


def ratio_quantile(eigenvalues, prob, *, xtol: float = 1e-13, ftol: float = 1e-15,
                   max_iter: int = 100) -> np.ndarray:
    """Quantile c of R = sum mu_j z_j^2 / sum z_j^2 with P(R < c) = prob, vectorised over rows.

    P(R < c) = P(sum (mu_j - c) z_j^2 < 0) is evaluated by ``prob_quadform_below_zero``;
    the root is bracketed by [min mu, max mu] and found by the Illinois (modified regula
    falsi) method, started at the normal approximation, until the secant step or the bracket
    is below xtol or |P(R < c) - prob| <= ftol.
    eigenvalues: (p,) or (m, p) with NaN padding; prob: scalar or (m,).  NaN where a row has
    fewer than two distinct values or prob is outside (0, 1).
    """
    mu = np.asarray(eigenvalues, dtype=float)
    one_row = mu.ndim == 1
    mu = np.atleast_2d(mu)
    m = mu.shape[0]
    target = np.broadcast_to(np.asarray(prob, dtype=float), (m,)).copy()
    valid_mu = np.isfinite(mu)
    count = valid_mu.sum(axis=1)
    lo = np.where(valid_mu, mu, np.inf).min(axis=1)
    hi = np.where(valid_mu, mu, -np.inf).max(axis=1)
    out = np.full(m, np.nan)
    ok = (count >= 2) & (hi > lo) & (target > 0) & (target < 1)
    idx = np.flatnonzero(ok)
    if idx.size == 0:
        return float(out[0]) if one_row else out
    mu_ok = np.where(valid_mu[idx], mu[idx], np.nan)
    tgt = target[idx]
    a, b = lo[idx].copy(), hi[idx].copy()
    fa, fb = -tgt, 1.0 - tgt  # F(lo) - prob and F(hi) - prob
    # Start: normal approximation to R (mean, exact variance 2 sum (mu - mean)^2 / (p(p+2))).
    pcount = count[idx].astype(float)
    mean = np.nanmean(mu_ok, axis=1)
    var = 2.0 * np.nansum((mu_ok - mean[:, None]) ** 2, axis=1) / (pcount * (pcount + 2.0))
    from scipy.stats import norm

    x = mean + np.sqrt(var) * norm.ppf(tgt)
    x = np.clip(x, a + 0.01 * (b - a), b - 0.01 * (b - a))
    side = np.zeros(idx.size)  # Illinois bookkeeping: -1 last moved a, +1 last moved b
    done = np.zeros(idx.size, dtype=bool)
    result = np.full(idx.size, np.nan)

    def cdf(rows: np.ndarray, c: np.ndarray) -> np.ndarray:
        lam = mu_ok[rows] - c[:, None]
        lam = np.where(np.isnan(lam), 0.0, lam)
        return prob_quadform_below_zero(lam)

    for _ in range(max_iter):
        act = np.flatnonzero(~done)
        if act.size == 0:
            break
        fx = cdf(act, x[act]) - tgt[act]
        exact = np.abs(fx) <= ftol
        left = fx < 0  # root lies above x
        # Update bracket.
        a_new = np.where(left, x[act], a[act])
        fa_new = np.where(left, fx, fa[act])
        b_new = np.where(~left, x[act], b[act])
        fb_new = np.where(~left, fx, fb[act])
        # Illinois: halve the function value at the end that stayed twice in a row.
        stay_b = left & (side[act] == -1)
        stay_a = ~left & (side[act] == 1)
        fb_new = np.where(stay_b, 0.5 * fb_new, fb_new)
        fa_new = np.where(stay_a, 0.5 * fa_new, fa_new)
        side[act] = np.where(left, -1, 1)
        a[act], fa[act], b[act], fb[act] = a_new, fa_new, b_new, fb_new
        width = b[act] - a[act]
        fin = exact | (width <= xtol)
        result[act[fin]] = np.where(exact[fin], x[act[fin]], 0.5 * (a[act[fin]] + b[act[fin]]))
        done[act[fin]] = True
        go = act[~fin]
        if go.size:
            xn = a[go] - fa[go] * (b[go] - a[go]) / (fb[go] - fa[go])
            # Guard: stay strictly inside the bracket; fall back to bisection if not.
            bad = ~np.isfinite(xn) | (xn <= a[go]) | (xn >= b[go])
            xn = np.where(bad, 0.5 * (a[go] + b[go]), xn)
            # Converged when the secant step (or a bisection fallback in an already narrow
            # bracket, where rounding noise in P stalls the secant) is below xtol.
            small = (~bad & (np.abs(xn - x[go]) <= 0.5 * xtol)) | (
                bad & (b[go] - a[go] < 1e2 * xtol))
            result[go[small]] = xn[small]
            done[go[small]] = True
            x[go] = xn
    left_over = ~done
    result[left_over] = 0.5 * (a[left_over] + b[left_over])
    out[idx] = result
    return float(out[0]) if one_row else out
