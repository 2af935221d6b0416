"""A user prior on the spin obliquity, marginalised by quadrature in theta (diskfield.obliquity)."""
from __future__ import annotations

import dataclasses
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import integrate, special

from diskfield import build_model, read_compilation
from diskfield._lkcommon import _detection_stats
from diskfield.cli import main
from diskfield.errors import PriorFileError
from diskfield.obliquity import log_integrand_obliquity
from diskfield.priorset import load_priors
from diskfield.priorspec import Fixed, HalfNormal, LogUniform, Prior, TruncatedNormal, Uniform
from diskfield.resources import demo_dir
from diskfield.simulate import _sample_spin, compilation_from_arrays

OBLIQUITY = """
[spin.obliquity]
family = "uniform"
low = 0.0
high = 30.0
unit = "deg"
"""


class _SineObliquity(Prior):
    """Density sin(theta) on [0, 90] deg: u = cos(theta) ~ U(0, 1), i.e. isotropic axes
    (derived: P(cos theta < c) = 1 - P(theta < arccos c) = c)."""

    family = "sine"

    @property
    def support(self):
        return (0.0, 90.0)

    def _logpdf(self, x):
        with np.errstate(divide="ignore"):  # density 0 at theta = 0
            return np.log(np.sin(np.deg2rad(x))) + np.log(np.pi / 180.0)

    def ppf(self, u):
        return np.rad2deg(np.arccos(1.0 - np.asarray(u, float)))


@pytest.fixture()
def obliquity_file(tmp_path):
    path = tmp_path / "obliquity.toml"
    path.write_text(OBLIQUITY)
    return path


@pytest.fixture(scope="module")
def demo():
    return read_compilation(demo_dir() / "demo_compilation.ecsv")


def _with(prior):
    return dataclasses.replace(load_priors(None), spin_obliquity=prior)


def _walkers(model, n, seed):
    rng = np.random.default_rng(seed)
    return np.column_stack([p.sample(rng, n) for p in model.priors])


@pytest.mark.parametrize("spin", ["body", "record"])
def test_isotropic_equivalent_prior_reproduces_the_closed_forms(demo, spin):
    # derived: theta ~ sin(theta) on [0, 90] deg gives u ~ U(0, 1), the EMG closed forms
    iso = build_model(demo, profile="smooth", spin=spin)
    obl = build_model(demo, profile="smooth", spin=spin, priors=_with(_SineObliquity()))
    theta = _walkers(iso, 16, 7)
    a, b = iso.log_likelihood_pointwise(theta), obl.log_likelihood_pointwise(theta)
    assert np.all(np.isfinite(b))
    dets_only = ~iso._bodies.lim.any(axis=1)
    assert np.max(np.abs(a - b)[:, dets_only]) < 1e-3
    if spin == "record":  # closed-form limits (EMG survival) too
        assert np.max(np.abs(a - b)) < 0.01


def test_fixed_obliquity_is_a_known_shift_of_the_non_rotating_model(demo):
    # derived: theta fixed at 60 deg gives u = 1/2, i.e. X = ln 2 added to every ln value
    none = build_model(demo, profile="smooth", spin="none")
    theta = _walkers(none, 8, 11)
    at0 = build_model(demo, profile="smooth", priors=_with(Fixed(0.0)))
    np.testing.assert_allclose(at0.log_likelihood(theta), none.log_likelihood(theta), atol=1e-9)
    recs = dataclasses.replace(demo.records, ln_value=demo.records.ln_value + np.log(2.0))
    shifted = build_model(dataclasses.replace(demo, records=recs), profile="smooth", spin="none")
    at60 = build_model(demo, profile="smooth", priors=_with(Fixed(60.0)))
    np.testing.assert_allclose(at60.log_likelihood(theta), shifted.log_likelihood(theta),
                               atol=1e-6)


def test_narrow_prior_behaves_like_a_non_rotating_body(demo):
    none = build_model(demo, profile="smooth", spin="none")
    theta = _walkers(none, 8, 12)
    ref = none.log_likelihood_pointwise(theta)
    gaps = []
    for deg in (5.0, 1.0):
        obl = build_model(demo, profile="smooth", priors=_with(Uniform(0.0, deg, unit="deg")))
        gaps.append(np.max(np.abs(obl.log_likelihood_pointwise(theta) - ref)))
    # X <= -ln cos 5 deg = 0.0038: small, and shrinking like theta^2 (derived)
    assert gaps[0] < 0.2 and gaps[1] < gaps[0] / 10


def _quad_reference(prior, phi, z, var, det, lim, spin):
    """ln of the theta integral by scipy.integrate.quad (one body, one distance node)."""
    lo, hi = prior.support

    def record_terms(x, idx):
        d = phi - x
        out = 1.0
        for j in idx:
            if det[j]:
                out *= np.exp(-0.5 * (z[j] - d) ** 2 / var[j]) / np.sqrt(2 * np.pi * var[j])
            if lim[j]:
                out *= special.ndtr((z[j] - d) / np.sqrt(var[j]))
        return out

    def one(idx):
        def f(t):
            x = -np.log(np.cos(np.deg2rad(t)))
            return np.exp(prior._logpdf(np.array(t))) * record_terms(x, idx)
        # break points where X crosses each record's centre (phi - z_j)
        pts = [np.rad2deg(np.arccos(np.exp(-(phi - zj)))) for zj in z if phi - zj > 0]
        pts = [p for p in pts if lo < p < hi]
        return integrate.quad(f, lo, hi, points=pts or None, limit=400, epsabs=0,
                              epsrel=1e-11)[0]

    if spin == "body":
        return np.log(one(range(len(z))))
    return sum(np.log(one([j])) for j in range(len(z)))


@pytest.mark.parametrize("prior", [Uniform(10.0, 70.0), TruncatedNormal(30.0, 15.0, 0.0, 90.0),
                                   HalfNormal(20.0, 90.0), LogUniform(1.0, 90.0),
                                   _SineObliquity()], ids=lambda p: p.family)
@pytest.mark.parametrize("spin", ["body", "record"])
def test_against_quad_over_theta_with_limits(prior, spin, rng):
    # reference: scipy.integrate.quad over theta (adaptive), common practice, no source
    n = 4
    z = rng.normal(0.0, 1.0, (3, n))
    det = np.array([[1, 1, 0, 0], [1, 0, 0, 1], [0, 0, 1, 1]], bool)
    lim = ~det
    var = rng.uniform(0.01, 0.5, (1, 3, n))
    b = SimpleNamespace(z=z, det=det, lim=lim)
    stats = _detection_stats(z[None], var, det[None])
    phi = rng.uniform(-1.0, 3.0, (1, 3, 5))
    got = log_integrand_obliquity(phi, b, var, stats, spin, prior)
    assert got.shape == phi.shape and np.all(np.isfinite(got))
    for g in range(3):
        for k in range(5):
            ref = _quad_reference(prior, phi[0, g, k], z[g], var[0, g], det[g], lim[g], spin)
            assert got[0, g, k] == pytest.approx(ref, abs=0.01), (g, k)


def test_against_monte_carlo_latents_for_a_toy_body():
    # Monte Carlo over the simulator's own spin draws (diskfield.simulate), common practice
    comp = compilation_from_arrays(["B", "B"], ["NC", "NC"], [np.log(12.0), np.log(15.0)],
                                   [0.3, 0.25], distance={"B": (2.0, 2.0 + 1e-6)})
    model = build_model(comp, profile="smooth", priors=_with(TruncatedNormal(40, 20, 0, 90)))
    theta = np.array([[40.0, 1.0, 0.1]])
    assert model.parameter_names == ("field_1au", "power_index", "intrinsic_scatter")
    phi = model.log_field(theta, 2.0)[0]
    x = _sample_spin(model, np.random.default_rng(3), 200_000)[:, 0]
    s2 = model._terms.var_fixed + 0.1 ** 2
    dens = np.prod(np.exp(-0.5 * (model._terms.z - (phi - x[:, None])) ** 2 / s2)
                   / np.sqrt(2 * np.pi * s2), axis=1)
    mc, se = dens.mean(), dens.std() / np.sqrt(len(dens))
    got = np.exp(model.log_likelihood(theta)[0])
    assert abs(got - mc) < 4 * se + 1e-3 * mc


def test_cli_fit_with_an_obliquity_prior_runs(obliquity_file, tmp_path):
    status = main(["fit", str(demo_dir() / "demo_compilation.ecsv"), "--model", "smooth",
                   "--priors", str(obliquity_file), "--max-steps", "10", "--starts", "1",
                   "--quiet", "--out", str(tmp_path / "out")])
    assert status == 0


def test_time_dependent_envelope_is_refused_naming_the_file(demo, obliquity_file):
    with pytest.raises(PriorFileError) as err:
        build_model(demo, profile="smooth", envelope="dissipating", priors=[obliquity_file])
    line = err.value.lines()[0]
    assert str(obliquity_file) in line and "spin.obliquity" in line and "--spin none" in line


def test_non_rotating_bodies_accept_the_file(demo, obliquity_file):
    model = build_model(demo, profile="smooth", envelope="dissipating", spin="none",
                        priors=[obliquity_file])
    assert model.parameter_names[0] == "field_1au"
