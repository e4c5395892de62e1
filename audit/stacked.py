"""Per-case diagnostics for a stack of cases with equal n and k but different design matrices.

``diagnose_stack(Y, X, C)`` gives, row for row, the columns, dtypes and values that
``audit.diagnose.diagnose_group`` gives case by case (tests/test_stacked.py), with batched linear
algebra over the stack instead of one call per design:

* design algebra once per distinct design in the stack (bytes of X): QR, singular values,
  DW null eigenvalues mu = eig(N'AN), exact critical value and power, the null moments of
  the residual r1, the AR(1) cross-product matrices;
* OLS, HAC and GLS-AR(1) contrasts from Q, R and the cross products of the Prais-Winsten
  form [PQ, Pe]'[PQ, Pe] = G0 - rho G1 + rho^2 G2 (the pieces of ``audit.ar1``):
  c'b_GLS = c'b_OLS + a'M(rho)^-1 m(rho), a = R^-T c, M = (PQ)'PQ, m = (PQ)'Pe,
  RSS* = (Pe)'Pe - m'M^-1 m, Var = RSS*/(n-k) a'M^-1 a;
* AR(1) by REML and profile ML with the grid and bracket rule of ``audit.ar1.ar1_batch``
  (-2 loglik on the grid from Cholesky factors of M(g); the score where the bracket rule
  reads it), then safeguarded secant steps on the analytic score inside the bracket;
* exact DW p-values of all rows (case model and session-only regression) in one call of the
  vectorised Imhof routine (``audit.quadform``); exact critical values by safeguarded Newton
  steps on the Imhof CDF and its density (fixed 7-point Gauss panels), finished by one Newton
  step on the error-controlled Imhof CDF; power from the (n-k)-dimensional form L'(B - cI)L,
  G = N'SN = LL' (as ``durbin_watson.dw_power_grid``).

Degenerate rows (constant series, exact fit, rank-deficient X, NaN) give NaN and the same
reason codes as the per-group path; they never raise.  Whole reviews: ``diagnose_series``
(flat observation arrays; case designs for all cases at once by ``case_design_stacks``) or
``diagnose_designs`` (a list of ``CaseDesign``); both group cases by (n, k).
"""

from __future__ import annotations

import math
from collections import defaultdict
from typing import Callable, Sequence

import numpy as np
import pandas as pd
from scipy import special

from audit.asymptotic_tests import bg_lm_rows, ljung_box_default_lags, ljung_box_rows
from audit.durbin_watson import dw_statistic_rows as _dw_rows, dw_zones as _zone
from audit import reasons as R
from audit.ar1 import _GRID, _brackets, _objective_from_pieces, _objective_value, gls_rss_pieces
from audit.durbin_watson import critical_bounds
from audit.quadform import (
    GAUSS7_WEIGHTS_ON_KRONROD_NODES,
    KRONROD_NODES,
    prob_quadform_below_zero,
    ratio_quantile,
)
from audit.regression import newey_west_default_lags, series_reasons, unscale, unscale_effect_columns

__all__ = ["diagnose_stack", "diagnose_designs", "diagnose_series", "case_design_stacks", "stack_groups",
           "gls_at_rhos", "DEFAULT_POWER_RHO"]

DEFAULT_POWER_RHO = 0.3
CASE_BLOCK = 50_000  # cases whose designs are built together in diagnose_series (bounds memory)
STACK_ROWS = 1024  # rows per diagnose_stack call in diagnose_series / diagnose_designs (bounds memory)
SIDE_BY_SIDE_ROWS = 8192  # cases whose stacks run side by side (_stack_columns_many; bounds memory)
# ... and at most this many cases x points^2 (the largest per-design arrays, such as the bases of
# the residual space and the DW null matrices, hold about n^2 numbers per case)
SIDE_BY_SIDE_CELLS = 1_000_000

# Same thresholds as the per-case modules (audit.durbin_watson, audit.diagnose).
_DW_RANK_RTOL = 1e-10  # smallest/largest singular value below this: no DW null distribution
_EIG_ZERO_RTOL = 1e-12
_EPS = np.finfo(float).eps

# Fixed Imhof panels for the Newton search of critical values (u panel, then width 1.5 in
# log u; no refinement).
_G7_NODES = KRONROD_NODES[GAUSS7_WEIGHTS_ON_KRONROD_NODES > 0]
_G7_WEIGHTS = GAUSS7_WEIGHTS_ON_KRONROD_NODES[GAUSS7_WEIGHTS_ON_KRONROD_NODES > 0]
_FIRST_PANEL_END = 0.5
_PANEL_WIDTH = 1.5
_TAIL_TOL = 1e-12
_NEWTON_STEP_TOL = 1e-4
_NEWTON_MAX_ITER = 30
_POLISH_MAX_CORRECTION = 1e-7
_FUSED_BLOCK = 30_000  # rows * nodes * p per block in the fused Imhof evaluation (cache-sized)

# AR(1) score search
_SECANT_MAX_ITER = 60
_SECANT_XTOL = 1e-12
_BISECT_ITERS = 60
_ROW_BLOCK = 256  # rows per block in the REML grid evaluation (bounds memory)

ProgressFn = Callable[[int, int], None]


# ----------------------------------------------------------------------------- grouping


def stack_groups(designs: Sequence, by_model: bool = False) -> dict[tuple, list[int]]:
    """Indices of cases that can share one ``diagnose_stack`` call: key (n, k) (or (n, k, model)).

    ``designs``: objects with ``X`` (n x k) and ``model`` (e.g. ``audit.design.CaseDesign``).
    ``diagnose_stack`` takes the model per row, so (n, k) is enough and gives larger stacks.
    """
    groups: dict[tuple, list[int]] = defaultdict(list)
    for i, des in enumerate(designs):
        n, k = des.X.shape
        key = (n, k, des.model) if by_model else (n, k)
        groups[key].append(i)
    return dict(groups)


def diagnose_designs(series: Sequence[np.ndarray], designs: Sequence, alpha: float = 0.05,
                     supplied_rho=None, power_rho: float = DEFAULT_POWER_RHO,
                     progress: ProgressFn | None = None) -> pd.DataFrame:
    """``diagnose_stack`` over a whole review: cases grouped by (n, k), one frame in input order.

    ``series[i]`` the outcomes of case i, ``designs[i]`` its ``CaseDesign``; ``supplied_rho``
    None, a scalar or one value per case.  Same rows as ``diagnose_group`` case by case.
    """
    total = len(designs)
    if total == 0:
        return pd.DataFrame()
    rho_all = None if supplied_rho is None else np.broadcast_to(np.asarray(supplied_rho, float), (total,))
    runner = _SideBySide(progress, total)
    for group in stack_groups(designs).values():
        for s0 in range(0, len(group), STACK_ROWS):
            idx = group[s0:s0 + STACK_ROWS]
            Y = np.vstack([np.asarray(series[i], dtype=float) for i in idx])
            X = np.stack([designs[i].X for i in idx])
            C = np.stack([designs[i].contrast for i in idx])
            runner.add(idx, (Y, X, C, alpha, None if rho_all is None else rho_all[idx], power_rho,
                             np.array([designs[i].model for i in idx], dtype=object),
                             np.array([designs[i].n_transitions for i in idx])))
    return runner.frame()


def diagnose_series(session, outcome, phase_index, condition, design, phase_label, case_starts,
                    alpha: float = 0.05, supplied_rho=None, power_rho: float = DEFAULT_POWER_RHO,
                    progress: ProgressFn | None = None) -> pd.DataFrame:
    """``diagnose_stack`` for a whole review given as flat observation arrays (no per-case objects).

    One entry per observation, sorted by case then session; ``design`` the design name per
    observation (the case's first one is used); ``case_starts`` the first row of each case.
    Case designs are built for all cases at once (``case_design_stacks``), cases grouped by
    (n, k); ``supplied_rho`` None, a scalar or one value per case.  One row per case, in case
    order, equal to ``audit.diagnose.diagnose_group`` case by case.  Memory is bounded by taking
    at most ``CASE_BLOCK`` cases and ``STACK_ROWS`` rows per stack at a time.
    """
    session = np.asarray(session, dtype=float)
    outcome = np.asarray(outcome, dtype=float)
    starts = np.asarray(case_starts, dtype=np.int64)
    total = starts.size
    if total == 0:
        return pd.DataFrame()
    rho_all = None if supplied_rho is None else np.broadcast_to(np.asarray(supplied_rho, float), (total,))
    phase_index, condition = np.asarray(phase_index), np.asarray(condition)
    design, phase_label = np.asarray(design), np.asarray(phase_label)
    n_obs = session.size
    runner = _SideBySide(progress, total)
    for b0 in range(0, total, CASE_BLOCK):
        b1 = min(b0 + CASE_BLOCK, total)
        r0, r1 = starts[b0], (starts[b1] if b1 < total else n_obs)
        block = slice(r0, r1)
        for idx, rows, X, C, models, n_trans in case_design_stacks(
                session[block], phase_index[block], condition[block], design[block], phase_label[block],
                starts[b0:b1] - r0):
            idx = idx + b0
            rows = rows + r0
            for s0 in range(0, idx.size, STACK_ROWS):
                sl = slice(s0, s0 + STACK_ROWS)
                runner.add(idx[sl], (outcome[rows[sl]], X[sl], C[sl], alpha,
                                     None if rho_all is None else rho_all[idx[sl]], power_rho,
                                     models[sl], n_trans[sl]))
    return runner.frame()


class _SideBySide:
    """Stacks collected for ``_stack_columns_many`` and run once they hold ``SIDE_BY_SIDE_ROWS``
    cases or ``SIDE_BY_SIDE_CELLS`` cases x points^2 (bounds memory); progress after each run;
    ``frame`` gives the rows in case order."""

    def __init__(self, progress: ProgressFn | None, total: int):
        self.progress, self.total = progress, total
        self.parts: list[dict] = []
        self.where: list[np.ndarray] = []
        self.waiting: list[tuple] = []
        self.waiting_rows = 0
        self.waiting_cells = 0
        self.done = 0

    def add(self, idx: np.ndarray, args: tuple) -> None:
        """Add a stack (``_stack_columns`` arguments, Y first); run the waiting stacks when full."""
        self.waiting.append((np.asarray(idx), args))
        self.waiting_rows += len(idx)
        self.waiting_cells += len(idx) * args[0].shape[1] ** 2
        if self.waiting_rows >= SIDE_BY_SIDE_ROWS or self.waiting_cells >= SIDE_BY_SIDE_CELLS:
            self.run()

    def run(self) -> None:
        if not self.waiting:
            return
        self.parts.extend(_stack_columns_many([args for _, args in self.waiting]))
        self.where.extend(idx for idx, _ in self.waiting)
        self.done += self.waiting_rows
        self.waiting, self.waiting_rows, self.waiting_cells = [], 0, 0
        if self.progress:
            self.progress(self.done, self.total)

    def frame(self) -> pd.DataFrame:
        self.run()
        return _to_frame(self.parts, order=np.argsort(np.concatenate(self.where), kind="stable"))


def case_design_stacks(session, phase_index, condition, design, phase_label, case_starts):
    """Case designs of all cases at once, yielded as stacks of equal (n, k).

    Same matrices, contrasts, models and transition counts as ``audit.design.case_design``
    case by case (piecewise level-and-trend, level-only or alternating-treatment model; see
    there), built with array operations over all cases.  Yields (case indices, row indices
    (m, n), X (m, n, k), C (m, k), models, n_transitions) per stack.
    """
    session = np.asarray(session, dtype=float)
    phase_index = np.asarray(phase_index)
    condition = np.asarray(condition).astype(str, copy=False)
    design = np.asarray(design)  # read at the first row of each case only
    label = np.asarray(phase_label)  # read on the treatment rows of alternating designs only
    starts = np.asarray(case_starts, dtype=np.int64)
    N = session.size
    m = starts.size
    if m == 0:
        return
    ends = np.r_[starts[1:], N]
    n_case = ends - starts
    row_case = np.repeat(np.arange(m), n_case)
    t = session - session[starts][row_case]
    alt = design[starts].astype(str, copy=False) == "alternating"
    treat = condition == "treatment"

    # phases of the level/trend models: a new phase where phase_index changes within a case
    new_phase = np.ones(N, dtype=bool)
    new_phase[1:] = phase_index[1:] != phase_index[:-1]
    new_phase[starts] = True
    phase_id = np.cumsum(new_phase) - 1  # global phase number
    first_phase = phase_id[starts]
    pnum = phase_id - first_phase[row_case]  # phase number within the case
    n_phases = pnum[ends - 1] + 1
    phase_start_row = np.flatnonzero(new_phase)
    lengths = np.diff(np.r_[phase_start_row, N])
    min_len = np.minimum.reduceat(lengths, first_phase)
    full_k = 2 + 2 * (n_phases - 1)
    use_slopes = (min_len >= 3) & (n_case - full_k >= 5)  # design.MIN_POINTS_FOR_SLOPE, MIN_RESIDUAL_DF
    k_case = 2 + (n_phases - 1) * (1 + use_slopes.astype(np.int64))
    pc = condition[phase_start_row]
    sign = np.zeros(phase_start_row.size)  # transition into global phase g: +1 A->B, -1 B->A
    sign[1:] = np.where((pc[:-1] == "baseline") & (pc[1:] == "treatment"), 1.0,
                        np.where((pc[:-1] == "treatment") & (pc[1:] == "baseline"), -1.0, 0.0))
    sign[first_phase] = 0.0
    n_trans_case = np.add.reduceat((sign != 0).astype(np.int64), first_phase)

    # alternating designs: one indicator per treatment label (sorted), rank of each row's label
    alt_rows = alt[row_case] & treat
    rank = np.zeros(N, dtype=np.int64)
    n_labels = np.zeros(m, dtype=np.int64)
    if alt_rows.any():
        rr = np.flatnonzero(alt_rows)
        lab_codes, lab_inv = np.unique(label[rr].astype(str, copy=False),
                                       return_inverse=True)  # sorted like sorted(set(...))
        pair = row_case[rr] * lab_codes.size + lab_inv.ravel()
        upair, pinv = np.unique(pair, return_inverse=True)
        pcase = upair // lab_codes.size
        first_of_case = np.r_[0, np.flatnonzero(pcase[1:] != pcase[:-1]) + 1]
        pos_in_case = np.arange(upair.size) - np.repeat(first_of_case, np.diff(np.r_[first_of_case, upair.size]))
        rank[rr] = pos_in_case[pinv.ravel()]
        n_labels[pcase[first_of_case]] = np.diff(np.r_[first_of_case, upair.size])
    k_case = np.where(alt, 2 + n_labels, k_case)
    n_trans_case = np.where(alt, n_labels, n_trans_case)
    models = np.where(alt, "alternating", np.where(use_slopes, "level_and_trend", "level_only")).astype(object)

    for n, k, idx in _equal_pairs(n_case, k_case):
        rows = starts[idx][:, None] + np.arange(n)[None, :]
        X = np.zeros((idx.size, n, k))
        C = np.zeros((idx.size, k))
        X[:, :, 0] = 1.0
        X[:, :, 1] = t[rows]
        na = np.flatnonzero(~alt[idx])  # level(-and-trend) cases of the stack
        if na.size:
            P = n_phases[idx[na]]
            pn = pnum[rows[na]]
            tt = t[rows[na]]
            nt = n_trans_case[idx[na]]
            slope = use_slopes[idx[na]]
            for j in range(int(P.max()) - 1):  # phase change j + 1: level column 2 + j
                has = np.flatnonzero(P > j + 1)
                sel = na[has]
                step = pn[has] >= j + 1
                X[sel, :, 2 + j] = step
                g = first_phase[idx[sel]] + j + 1
                C[sel, 2 + j] = np.where(nt[has] > 0, sign[g] / np.maximum(nt[has], 1), 0.0)
                sl = np.flatnonzero(slope[has])
                if sl.size:  # slope change column 2 + (P - 1) + j: (t - t_p) S_p
                    tp = t[phase_start_row[g[sl]]]
                    col = 2 + (P[has[sl]] - 1) + j
                    X[sel[sl][:, None], np.arange(n)[None, :], col[:, None]] = (tt[has[sl]] - tp[:, None]) * step[sl]
        al = np.flatnonzero(alt[idx])
        if al.size:
            r = rows[al]
            ci, pi = np.nonzero(alt_rows[r])
            X[al[ci], pi, 2 + rank[r[ci, pi]]] = 1.0
            L = n_labels[idx[al]]
            for j in range(int(L.max())):
                has = L > j
                C[al[has], 2 + j] = 1.0 / L[has]
        yield idx, rows, X, C, models[idx], n_trans_case[idx]


# ----------------------------------------------------------------------------- small helpers


def _equal_pairs(a: np.ndarray, b: np.ndarray):
    """(a, b, positions) for each distinct pair (a[i], b[i]) of two integer arrays, in order of
    first appearance, positions increasing (as a dict of lists filled position by position)."""
    if a.size == 0:
        return
    low = int(b.min())
    key = a.astype(np.int64) * (int(b.max()) - low + 1) + (b - low)  # one integer per pair
    _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    inverse = inverse.ravel()
    members = np.argsort(inverse, kind="stable")  # positions grouped by pair, increasing within
    ends = np.cumsum(np.bincount(inverse, minlength=first.size))
    begins = ends - np.bincount(inverse, minlength=first.size)
    for g in np.argsort(first):
        yield int(a[first[g]]), int(b[first[g]]), members[begins[g]:ends[g]]


def _binary_exponents(Y: np.ndarray) -> np.ndarray:
    """Binary exponent of the largest finite |value| of each row (as regression.binary_exponents):
    dividing a row by 2**e is exact and brings it into [0.5, 1); rows without one get 0."""
    A = np.abs(np.where(np.isfinite(Y), Y, 0.0))
    top = A.max(axis=-1) if A.shape[-1] else np.zeros(A.shape[:-1])
    return np.frexp(top)[1].astype(np.int64)


def _outer(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a[:, None] * b[None, :] (the same products): numpy copies the operands of a broadcast
    product through buffers first, einsum reads them in place."""
    return np.einsum("i,j->ij", a, b)


def _scale_rows(Y: np.ndarray, e: np.ndarray) -> np.ndarray:
    """Y * 2**-e row by row (exact)."""
    return np.ldexp(Y, -e[:, None])


def _unique_rows(A: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First index of each distinct row (by bytes) and the inverse map row -> distinct row."""
    A = np.ascontiguousarray(A.reshape(A.shape[0], -1))
    if A.shape[0] == 0:
        return np.empty(0, dtype=int), np.empty(0, dtype=int)
    view = A.view(np.dtype((np.void, A.dtype.itemsize * A.shape[1]))).ravel()
    _, first, inverse = np.unique(view, return_index=True, return_inverse=True)
    return first, inverse.ravel()


class _NullableBool:
    """Boolean column with a missing mask; ``numpy=True`` stores it as ``BooleanArray.to_numpy()``
    does in the per-group path (bool without NA, object with pd.NA), else as a "boolean" column."""

    __slots__ = ("values", "mask", "numpy")

    def __init__(self, values: np.ndarray, mask: np.ndarray, numpy: bool):
        self.values, self.mask, self.numpy = values, mask, numpy

    def __getitem__(self, rows) -> "_NullableBool":
        return _NullableBool(self.values[rows], self.mask[rows], self.numpy)

    def fill_false(self) -> np.ndarray:
        return self.values & ~self.mask


def _significance(p: np.ndarray, alpha: float) -> _NullableBool:
    """p < alpha with NA where p is NaN (``regression._significance``)."""
    p = np.asarray(p, dtype=float)
    return _NullableBool(p < alpha, np.isnan(p), numpy=True)


def _decision(p: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Decision p < alpha and its validity (finite p)."""
    p = np.asarray(p, dtype=float)
    fin = np.isfinite(p)
    return np.where(fin, p < alpha, False), fin


def _flip(base, alt) -> _NullableBool:
    """Decision differs from the OLS one; NA where either p-value is missing."""
    (a, fa), (b, fb) = base, alt
    return _NullableBool(a != b, ~(fa & fb), numpy=False)


def _two_sided_t(est: np.ndarray, se: np.ndarray, df: float) -> np.ndarray:
    """2 P(T_df > |est/se|), the values of scipy.stats.t.sf (special.stdtr) without its overhead."""
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = est / se
    return 2.0 * special.stdtr(df, -np.abs(stat))


def _chi2_sf(x: np.ndarray, df: float) -> np.ndarray:
    """scipy.stats.chi2.sf (special.chdtrc; 1 below the support, NaN stays NaN)."""
    x = np.asarray(x, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.where(x < 0, 1.0, special.chdtrc(df, x))


def _join_reasons(*cols: np.ndarray) -> np.ndarray:
    """``reasons.join`` row by row (only rows with a code need the Python join)."""
    m = len(cols[0])
    out = np.full(m, R.OK, dtype=object)
    any_code = np.zeros(m, dtype=bool)
    for c in cols:
        any_code |= np.asarray(c, dtype=object) != R.OK
    for i in np.flatnonzero(any_code):
        out[i] = R.join(*(c[i] for c in cols))
    return out


# ----------------------------------------------------------------------------- design algebra


class _Designs:
    """Per distinct design (U of them): rank checks, bases, DW null eigenvalues, AR(1) matrices."""

    def __init__(self, Xu: np.ndarray, light: bool = False):
        U, n, k = Xu.shape
        self.U, self.n, self.k = U, n, k
        p = n - k
        self.p = p
        finite = np.all(np.isfinite(Xu), axis=(1, 2))
        Xs = np.where(finite[:, None, None], Xu, 0.0)
        sv = np.linalg.svd(Xs, compute_uv=False) if k else np.zeros((U, 0))
        smax = sv.max(axis=1) if k else np.zeros(U)
        rank = np.count_nonzero(sv > (smax * max(n, k) * _EPS)[:, None], axis=1)
        reason = np.full(U, R.OK, dtype=object)
        reason[rank < k] = R.SINGULAR_DESIGN
        if n <= k:
            reason[:] = R.NO_RESIDUAL_DF
        reason[~finite] = R.NON_FINITE_INPUT
        self.reason = reason  # audit.regression.design_reason
        self.ok = reason == R.OK
        # audit.durbin_watson._design_basis: DW null distribution exists
        self.dw_ok = self.ok & (p >= 1)
        if k:
            self.dw_ok &= (sv[:, 0] > 0) & ~(sv[:, -1] <= _DW_RANK_RTOL * sv[:, 0])
        self.Q = np.zeros((U, n, k))
        self.Rf = np.tile(np.eye(k), (U, 1, 1))
        self.N = np.zeros((U, n, max(p, 0)))
        good = np.flatnonzero(self.ok)
        if good.size:
            Qc, Rc = np.linalg.qr(Xs[good], mode="complete")
            self.Q[good] = Qc[:, :, :k]
            self.Rf[good] = Rc[:, :k, :]
            self.N[good] = Qc[:, :, k:]
        # rank-deficient (finite) designs: residuals y - X pinv(X) y, as diagnose_group
        self.X = Xs
        self.pinv_rows = np.flatnonzero(finite & ~self.ok)
        self.pinv = np.zeros((U, k, n))
        if self.pinv_rows.size:
            self.pinv[self.pinv_rows] = np.linalg.pinv(Xs[self.pinv_rows])
        # DW null eigenvalues (ascending) of N'AN, A the first-difference matrix
        self.mu = np.full((U, max(p, 0)), np.nan)
        dwi = np.flatnonzero(self.dw_ok)
        if dwi.size and p > 0:
            every = dwi.size == U  # the usual case: no copies of the rows
            dn = np.diff(self.N if every else self.N[dwi], axis=1)
            B = dn.transpose(0, 2, 1) @ dn
            if every:
                self.B = B
            else:
                self.B = np.zeros((U, p, p))
                self.B[dwi] = B
            self.mu[dwi] = np.clip(np.linalg.eigvalsh(B), 0.0, 4.0)
        else:
            self.B = np.zeros((U, max(p, 0), max(p, 0)))
        if light:  # the session-only regression needs no more
            return
        # AR(1) cross-product matrices: M(rho) = I - rho A1 + rho^2 A2 (audit.ar1._Moments)
        Q = self.Q
        A1 = Q[:, 1:].transpose(0, 2, 1) @ Q[:, :-1]
        self.A1 = A1 + A1.transpose(0, 2, 1)
        self.A2 = Q[:, 1:-1].transpose(0, 2, 1) @ Q[:, 1:-1]
        # exact null mean and variance of residual r1 (audit.autocorrelation, Pitman-Koopmans):
        # tr(ML) = -tr(Q'LQ) = -tr(A1)/2; tr((ML)^2) = tr(L^2) - 2||LQ||^2 + ||Q'LQ||^2
        if p > 0:
            LQ = np.zeros_like(Q)
            LQ[:, 1:] += 0.5 * Q[:, :-1]
            LQ[:, :-1] += 0.5 * Q[:, 1:]
            trA = -0.5 * np.trace(self.A1, axis1=1, axis2=2)
            trA2 = 0.5 * (n - 1) - 2.0 * np.sum(LQ**2, axis=(1, 2)) + 0.25 * np.sum(self.A1**2, axis=(1, 2))
            mean = trA / p
            second = (2.0 * trA2 + trA**2) / (p * (p + 2.0))
            var = np.maximum(second - mean**2, 0.0)
            if p == 1:  # r1 is fixed by the design
                var = np.zeros(U)
            self.r1_mean, self.r1_var = mean, var
        else:
            self.r1_mean = self.r1_var = np.full(U, np.nan)
        # Breusch-Godfrey auxiliary regression: X, plus a constant when X has none
        self.has_constant = np.any(np.all(Xs == Xs[:, :1, :], axis=1) & (Xs[:, 0, :] != 0), axis=1)
        no_c = np.flatnonzero(~self.has_constant & self.ok)
        self.Qa_noconst = np.zeros((U, n, k + 1))
        if no_c.size:
            Xa = np.concatenate([np.ones((no_c.size, n, 1)), Xs[no_c]], axis=2)
            self.Qa_noconst[no_c] = np.linalg.qr(Xa)[0]


class _ContrastRows:
    """OLS pieces of a stack (Y already scaled by powers of two) and the GLS-AR(1) contrast test
    at a rho per row: c'b_GLS = c'b_OLS + a'M(rho)^-1 m(rho), Var = RSS*/(n-k) a'M^-1 a."""

    def __init__(self, Y: np.ndarray, X: np.ndarray, C: np.ndarray):
        m, n = Y.shape
        k = X.shape[2]
        self.m, self.df = m, n - k
        first, du = _unique_rows(X)
        des = _Designs(X[first])
        self.du, self.des = du, des
        self.xreason = des.reason[du]
        self.design_ok = des.ok[du]
        no_contrast = ~np.any(C != 0, axis=1)
        self.creason = np.where((self.xreason == R.OK) & no_contrast, R.NO_CONTRAST, self.xreason)
        self.Yf = np.where(np.isfinite(Y), Y, 0.0)
        self.Qr = des.Q[du]
        self.q = np.einsum("mnk,mn->mk", self.Qr, self.Yf)
        self.Ef = self.Yf - np.einsum("mnk,mk->mn", self.Qr, self.q)
        self.sreason = series_reasons(Y, self.Ef)
        self.a = np.linalg.solve(des.Rf[du].transpose(0, 2, 1), C[:, :, None])[:, :, 0]  # a = R^-T c
        self.est_ols = np.einsum("mk,mk->m", self.q, self.a)
        ok_rows = self.design_ok  # cross products for GLS are needed on every usable design
        self.ar_all = _AR1Rows(self.Ef[ok_rows], self.Qr[ok_rows], des.A1[du[ok_rows]], des.A2[du[ok_rows]],
                               n, k) if ok_rows.any() else None
        self.pos_in_ok = np.cumsum(ok_rows) - 1

    def gls(self, rho_in: np.ndarray, alpha: float):
        """Estimate, se, p, significance and reason of the GLS contrast with row i at rho_in[i]."""
        m, df, creason = self.m, self.df, self.creason
        rho_in = np.asarray(rho_in, dtype=float)
        reason = np.where(creason != R.OK, creason, self.sreason)
        bad_rho = ~np.isfinite(rho_in)
        reason = np.where((reason == R.OK) & bad_rho, R.NON_FINITE_INPUT, reason)
        reason = np.where((reason == R.OK) & (np.abs(np.where(bad_rho, 0, rho_in)) >= 1.0),
                          R.NUMERICAL_FAILURE, reason)
        r = np.where(reason == R.OK, rho_in, 0.0)
        est = np.full(m, np.nan)
        se = np.full(m, np.nan)
        rows = np.flatnonzero(creason == R.OK)
        if rows.size and df > 0:
            sub = self.ar_all.take(self.pos_in_ok[rows])
            Minv, b, rss, _, _, _ = sub.at(r[rows])
            ar = self.a[rows]
            est[rows] = self.est_ols[rows] + np.sum(ar * b, axis=1)
            with np.errstate(invalid="ignore"):
                se[rows] = np.sqrt(rss / df * np.einsum("mi,mij,mj->m", ar, Minv, ar))
        reason = np.where((reason == R.OK) & ~(se > 0), R.ZERO_VARIANCE, reason)
        e_, s_, p_ = _masked_test(est, se, reason, df)
        return e_, s_, p_, _significance(p_, alpha), reason


def gls_at_rhos(Y, X, C, rhos, n_transitions=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """GLS-AR(1) effect tests of a stack of cases at several rho each: estimate, se, p of shape (m, J).

    ``rhos`` (m, J) or (J,); the ``effect_gls_supplied_*`` columns of ``diagnose_stack`` for each
    column of rhos (NaN where rho is not finite, for cases without a baseline/treatment
    transition, and where the data allow no test), without the other diagnostics.
    """
    with np.errstate(all="ignore"):
        Y = np.asarray(Y, dtype=float)
        X = np.asarray(X, dtype=float)
        C = np.asarray(C, dtype=float)
        m = Y.shape[0]
        rhos = np.asarray(rhos, dtype=float)
        rhos = np.broadcast_to(rhos if rhos.ndim == 2 else rhos[None, :], (m, rhos.shape[-1]))
        J = rhos.shape[1]
        out = tuple(np.full((m, J), np.nan) for _ in range(3))
        if m == 0:
            return out
        ex = _binary_exponents(Y)
        cr = _ContrastRows(_scale_rows(Y, ex), X, C)
        n_trans = np.count_nonzero(C, axis=1) if n_transitions is None else np.asarray(n_transitions)
        dead_case = np.broadcast_to(n_trans, (m,)) == 0
        for j in range(J):
            est, se, p, _, _ = cr.gls(np.nan_to_num(rhos[:, j]), 0.05)
            est, se = unscale(est, ex), unscale(se, ex)
            dead = dead_case | ~np.isfinite(rhos[:, j]) | ~np.isfinite(est) | ~np.isfinite(se)
            out[0][:, j] = np.where(dead, np.nan, est)
            out[1][:, j] = np.where(dead, np.nan, se)
            out[2][:, j] = np.where(dead, np.nan, p)
        return out


# ----------------------------------------------------------------------------- Imhof pieces


def _tail_log_t(a_sorted: np.ndarray) -> np.ndarray:
    """log U beyond which the Imhof tail is below _TAIL_TOL (quadform's bound; |lam| sorted desc)."""
    q = np.arange(1, a_sorted.shape[1] + 1, dtype=float)
    with np.errstate(divide="ignore"):
        cum_log = np.cumsum(np.log(a_sorted), axis=1)
    log_u = (2.0 / q) * (math.log(2.0) - np.log(q) - math.log(_TAIL_TOL) - 0.5 * cum_log)
    log_u = np.where(np.isfinite(log_u), log_u, np.inf)
    return log_u.min(axis=1)


def _imhof_cdf_density(lam: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """P(sum lam_j z_j^2 < 0) and its derivative in c for lam = mu - c, rows of mixed sign.

    Imhof (1961): F = 1/2 - (1/pi) int_0^inf sin(theta)/(u rho) du; differentiating under the
    integral, dF/dc = (1/(2 pi)) int_0^inf (1/rho) [cos(theta) sum 1/(1+x_j^2)
    - sin(theta) sum x_j/(1+x_j^2)] du, x_j = lam_j u.  Fixed panels
    (u in [0, 1/2] after scaling by sqrt(sum lam^2), then width 1.5 in log u up to the tail
    bound), 7-point Gauss rule on each: accurate to about 1e-8, enough to steer Newton steps.
    """
    r, p = lam.shape
    s = np.sqrt(np.sum(lam * lam, axis=1))
    lt = lam / s[:, None]
    t_hi = _tail_log_t(-np.sort(-np.abs(lt), axis=1))
    t0 = math.log(_FIRST_PANEL_END)
    n_t = np.maximum(np.ceil((t_hi - t0) / _PANEL_WIDTH), 1).astype(int)
    nmax = int(n_t.max())
    g = _G7_NODES.size
    # node positions: u panel then nmax t panels, (nmax + 1) * g nodes per row
    half_u = 0.5 * _FIRST_PANEL_END
    u_nodes = half_u + half_u * _G7_NODES
    t_mid = t0 + (np.arange(nmax) + 0.5) * _PANEL_WIDTH
    t_nodes = (t_mid[:, None] + 0.5 * _PANEL_WIDTH * _G7_NODES[None, :]).ravel()
    u_all = np.concatenate([u_nodes, np.exp(t_nodes)])
    # weights: F uses du/u on the u panel and dt on t panels; f uses du and u dt
    w_u = half_u * _G7_WEIGHTS
    w_t = np.tile(0.5 * _PANEL_WIDTH * _G7_WEIGHTS, nmax)
    wF = np.concatenate([w_u / u_nodes, w_t])
    wf = np.concatenate([w_u, w_t * np.exp(t_nodes)])
    panel = np.concatenate([np.full(g, -1), np.repeat(np.arange(nmax), g)])
    mask = panel[None, :] < n_t[:, None]  # (r, nodes)
    F = np.empty(r)
    f = np.empty(r)
    block = max(1, _FUSED_BLOCK // (u_all.size * max(p, 1)))
    ones = np.ones(p)  # sums over the eigenvalues as BLAS products (faster than short-axis sums)
    for s0 in range(0, r, block):
        sl = slice(s0, s0 + block)
        x = np.einsum("q,rp->rqp", u_all, lt[sl])  # lt u, without a buffered broadcast (quadform)
        x2 = 1.0 + x * x
        theta = 0.5 * (np.arctan(x) @ ones)
        np.divide(x, x2, out=x)  # x / (1 + x^2)
        s2 = x @ ones
        np.reciprocal(x2, out=x)  # 1 / (1 + x^2)
        s1 = x @ ones
        inv_rho = np.exp(-0.25 * (np.log(x2, out=x2) @ ones))
        sin_t, cos_t = np.sin(theta), np.cos(theta)
        msk = mask[sl]
        F[sl] = 0.5 - (np.where(msk, sin_t * inv_rho, 0.0) @ wF) / math.pi
        f[sl] = (np.where(msk, inv_rho * (cos_t * s1 - sin_t * s2), 0.0) @ wf) / (2.0 * math.pi * s[sl])
    return F, f


def _ratio_quantile_start(mu: np.ndarray, prob: np.ndarray) -> np.ndarray:
    """Starting value: beta distribution on [min mu, max mu] with the exact mean and variance of
    R = sum mu z^2 / sum z^2 (variance 2 sum (mu - mean)^2 / (p (p + 2)))."""
    p = mu.shape[1]
    lo, hi = mu[:, 0], mu[:, -1]
    mean = mu.mean(axis=1)
    var = 2.0 * np.sum((mu - mean[:, None]) ** 2, axis=1) / (p * (p + 2.0))
    width = hi - lo
    with np.errstate(divide="ignore", invalid="ignore"):
        m_ = (mean - lo) / width
        v_ = var / width**2
        common = m_ * (1.0 - m_) / v_ - 1.0
        x = lo + width * special.betaincinv(m_ * common, (1.0 - m_) * common, prob)
    normal = mean + np.sqrt(var) * special.ndtri(prob)
    x = np.where(np.isfinite(x), x, normal)
    return np.clip(x, lo + 0.01 * width, hi - 0.01 * width)


def _ratio_quantile_newton(mu: np.ndarray, prob: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Newton search for P(R < c) = prob on the fixed-panel Imhof CDF and density (rows of
    ascending mu with mu_min < mu_max), bracketed by [mu_min, mu_max] with bisection fallback.

    Returns c, the density at the last iterate and a converged flag (last step below
    ``_NEWTON_STEP_TOL``; the final Newton step on the error-controlled CDF follows in
    ``_PowerSetup.finish``).
    """
    r = mu.shape[0]
    a, b = mu[:, 0].copy(), mu[:, -1].copy()
    x = _ratio_quantile_start(mu, prob)
    dens = np.full(r, np.nan)
    done = np.zeros(r, dtype=bool)
    for _ in range(_NEWTON_MAX_ITER):
        act = np.flatnonzero(~done)
        if act.size == 0:
            break
        F, f = _imhof_cdf_density(mu[act] - x[act, None])
        g = F - prob[act]
        xa = x[act]
        a[act] = np.where(g < 0, xa, a[act])
        b[act] = np.where(g > 0, xa, b[act])
        with np.errstate(divide="ignore", invalid="ignore"):
            xn = xa - g / f
        bad = ~np.isfinite(xn) | (xn <= a[act]) | (xn >= b[act])
        xn = np.where(bad, 0.5 * (a[act] + b[act]), xn)
        small = (~bad & (np.abs(xn - xa) <= _NEWTON_STEP_TOL)) | (g == 0)
        dens[act] = f
        x[act] = np.where(g == 0, xa, xn)
        done[act[small]] = True
    return x, dens, done


# ----------------------------------------------------------------------------- AR(1)

_METHODS = ("REML", "ML")


_ENTRYWISE_MAX_K = 8  # _spd_inverse works entry by entry up to this k (LAPACK per matrix above)


def _spd_inverse(M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse and log-determinant of symmetric positive definite matrices (..., k, k).

    Cholesky M = LL', M^-1 = L^-T L^-1, log|M| = 2 sum log L_jj; falls back to inv/slogdet if
    M is not numerically positive definite.  For k <= ``_ENTRYWISE_MAX_K`` every step works
    on one entry of all matrices at once (``_spd_inverse_entrywise``); above, Cholesky by
    LAPACK and L^-1 row by row by batched matrix products.
    """
    k = M.shape[-1]
    if 0 < k <= _ENTRYWISE_MAX_K:
        out = _spd_inverse_entrywise(M.reshape(-1, k, k))
        if out is None:
            return np.linalg.inv(M), np.linalg.slogdet(M)[1]
        return out[0].reshape(M.shape), out[1].reshape(M.shape[:-2])
    try:
        L = np.linalg.cholesky(M)
    except np.linalg.LinAlgError:
        return np.linalg.inv(M), np.linalg.slogdet(M)[1]
    flat = L.reshape(-1, k, k)
    Li = np.zeros_like(flat)
    diag = np.diagonal(flat, axis1=1, axis2=2)
    inv_d = 1.0 / diag
    if k:
        Li[:, 0, 0] = inv_d[:, 0]
    for j in range(1, k):  # row j of L^-1: (e_j - L[j, :j] L^-1[:j, :]) / L[j, j]
        row = (flat[:, j:j + 1, :j] @ Li[:, :j, :])[:, 0, :]
        row *= -inv_d[:, j, None]
        row[:, j] += inv_d[:, j]
        Li[:, j, :] = row
    Minv = (Li.transpose(0, 2, 1) @ Li).reshape(M.shape)
    logdet = 2.0 * np.sum(np.log(diag), axis=1).reshape(M.shape[:-2])
    return Minv, logdet


def _cholesky_entries(entry: Callable[[int, int], np.ndarray], k: int):
    """Cholesky factors of many k x k matrices at once, one entry at a time: ``entry(i, j)``
    gives the (i, j) entries (i >= j) of all matrices as an array; returns (L, log|M|) with
    L[i][j] the array of the (i, j) entries of the factors, or None when a pivot is not
    positive (not numerically positive definite, or not finite).  For small k much faster
    than one LAPACK call per matrix."""
    L = [[None] * k for _ in range(k)]
    for j in range(k):
        d = np.array(entry(j, j), dtype=float)
        for p_ in range(j):
            d -= L[j][p_] * L[j][p_]
        if not np.all(d > 0):
            return None
        L[j][j] = np.sqrt(d)
        for i in range(j + 1, k):
            acc = np.array(entry(i, j), dtype=float)
            for p_ in range(j):
                acc -= L[i][p_] * L[j][p_]
            acc /= L[j][j]
            L[i][j] = acc
    logdet = np.log(L[0][0])
    for j in range(1, k):
        logdet = logdet + np.log(L[j][j])
    return L, 2.0 * logdet


def _spd_inverse_entrywise(M: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """(M^-1, log|M|) of matrices M (m, k, k) by ``_cholesky_entries``, each entry of L^-1 and
    M^-1 a vector over the m matrices; None when M is not numerically positive definite."""
    m, k, _ = M.shape
    factors = _cholesky_entries(lambda i, j: M[:, i, j], k)
    if factors is None:
        return None
    L, logdet = factors
    Li = [[None] * k for _ in range(k)]  # L^-1, lower triangular
    for i in range(k):
        Li[i][i] = 1.0 / L[i][i]
        for j in range(i):
            acc = L[i][j] * Li[j][j]
            for p_ in range(j + 1, i):
                acc = acc + L[i][p_] * Li[p_][j]
            Li[i][j] = -acc * Li[i][i]
    Minv = np.empty((m, k, k))
    for a in range(k):  # (L^-T L^-1)[a, b] = sum_{p >= a} L^-1[p, a] L^-1[p, b], b <= a
        for b in range(a + 1):
            acc = Li[a][a] * Li[a][b]
            for p_ in range(a + 1, k):
                acc = acc + Li[p_][a] * Li[p_][b]
            Minv[:, a, b] = acc
            Minv[:, b, a] = acc
    return Minv, logdet


class _AR1Rows:
    """Cross products of [Q, e] per row such that [PQ, Pe]'[PQ, Pe] = G0 - rho G1 + rho^2 G2
    (``audit.ar1._Moments`` with the design of each row), and the AR(1) objective pieces."""

    _FIELDS = ("n", "A1", "A2", "qe1", "qe2", "ee0", "ee1", "ee2")

    def __init__(self, E: np.ndarray, Qr: np.ndarray, A1r: np.ndarray, A2r: np.ndarray, n: int, k: int):
        self.n, self.k = np.full(E.shape[0], n, dtype=np.int64), k  # n per row: stacks of one k can merge
        self.A1, self.A2 = A1r, A2r
        self.qe1 = np.einsum("mt,mtk->mk", E[:, :-1], Qr[:, 1:]) + np.einsum("mt,mtk->mk", E[:, 1:], Qr[:, :-1])
        self.qe2 = np.einsum("mt,mtk->mk", E[:, 1:-1], Qr[:, 1:-1])
        self.ee0 = np.sum(E**2, axis=1)
        self.ee1 = 2.0 * np.sum(E[:, 1:] * E[:, :-1], axis=1)
        self.ee2 = np.sum(E[:, 1:-1] ** 2, axis=1)

    def take(self, rows: np.ndarray) -> "_AR1Rows":
        new = object.__new__(_AR1Rows)
        new.k = self.k
        for name in self._FIELDS:
            setattr(new, name, getattr(self, name)[rows])
        return new

    @classmethod
    def concat(cls, parts: Sequence["_AR1Rows"]) -> "_AR1Rows":
        """The rows of several stacks of the same k (any n) as one set of rows."""
        new = object.__new__(cls)
        new.k = parts[0].k
        for name in cls._FIELDS:
            setattr(new, name, np.concatenate([getattr(p_, name) for p_ in parts]))
        return new

    def at(self, rho: np.ndarray):
        """M^-1, b = M^-1 m, rss, drss, log|M|, d log|M| / drho with row i at rho[i]."""
        r = rho[:, None, None]
        Mxx = np.eye(self.k) - r * self.A1 + r**2 * self.A2
        dM = -self.A1 + 2.0 * r * self.A2
        Minv, logdet = _spd_inverse(Mxx)
        dlogdet = np.einsum("mij,mji->m", Minv, dM)
        b, rss, drss = gls_rss_pieces(Minv, dM, self.qe1, self.qe2, self.ee0, self.ee1, self.ee2, rho)
        return Minv, b, rss, drss, logdet, dlogdet

    def objective(self, reml: np.ndarray, rho: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """-2 loglik and its derivative (``ar1._objective_from_pieces``), REML where ``reml``."""
        _, _, rss, drss, logdet, dlogdet = self.at(rho)
        with np.errstate(invalid="ignore", divide="ignore"):
            fr, dr = _objective_from_pieces("REML", self.n, self.k, rho, rss, drss, logdet, dlogdet)
            fm, dm = _objective_from_pieces("ML", self.n, self.k, rho, rss, drss, logdet, dlogdet)
        return np.where(reml, fr, fm), np.where(reml, dr, dm)


def _grid_cholesky(A1: np.ndarray, A2: np.ndarray):
    """Cholesky factors and log|M(g)| (U, G) of M(g) = I - g A1 + g^2 A2 on the REML grid.

    Returns (L, logdet, lower).  lower: L[i][j] (i >= j) the (U, G) array of the (i, j) entries
    of the factors of every design and grid point; the column-by-column factorisation then
    runs on contiguous vectors over all designs and grid points at once (much faster than one
    LAPACK call per small matrix).  Where M(g) is not numerically positive definite (a pivot
    <= 0 anywhere): the symmetric square roots V sqrt(W) of all M(g), shape (U, G, k, k).
    """
    g = _GRID
    g2 = g**2
    k = A1.shape[-1]

    def entry(i: int, j: int) -> np.ndarray:
        if i == j:
            return 1.0 - _outer(A1[:, j, j], g) + _outer(A2[:, j, j], g2)
        return _outer(A1[:, i, j], -g) + _outer(A2[:, i, j], g2)

    if k == 0:
        return [], np.zeros((A1.shape[0], g.size)), True
    factors = _cholesky_entries(entry, k)
    if factors is not None:
        return factors[0], factors[1], True
    # not numerically positive definite: symmetric square root
    Mxx = np.eye(k) - g[None, :, None, None] * A1[:, None] + g2[None, :, None, None] * A2[:, None]
    w, v = np.linalg.eigh(Mxx)
    return v * np.sqrt(np.clip(w, 0.0, None))[..., None, :], np.sum(np.log(w), axis=-1), False


def _grid_values(rows: _AR1Rows, du: np.ndarray, L: np.ndarray, logdet: np.ndarray, lower: bool):
    """-2 loglik on the grid for REML and ML, (m, G) each: rss = e'P'Pe - |L^-1 m|^2 (L and
    its layout from ``_grid_cholesky``)."""
    g = _GRID
    g2 = g**2
    m = rows.qe1.shape[0]
    G = g.size
    k = rows.k
    out = {meth: np.empty((m, G)) for meth in _METHODS}
    for s0 in range(0, m, _ROW_BLOCK):
        sl = slice(s0, s0 + _ROW_BLOCK)
        mee = rows.ee0[sl, None] - _outer(rows.ee1[sl], g) + _outer(rows.ee2[sl], g2)
        d = du[sl]
        if lower:  # forward substitution on (rows, G) vectors, one entry of L at a time
            qe1, qe2 = rows.qe1[sl], rows.qe2[sl]
            w = []
            ssq = np.zeros_like(mee)
            for j in range(k):
                acc = _outer(qe1[:, j], -g) + _outer(qe2[:, j], g2)
                for p_ in range(j):
                    acc -= L[j][p_][d] * w[p_]
                wj = acc / L[j][j][d]
                w.append(wj)
                ssq += wj * wj
            rss = mee - ssq
        else:  # L = V sqrt(W): |L^-1 m|^2 = m' M^-1 m
            qe1, qe2 = rows.qe1[sl][:, None, :], rows.qe2[sl][:, None, :]
            mxe = -g[None, :, None] * qe1 + g2[None, :, None] * qe2
            w = np.linalg.solve(L[d], mxe[..., None])[..., 0]
            rss = mee - np.sum(w * w, axis=2)
        ld = logdet[d]
        n_rows = rows.n[sl, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            for meth in _METHODS:  # the values only (the score is not needed on the grid)
                out[meth][sl] = _objective_value(meth, n_rows, rows.k, g[None, :], rss, ld)
    return out


def _hermite_start(lo, hi, f_lo, f_hi, d_lo, d_hi) -> np.ndarray:
    """Stationary point in (lo, hi) of the cubic through the objective values and slopes at both
    ends (d_lo < 0 < d_hi), NaN where it cannot be found: a starting point for the score root
    much closer than the secant of the slopes alone."""
    h = hi - lo
    D0, D1 = d_lo * h, d_hi * h  # slopes in s = (x - lo) / h
    dF = f_hi - f_lo
    qa = 3.0 * (D0 + D1) - 6.0 * dF  # p'(s) = qa s^2 + qb s + D0
    qb = 6.0 * dF - 4.0 * D0 - 2.0 * D1
    disc = qb * qb - 4.0 * qa * D0
    with np.errstate(divide="ignore", invalid="ignore"):
        root = np.sqrt(disc)
        # the root of p' where it rises through zero; the stable form of the quadratic formula
        s = np.where(qb >= 0, -2.0 * D0 / (qb + root), (root - qb) / (2.0 * qa))
        s = np.where(np.abs(qa) <= 1e-12 * (np.abs(qb) + np.abs(D0)), -D0 / qb, s)
    return np.where((s > 0) & (s < 1), lo + s * h, np.nan)


def _score_root(rows: _AR1Rows, reml: np.ndarray, lo, hi, d_lo, d_hi, start=None) -> np.ndarray:
    """Root of the score in [lo, hi] (d_lo < 0 < d_hi), all rows at once: secant steps through
    the last two iterates, kept inside the shrinking sign-change bracket (bisection when a
    step leaves it), until the step or the bracket is below 1e-12.  ``start``: first iterate
    (where finite and inside the bracket; otherwise the secant point of the slopes)."""
    a, b = lo.copy(), hi.copy()
    x = a - d_lo * (b - a) / (d_hi - d_lo)
    if start is not None:
        x = np.where(np.isfinite(start) & (start > a) & (start < b), start, x)
    x = np.where((x > a) & (x < b), x, 0.5 * (a + b))
    use_lo = np.abs(d_lo) < np.abs(d_hi)
    xp, fp = np.where(use_lo, a, b), np.where(use_lo, d_lo, d_hi)  # previous iterate
    result = np.full(a.size, np.nan)
    done = np.zeros(a.size, dtype=bool)
    for _ in range(_SECANT_MAX_ITER):
        act = np.flatnonzero(~done)
        if act.size == 0:
            break
        active = rows if act.size == a.size else rows.take(act)  # no copy while all rows are active
        fx = active.objective(reml[act], x[act])[1]
        xa = x[act]
        left = fx < 0
        a_new = np.where(left, xa, a[act])
        b_new = np.where(left, b[act], xa)
        with np.errstate(divide="ignore", invalid="ignore"):
            xn = xa - fx * (xa - xp[act]) / (fx - fp[act])
        # a step that lands on or just beyond an end of the bracket (the root sits at an
        # evaluated point) moves just inside it; a wild one is replaced by bisection
        width = b_new - a_new
        near = 0.1 * width
        xn = np.where((xn <= a_new) & (xn > a_new - near), a_new + 0.5 * _SECANT_XTOL, xn)
        xn = np.where((xn >= b_new) & (xn < b_new + near), b_new - 0.5 * _SECANT_XTOL, xn)
        bad = ~np.isfinite(xn) | (xn <= a_new) | (xn >= b_new)
        xn = np.where(bad, 0.5 * (a_new + b_new), xn)
        zero = fx == 0
        fin = zero | (np.abs(xn - xa) <= _SECANT_XTOL) | (b_new - a_new <= _SECANT_XTOL)
        a[act], b[act] = a_new, b_new
        xp[act], fp[act] = xa, fx
        result[act] = np.where(zero, xa, xn)
        done[act[fin]] = True
        x[act] = xn
    left_over = ~done
    result[left_over] = 0.5 * (a[left_over] + b[left_over])
    return result


def _bisect(rows: _AR1Rows, reml: np.ndarray, lo, hi) -> np.ndarray:
    """The bisection of ``audit.ar1.ar1_batch`` (for brackets without a sign change)."""
    lo, hi = lo.copy(), hi.copy()
    for _ in range(_BISECT_ITERS):
        mid = 0.5 * (lo + hi)
        up = rows.objective(reml, mid)[1] > 0
        hi = np.where(up, mid, hi)
        lo = np.where(up, lo, mid)
        if np.all(hi - lo <= 1e-15):
            break
    return 0.5 * (lo + hi)


def _ar1_fit(rows: _AR1Rows, du: np.ndarray, designs: _Designs):
    """REML and ML AR(1) of the rows (usable data): dict method -> (rho, at_bound, failed).

    Grid and bracket of ``audit.ar1.ar1_batch``: -2 loglik at every grid point (Cholesky of
    M(g) per design), the score at the best grid point and at the neighbour it points to
    (all that the bracket rule reads), then inside a bracket with a sign change of the score
    safeguarded secant steps (both methods stacked in one search; first iterate the
    stationary point of the cubic through the values and slopes at the bracket ends),
    otherwise its bisection.
    """
    used = np.unique(du)
    L, logdet, lower = _grid_cholesky(designs.A1[used], designs.A2[used])
    f_grids = _grid_values(rows, np.searchsorted(used, du), L, logdet, lower)
    m = du.size
    G = _GRID.size
    f_all = np.concatenate([f_grids[meth] for meth in _METHODS])  # (2m, G), REML rows first
    reml = np.repeat([True, False], m)
    both = rows.take(np.tile(np.arange(m), 2))
    ridx = np.arange(2 * m)
    d_all = np.full((2 * m, G), np.nan)
    j = np.argmin(f_all, axis=1)
    d_all[ridx, j] = both.objective(reml, _GRID[j])[1]
    nb = np.clip(np.where(d_all[ridx, j] < 0, j + 1, j - 1), 0, G - 1)
    d_all[ridx, nb] = both.objective(reml, _GRID[nb])[1]
    lo, hi, done, done_rho, bound, ok, _ = _brackets(f_all, d_all)
    est = np.where(done, done_rho, np.nan)
    ill = np.flatnonzero(~done & ok)
    if ill.size:
        jl, jh = np.searchsorted(_GRID, lo[ill]), np.searchsorted(_GRID, hi[ill])
        d_lo, d_hi = d_all[ill, jl], d_all[ill, jh]
        start = _hermite_start(lo[ill], hi[ill], f_all[ill, jl], f_all[ill, jh], d_lo, d_hi)
        est[ill] = _score_root(both.take(ill), reml[ill], lo[ill], hi[ill], d_lo, d_hi, start)
    bis = np.flatnonzero(~done & ~ok)
    if bis.size:
        est[bis] = _bisect(both.take(bis), reml[bis], lo[bis], hi[bis])
    f_est = both.objective(reml, est)[0]
    failed = ~np.isfinite(f_est)
    return {meth: (est[i * m:(i + 1) * m], bound[i * m:(i + 1) * m], failed[i * m:(i + 1) * m])
            for i, meth in enumerate(_METHODS)}


# ----------------------------------------------------------------------------- main


def diagnose_stack(Y, X, C, alpha: float = 0.05, supplied_rho=None, power_rho: float = DEFAULT_POWER_RHO,
                   models=None, n_transitions=None) -> pd.DataFrame:
    """All regression-based diagnostics of ``audit.diagnose.diagnose_group`` for a stack of cases.

    Y (m, n) outcomes, X (m, n, k) design matrices (one per case, intercept and session first),
    C (m, k) effect contrasts.  ``supplied_rho``: None, scalar or (m,); ``models``: the case model
    name (str or (m,)); ``n_transitions``: (m,) baseline/treatment transitions in the effect
    (default: number of nonzero contrast entries).  One row per case, same columns, dtypes and
    values as ``diagnose_group`` called case by case.
    """
    return _to_frame([_stack_columns(Y, X, C, alpha, supplied_rho, power_rho, models, n_transitions)])


def _to_frame(parts: list[dict], order: np.ndarray | None = None) -> pd.DataFrame:
    """One DataFrame from the column dicts of several stacks (rows permuted by ``order``).

    Columns concatenate as ``pd.concat`` of the per-stack frames would: a significance column
    is bool unless a value is missing anywhere (then object with pd.NA); flips are "boolean".
    """
    cols = {}
    for name in parts[0]:
        vals = [p[name] for p in parts]
        if isinstance(vals[0], _NullableBool):
            v = np.concatenate([x.values for x in vals])
            mk = np.concatenate([x.mask for x in vals])
            if order is not None:
                v, mk = v[order], mk[order]
            arr = pd.arrays.BooleanArray(v, mk)
            cols[name] = arr.to_numpy() if vals[0].numpy else arr
        else:
            v = np.concatenate(vals) if len(vals) > 1 else vals[0]
            cols[name] = v[order] if order is not None else v
    return pd.DataFrame(cols)


def _stack_columns(Y, X, C, alpha, supplied_rho, power_rho, models, n_transitions) -> dict:
    """The columns of ``diagnose_stack`` as arrays (see there); NaN and reasons, no warnings."""
    return _stack_columns_many([(Y, X, C, alpha, supplied_rho, power_rho, models, n_transitions)])[0]


def _stack_columns_many(stacks: Sequence[tuple]) -> list[dict]:
    """``_stack_columns`` of several stacks (argument tuples), run side by side.

    Each stack's computation (``_stack_steps``) stops where it needs one of the pieces that
    cost about as much for a few rows as for many (the REML/ML search, the session-only
    designs, the Newton search of the power's critical values, the error-controlled Imhof
    integrals); ``_run_side_by_side`` collects those requests of all stacks, answers them in
    merged calls and resumes the stacks.
    Every row's values are computed from its own inputs only, so the result of a stack does
    not depend on the stacks it runs beside (up to the last bits of sums).
    """
    with np.errstate(all="ignore"):
        return _run_side_by_side([_stack_steps(*args) for args in stacks])


# Requests of _stack_steps, answered in this order (a stack that skips one waits for the others):
# ("ar1", k, (rows, du, designs)) -> _ar1_fit's dict; ("light", (n, k0), distinct session-only
# designs) -> (_Designs(light=True) of the distinct designs of all such requests, the position
# there of each design of the request); ("quantile", (p, target), mu) -> (c, dens, converged) of
# _ratio_quantile_newton; ("imhof", width, lam) -> P(Q < 0) per row.
_REQUEST_ORDER = ("ar1", "light", "quantile", "imhof")


def _run_side_by_side(steps: list) -> list:
    """Drive generators that yield (kind, key, payload) requests and return their result:
    each round answers the pending requests of the earliest kind, those with equal keys in one
    call (``_ANSWER``), and sends each generator its answer."""
    results: list = [None] * len(steps)
    pending: dict[int, tuple] = {}

    def advance(i: int, answer) -> None:
        try:
            pending[i] = steps[i].send(answer)
        except StopIteration as stop:
            results[i] = stop.value

    for i in range(len(steps)):
        advance(i, None)
    while pending:
        kind = min((req[0] for req in pending.values()), key=_REQUEST_ORDER.index)
        by_key: dict = defaultdict(list)
        for i, req in pending.items():
            if req[0] == kind:
                by_key[req[1]].append(i)
        for key, members in by_key.items():
            answers = _ANSWER[kind]([pending[i][2] for i in members])
            for i, answer in zip(members, answers):
                del pending[i]
                advance(i, answer)
    return results


def _split_rows(values, sizes: list[int]) -> list:
    """Cut an array (or each array of a tuple) into consecutive pieces of ``sizes`` rows."""
    cuts = np.cumsum(sizes)[:-1]
    if isinstance(values, tuple):
        return list(zip(*(np.split(v, cuts) for v in values)))
    return np.split(values, cuts)


def _answer_ar1(payloads: list) -> list:
    """_ar1_fit of the rows of several stacks of one k in one call."""
    if len(payloads) == 1:
        return [_ar1_fit(*payloads[0])]
    rows = _AR1Rows.concat([p_[0] for p_ in payloads])
    offsets = np.cumsum([0] + [p_[2].A1.shape[0] for p_ in payloads])
    du = np.concatenate([p_[1] + off for p_, off in zip(payloads, offsets)])
    designs = _StackedMatrices(np.concatenate([p_[2].A1 for p_ in payloads]),
                               np.concatenate([p_[2].A2 for p_ in payloads]))
    fits = _ar1_fit(rows, du, designs)
    sizes = [p_[1].size for p_ in payloads]
    per_method = {meth: _split_rows(fits[meth], sizes) for meth in fits}
    return [{meth: per_method[meth][j] for meth in fits} for j in range(len(payloads))]


class _StackedMatrices:
    """The AR(1) matrices of the designs of several stacks (what _ar1_fit reads of _Designs)."""

    def __init__(self, A1: np.ndarray, A2: np.ndarray):
        self.A1, self.A2 = A1, A2


def _answer_light(payloads: list) -> list:
    """The session-only designs of several stacks of one n (stacks of other k share them) as
    one _Designs of their distinct designs, and where each stack's designs are in it."""
    if len(payloads) == 1:
        return [(_Designs(payloads[0], light=True), np.arange(payloads[0].shape[0]))]
    first, inverse = _unique_rows(np.concatenate(payloads))
    shared = _Designs(np.concatenate(payloads)[first], light=True)
    return [(shared, part) for part in _split_rows(inverse, [p_.shape[0] for p_ in payloads])]


def _answer_quantile(payloads: list) -> list:
    """_ratio_quantile_newton on the null eigenvalue rows of several stacks (same width and
    target) in one call."""
    mu, target = np.vstack([p_[0] for p_ in payloads]), payloads[0][1]
    out = _ratio_quantile_newton(mu, np.full(mu.shape[0], target))
    return _split_rows(out, [p_[0].shape[0] for p_ in payloads])


def _answer_imhof(payloads: list) -> list:
    """prob_quadform_below_zero on the eigenvalue rows of several stacks (same width) in one call."""
    return _split_rows(prob_quadform_below_zero(np.vstack(payloads)), [p_.shape[0] for p_ in payloads])


_ANSWER = {"ar1": _answer_ar1, "light": _answer_light, "quantile": _answer_quantile, "imhof": _answer_imhof}


def _stack_steps(Y, X, C, alpha, supplied_rho, power_rho, models, n_transitions):
    """The columns of one stack (``_stack_columns``) as a generator of requests (``_run_side_by_side``)."""
    Y = np.asarray(Y, dtype=float)
    X = np.asarray(X, dtype=float)
    C = np.asarray(C, dtype=float)
    if Y.ndim != 2 or X.ndim != 3 or C.ndim != 2:
        raise ValueError(f"need Y (m, n), X (m, n, k), C (m, k); got {Y.shape}, {X.shape}, {C.shape}")
    m, n = Y.shape
    k = X.shape[2]
    if X.shape[:2] != (m, n) or C.shape != (m, k):
        raise ValueError(f"shapes do not match: Y {Y.shape}, X {X.shape}, C {C.shape}")
    alpha = float(alpha)
    if models is None:
        models = ""
    models = np.broadcast_to(np.asarray(models, dtype=object), (m,)).copy()
    if n_transitions is None:
        n_transitions = np.count_nonzero(C, axis=1)
    n_trans = np.broadcast_to(np.asarray(n_transitions, dtype=np.int64), (m,)).copy()
    df = n - k

    out: dict[str, object] = {}
    out["model"] = models
    out["n_obs"] = np.full(m, n)
    out["n_params"] = np.full(m, k)
    out["df_resid"] = np.full(m, df)
    out["n_transitions"] = n_trans
    if m == 0:
        return _empty_columns(out, n, k, supplied_rho is not None)

    # each series scaled by a power of two (exact, as diagnose_group): no overflow near the float
    # limits; everything below is scale-free except effect estimates and standard errors
    ex = _binary_exponents(Y)
    Y = _scale_rows(Y, ex)

    # ---- designs (once per distinct X), OLS pieces and the GLS contrast at any rho
    cr = _ContrastRows(Y, X, C)
    du, des, xreason, design_ok, creason = cr.du, cr.des, cr.xreason, cr.design_ok, cr.creason
    Yf, Qr, q, Ef, sreason, a, est_ols = cr.Yf, cr.Qr, cr.q, cr.Ef, cr.sreason, cr.a, cr.est_ols
    y_finite = np.all(np.isfinite(Y), axis=1)

    # ---- residuals: Yf zero-filled (batch functions), E_ref with NaN rows (diagnose's pinv path)
    E_ref = Ef.copy()
    pin = np.isin(du, des.pinv_rows)
    if pin.any():
        E_ref[pin] = _pinv_residuals(des, du[pin], Yf[pin])
    E_ref[~y_finite] = np.nan
    x_finite = des.reason[du] != R.NON_FINITE_INPUT
    E_ref[~x_finite] = np.nan

    # ---- OLS contrast: a = R^-T c, h = Q a, estimate a'Q'y, Var = s2 a'a
    aa = np.sum(a * a, axis=1)
    rss_ols = np.sum(Ef**2, axis=1)
    se_ols = np.sqrt(rss_ols / df * aa) if df > 0 else np.full(m, np.nan)
    r_ols = np.where(creason != R.OK, creason, sreason)
    r_ols = np.where((r_ols == R.OK) & ~(se_ols > 0), R.ZERO_VARIANCE, r_ols)
    est_o, se_o, p_o = _masked_test(est_ols, se_ols, r_ols, df)
    out["effect_ols_estimate"] = est_o
    out["effect_ols_std_error"] = se_o
    out["effect_ols_p_value"] = p_o
    out["effect_ols_significant"] = _significance(p_o, alpha)
    out["effect_ols_reason"] = r_ols.astype(object)

    # ---- AR(1): REML (primary) and ML, audit.ar1.ar1_batch
    ar_reason = np.where(design_ok & (df < 2), R.TOO_FEW_POINTS, xreason)
    ar_reason = np.where(ar_reason == R.OK, sreason, ar_reason).astype(object)
    rho_reml = np.full(m, np.nan)
    rho_ml = np.full(m, np.nan)
    at_bound = np.zeros(m, dtype=bool)
    ar_all, pos_in_ok = cr.ar_all, cr.pos_in_ok
    good = np.flatnonzero(ar_reason == R.OK)
    if good.size:
        fits = yield ("ar1", k, (ar_all.take(pos_in_ok[good]), du[good], des))
        est, bound, failed = fits["REML"]
        rho_reml[good] = np.where(failed, np.nan, est)
        at_bound[good] = bound
        ar_reason[good[failed]] = R.NUMERICAL_FAILURE
        est_ml, _, failed_ml = fits["ML"]
        rho_ml[good] = np.where(failed_ml, np.nan, est_ml)
    out["ar1_reml_rho"] = rho_reml
    out["ar1_reml_at_bound"] = at_bound
    out["ar1_reml_reason"] = ar_reason
    out["ar1_ml_rho"] = rho_ml

    # ---- GLS with the REML rho (rho 0 where REML failed, as diagnose_group)
    def gls(rho_in: np.ndarray):
        return cr.gls(rho_in, alpha)

    e_g, s_g, p_g, sig_g, r_g = gls(np.nan_to_num(rho_reml, nan=0.0))
    r_gls = np.where(ar_reason != R.OK, ar_reason, r_g)
    bad = r_gls != R.OK
    out["effect_gls_reml_estimate"] = np.where(bad, np.nan, e_g)
    out["effect_gls_reml_std_error"] = np.where(bad, np.nan, s_g)
    out["effect_gls_reml_p_value"] = np.where(bad, np.nan, p_g)
    out["effect_gls_reml_significant"] = sig_g
    out["effect_gls_reml_reason"] = r_gls.astype(object)

    if supplied_rho is not None:
        rho_s = np.broadcast_to(np.asarray(supplied_rho, dtype=float), (m,)).copy()
        e_s, s_s, p_s, sig_s, _ = gls(np.nan_to_num(rho_s))
        nf = ~np.isfinite(rho_s)
        out["effect_gls_supplied_rho"] = rho_s
        out["effect_gls_supplied_estimate"] = np.where(nf, np.nan, e_s)
        out["effect_gls_supplied_std_error"] = np.where(nf, np.nan, s_s)
        out["effect_gls_supplied_p_value"] = np.where(nf, np.nan, p_s)
        out["effect_gls_supplied_significant"] = sig_s

    # ---- HAC (Newey-West, Bartlett, n/(n-k)): Var = n/(n-k) v'Wv, v = h * e
    L = newey_west_default_lags(n)
    L = max(0, min(L, n - 1))
    h = np.einsum("mnk,mk->mn", Qr, a)
    V = Ef * h
    var = np.sum(V**2, axis=1)
    for lag in range(1, L + 1):
        w = 1.0 - lag / (L + 1.0)
        var = var + 2.0 * w * np.sum(V[:, lag:] * V[:, :-lag], axis=1)
    var = var * (n / df) if df > 0 else np.full(m, np.nan)
    r_hac = np.where(creason != R.OK, creason, sreason)
    with np.errstate(invalid="ignore"):
        se_hac = np.sqrt(np.where(var > 0, var, np.nan))
    r_hac = np.where((r_hac == R.OK) & ~(var > 0), R.ZERO_VARIANCE, r_hac)
    _, se_h, p_h = _masked_test(est_ols, se_hac, r_hac, df)
    out["effect_hac_std_error"] = se_h
    out["effect_hac_p_value"] = p_h
    out["effect_hac_significant"] = _significance(p_h, alpha)
    out["effect_hac_lags"] = np.full(m, L, dtype=np.int64)

    no_effect = n_trans == 0
    if no_effect.any():
        for col in [c_ for c_ in out if c_.startswith("effect_")]:
            val = out[col]
            if isinstance(val, np.ndarray) and val.dtype.kind == "f":
                out[col] = np.where(no_effect, np.nan, val)
        out["effect_ols_reason"] = np.where(no_effect, R.NO_CONTRAST, out["effect_ols_reason"]).astype(object)

    # ---- flips against the OLS decision
    base = _decision(out["effect_ols_p_value"], alpha)
    alts = ("gls_reml", "hac") + (("gls_supplied",) if supplied_rho is not None else ())
    for alt in alts:
        out[f"flip_{alt}"] = _flip(base, _decision(out[f"effect_{alt}_p_value"], alpha))
    out["flip_any"] = out["flip_gls_reml"].fill_false() | out["flip_hac"].fill_false()

    # ---- Durbin-Watson on the model residuals and on the session-only regression
    d = _dw_rows(E_ref, Y)
    k0 = min(2, k)
    X0 = X[:, :, :k0]
    first0, du0 = _unique_rows(X0)
    des0, to_shared = yield ("light", (n, k0), X0[first0])
    du0 = to_shared[du0]
    Q0r = des0.Q[du0]
    E0 = Yf - np.einsum("mnk,mk->mn", Q0r, np.einsum("mnk,mn->mk", Q0r, Yf))
    pin0 = np.isin(du0, des0.pinv_rows)
    if pin0.any():
        E0[pin0] = _pinv_residuals(des0, du0[pin0], Yf[pin0])
    E0[~y_finite | ~x_finite] = np.nan
    d0 = _dw_rows(E0, Y)

    # exact critical value for the power (once per distinct design), then all p-values at once
    power, mu_q = _power_start(des, float(power_rho), alpha)
    if mu_q is not None:
        power.set_quantiles(*(yield ("quantile", (mu_q.shape[1], power.target), (mu_q, power.target))))
    p = des.p
    p0 = des0.p
    width = max(p, p0, 1)
    pieces = []
    row_main = np.flatnonzero(des.dw_ok[du] & np.isfinite(d))
    row_sess = np.flatnonzero(des0.dw_ok[du0] & np.isfinite(d0))
    if row_main.size:
        pieces.append(_pad(des.mu[du[row_main]] - d[row_main, None], width))
    if row_sess.size:
        pieces.append(_pad(des0.mu[du0[row_sess]] - d0[row_sess, None], width))
    if power.polish_rows.size:
        pieces.append(_pad(des.mu[power.polish_rows] - power.c[power.polish_rows, None], width))
    probs = (yield ("imhof", width, np.vstack(pieces))) if pieces else np.empty(0)
    p_pos = np.full(m, np.nan)
    p_pos[row_main] = probs[:row_main.size]
    p0_pos = np.full(m, np.nan)
    p0_pos[row_sess] = probs[row_main.size:row_main.size + row_sess.size]
    lam_power = power.polish(probs[row_main.size + row_sess.size:], des)
    if lam_power is not None:
        power.set_power((yield ("imhof", lam_power.shape[1], lam_power)))
    power_u = power.value

    d_lower, d_upper = critical_bounds(n, k - 1, alpha)
    out["dw_statistic"] = d
    out["dw_p_positive"] = p_pos
    out["dw_p_negative"] = 1.0 - p_pos
    out["dw_d_lower"] = np.full(m, d_lower)
    out["dw_d_upper"] = np.full(m, d_upper)
    out["dw_zone"] = _zone(d, d_lower, d_upper)
    out["dw_significant_positive"] = out["dw_p_positive"] < alpha
    out["dw_significant_negative"] = out["dw_p_negative"] < alpha
    out["dw_power_rho"] = np.full(m, float(power_rho))
    out["dw_power"] = power_u[du]
    out["dw_session_only_statistic"] = d0
    out["dw_session_only_p_positive"] = p0_pos

    # ---- residual lag-1 autocorrelation with exact null moments (autocorrelation.residual_lag1_batch)
    r1_reason = np.where(x_finite, xreason, R.NON_FINITE_INPUT).astype(object)
    has_x = r1_reason == R.OK
    E_fill = np.where(np.isfinite(E_ref), E_ref, 0.0)
    E_sc = _scale_rows(E_fill, _binary_exponents(E_fill))  # exact; r1 is scale-free
    num = np.sum(E_sc[:, 1:] * E_sc[:, :-1], axis=1)
    den = np.sum(E_sc**2, axis=1)
    rr = np.full(m, R.OK, dtype=object)
    rr[~(den > 0)] = R.ZERO_RESIDUAL_VARIANCE
    # data reasons (also those of Breusch-Godfrey and Ljung-Box); the same function of the same
    # arrays as the contrast rows' when no residual row was replaced (the usual case)
    data_r = sreason.copy() if np.array_equal(E_fill, Ef) else series_reasons(Y, E_fill)
    rr = np.where(rr == R.OK, data_r, rr)
    rr[~np.all(np.isfinite(E_ref), axis=1)] = R.NON_FINITE_INPUT
    r1_reason = np.where(has_x, rr, r1_reason)
    mean_r = np.where(has_x, des.r1_mean[du], np.nan)
    var_r = np.where(has_x, des.r1_var[du], np.nan)
    ok_r = r1_reason == R.OK
    with np.errstate(divide="ignore", invalid="ignore"):
        r1 = np.where(ok_r, num / np.where(ok_r, den, 1.0), np.nan)
        corrected = r1 - mean_r
        z = np.where(var_r > 0, corrected / np.sqrt(var_r), np.nan)
    r1_reason = np.where(ok_r & has_x & ~(var_r > 0), R.ZERO_VARIANCE, r1_reason)
    pz = 2.0 * special.ndtr(-np.abs(z))  # scipy.stats.norm.sf
    nfin = r1_reason == R.NON_FINITE_INPUT
    out["r1_residual"] = r1
    out["r1_null_mean"] = np.where(nfin, np.nan, mean_r)
    out["r1_null_variance"] = np.where(nfin, np.nan, var_r)
    out["r1_corrected"] = corrected
    out["r1_z"] = z
    out["r1_p_value"] = pz

    # ---- Breusch-Godfrey (lag 1) and Ljung-Box (asymptotic_tests)
    out["bg_statistic"], out["bg_p_value"] = _breusch_godfrey(E_ref, data_r, des, du, xreason, x_finite, n, k)
    h_lb = ljung_box_default_lags(n)
    lb_q, lb_p = _ljung_box(E_ref, Y, h_lb, data_r)
    out["lb_statistic"] = lb_q
    out["lb_lags"] = np.full(m, h_lb)
    out["lb_p_value"] = lb_p

    dead = ~np.isfinite(d)
    if dead.any():
        out["dw_p_positive"] = np.where(dead, np.nan, out["dw_p_positive"])
        out["dw_p_negative"] = np.where(dead, np.nan, out["dw_p_negative"])
        out["dw_zone"] = np.where(dead, "unknown", out["dw_zone"])
    overflow = unscale_effect_columns(out, ex)
    out["reason"] = _join_reasons(out["effect_ols_reason"], out["ar1_reml_reason"], r1_reason,
                                  np.where(overflow, R.NUMERICAL_FAILURE, R.OK).astype(object))
    return out


def _pinv_residuals(des: _Designs, d: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """y - X (pinv(X) y) for rows with rank-deficient designs (diagnose_group's projection)."""
    coef = np.einsum("mkn,mn->mk", des.pinv[d], Y)
    return Y - np.einsum("mnk,mk->mn", des.X[d], coef)


def _pad(rows: np.ndarray, width: int) -> np.ndarray:
    """Zero-pad rows of eigenvalues to ``width`` columns (zeros do not change P(Q < 0))."""
    if rows.shape[1] == width:
        return rows
    return np.concatenate([rows, np.zeros((rows.shape[0], width - rows.shape[1]))], axis=1)


def _masked_test(est, se, reason, df):
    """``regression._frame``: NaN estimate and se where a reason is set, two-sided t p-value."""
    bad = reason != R.OK
    est = np.where(bad, np.nan, est)
    se = np.where(bad, np.nan, se)
    p = _two_sided_t(est, se, df) if df > 0 else np.full(est.shape, np.nan)
    return est, se, p


class _PowerSetup:
    """Exact critical values (before the last polishing step) and the designs that need power."""

    def __init__(self, U: int):
        self.c = np.full(U, np.nan)
        self.dens = np.full(U, np.nan)
        self.polish_rows = np.empty(0, dtype=int)
        self.value = np.full(U, np.nan)
        self.rho = 0.0
        self.alpha = 0.05
        self.target = np.nan

    def finish(self, polish_probs: np.ndarray, des: _Designs) -> np.ndarray:
        """Polish c by one Newton step on the error-controlled Imhof CDF, then the power."""
        lam = self.polish(polish_probs, des)
        if lam is not None:
            self.set_power(prob_quadform_below_zero(lam))
        return self.value

    def polish(self, polish_probs: np.ndarray, des: _Designs) -> np.ndarray | None:
        """Polish c by one Newton step on the error-controlled Imhof CDF; the eigenvalue rows
        whose P(Q < 0) are the powers (``set_power``), None when no design needs one."""
        rows = self.polish_rows
        if rows.size == 0:
            return None
        c = self.c[rows] - (polish_probs - self.target) / self.dens[rows]
        off = ~np.isfinite(c) | (np.abs(c - self.c[rows]) > _POLISH_MAX_CORRECTION)
        if off.any():  # the fixed-panel search did not get close enough: the reference root finder
            c[off] = ratio_quantile(des.mu[rows[off]], np.full(int(off.sum()), self.target))
        self.c[rows] = c
        return _power_eigenvalues(des, rows, c, self.rho)

    def set_power(self, probs: np.ndarray) -> None:
        """The powers from P(Q < 0) of the rows of ``polish`` (NaN where c is not finite)."""
        rows = self.polish_rows
        self.value[rows] = np.where(np.isfinite(self.c[rows]), probs, np.nan)

    def set_quantiles(self, c: np.ndarray, dens: np.ndarray, conv: np.ndarray) -> None:
        """The result of the Newton search on ``start``'s rows."""
        rows = self.polish_rows
        self.c[rows] = np.where(conv, c, np.nan)
        self.dens[rows] = dens


def _power_start(des: _Designs, rho: float, alpha: float) -> tuple[_PowerSetup, np.ndarray | None]:
    """``durbin_watson.dw_power`` conditions; the null eigenvalue rows whose critical values the
    Newton search must find (``_ratio_quantile_newton`` at ``target``, then ``set_quantiles``),
    None when no design needs one."""
    ps = _PowerSetup(des.U)
    ps.rho, ps.alpha = rho, alpha
    usable = des.dw_ok & (des.p >= 2)
    if not (np.isfinite(rho) and abs(rho) < 1 and 0 < alpha < 1):
        return ps, None
    if rho == 0.0:
        ps.value[usable] = alpha
        return ps, None
    rows = np.flatnonzero(usable)
    if rows.size == 0:
        return ps, None
    mu = des.mu[rows]
    spread = mu[:, -1] > mu[:, 0]
    rows, mu = rows[spread], mu[spread]
    ps.target = alpha if rho > 0 else 1.0 - alpha
    if rows.size == 0:
        return ps, None
    ps.polish_rows = rows
    return ps, mu


def _power_setup(des: _Designs, rho: float, alpha: float) -> _PowerSetup:
    """``durbin_watson.dw_power`` conditions and the Newton search of the critical values."""
    ps, mu = _power_start(des, rho, alpha)
    if mu is not None:
        ps.set_quantiles(*_ratio_quantile_newton(mu, np.full(mu.shape[0], ps.target)))
    return ps


def _power_eigenvalues(des: _Designs, rows: np.ndarray, c: np.ndarray, rho: float) -> np.ndarray:
    """Rows of eigenvalues of L'(s(B - cI))L, G = N'S(rho)N = LL' (dw_power_grid), whose
    P(Q < 0) are the powers P_rho(reject)."""
    n = des.n
    p = des.p
    lag = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    S = rho**lag
    N = des.N[rows]
    G = N.transpose(0, 2, 1) @ (S @ N)
    G = 0.5 * (G + G.transpose(0, 2, 1))
    try:
        root = np.linalg.cholesky(G)
    except np.linalg.LinAlgError:
        gw, gv = np.linalg.eigh(G)
        root = (gv * np.sqrt(np.clip(gw, 0.0, None))[:, None, :]) @ gv.transpose(0, 2, 1)
    sign = 1.0 if rho > 0 else -1.0
    cmat = sign * (des.B[rows] - np.einsum("u,ij->uij", c, np.eye(p)))  # c I per row, as _outer forms products
    form = root.transpose(0, 2, 1) @ cmat @ root
    lam = np.linalg.eigvalsh(0.5 * (form + form.transpose(0, 2, 1)))
    big = np.abs(lam).max(axis=1, keepdims=True)
    return np.where(np.abs(lam) < _EIG_ZERO_RTOL * big, 0.0, lam)


def _breusch_godfrey(E_ref, data_r, des: _Designs, du, xreason, x_finite, n, k):
    """``asymptotic_tests.breusch_godfrey_batch`` with a design per row: LM = n R^2 of e on [X, e_-1].

    ``data_r``: ``series_reasons`` of the data and the zero-filled residuals, per row.
    """
    m = E_ref.shape[0]
    has_c = des.has_constant[du]
    ka = np.where(has_c, k, k + 1) + 1
    df_denom = n - ka
    reason = np.where(x_finite, xreason, R.NON_FINITE_INPUT).astype(object)
    reason = np.where((reason == R.OK) & (df_denom < 1), R.NO_RESIDUAL_DF, reason)
    lm = np.full(m, np.nan)
    rows = np.flatnonzero(reason == R.OK)
    if rows.size == 0:
        return lm, _chi2_sf(lm, 1)
    E = E_ref[rows]
    finite = np.all(np.isfinite(E), axis=1)
    E0 = np.where(np.isfinite(E), E, 0.0)
    Ef = _scale_rows(E0, _binary_exponents(E0))  # exact; LM is scale-free
    lag = np.zeros_like(Ef)
    lag[:, 1:] = Ef[:, :-1]
    Qa = des.Q[du[rows]]
    U_ = Ef - np.einsum("mnk,mk->mn", Qa, np.einsum("mnk,mn->mk", Qa, Ef))
    Lr = lag - np.einsum("mnk,mk->mn", Qa, np.einsum("mnk,mn->mk", Qa, lag))
    nc = np.flatnonzero(~has_c[rows])
    if nc.size:
        Qn = des.Qa_noconst[du[rows[nc]]]
        U_[nc] = Ef[nc] - np.einsum("mnk,mk->mn", Qn, np.einsum("mnk,mn->mk", Qn, Ef[nc]))
        Lr[nc] = lag[nc] - np.einsum("mnk,mk->mn", Qn, np.einsum("mnk,mn->mk", Qn, lag[nc]))
    lm[rows] = bg_lm_rows(U_, Lr, Ef, data_r[rows], finite)[0]
    return lm, _chi2_sf(lm, 1)


def _ljung_box(E_ref, Y, h, data_r):
    """Ljung-Box Q(h) and p-value per row: the arrays of ``asymptotic_tests.ljung_box_batch``."""
    q, _ = ljung_box_rows(E_ref, h, Y, data_reasons=data_r)
    return q, _chi2_sf(q, h)


def _empty_columns(out: dict, n: int, k: int, with_supplied: bool) -> dict:
    """Zero-row columns with the names and dtypes of a computed stack."""
    t = np.arange(float(max(n, k + 3)))
    X = np.column_stack([np.ones(t.size), t] + [(t >= t.size // 2).astype(float)] * max(k - 2, 0))[:, :max(k, 1)]
    Cc = np.zeros((1, X.shape[1]))
    Cc[0, -1] = 1.0
    template = _stack_columns((t**2)[None], X[None], Cc, 0.05, 0.0 if with_supplied else None,
                              DEFAULT_POWER_RHO, "", None)
    return {name: (v[:0] if not isinstance(v, _NullableBool) else v[:0]) for name, v in template.items()}
