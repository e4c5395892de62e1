"""Tests for audit.quadform: P(sum lam_j z_j^2 < 0) by Imhof, and the ratio quantile."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import stats

from audit import quadform as Q
from audit.quadform import (
    prob_quadform_below_zero,
    prob_quadform_below_zero_pan,
    prob_quadform_below_zero_reference,
    ratio_quantile,
)


def _random_rows(rng, sizes, reps):
    rows = []
    for p in sizes:
        for _ in range(reps):
            lam = rng.normal(size=p) * np.exp(rng.normal(size=p))
            if np.all(lam > 0) or np.all(lam < 0):
                lam[0] = -lam[0]
            rows.append(lam)
    return rows


def test_kronrod_rule_is_exact_for_polynomials():
    # source: Gauss-Kronrod theory (Kronrod 1965; QUADPACK qk15): the 15-point rule is exact
    # to degree 22 and its embedded 7-point Gauss rule to degree 13.
    x = Q.KRONROD_NODES
    for deg in range(23):
        exact = 2.0 / (deg + 1) if deg % 2 == 0 else 0.0
        assert abs(Q.KRONROD_WEIGHTS @ x**deg - exact) < 1e-14
        if deg <= 13:
            assert abs(Q.GAUSS7_WEIGHTS_ON_KRONROD_NODES @ x**deg - exact) < 1e-14


def test_kronrod21_rule_of_the_integral_is_exact_for_polynomials():
    # source: Gauss-Kronrod theory (Kronrod 1965; QUADPACK qk21): the 21-point rule is exact
    # to degree 31 and its embedded 10-point Gauss rule to degree 19 (and not to degree 20).
    x = Q._K21_NODES
    gauss = Q._K21_WEIGHTS - Q._K21_DIFF_WEIGHTS
    assert x.size == 21 and np.all(np.diff(x) > 0) and np.count_nonzero(gauss) == 10
    for deg in range(32):
        exact = 2.0 / (deg + 1) if deg % 2 == 0 else 0.0
        assert abs(Q._K21_WEIGHTS @ x**deg - exact) < 1e-14
        if deg <= 19:
            assert abs(gauss @ x**deg - exact) < 1e-14
    assert abs(gauss @ x**20 - 2.0 / 21) > 1e-8


def test_one_signed_zero_and_nonfinite_rows_are_exact():
    rows = np.array([
        [1.0, 2.0, 0.0],     # all >= 0: Q > 0 a.s.
        [-1.0, 0.0, -3.0],   # all <= 0: Q < 0 a.s.
        [0.0, 0.0, 0.0],     # Q = 0: undefined
        [1.0, np.nan, -1.0],
        [np.inf, -1.0, 1.0],
    ])
    p, err = prob_quadform_below_zero(rows, return_error=True)
    # source: definition (a sum of nonnegative terms with one positive weight is > 0 a.s.)
    assert p[0] == 0.0 and p[1] == 1.0
    assert np.isnan(p[2]) and np.isnan(p[3]) and np.isnan(p[4])
    assert err[0] == 0.0 and err[1] == 0.0
    assert prob_quadform_below_zero(np.array([2.5])) == 0.0
    assert prob_quadform_below_zero(np.array([-2.5])) == 1.0


@pytest.mark.parametrize("a,b", [(1.0, 1.0), (1.0, 1e-6), (3.0, 0.2), (1e-3, 5.0)])
def test_two_eigenvalues_match_f_distribution(a, b):
    # a z1^2 - b z2^2 < 0  <=>  z1^2 / z2^2 < b / a, and z1^2/z2^2 ~ F(1, 1)
    expected = stats.f.cdf(b / a, 1, 1)  # source: scipy.stats.f
    assert abs(prob_quadform_below_zero(np.array([a, -b])) - expected) < 1e-12


@pytest.mark.parametrize("r,s,c", [(1, 2, 0.7), (3, 1, 2.0), (5, 5, 1.0), (10, 3, 0.4),
                                   (2, 2, 3.0), (20, 7, 1.3), (4, 9, 0.25)])
def test_repeated_eigenvalues_match_f_distribution(r, s, c):
    # sum_{i<=r} z_i^2 - c sum_{j<=s} z_j^2 < 0  <=>  (chi2_r / r) / (chi2_s / s) < c s / r
    lam = np.r_[np.ones(r), -c * np.ones(s)]
    expected = stats.f.cdf(c * s / r, r, s)  # source: scipy.stats.f
    p, err = prob_quadform_below_zero(lam, return_error=True)
    assert abs(p - expected) < 1e-10
    assert err < 4e-10


def test_imhof_agrees_with_quad_reference_and_pan():
    rng = np.random.default_rng(20240611)
    rows = _random_rows(rng, [3, 4, 5, 8, 12, 20, 35, 60], reps=6)
    worst_quad = worst_pan = 0.0
    for lam in rows:
        p = prob_quadform_below_zero(lam)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # source: scipy.integrate.quad on the Imhof integrand
            ref = prob_quadform_below_zero_reference(lam)
            pan = prob_quadform_below_zero_pan(lam)  # source: Pan (1968) formula, scipy quad
        worst_quad = max(worst_quad, abs(p - ref))
        worst_pan = max(worst_pan, abs(p - pan))
    print(f"max |Imhof - quad reference| = {worst_quad:.2e}, max |Imhof - Pan| = {worst_pan:.2e}")
    assert worst_quad < 1e-9
    assert worst_pan < 1e-9


def test_initial_t_panels_cover_the_range_in_increasing_order():
    for span in (-1.0, 0.0, 0.3, 3.0, 4.5, 4.6, 7.5, 40.0):
        edges = Q._t_panel_edges(span)
        assert edges[0] == 0.0 and np.all(np.diff(edges) > 0)
        assert edges[-1] >= span and edges.size >= 2
        # narrow panels first, then the standard width, then wide ones
        widths = np.diff(edges)
        n_narrow = round(Q._NARROW_SPAN / Q._NARROW_WIDTH)
        n_middle = round((Q._WIDE_START - Q._NARROW_SPAN) / Q._PANEL_WIDTH)
        assert np.allclose(widths[:n_narrow], Q._NARROW_WIDTH)
        assert np.allclose(widths[n_narrow:n_narrow + n_middle], Q._PANEL_WIDTH)
        assert np.allclose(widths[n_narrow + n_middle:], Q._WIDE_WIDTH)


def test_durbin_watson_rows_agree_with_quad_reference_within_the_error_bound():
    # rows of the form mu - d (mu: eigenvalues of N'AN for a level-and-trend design), the rows
    # the DW p-values and critical values integrate; the error bound stays below its documented size
    rng = np.random.default_rng(17)
    for n, k in ((8, 3), (16, 4), (40, 8)):
        t = np.arange(float(n))
        step = (t >= n // 2).astype(float)
        X = np.column_stack([np.ones(n), t, step, (t - n // 2) * step, rng.normal(size=(n, max(k - 4, 0)))])[:, :k]
        N = np.linalg.qr(X, mode="complete")[0][:, k:]
        dn = np.diff(N, axis=0)
        mu = np.linalg.eigvalsh(dn.T @ dn)
        for d in np.quantile(mu, [0.05, 0.3, 0.5, 0.8, 0.97]) + rng.normal(scale=1e-3, size=5):
            p, err = prob_quadform_below_zero(mu - d, return_error=True)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ref = prob_quadform_below_zero_reference(mu - d)  # source: scipy.integrate.quad
            assert abs(p - ref) < 1e-9
            assert err < 4e-10


def test_references_agree_with_each_other():
    # Two independent reference routes (Imhof integral vs Pan's finite intervals).
    rng = np.random.default_rng(7)
    for lam in _random_rows(rng, [3, 6, 15], reps=4):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = prob_quadform_below_zero_reference(lam)
            assert abs(ref - prob_quadform_below_zero_pan(lam)) < 1e-9


def test_widely_spread_and_many_eigenvalues():
    cases = [
        np.array([1.0, -1e-6, -2e-6]),
        np.array([1.0, 1e-8, -1e-3]),
        np.linspace(-1.0, 3.0, 200),
        np.r_[np.linspace(0.01, 4.0, 120), -0.3],
        np.r_[1e4, -1e-4 * np.arange(1, 6)],
    ]
    for lam in cases:
        p, err = prob_quadform_below_zero(lam, return_error=True)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = prob_quadform_below_zero_reference(lam)  # source: scipy.integrate.quad
        assert abs(p - ref) < 1e-9
        assert err < 4e-10


def test_rows_are_independent_of_batching_padding_and_scale():
    rng = np.random.default_rng(3)
    rows = _random_rows(rng, [3, 5, 9], reps=5)
    width = max(len(r) for r in rows) + 2
    padded = np.zeros((len(rows), width))
    for i, lam in enumerate(rows):
        padded[i, : len(lam)] = lam
    batch = prob_quadform_below_zero(padded)
    single = np.array([prob_quadform_below_zero(lam) for lam in rows])
    scaled = prob_quadform_below_zero(padded * 123.4)
    assert np.max(np.abs(batch - single)) < 1e-13
    assert np.max(np.abs(batch - scaled)) < 1e-12
    # zeros anywhere in a row (rows of different widths in one call are integrated at their own
    # width): the same as the row without its zeros
    scattered = np.zeros((len(rows), 2 * width))
    for i, lam in enumerate(rows):
        slots = np.sort(rng.choice(2 * width, size=len(lam), replace=False))
        scattered[i, slots] = lam
    assert np.max(np.abs(prob_quadform_below_zero(scattered) - single)) < 1e-13


def test_monte_carlo_agreement():
    rng = np.random.default_rng(11)
    lam = np.array([2.0, 1.1, 0.4, -0.3, -0.9, -1.7])
    z = rng.standard_normal((200_000, lam.size))
    hits = ((z * z) @ lam < 0).mean()
    se = math.sqrt(hits * (1 - hits) / z.shape[0])
    # source: Monte Carlo, 200,000 draws, 4 standard errors
    assert abs(prob_quadform_below_zero(lam) - hits) < 4 * se


def test_ratio_quantile_matches_beta_distribution():
    # With mu = (0 x r, 1 x s): R = chi2_s / (chi2_r + chi2_s) ~ Beta(s/2, r/2).
    for r, s in [(3, 2), (7, 5), (12, 12), (1, 9)]:
        mu = np.r_[np.zeros(r), np.ones(s)]
        for prob in (0.01, 0.05, 0.5, 0.95):
            expected = stats.beta.ppf(prob, s / 2, r / 2)  # source: scipy.stats.beta
            assert abs(ratio_quantile(mu, prob) - expected) < 1e-10
        c = 0.37
        cdf = prob_quadform_below_zero(mu - c)
        assert abs(cdf - stats.beta.cdf(c, s / 2, r / 2)) < 1e-10  # source: scipy.stats.beta


def test_ratio_quantile_rows_with_nan_padding_and_degenerate_rows():
    mu = np.array([
        [0.1, 0.5, 1.3, 2.2, np.nan, np.nan],
        [0.3, 0.3, np.nan, np.nan, np.nan, np.nan],  # one distinct value: point mass
        [0.2, 0.9, 1.1, 1.8, 2.5, 3.9],
    ])
    q = ratio_quantile(mu, np.array([0.05, 0.05, 0.9]))
    assert np.isnan(q[1])
    assert abs(q[0] - ratio_quantile(mu[0, :4], 0.05)) < 1e-12
    # definition of the quantile: P(R < q) = prob
    assert abs(prob_quadform_below_zero(mu[2] - q[2]) - 0.9) < 1e-12
    assert np.isnan(ratio_quantile(mu[0, :4], 0.0)) and np.isnan(ratio_quantile(mu[0, :4], 1.0))
