"""The per-case quantities of the review summary that depend on each case's design, computed over
stacks of cases of equal (n, k) (``audit.stacked.case_design_stacks``) instead of design by design.

* ``ar1_from_r1``: the AR(1) coefficient that makes the exact expectation of the residual r1
  equal to the observed one (``audit.r1_calibration.ar1_from_residual_lag1_rows``);
* ``dw_power_at``: the exact Durbin-Watson power at one coefficient (as ``durbin_watson.dw_power``;
  critical values and power once per distinct design in a stack, as ``audit.stacked`` does);
* ``gls_at``: GLS-AR(1) effect tests at given coefficients per case (``stacked.gls_at_rhos``).

``audit.summary`` has per-design reference versions of the three; tests/test_summary_stacks.py
checks that both agree.  Memory is bounded as in ``stacked.diagnose_series``: designs are built
for at most ``stacked.CASE_BLOCK`` cases and used ``stacked.STACK_ROWS`` rows at a time.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import pandas as pd

from audit import reasons as R
from audit.autocorrelation import lag_matrix
from audit.quadform import prob_quadform_below_zero
from audit.r1_calibration import EXACT, RHO_BOUND, AR1FromResidualLag1, ar1_from_residual_lag1_rows
from audit.validation import CaseOrder
from audit.stacked import (
    CASE_BLOCK,
    STACK_ROWS,
    _Designs,
    _pad,
    _power_setup,
    _unique_rows,
    case_design_stacks,
    gls_at_rhos,
)

__all__ = ["ReviewStacks", "ar1_from_r1", "dw_power_at", "gls_at"]


@dataclass
class _Stack:
    idx: np.ndarray  # case positions (in ReviewStacks.keys order)
    Y: np.ndarray  # (m, n) outcomes
    X: np.ndarray  # (m, n, k) design matrices
    C: np.ndarray  # (m, k) effect contrasts
    n_transitions: np.ndarray

    def designs(self) -> tuple[_Designs, np.ndarray]:
        """Design algebra once per distinct design of the stack, and each row's design."""
        first, du = _unique_rows(self.X)
        return _Designs(self.X[first]), du


# Cases whose designs are built together here: smaller than the engine's CASE_BLOCK because the
# summary holds every table of the run at the same time (100,000 cases: 0.3 GB less at the peak).
SUMMARY_CASE_BLOCK = min(CASE_BLOCK, 10_000)


class ReviewStacks:
    """A review's observations as flat arrays sorted by case and session, with case positions."""

    def __init__(self, observations: pd.DataFrame):
        case_order = CaseOrder.of(observations)  # (case_key, session) order, without copying the table
        order = case_order.rows
        self.n_rows = order.size
        self.keys = case_order.keys.astype(str).astype(object)
        self.starts = case_order.starts[:-1]
        self.session = observations["session"].to_numpy(dtype=float)[order]
        self.outcome = observations["outcome"].to_numpy(dtype=float)[order]
        self.phase_index = observations["phase_index"].to_numpy()[order]
        self.condition = _text_in_order(observations["condition"], order)
        self.design = _text_in_order(observations["design"], order)
        self.phase_label = _text_in_order(observations["phase"], order)
        self._position = pd.Index(self.keys)

    def __len__(self) -> int:
        return self.keys.size

    def positions(self, case_keys) -> np.ndarray:
        """Position of each given case key in ``keys`` (-1 when the case has no observations)."""
        return self._position.get_indexer(pd.Index(np.asarray(case_keys, dtype=object).astype(str)))

    def stacks(self) -> Iterator[_Stack]:
        total = self.keys.size
        for b0 in range(0, total, SUMMARY_CASE_BLOCK):
            b1 = min(b0 + SUMMARY_CASE_BLOCK, total)
            r0 = self.starts[b0]
            r1 = self.starts[b1] if b1 < total else self.n_rows
            block = slice(r0, r1)
            for idx, rows, X, C, _models, n_trans in case_design_stacks(
                    self.session[block], self.phase_index[block], self.condition[block], self.design[block],
                    self.phase_label[block], self.starts[b0:b1] - r0):
                rows = rows + r0
                for s0 in range(0, idx.size, STACK_ROWS):
                    sl = slice(s0, s0 + STACK_ROWS)
                    yield _Stack(idx[sl] + b0, self.outcome[rows[sl]], X[sl], C[sl], n_trans[sl])


def _text_in_order(values: pd.Series, order: np.ndarray) -> np.ndarray:
    """``values.astype(str).to_numpy()[order]``, with one string object per distinct value."""
    codes, uniques = pd.factorize(values)
    if (codes < 0).any():  # missing values print as text there
        return values.astype(str).to_numpy()[order]
    return np.asarray(uniques, dtype=object).astype(str).astype(object)[codes[order]]


def ar1_from_r1(stacks: ReviewStacks, r1: np.ndarray) -> tuple[AR1FromResidualLag1, np.ndarray]:
    """Exact mean inversion for every case with observations; r1 aligned with ``stacks.keys``.

    Returns the result (aligned with ``stacks.keys``) and a mask of the cases it covers: cases
    whose design is singular or whose E_rho[r1] is not increasing are left out (reason
    ``numerical_failure`` in the reference path), for the caller's first-order fallback.
    """
    K = len(stacks)
    r1 = np.asarray(r1, dtype=float)
    rho, var = np.full(K, np.nan), np.full(K, np.nan)
    at_bound = np.zeros(K, dtype=bool)
    reason = np.full(K, R.OK, dtype=object)
    covered = np.zeros(K, dtype=bool)

    def one(st: _Stack):
        with np.errstate(all="ignore"):
            des, du = st.designs()
            ok = des.ok[du] & (des.p >= 1)
            if not ok.any():
                return None
            rows = np.flatnonzero(ok)
            Au = np.swapaxes(des.N, 1, 2) @ lag_matrix(des.n) @ des.N
            res = ar1_from_residual_lag1_rows(r1[st.idx[rows]], des.N[du[rows]], Au[du[rows]], des.r1_var[du[rows]])
            return st.idx[rows], res

    # the eigendecompositions and large array operations release the GIL: stacks in a few threads
    for found in _map_bounded(one, stacks.stacks()):
        if found is None:
            continue
        where, res = found
        good = res.reason != R.NUMERICAL_FAILURE
        take = where[good]
        rho[take], var[take] = res.rho[good], res.variance[good]
        at_bound[take], reason[take] = res.at_bound[good], res.reason[good]
        covered[take] = True
    return AR1FromResidualLag1(rho, var, at_bound, EXACT, reason), covered


def _threads() -> int:
    return max(1, min(4, os.cpu_count() or 1))


def _map_bounded(fn, items):
    """fn over items in a few threads, results in order, at most 2 x threads items in flight
    (``Executor.map`` would take every stack, and its arrays, at once)."""
    workers = _threads()
    with ThreadPoolExecutor(max_workers=workers) as pool:
        pending = deque()
        for item in items:
            pending.append(pool.submit(fn, item))
            if len(pending) >= 2 * workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def dw_power_at(stacks: ReviewStacks, rho: float, alpha: float) -> np.ndarray:
    """Exact DW power of every case's test at level alpha against AR(1) errors with coefficient rho
    (``durbin_watson.dw_power``; NaN where it is undefined); aligned with ``stacks.keys``."""
    out = np.full(len(stacks), np.nan)
    if not np.isfinite(rho):
        return out
    rho = float(np.clip(rho, -RHO_BOUND, RHO_BOUND))

    def one(st: _Stack):
        with np.errstate(all="ignore"):
            des, du = st.designs()
            power = _power_setup(des, rho, float(alpha))
            if power.polish_rows.size:
                probs = prob_quadform_below_zero(
                    _pad(des.mu[power.polish_rows] - power.c[power.polish_rows, None], max(des.p, 1)))
            else:
                probs = np.empty(0)
            return st.idx, power.finish(probs, des)[du]

    for idx, values in _map_bounded(one, stacks.stacks()):
        out[idx] = values
    return out


def gls_at(stacks: ReviewStacks, rhos: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """GLS-AR(1) effect test of every case at rhos (K, J) (rows aligned with ``stacks.keys``):
    estimate, se, p arrays (K, J), NaN for cases without a baseline/treatment transition."""
    rhos = np.asarray(rhos, dtype=float)
    K, J = rhos.shape
    est, se, p = (np.full((K, J), np.nan) for _ in range(3))

    def one(st: _Stack):
        return st.idx, gls_at_rhos(st.Y, st.X, st.C, rhos[st.idx], st.n_transitions)

    for idx, (e_, s_, p_) in _map_bounded(one, stacks.stacks()):
        est[idx], se[idx], p[idx] = e_, s_, p_
    return est, se, p
