"""Quadrature building blocks against closed-form integrals."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from diskfield import quadrature as quad


def test_gauss_legendre_unit_is_exact_for_polynomials():
    x, w = quad.gauss_legendre_unit(5)
    for k in range(10):  # exact for degree < 2n (standard Gauss property)
        assert np.sum(w * x**k) == pytest.approx(1.0 / (k + 1), rel=1e-13)


def test_gauss_hermite_normal_gives_normal_moments():
    x, w = quad.gauss_hermite_normal(8)
    # E[Z^2] = 1, E[Z^4] = 3 for a standard normal (standard)
    assert np.sum(w * x**2) == pytest.approx(1.0, rel=1e-12)
    assert np.sum(w * x**4) == pytest.approx(3.0, rel=1e-12)


def test_panel_rule_integrates_gaussian_across_graded_breaks():
    breaks = np.sort(np.concatenate([[-10.0, 10.0], quad.graded_breaks(
        np.array(0.3), np.array(0.01), -10.0, 10.0)]))
    for n, tol in ((4, 1e-3), (6, 1e-5)):  # well inside the 0.01-nat budget of the likelihood
        nodes, logw = quad.panel_rule(breaks, n)
        f = np.exp(-0.5 * ((nodes - 0.3) / 0.01) ** 2) / (0.01 * np.sqrt(2 * np.pi))
        assert np.sum(np.exp(logw) * f) == pytest.approx(1.0, abs=tol)


def test_panel_rule_zero_width_panels_get_no_weight():
    nodes, logw = quad.panel_rule(np.array([0.0, 0.0, 1.0, 1.0]), 3)
    assert np.all(np.isneginf(logw[:3])) and np.all(np.isneginf(logw[6:]))
    assert np.exp(logw[3:6]).sum() == pytest.approx(1.0)


def test_log_sum_exp_matches_scipy_and_handles_all_minus_inf():
    a = np.array([[-1000.0, -1001.0, -np.inf], [-np.inf, -np.inf, -np.inf]])
    out = quad.log_sum_exp(a, axis=-1)
    assert out[0] == pytest.approx(special.logsumexp(a[0]), rel=1e-14)
    assert np.isneginf(out[1])


def test_crossings_found_and_refined_for_a_ring_shape():
    x = np.linspace(0.5, 5.0, 60)[None, :]
    func = lambda r: np.log(10.0) - 1.5 * np.log(r) + np.log1p(3 * np.exp(  # noqa: E731
        -0.5 * ((r - 3.0) / 0.2) ** 2)) - np.log(3.0)
    f = func(x)
    lo, hi, flo, fhi, found = quad.first_crossings(x, f, np.ones((1, 59), bool), 5)
    root = quad.refine_crossings(func, lo, hi, flo, fhi, iterations=6)
    assert found.sum() == 3   # falls through the level, then the ring rises above and falls back
    np.testing.assert_allclose(func(root[found]), 0.0, atol=1e-6)


def test_monomial_interpolation_recovers_a_polynomial_of_lower_degree():
    # derived: the interpolant of a degree-5 polynomial at 6 nodes is the polynomial itself
    x, _ = quad.gauss_legendre_unit(6)
    got = quad.monomial_interpolation(6) @ (3 * x**2 + x**5)
    np.testing.assert_allclose(got, [0, 0, 3, 0, 0, 1], atol=1e-9)
