"""The stacked per-case parts of the summary (audit.summary_stacks, audit.r1_calibration rows path)
agree with the per-design reference functions, which are checked against scipy / statsmodels /
Monte Carlo in tests/test_summary.py, tests/test_durbin_watson.py and tests/test_regression.py.

Cases: the invented demo review (52 cases of AB, ABAB, multiple-baseline and alternating designs)
plus randomly drawn AB/ABAB designs with gaps in the session numbers.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from audit import reasons as R
from audit.autocorrelation import lag_matrix, residual_lag1_null_moments
from audit.config import AuditConfig
from audit.demo import write_demo_review
from audit.diagnose import diagnose_cases
from audit.durbin_watson import dw_power
from audit.intake import load_review
from audit.r1_calibration import (
    ar1_from_residual_lag1,
    ar1_from_residual_lag1_rows,
    residual_lag1_mean_under_ar1,
)
from audit.regression import gls_contrast_test
from audit.summary import case_designs
from audit.summary_stacks import ReviewStacks, ar1_from_r1, dw_power_at, gls_at

ROOT_TOL = 1e-9  # both root finders stop at 1e-10 in rho


def _random_observations(seed: int = 11, n_cases: int = 40) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for c in range(n_cases):
        n_phases = 2 if c % 2 else 4
        lengths = rng.integers(3, 9, size=n_phases)
        n = int(lengths.sum())
        steps = rng.choice([1.0, 1.0, 1.0, 2.0], size=n)  # some gaps in the session numbers
        session = np.cumsum(steps)
        phase_index = np.repeat(np.arange(1, n_phases + 1), lengths)
        cond = np.where(phase_index % 2 == 1, "baseline", "treatment")
        y = np.cumsum(rng.normal(size=n)) * 0.5 + (cond == "treatment") * 2.0
        for t in range(n):
            rows.append({"case_key": f"r{c:03d}", "study": "S", "session": session[t], "outcome": y[t],
                         "phase_index": phase_index[t], "condition": cond[t],
                         "phase": "A" if cond[t] == "baseline" else "B",
                         "design": "AB" if n_phases == 2 else "ABAB"})
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def review(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    demo = write_demo_review(folder)
    obs = load_review([demo.data_folder], AuditConfig()).prepared.observations
    cols = ["case_key", "study", "session", "outcome", "phase_index", "condition", "phase", "design"]
    both = pd.concat([obs[cols], _random_observations()], ignore_index=True)
    return {"observations": both, "demo_observations": obs, "stacks": ReviewStacks(both),
            "groups": case_designs(both)}


def test_stacks_cover_every_case_once(review):
    stacks = review["stacks"]
    seen = np.concatenate([st.idx for st in stacks.stacks()])
    assert np.array_equal(np.sort(seen), np.arange(len(stacks)))
    assert stacks.positions(["no such case"])[0] == -1


def test_ar1_inversion_equals_the_per_design_reference(review):
    stacks, groups = review["stacks"], review["groups"]
    rng = np.random.default_rng(3)
    r1 = np.full(len(stacks), np.nan)
    true_rho = rng.uniform(-0.9, 0.9, len(stacks))
    for sig, keys in groups.members.items():
        pos = stacks.positions(keys)
        r1[pos] = residual_lag1_mean_under_ar1(groups.designs[sig].X, true_rho[pos])
    r1[0] = 0.999  # beyond m(0.95): the bound
    fast, covered = ar1_from_r1(stacks, r1)
    compared = 0
    for sig, keys in groups.members.items():
        pos = stacks.positions(keys)
        ref = ar1_from_residual_lag1(r1[pos], groups.designs[sig].X)
        ok = ref.reason != R.NUMERICAL_FAILURE
        assert np.array_equal(covered[pos], ok)
        np.testing.assert_allclose(fast.rho[pos][ok], ref.rho[ok], rtol=0, atol=ROOT_TOL)
        np.testing.assert_allclose(fast.variance[pos][ok], ref.variance[ok], rtol=1e-9)
        assert np.array_equal(fast.at_bound[pos][ok], ref.at_bound[ok])
        compared += int(ok.sum())
    assert compared >= 80
    assert fast.rho[0] == 0.95 and fast.at_bound[0]
    # where the root is unique it is the coefficient that produced r1
    inside = covered & ~fast.at_bound & np.isfinite(r1)
    np.testing.assert_allclose(fast.rho[inside], true_rho[inside], atol=ROOT_TOL)


def test_ar1_rows_edge_cases():
    X = np.column_stack([np.ones(10), np.arange(10.0)])
    n, k = X.shape
    N = np.linalg.qr(X, mode="complete")[0][:, k:]
    A = N.T @ lag_matrix(n) @ N
    _, v0 = residual_lag1_null_moments(X)
    m = 4
    res = ar1_from_residual_lag1_rows([np.nan, -0.999, 0.999, 0.1], np.repeat(N[None], m, 0),
                                      np.repeat(A[None], m, 0), np.full(m, v0))
    assert np.isnan(res.rho[0]) and res.reason[0] == R.NON_FINITE_INPUT
    assert res.rho[1] == -0.95 and res.rho[2] == 0.95 and res.at_bound[1:3].all()
    assert np.isfinite(res.rho[3]) and not res.at_bound[3]
    fixed = ar1_from_residual_lag1_rows([0.1], N[None], A[None], [0.0])  # V0 = 0: r1 fixed by the design
    assert np.isnan(fixed.rho[0]) and fixed.reason[0] == R.NUMERICAL_FAILURE


def test_dw_power_equals_durbin_watson_dw_power(review):
    stacks, groups = review["stacks"], review["groups"]
    for rho in (0.35, -0.2):
        fast = dw_power_at(stacks, rho, 0.05)
        for sig, keys in groups.members.items():
            ref = dw_power(groups.designs[sig].X, rho, 0.05)
            got = fast[stacks.positions(keys)]
            if np.isnan(ref):
                assert np.isnan(got).all()
            else:  # both exact; the reference root finder and Imhof error bound are below 1e-9
                np.testing.assert_allclose(got, ref, atol=1e-9)
    assert np.isnan(dw_power_at(stacks, np.nan, 0.05)).all()


def test_gls_at_equals_per_case_gls_and_diagnose_cases(review):
    stacks, groups = review["stacks"], review["groups"]
    rhos = np.column_stack([np.linspace(-0.5, 0.8, len(stacks)), np.full(len(stacks), 0.3)])
    est, se, p = gls_at(stacks, rhos)
    checked = 0
    for sig, keys in groups.members.items():
        des = groups.designs[sig]
        for key, pos in zip(keys, stacks.positions(keys)):
            for j in range(2):
                ref = gls_contrast_test(groups.outcomes[key], des.X, des.contrast, rhos[pos, j])
                if des.n_transitions == 0:
                    assert np.isnan(est[pos, j])
                    continue
                np.testing.assert_allclose([est[pos, j], se[pos, j], p[pos, j]],
                                           [ref.estimate, ref.std_error, ref.p_value], rtol=1e-10, atol=1e-12)
                checked += 1
    assert checked >= 150
    demo = review["demo_observations"]
    full = diagnose_cases(demo, 0.05, supplied_rho=pd.Series(rhos[:, 0], index=stacks.keys))["cases"]
    pos = stacks.positions(full["case_key"])
    np.testing.assert_allclose(p[pos, 0], full["effect_gls_supplied_p_value"].to_numpy(float), rtol=1e-10,
                               atol=1e-12)
