"""Stacked diagnostics (audit.stacked): equal to the per-group path case by case, and to statsmodels.

The per-group path ``audit.diagnose.diagnose_group`` is itself checked against reference
libraries in tests/test_diagnose.py; here every column of ``diagnose_stack`` must reproduce it
row for row (a consistency check between our two paths), and the main columns are also
checked directly against statsmodels.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats.diagnostic import acorr_breusch_godfrey, acorr_ljungbox
from statsmodels.stats.stattools import durbin_watson

from audit import reasons as R
from audit.ar1 import ar1_correlation_matrix
from audit.config import AuditConfig
from audit.design import CaseDesign, case_design
from audit.diagnose import diagnose_group
from audit.intake import load_review
from audit.stacked import (
    case_design_stacks,
    diagnose_designs,
    diagnose_series,
    diagnose_stack,
    stack_groups,
)

FIXTURE = "fixtures/demo_small"
VALUE_TOL = 1e-9  # absolute and relative, every float column
RHO_TOL = 1e-8  # REML / ML AR(1) coefficients
RHO_COLUMNS = ("ar1_reml_rho", "ar1_ml_rho")


# ----------------------------------------------------------------------------- helpers


def _reference(Y, designs, alpha=0.05, supplied_rho=None, power_rho=0.3) -> pd.DataFrame:
    """diagnose_group called case by case (one row at a time), concatenated."""
    parts = []
    for i, des in enumerate(designs):
        rho = None if supplied_rho is None else np.asarray(supplied_rho, float)[i:i + 1]
        parts.append(diagnose_group(Y[i:i + 1], des, alpha, rho, power_rho))
    return pd.concat(parts, ignore_index=True)


def _assert_same(new: pd.DataFrame, ref: pd.DataFrame) -> dict[str, float]:
    """Same columns in the same order, same dtypes, same values; returns max abs error per column."""
    assert list(new.columns) == list(ref.columns)
    assert len(new) == len(ref)
    errors = {}
    for col in ref.columns:
        a, b = new[col], ref[col]
        assert a.dtype == b.dtype, f"{col}: {a.dtype} != {b.dtype}"
        if b.dtype.kind == "f":
            av, bv = a.to_numpy(), b.to_numpy()
            np.testing.assert_array_equal(np.isnan(av), np.isnan(bv), err_msg=col)
            tol = RHO_TOL if col in RHO_COLUMNS else VALUE_TOL
            np.testing.assert_allclose(av, bv, rtol=tol, atol=tol, err_msg=col)
            finite = np.isfinite(bv)
            errors[col] = float(np.max(np.abs(av - bv)[finite], initial=0.0))
        else:
            left = a.astype(object).where(a.notna(), "<NA>").tolist()
            right = b.astype(object).where(b.notna(), "<NA>").tolist()
            assert left == right, col
    return errors


def _stack_and_compare(Y_list, designs, supplied_rho=None, power_rho=0.3, alpha=0.05) -> dict[str, float]:
    """diagnose_stack per (n, k) stack against diagnose_group case by case."""
    worst: dict[str, float] = {}
    if supplied_rho is not None:
        supplied_rho = np.broadcast_to(np.asarray(supplied_rho, float), (len(designs),))
    for idx in stack_groups(designs).values():
        Y = np.vstack([Y_list[i] for i in idx])
        des = [designs[i] for i in idx]
        rho = None if supplied_rho is None else np.asarray(supplied_rho, float)[idx]
        new = diagnose_stack(Y, np.stack([d.X for d in des]), np.stack([d.contrast for d in des]), alpha, rho,
                             power_rho, models=[d.model for d in des], n_transitions=[d.n_transitions for d in des])
        ref = _reference(Y, des, alpha, rho, power_rho)
        for col, err in _assert_same(new, ref).items():
            worst[col] = max(worst.get(col, 0.0), err)
    return worst


def _ar1(rng, n, rho):
    e = np.empty(n)
    e[0] = rng.normal() / np.sqrt(1 - rho**2)
    for t in range(1, n):
        e[t] = rho * e[t - 1] + rng.normal()
    return e


def _sessions(rng, n):
    if rng.random() < 0.3:  # gaps in the session numbers
        return np.cumsum(rng.integers(1, 3, n)).astype(float)
    return np.arange(1.0, n + 1)


def _random_case(rng, n: int, kind: str):
    """(session, phase_index, condition, design, label) of an invented case of length n."""
    s = _sessions(rng, n)
    if kind in ("AB", "multiple_baseline"):
        na = int(rng.integers(3, n - 2))
        lab = np.array(["A"] * na + ["B"] * (n - na))
    elif kind == "ABAB":
        short = n < 12  # phases of 2 points: the level-only model
        size = 2 if short else 3
        cuts = np.sort(rng.choice(np.arange(size, n - size + 1), 3, replace=False)) if not short else None
        if short:
            lengths = [2, 2, 2, n - 6]
        else:
            while np.min(np.diff(np.r_[0, cuts, n])) < size:
                cuts = np.sort(rng.choice(np.arange(size, n - size + 1), 3, replace=False))
            lengths = np.diff(np.r_[0, cuts, n])
        lab = np.repeat(["A", "B", "A2", "B2"], lengths)
    else:  # alternating: baseline phase, then shuffled A/B (sometimes C) sessions
        nb = int(rng.integers(3, 5))
        rest = rng.choice(["A", "B", "C"] if rng.random() < 0.3 else ["A", "B"], n - nb)
        rest[0] = "B"
        lab = np.r_[np.full(nb, "A"), rest]
        kind = "alternating"
    cond = np.where(np.char.startswith(lab.astype(str), "A"), "baseline", "treatment")
    ph = np.cumsum(np.r_[1, lab[1:] != lab[:-1]])
    return s, ph, cond, kind, lab


def _random_review(seed: int, n_cases: int):
    """Outcome series and case designs of invented cases (AB, ABAB, multiple baseline, alternating)."""
    rng = np.random.default_rng(seed)
    series, designs, raw = [], [], []
    for _ in range(n_cases):
        kind = rng.choice(["AB", "ABAB", "multiple_baseline", "alternating"])
        n = int(rng.integers(8 if kind == "ABAB" else 6, 41))
        s, ph, cond, kind, lab = _random_case(rng, n, kind)
        des = case_design(s, ph, cond, kind, lab)
        y = des.X @ rng.normal(size=des.n_params) + _ar1(rng, n, rng.uniform(-0.5, 0.8))
        series.append(np.round(y, 1) if rng.random() < 0.3 else y)
        designs.append(des)
        raw.append((s, ph, cond, kind, lab))
    return series, designs, raw


def _design(X, c, model="level_and_trend", n_transitions=1) -> CaseDesign:
    return CaseDesign(X=X, contrast=np.asarray(c, float), columns=tuple(f"x{j}" for j in range(X.shape[1])),
                      model=model, n_transitions=n_transitions, signature=b"")


@pytest.fixture(scope="module")
def fixture_obs():
    obs = load_review([FIXTURE], AuditConfig()).prepared.observations
    return obs.sort_values(["case_key", "session"], kind="stable").reset_index(drop=True)


def _fixture_cases(obs):
    series, designs = [], []
    for _, part in obs.groupby("case_key", sort=True):
        args = (part["session"].to_numpy(float), part["phase_index"].to_numpy(),
                part["condition"].to_numpy().astype(str), part["design"].iloc[0], part["phase"].to_numpy().astype(str))
        designs.append(case_design(*args))
        series.append(part["outcome"].to_numpy(float))
    return series, designs


# ----------------------------------------------------------------------------- equal to the per-group path


def test_fixture_review_equals_per_group_path(fixture_obs):
    series, designs = _fixture_cases(fixture_obs)
    assert len(designs) >= 10
    rho = np.linspace(-0.3, 0.6, len(designs))
    worst = _stack_and_compare(series, designs, supplied_rho=rho)
    assert worst["dw_p_positive"] <= VALUE_TOL and worst["dw_power"] <= VALUE_TOL


@pytest.mark.parametrize("seed", [11, 12])
def test_random_designs_equal_per_group_path(seed):
    series, designs, _ = _random_review(seed, 70)
    models = {d.model for d in designs}
    assert {"level_and_trend", "level_only", "alternating"} <= models
    rho = np.random.default_rng(seed).uniform(-0.6, 0.6, len(designs))
    _stack_and_compare(series, designs, supplied_rho=rho)


@pytest.mark.parametrize("power_rho", [-0.4, 0.0])
def test_power_at_negative_and_zero_rho_equals_per_group_path(power_rho):
    series, designs, _ = _random_review(21, 25)
    _stack_and_compare(series, designs, power_rho=power_rho, alpha=0.1)


def _degenerate_rows(rng) -> list[tuple[np.ndarray, CaseDesign]]:
    """Invented cases of 12 points (one ordinary case first) with degenerate data or designs."""
    n = 12
    t = np.arange(n, dtype=float)
    step = (t >= 6).astype(float)
    X = np.column_stack([np.ones(n), t, step, (t - 6) * step])
    c = np.array([0, 0, 1.0, 0])
    normal = _design(X, c)
    X_dup = np.column_stack([np.ones(n), t, step, step])  # rank deficient (k = 4, rank 3)
    singular = _design(X_dup, c)
    X_only_base = X.copy()
    no_effect = _design(X_only_base, np.zeros(4), n_transitions=0)
    base = rng.normal(size=n) + t
    rows = [
        (base, normal),
        (np.full(n, 5.0), normal),  # constant series
        (X @ np.array([1.0, 0.5, 3.0, -0.2]), normal),  # exact fit
        (np.r_[rng.normal(size=n - 1), np.nan], normal),  # missing value
        (rng.normal(size=n), singular),
        (rng.normal(size=n), no_effect),
        (rng.normal(size=n) * 2 + 1, normal),
        (np.ldexp(base, 996), normal),  # near the float limits (about 1e300), exactly 2**996 * base
        ((rng.normal(size=n) + t) * 1e-300, normal),
        (np.where(t % 2 == 0, 1.0, -1.0) * np.finfo(float).max, normal),
    ]
    return rows


@pytest.mark.filterwarnings("error")
def test_degenerate_rows_mixed_into_stacks_give_the_same_nan_and_reasons():
    rows = _degenerate_rows(np.random.default_rng(3))
    Y = [r[0] for r in rows]
    designs = [r[1] for r in rows]
    rho = np.array([0.2, 0.2, 0.2, 0.2, 0.2, 0.2, np.nan, 0.2, 0.2, 0.2])
    _stack_and_compare(Y, designs, supplied_rho=rho)
    out = diagnose_stack(np.vstack(Y), np.stack([d.X for d in designs]), np.stack([d.contrast for d in designs]),
                         supplied_rho=rho, models=[d.model for d in designs],
                         n_transitions=[d.n_transitions for d in designs])
    assert out.loc[1, "reason"].startswith(R.CONSTANT_SERIES)
    assert R.ZERO_RESIDUAL_VARIANCE in out.loc[2, "reason"]
    assert R.NON_FINITE_INPUT in out.loc[3, "reason"]
    assert R.SINGULAR_DESIGN in out.loc[4, "reason"] and np.isnan(out.loc[4, "dw_p_positive"])
    assert out.loc[5, "effect_ols_reason"] == R.NO_CONTRAST
    assert out.loc[0, "reason"] == "" and np.isfinite(out.loc[0, "dw_power"])
    # source: definition (DW, r1, rho and p-values are scale-free; estimates scale with the data)
    for col in ("dw_statistic", "dw_p_positive", "ar1_reml_rho", "effect_ols_p_value", "r1_residual", "lb_statistic"):
        assert out.loc[7, col] == pytest.approx(out.loc[0, col], rel=1e-12, abs=1e-15), col
    assert out.loc[7, "effect_ols_estimate"] == pytest.approx(out.loc[0, "effect_ols_estimate"] * 2.0**996, rel=1e-12)
    assert out.loc[7, "reason"] == "" and np.isfinite(out.loc[8, "ar1_reml_rho"])


def test_designs_that_occur_twice_share_their_algebra_but_not_their_data():
    rng = np.random.default_rng(8)
    series, designs, _ = _random_review(5, 6)
    twice = designs + designs
    Y = series + [y[::-1].copy() + rng.normal(size=y.size) for y in series]
    _stack_and_compare(Y, twice, supplied_rho=0.25)


def test_grid_values_from_cholesky_and_symmetric_root_agree():
    # the two factorisations of M(g) in the AR(1) grid search (the second one is the fallback
    # when M(g) is not numerically positive definite) give the same -2 loglik on the grid
    from audit.ar1 import _GRID
    from audit.stacked import _AR1Rows, _grid_cholesky, _grid_values

    series, designs, _ = _random_review(4, 12)
    for des, y in zip(designs, series):
        n, k = des.X.shape
        Q = np.linalg.qr(des.X)[0]
        A1 = Q[1:].T @ Q[:-1]
        A1 = (A1 + A1.T)[None]
        A2 = (Q[1:-1].T @ Q[1:-1])[None]
        E = (y - Q @ (Q.T @ y))[None]
        rows = _AR1Rows(E, Q[None], A1, A2, n, k)
        L, logdet, lower = _grid_cholesky(A1, A2)
        assert lower
        M = np.eye(k) - _GRID[None, :, None, None] * A1[:, None] + (_GRID**2)[None, :, None, None] * A2[:, None]
        w, v = np.linalg.eigh(M)
        root = v * np.sqrt(w)[..., None, :]
        a = _grid_values(rows, np.zeros(1, dtype=int), L, logdet, True)
        b = _grid_values(rows, np.zeros(1, dtype=int), root, np.sum(np.log(w), axis=-1), False)
        for meth in a:
            np.testing.assert_allclose(a[meth], b[meth], rtol=1e-10, atol=1e-10)


# ----------------------------------------------------------------------------- whole-review entry points


def test_case_design_stacks_equal_case_design(fixture_obs):
    obs = fixture_obs
    keys = obs["case_key"].to_numpy()
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    arrays = (obs["session"].to_numpy(float), obs["phase_index"].to_numpy(), obs["condition"].to_numpy().astype(str),
              obs["design"].to_numpy().astype(str), obs["phase"].to_numpy().astype(str))
    _, _, raw = _random_review(31, 80)
    # append the invented cases to the fixture's rows
    sess, ph, cond, design, lab = (list(a) for a in arrays)
    starts = list(starts)
    for s, p, c, kind, lb in raw:
        starts.append(len(sess))
        sess += list(s)
        ph += list(p)
        cond += list(c)
        design += [kind] * len(s)
        lab += list(lb)
    arrays = tuple(np.asarray(a) for a in (sess, ph, cond, design, lab))
    starts = np.asarray(starts)
    ends = np.r_[starts[1:], len(sess)]
    seen = 0
    for idx, rows, X, C, models, n_trans in case_design_stacks(*arrays, starts):
        for j, i in enumerate(idx):
            sl = slice(starts[i], ends[i])
            ref = case_design(arrays[0][sl], arrays[1][sl], arrays[2][sl], arrays[3][starts[i]], arrays[4][sl])
            # bytes equal: the same matrices, contrasts, models and transition counts
            assert ref.X.tobytes() == X[j].tobytes() and ref.contrast.tobytes() == C[j].tobytes()
            assert ref.model == models[j] and ref.n_transitions == n_trans[j]
            np.testing.assert_array_equal(rows[j], np.arange(starts[i], ends[i]))
            seen += 1
    assert seen == len(starts)


def test_diagnose_series_and_designs_give_the_per_group_rows_in_case_order(fixture_obs):
    obs = fixture_obs
    series, designs = _fixture_cases(obs)
    keys = obs["case_key"].to_numpy()
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    ref = pd.concat([diagnose_group(y[None, :], d, 0.05, None) for y, d in zip(series, designs)], ignore_index=True)
    flat = diagnose_series(obs["session"], obs["outcome"], obs["phase_index"], obs["condition"].astype(str),
                           obs["design"].astype(str), obs["phase"].astype(str), starts)
    _assert_same(flat, ref)
    calls = []
    by_designs = diagnose_designs(series, designs, progress=lambda done, total: calls.append((done, total)))
    _assert_same(by_designs, ref)
    assert calls[-1] == (len(designs), len(designs))


def test_stacks_run_side_by_side_equal_each_stack_run_alone(monkeypatch):
    # diagnose_designs runs its stacks side by side (merged REML/ML searches per k, Newton
    # searches and Imhof integrals across stacks); each stack run alone (diagnose_stack) must
    # give the same rows: no row may depend on the rows it is merged with.  Degenerate rows
    # (constant, exact fit, missing value, rank-deficient design, no contrast, near the float
    # limits) ride along.
    import audit.stacked as S

    series, designs, _ = _random_review(31, 90)
    rng = np.random.default_rng(31)
    extra = _degenerate_rows(rng)
    series = series + [e[0] for e in extra]
    designs = designs + [e[1] for e in extra]
    rho = rng.uniform(-0.5, 0.7, len(designs))
    groups = stack_groups(designs)
    assert len({k for (_, k) in groups}) >= 3 and len(groups) >= 20
    merged = []
    real_answer = dict(S._ANSWER)
    for kind in real_answer:  # count the merged calls: fewer than one per stack
        monkeypatch.setitem(S._ANSWER, kind, lambda p, _k=kind: merged.append(_k) or real_answer[_k](p))
    for power_rho in (0.3, -0.4):
        merged.clear()
        together = diagnose_designs(series, designs, supplied_rho=rho, power_rho=power_rho)
        assert 0 < merged.count("ar1") < len(groups) and merged.count("imhof") < 2 * len(groups)
        assert merged.count("light") == len({n for (n, _) in groups}) < len(groups)
        alone = []
        for idx in groups.values():
            out = diagnose_stack(np.vstack([series[i] for i in idx]), np.stack([designs[i].X for i in idx]),
                                 np.stack([designs[i].contrast for i in idx]), 0.05, rho[idx], power_rho,
                                 models=[designs[i].model for i in idx],
                                 n_transitions=[designs[i].n_transitions for i in idx])
            alone.append(out.set_axis(idx))
        alone = pd.concat(alone).sort_index().reset_index(drop=True)
        errors = _assert_same(together, alone)
        assert errors["ar1_reml_rho"] <= 1e-13 and errors["dw_power"] <= 1e-12
    # a memory bound that cuts the stacks into several side-by-side runs: the same rows, and
    # progress after each run
    monkeypatch.setattr(S, "SIDE_BY_SIDE_CELLS", 8_000)
    calls = []
    cut = diagnose_designs(series, designs, supplied_rho=rho, power_rho=-0.4,
                           progress=lambda done, total: calls.append(done))
    _assert_same(cut, together)
    assert len(calls) > 3 and calls == sorted(calls) and calls[-1] == len(designs)


def test_stack_groups_keys():
    _, designs, _ = _random_review(2, 30)
    groups = stack_groups(designs)
    assert sorted(i for idx in groups.values() for i in idx) == list(range(30))
    for (n, k), idx in groups.items():
        assert all(designs[i].X.shape == (n, k) for i in idx)
    by_model = stack_groups(designs, by_model=True)
    assert all(designs[i].model == key[2] for key, idx in by_model.items() for i in idx)


# ----------------------------------------------------------------------------- against statsmodels


def test_stack_columns_match_statsmodels(fixture_obs):
    series, designs = _fixture_cases(fixture_obs)
    rho = 0.35
    frame = diagnose_designs(series, designs, supplied_rho=rho)
    for i, (y, des) in enumerate(zip(series, designs)):
        X, c = des.X, des.contrast
        n, k = X.shape
        row = frame.iloc[i]
        fit = sm.OLS(y, X).fit()
        t = fit.t_test(c)
        # source: statsmodels OLS t_test of the contrast
        assert row["effect_ols_estimate"] == pytest.approx(float(np.squeeze(t.effect)), rel=1e-8, abs=1e-10)
        assert row["effect_ols_std_error"] == pytest.approx(float(np.squeeze(t.sd)), rel=1e-8)
        assert row["effect_ols_p_value"] == pytest.approx(float(np.squeeze(t.pvalue)), rel=1e-8, abs=1e-12)
        hac = sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": int(row["effect_hac_lags"]),
                                                         "use_correction": True}, use_t=True)
        # source: statsmodels OLS(cov_type='HAC', use_correction=True, use_t=True)
        assert row["effect_hac_p_value"] == pytest.approx(float(np.squeeze(hac.t_test(c).pvalue)), rel=1e-8, abs=1e-12)
        gls = sm.GLS(y, X, sigma=ar1_correlation_matrix(n, rho)).fit().t_test(c)
        # source: statsmodels GLS(y, X, sigma=R(rho)) t_test of the contrast
        assert row["effect_gls_supplied_estimate"] == pytest.approx(float(np.squeeze(gls.effect)), rel=1e-8, abs=1e-10)
        assert row["effect_gls_supplied_p_value"] == pytest.approx(float(np.squeeze(gls.pvalue)), rel=1e-7, abs=1e-12)
        # source: statsmodels durbin_watson on the OLS residuals
        assert row["dw_statistic"] == pytest.approx(durbin_watson(fit.resid), rel=1e-10)
        X0 = X[:, :2]
        assert row["dw_session_only_statistic"] == pytest.approx(durbin_watson(sm.OLS(y, X0).fit().resid), rel=1e-10)
        lb = acorr_ljungbox(fit.resid, lags=int(row["lb_lags"]))
        # source: statsmodels acorr_ljungbox (statistic at the largest lag)
        assert row["lb_statistic"] == pytest.approx(lb["lb_stat"].iloc[-1], rel=1e-9)
        bg = acorr_breusch_godfrey(fit, nlags=1, result_object=True)
        # source: statsmodels acorr_breusch_godfrey(nlags=1)
        assert row["bg_statistic"] == pytest.approx(bg.lm, rel=1e-9, abs=1e-12)
        # source: numpy lag-1 autocorrelation of the residuals, sum e_t e_t+1 / sum e_t^2
        e = fit.resid
        assert row["r1_residual"] == pytest.approx(float(e[1:] @ e[:-1] / (e @ e)), rel=1e-9)


@pytest.mark.parametrize("k", [1, 2, 4, 8, 9])
def test_spd_inverse_matches_numpy_inverse_and_log_determinant(k):
    # source: numpy.linalg.inv and slogdet (LAPACK); entry by entry up to k = 8, LAPACK above
    from audit.stacked import _spd_inverse

    rng = np.random.default_rng(k)
    A = rng.normal(size=(300, k, k))
    M = A @ A.transpose(0, 2, 1) + 0.1 * np.eye(k)
    Minv, logdet = _spd_inverse(M)
    np.testing.assert_allclose(Minv, np.linalg.inv(M), rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(logdet, np.linalg.slogdet(M)[1], rtol=1e-12, atol=1e-12)
    # one matrix not positive definite (or not finite): every matrix by inv / slogdet
    bad = M.copy()
    bad[7] = -np.eye(k)
    bad[9, 0, 0] = np.nan
    with np.errstate(all="ignore"):  # as its callers run it
        Minv_b, logdet_b = _spd_inverse(bad)
    np.testing.assert_allclose(Minv_b[7], -np.eye(k))
    assert np.all(np.isnan(Minv_b[9])) or not np.all(np.isfinite(Minv_b[9]))
    np.testing.assert_allclose(Minv_b[:7], np.linalg.inv(M[:7]), rtol=1e-9, atol=1e-9)
