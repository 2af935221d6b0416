"""Closed forms of the recording model against scipy and numerical integration."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from diskfield.priorspec import Fixed, LogNormal
from diskfield.recording import emg_logcdf, emg_logpdf, emg_logsf, record_terms
from diskfield.simulate import compilation_from_arrays


def _exponnorm(var):
    # scipy's exponnorm(K, loc, scale) is N(loc, scale^2) + Exp(rate 1/(K scale)); our D is
    # N(0, V) + Exp(1), so scale = sqrt(V), K = 1/(sigma lambda) = 1/sqrt(V)
    # (scipy.stats.exponnorm documentation).
    sd = np.sqrt(var)
    return stats.exponnorm(1.0 / sd, loc=0.0, scale=sd)


@pytest.mark.parametrize("var", [1e-4, 0.01, 0.25, 1.0, 9.0])
def test_emg_logpdf_matches_scipy_exponnorm(var):
    d = np.linspace(-6, 25, 301) * max(np.sqrt(var), 0.05)
    ref = _exponnorm(var).logpdf(d)
    ok = np.isfinite(ref)
    np.testing.assert_allclose(emg_logpdf(d, var)[ok], ref[ok], rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("var", [0.01, 0.25, 2.0])
def test_emg_logcdf_and_logsf_match_scipy_in_both_tails(var):
    dist = _exponnorm(var)
    d = np.concatenate([np.linspace(-8, 0, 40) * np.sqrt(var), np.linspace(0, 30, 40)])
    np.testing.assert_allclose(emg_logsf(d, var), dist.logsf(d), rtol=1e-9, atol=1e-12)
    cdf_ref = dist.logcdf(d)
    ok = np.isfinite(cdf_ref) & (cdf_ref > -700)
    np.testing.assert_allclose(emg_logcdf(d, var)[ok], cdf_ref[ok], rtol=1e-8, atol=1e-12)


def test_emg_far_tails_finite_and_monotone():
    # far left tail of the density: Gaussian, so ln p ~ -d^2 / 2V (derived); far right: -d
    d = np.linspace(-200, 200, 4001)
    lp, ls = emg_logpdf(d, 0.04), emg_logsf(d, 0.04)
    assert np.all(np.isfinite(lp)) and np.all(np.isfinite(ls))
    assert np.all(np.diff(ls) <= 1e-12)          # survival function decreases
    assert np.all(np.diff(lp[d > 1]) < 0)        # density decreases past its mode
    np.testing.assert_allclose(lp[-1], -200 + 0.02, rtol=1e-12)  # -d + V/2 (derived)


@pytest.mark.parametrize("var,d", [(0.09, -0.4), (0.09, 0.3), (1.0, 2.5), (0.0025, 0.01)])
def test_emg_density_equals_spin_integral(var, d):
    # p(d) = int_0^inf e^-X N(X; d, V) dX: the isotropic spin integral (derived)
    ref, _ = integrate.quad(lambda x: np.exp(-x) * stats.norm.pdf(x, d, np.sqrt(var)), 0, np.inf,
                            epsabs=0, epsrel=1e-12, points=None, limit=200)
    assert np.log(ref) == pytest.approx(float(emg_logpdf(d, var)), abs=1e-9)


def test_mean_and_sd_of_abs_cos_for_isotropic_axes(rng):
    # u = |cos theta| ~ U(0, 1) for isotropic axes: mean 1/2, sd 1/sqrt(12) (derived;
    # REFERENCES.md check values). Monte Carlo with isotropic unit vectors.
    v = rng.standard_normal((200_000, 3))
    u = np.abs(v[:, 2]) / np.linalg.norm(v, axis=1)
    se = u.std() / np.sqrt(len(u))
    assert abs(u.mean() - 0.5) < 5 * se
    assert u.std() == pytest.approx(1 / np.sqrt(12), abs=3e-3)
    # and X = -ln u is Exponential(1): mean 1 (derived)
    x = -np.log(u)
    assert abs(x.mean() - 1.0) < 5 * x.std() / np.sqrt(len(x))


def test_record_terms_assemble_offsets_and_variances():
    comp = compilation_from_arrays(
        ["A", "A", "B"], ["NC", "NC", "CC"], np.log([10.0, 20.0, 5.0]), [0.1, 0.2, 0.3],
        method=["ARM", "", "thermal"], remanence=["CRM", "TRM", ""],
        ln_fraction_mean=[np.log(0.5), 0.0, 0.0], ln_fraction_sd=[0.1, 0.0, 0.0])
    cal = {"ARM": LogNormal(1.0, 0.7), "thermal": LogNormal(1.0, 0.1)}
    rem = {"CRM": LogNormal(0.7, 0.6), "TRM": Fixed(1.0)}
    t = record_terms(comp.records, cal, rem)
    np.testing.assert_allclose(t.offset, [np.log(0.5) + np.log(0.7), 0.0, 0.0])
    np.testing.assert_allclose(t.var_fixed, [0.01 + 0.01 + 0.49 + 0.36, 0.04, 0.09 + 0.01])
    np.testing.assert_allclose(t.z, np.log([10.0, 20.0, 5.0]) - t.offset)


def test_record_terms_name_a_missing_calibration_prior():
    from diskfield.errors import PriorFileError

    comp = compilation_from_arrays(["A"], ["NC"], [1.0], [0.1], method=["IRM"])
    with pytest.raises(PriorFileError, match="calibration.IRM"):
        record_terms(comp.records, {"ARM": LogNormal(1.0, 0.7)}, {})
