"""Label ordering of exchangeable parameter groups (the two rings of ``two-ring``)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from conftest import seed_for
from diskfield import build_model
from diskfield.comparison import _savage_dickey_one, ring_prior_file
from diskfield.evidence import nested_evidence, savage_dickey
from diskfield.optimize import maximize_likelihood, unit_to_theta
from diskfield.ordering import Ordering, label_ordering
from diskfield.priorspec import Uniform
from diskfield.profiles import Exchangeable, Parameter, RadialProfile, get_profile
from diskfield.sampling import (SamplerSettings, _initial_walkers, _unit_log_probability,
                                run_sampler)
from diskfield.truth import ordered_truth

RING1 = ("ring_amplitude", "ring_radius", "ring_width")
RING2 = ("ring2_amplitude", "ring2_radius", "ring2_width")

# A small two-ring problem: the amplitudes and radii free (4 parameters), the rest fixed, so
# that nested sampling and emcee finish in seconds.
SMALL_PRIORS = """
[parameters.field_1au]
family = "fixed"
value = 40.0
[parameters.power_index]
family = "fixed"
value = 0.8
[parameters.intrinsic_scatter]
family = "fixed"
value = 0.2
[parameters.ring_width]
family = "fixed"
value = 1.0
[parameters.ring2_width]
family = "fixed"
value = 1.0
[parameters.ring_amplitude]
family = "uniform"
low = -0.5
high = 4.0
[parameters.ring2_amplitude]
family = "uniform"
low = -0.5
high = 4.0
[parameters.ring_radius]
family = "uniform"
low = 1.0
high = 12.0
[parameters.ring2_radius]
family = "uniform"
low = 1.0
high = 12.0
"""


def _cols(model, names):
    return [model.parameter_names.index(n) for n in names]


def _swap_rings(model, theta):
    free = [k for k, n in enumerate(RING1) if n in model.parameter_names]
    out = np.array(theta, float, copy=True)
    a = _cols(model, [RING1[k] for k in free])
    b = _cols(model, [RING2[k] for k in free])
    out[..., a], out[..., b] = theta[..., b], theta[..., a]
    return out


@pytest.fixture
def small_two_ring(small_compilation, tmp_path):
    path = tmp_path / "small_priors.toml"
    path.write_text(SMALL_PRIORS)
    return build_model(small_compilation, profile="two-ring", spin="none", priors=path)


# ------------------------------------------------------------------ when ordering applies

def test_ordering_applied_iff_the_ring_priors_are_identical(small_compilation, tmp_path):
    default = build_model(small_compilation, profile="two-ring")
    assert default.ordering.applied
    assert "ring_radius <= ring2_radius" in default.config["label_ordering"]
    assert "ring = inner" in default.config["label_ordering"]
    # the same distribution with another source string still counts as identical
    same = tmp_path / "same.toml"
    same.write_text('[parameters.ring_radius]\nfamily = "uniform"\nlow = 0.5\nhigh = 20.0\n'
                    'unit = "AU"\nsource = "my own words"\n')
    assert build_model(small_compilation, profile="two-ring", priors=same).ordering.applied
    # a different prior on the outer ring's radius: not symmetric, nothing ordered, and said
    other = tmp_path / "other.toml"
    other.write_text('[parameters.ring2_radius]\nfamily = "uniform"\nlow = 6.0\nhigh = 20.0\n')
    m = build_model(small_compilation, profile="two-ring", priors=other)
    assert not m.ordering.applied
    assert m.config["label_ordering"].startswith("ring, ring2 not ordered: ring2_radius")
    u = np.random.default_rng(1).uniform(size=(50, len(m.parameter_names)))
    theta = m.prior_transform(u)
    lp_product = sum(p.log_prob(theta[:, i]) for i, p in enumerate(m.priors))
    np.testing.assert_array_equal(m.log_prior(theta), lp_product)
    # `diskfield profiles` says the same under the same prior files
    from diskfield.commands.profiles import describe_components
    from diskfield.priorset import load_priors

    def listed(files):
        info = describe_components(load_priors(files))
        return {c["name"]: c.get("label_ordering") for c in info["profiles"]}

    assert listed(None)["two-ring"] == default.config["label_ordering"]
    assert listed([other])["two-ring"] == m.config["label_ordering"]
    assert listed(None)["ring"] is None
    # profiles without exchangeable groups have no ordering and an empty note
    ring = build_model(small_compilation, profile="ring")
    assert not ring.ordering.applied and ring.config["label_ordering"] == ""


def test_fixed_identical_members_still_ordered_but_a_fixed_key_is_not(small_two_ring,
                                                                      small_compilation,
                                                                      tmp_path):
    m = small_two_ring  # widths fixed at the same value in both rings
    assert m.ordering.applied and m.ordering.parts[0].columns.shape == (2, 2)
    fixed_key = tmp_path / "fixed_key.toml"
    fixed_key.write_text(SMALL_PRIORS.replace(
        'ring_radius]\nfamily = "uniform"\nlow = 1.0\nhigh = 12.0',
        'ring_radius]\nfamily = "fixed"\nvalue = 5.0').replace(
        'ring2_radius]\nfamily = "uniform"\nlow = 1.0\nhigh = 12.0',
        'ring2_radius]\nfamily = "fixed"\nvalue = 5.0'))
    m2 = build_model(small_compilation, profile="two-ring", spin="none", priors=fixed_key)
    assert not m2.ordering.applied and "is fixed" in m2.config["label_ordering"]


def test_two_ring_field_is_symmetric_under_swapping_the_rings(small_compilation):
    # the premise of the ordering (derived: the field is a product of the two ring factors)
    m = build_model(small_compilation, profile="two-ring")
    rng = np.random.default_rng(seed_for("symmetric field"))
    theta = m.prior_transform(rng.uniform(size=(20, len(m.parameter_names))))
    r = np.geomspace(0.5, 20.0, 60)
    np.testing.assert_allclose(m.log_field(theta, r), m.log_field(_swap_rings(m, theta), r),
                               rtol=0, atol=1e-12)
    np.testing.assert_allclose(m.log_likelihood(theta),
                               m.log_likelihood(_swap_rings(m, theta)), rtol=1e-12)


# ------------------------------------------------------------------ the prior transform

def test_transform_swaps_whole_groups(small_compilation):
    m = build_model(small_compilation, profile="two-ring")
    u = np.full(len(m.parameter_names), 0.5)
    u[_cols(m, RING1)] = (0.2, 0.9, 0.3)   # ring given the outer radius
    u[_cols(m, RING2)] = (0.7, 0.1, 0.6)
    swapped = u.copy()
    swapped[_cols(m, RING1)], swapped[_cols(m, RING2)] = u[_cols(m, RING2)], u[_cols(m, RING1)]
    theta = m.prior_transform(u)
    expected = np.array([p.ppf(x) for p, x in zip(m.priors, swapped)])
    np.testing.assert_array_equal(theta, expected)
    assert theta[_cols(m, RING1)[1]] < theta[_cols(m, RING2)[1]]
    # already ordered: the transform is the plain inverse CDFs
    np.testing.assert_array_equal(m.prior_transform(swapped), expected)


def test_transform_image_is_ordered_with_the_order_statistics_marginals(small_compilation):
    m = build_model(small_compilation, profile="two-ring")
    rng = np.random.default_rng(seed_for("fold marginals"))
    theta = m.prior_transform(rng.uniform(size=(20000, len(m.parameter_names))))
    i1, i2 = _cols(m, ("ring_radius", "ring2_radius"))
    assert np.all(theta[:, i1] <= theta[:, i2])
    lo, hi = m.priors[i1].support
    x1, x2 = (theta[:, i1] - lo) / (hi - lo), (theta[:, i2] - lo) / (hi - lo)
    # order statistics of two iid U(0, 1): the min has density 2(1 - x), CDF 1 - (1 - x)^2;
    # the max has CDF x^2 (order statistics, common practice)
    assert stats.kstest(x1, lambda x: 1 - (1 - x) ** 2).pvalue > 1e-3
    assert stats.kstest(x2, lambda x: x ** 2).pvalue > 1e-3
    # amplitudes do not depend on the radii: each ring's amplitude keeps its own prior
    ia = _cols(m, ("ring_amplitude",))[0]
    assert stats.kstest(theta[:, ia], m.priors[ia].cdf).pvalue > 1e-3


def test_three_exchangeable_groups_fold_to_k_factorial_times_the_prior():
    # a toy profile with three exchangeable one-parameter groups: the image of the fold is
    # the sorted triple of iid uniforms (order statistics: min ~ Beta(1, 3), median
    # ~ Beta(2, 2), max ~ Beta(3, 1); common practice)
    prof = RadialProfile("three", "toy", tuple(Parameter(f"c{k}_x", "", "") for k in (1, 2, 3)),
                         lambda r, p: 0.0 * r,
                         exchangeable=(Exchangeable(("c1", "c2", "c3"), ("x",), "x"),))
    priors = {f"c{k}_x": Uniform(0.0, 1.0) for k in (1, 2, 3)}
    ordering = label_ordering(prof, priors, ("c1_x", "c2_x", "c3_x"))
    assert ordering.applied and ordering.log_norm == pytest.approx(np.log(6.0))
    u = np.random.default_rng(seed_for("three groups")).uniform(size=(20000, 3))
    x = ordering.sort(u)
    assert np.all(ordering.in_order(x)) and not np.all(ordering.in_order(u))
    for k, (a, b) in enumerate(((1, 3), (2, 2), (3, 1))):
        assert stats.kstest(x[:, k], stats.beta(a, b).cdf).pvalue > 1e-3


def test_log_prior_is_the_normalised_density_of_the_transform(small_compilation):
    m = build_model(small_compilation, profile="two-ring")
    rng = np.random.default_rng(seed_for("log prior density"))
    n = 40000
    theta = m.prior_transform(rng.uniform(size=(n, len(m.parameter_names))))
    lp = m.log_prior(theta)
    lp_product = sum(p.log_prob(theta[:, i]) for i, p in enumerate(m.priors))
    assert np.all(np.isfinite(lp))
    np.testing.assert_allclose(lp, lp_product + np.log(2.0), rtol=0, atol=1e-12)
    assert np.all(m.log_prior(_swap_rings(m, theta)) == -np.inf)
    # Fraction of transform draws in a box of (ring_radius, ring2_radius) against the
    # integral of exp(log_prior) over that box (midpoint rule on a grid; the other
    # parameters' own densities divided out): checks the ln 2 normalisation (derived)
    i1, i2 = _cols(m, ("ring_radius", "ring2_radius"))
    box = ((2.0, 7.0), (5.0, 14.0))  # crosses the diagonal r1 = r2
    g1 = np.linspace(*box[0], 201)
    g2 = np.linspace(*box[1], 201)
    m1, m2 = 0.5 * (g1[1:] + g1[:-1]), 0.5 * (g2[1:] + g2[:-1])
    r1, r2 = (a.ravel() for a in np.meshgrid(m1, m2, indexing="ij"))
    grid = np.tile(theta[0], (r1.size, 1))
    grid[:, i1], grid[:, i2] = r1, r2
    others = sum(p.log_prob(grid[:, i]) for i, p in enumerate(m.priors) if i not in (i1, i2))
    density = np.exp(m.log_prior(grid) - others)
    cell = np.diff(g1)[0] * np.diff(g2)[0]
    integral = np.sum(density) * cell
    inside = ((theta[:, i1] >= box[0][0]) & (theta[:, i1] <= box[0][1])
              & (theta[:, i2] >= box[1][0]) & (theta[:, i2] <= box[1][1]))
    frac = inside.mean()
    # tolerance: 4 binomial standard errors of the fraction, plus a bound on the midpoint
    # rule's error, which comes only from the cells the diagonal cuts (at most one cell's
    # mass each; derived)
    lo1, lo2 = np.meshgrid(g1[:-1], g2[:-1], indexing="ij")
    cut = np.sum((lo1 < lo2 + np.diff(g2)[0]) & (lo2 < lo1 + np.diff(g1)[0]))
    tol = 4 * np.sqrt(frac * (1 - frac) / n) + cut * cell * density.max()
    assert abs(frac - integral) < tol


# ------------------------------------------------------------------ evidence and samplers

def test_nested_ln_z_unchanged_by_ordering(small_two_ring):
    ordered = small_two_ring
    plain = build_model(ordered.compilation, profile="two-ring", spin="none",
                        priors=ordered.priorset)
    plain.ordering = Ordering()   # the same model with the product prior
    assert ordered.ordering.applied and not plain.ordering.applied
    seed = seed_for("ln Z ordering")
    a = nested_evidence(ordered, seed=seed, nlive=150, dlogz=0.1)
    b = nested_evidence(plain, seed=seed + 1, nlive=150, dlogz=0.1)
    # the likelihood is symmetric, so the fold leaves Z = ∫ L(T(u)) du unchanged (derived);
    # independent runs: agree within three combined standard errors
    assert abs(a.ln_evidence - b.ln_evidence) < 3 * np.hypot(a.ln_evidence_err,
                                                            b.ln_evidence_err)
    # with the same seed dynesty draws the same unit-cube points and L(fold(u)) = L(u), so
    # the two runs coincide up to the round-off of the swapped ring product (derived)
    same = nested_evidence(plain, seed=seed, nlive=150, dlogz=0.1)
    assert same.n_calls == a.n_calls
    assert abs(same.ln_evidence - a.ln_evidence) < 1e-9
    i1, i2 = _cols(ordered, ("ring_radius", "ring2_radius"))
    assert np.all(a.draws.theta[:, i1] <= a.draws.theta[:, i2])
    assert not np.all(same.draws.theta[:, i1] <= same.draws.theta[:, i2])


def test_sampler_and_optimiser_stay_in_the_ordered_region(small_two_ring):
    m = small_two_ring
    i1, i2 = _cols(m, ("ring_radius", "ring2_radius"))
    rng = np.random.default_rng(seed_for("optimiser order"))
    opt = maximize_likelihood(m, rng, n_starts=2)
    assert opt.u[i1] <= opt.u[i2]
    np.testing.assert_array_equal(unit_to_theta(m, opt.u)[0], opt.theta)
    logp = _unit_log_probability(m)
    z0 = _initial_walkers(m, opt, rng, 16, 0.3, logp)   # a wide ball crosses the diagonal
    assert np.all(z0[:, i1] <= z0[:, i2])
    swapped = _swap_rings(m, z0)
    crossed = swapped[:, i1] > swapped[:, i2]
    assert np.any(crossed)
    # fold: the density in z is symmetric (L is, and the fold maps both to one θ; derived)
    np.testing.assert_allclose(logp(swapped), logp(z0), rtol=1e-12)
    np.testing.assert_array_equal(logp.theta(swapped), logp.theta(z0))
    # wall: outside the ordered region the density is zero
    walled = _unit_log_probability(m, wall=True)
    assert np.all(walled(swapped)[crossed, 0] == -np.inf)
    for region in ("fold", "wall"):
        run = run_sampler(m, seed=seed_for("sampler order"),
                          settings=SamplerSettings(n_walkers=16, chunk=50, max_steps=100,
                                                   ordered_region=region))
        assert np.all(run.chain[..., i1] <= run.chain[..., i2])
        assert np.all(np.isfinite(run.log_prob))


def test_folded_walkers_sample_the_ordered_posterior(small_two_ring):
    # The folded walkers' draws of the ordered radii have the nested-sampling posterior
    # mean within a few Monte Carlo errors (nested-sampling weights as the reference;
    # common practice, no source)
    m = small_two_ring
    i1, i2 = _cols(m, ("ring_radius", "ring2_radius"))
    ns = nested_evidence(m, seed=seed_for("ordered posterior ns"), nlive=150, dlogz=0.1)
    w = np.exp(ns.draws.log_weight)
    ref = w @ ns.draws.theta[:, [i1, i2]]
    sd = np.sqrt(w @ (ns.draws.theta[:, [i1, i2]] - ref) ** 2)
    run = run_sampler(m, seed=seed_for("ordered posterior"),
                      settings=SamplerSettings(n_walkers=16, chunk=300, max_steps=600))
    draws = run.chain[run.burn_in:].reshape(-1, run.chain.shape[-1])[:, [i1, i2]]
    assert np.all(draws[:, 0] <= draws[:, 1])
    n_eff = draws.shape[0] / np.max(run.tau)
    # tolerance: 4 Monte Carlo standard errors (ESS from the run's own tau) plus 4 of the
    # nested-sampling mean's (~ sd / sqrt(nlive * max(information, 1)); from memory)
    tol = 4 * sd / np.sqrt(n_eff) + 4 * sd / np.sqrt(150 * max(ns.information, 1.0))
    assert np.all(np.abs(draws.mean(axis=0) - ref) < tol)


# ------------------------------------------------------------------ Savage–Dickey

def _symmetric_draws(rng, n):
    """Draws of (a, r) for a strong inner and a weak outer ring, labels assigned at random
    (the unordered, symmetric posterior) -> array (n, 2 groups, 2 members)."""
    strong = np.column_stack([rng.normal(3.0, 0.7, n), rng.normal(4.0, 0.3, n)])
    weak = np.column_stack([rng.normal(0.3, 0.5, n), rng.normal(9.0, 1.0, n)])
    flip = rng.uniform(size=n) < 0.5
    first = np.where(flip[:, None], weak, strong)
    second = np.where(flip[:, None], strong, weak)
    return np.stack([first, second], axis=1)


def test_savage_dickey_pooled_over_ordered_draws_equals_the_unordered_value():
    rng = np.random.default_rng(seed_for("savage dickey pooled"))
    prior = Uniform(-0.9, 10.0)
    unordered = _symmetric_draws(rng, 3000)
    order = np.argsort(unordered[:, :, 1], axis=1)
    ordered = np.take_along_axis(unordered, order[:, :, None], axis=1)
    assert np.all(ordered[:, 0, 1] <= ordered[:, 1, 1])
    kw = dict(parameter="ring2_amplitude", value=0.0, seed=3)
    # the unordered model's own estimate: the second label's amplitude
    plain = savage_dickey(unordered[:, 1, 0], prior, **kw)
    pooled = savage_dickey(ordered[:, :, 0], prior, exchangeable=True, **kw)
    # pooling is invariant to relabelling a draw: the same value from the unordered draws
    same = savage_dickey(unordered[:, :, 0], prior, exchangeable=True, **kw)
    assert pooled.ln_bayes_factor == same.ln_bayes_factor
    # the unordered estimate uses half the copies; both estimate the same symmetric marginal
    # (derived): agree within three combined bootstrap errors
    err = np.hypot(plain.ln_bayes_factor_err, pooled.ln_bayes_factor_err)
    assert abs(pooled.ln_bayes_factor - plain.ln_bayes_factor) < 3 * err
    # the outer ring's own draws answer another question (its density at 0 is ~2x the
    # symmetric one here: ln 2 off), which is why ordering needs the pooling
    naive = savage_dickey(ordered[:, 1, 0], prior, **kw)
    assert abs(naive.ln_bayes_factor - plain.ln_bayes_factor) > 5 * err


def test_comparison_pools_the_ring_amplitudes_under_ordering(small_compilation):
    m = build_model(small_compilation, profile="two-ring")
    rng = np.random.default_rng(seed_for("comparison pooling"))
    draws = m.prior_transform(rng.uniform(size=(4 * 300, len(m.parameter_names))))
    draws = draws.reshape(4, 300, -1)

    class _Fit:
        model = m
        run = type("Run", (), {"draws": staticmethod(lambda: draws)})()

    ia, ia2 = _cols(m, ("ring_amplitude", "ring2_amplitude"))
    got = _savage_dickey_one(_Fit, ia2, "ring2_amplitude", seed=1)
    want = savage_dickey(draws[..., [ia2, ia]], m.priors[ia2], parameter="ring2_amplitude",
                         seed=1, exchangeable=True)
    assert got == want


# ------------------------------------------------------------------ other consumers

def test_prior_sensitivity_keeps_the_ordering_and_ln2_cancels(small_compilation, tmp_path):
    old = build_model(small_compilation, profile="two-ring")
    for scale in (0.5, 2.0):
        path, _ = ring_prior_file(old, scale, tmp_path / f"x{scale:g}.toml")
        new = build_model(small_compilation, profile="two-ring", priors=path)
        assert new.ordering.applied
        rng = np.random.default_rng(seed_for("sensitivity", scale))
        theta = (new if scale < 1 else old).prior_transform(
            rng.uniform(size=(200, len(old.parameter_names))))
        # the reweighting ratio new / old: product priors only, the ln 2 cancels (derived)
        ratio = new.log_prior(theta) - old.log_prior(theta)
        product = sum(pn.log_prob(theta[:, i]) - po.log_prob(theta[:, i])
                      for i, (pn, po) in enumerate(zip(new.priors, old.priors)))
        ok = np.isfinite(product)
        assert ok.sum() > 100
        np.testing.assert_allclose(ratio[ok], product[ok], rtol=0, atol=1e-12)


def test_truth_is_relabelled_like_the_fit():
    truth = {"ring_amplitude": 1.0, "ring_radius": 9.0, "ring_width": 0.5,
             "ring2_amplitude": 4.0, "ring2_radius": 3.0, "ring2_width": 1.5, "field_1au": 40.0}
    got = ordered_truth("two-ring", truth)
    assert got == {"ring_amplitude": 4.0, "ring_radius": 3.0, "ring_width": 1.5,
                   "ring2_amplitude": 1.0, "ring2_radius": 9.0, "ring2_width": 0.5,
                   "field_1au": 40.0}
    assert ordered_truth("two-ring", {"ring2_radius": 6.0}) == {"ring2_radius": 6.0}
    assert ordered_truth("ring", {"ring_radius": 6.0}) == {"ring_radius": 6.0}


def test_conformance_check_covers_exchangeable_declarations():
    from dataclasses import replace

    from diskfield.testing import check_profile

    check_profile(get_profile("two-ring"))
    ring = get_profile("ring")
    two = get_profile("two-ring")
    bogus = replace(ring, name="bogus", exchangeable=two.exchangeable)   # ring2_* undeclared
    with pytest.raises(AssertionError, match="undeclared: ring2_amplitude"):
        check_profile(bogus)
    # a profile whose second ring enters differently is not exchangeable
    lopsided = replace(two, name="lopsided",
                       log_field=lambda r, p: two.log_field(r, p) + 0.1 * p["ring2_width"])
    with pytest.raises(AssertionError, match="not exchangeable"):
        check_profile(lopsided)


def test_declared_groups_name_declared_parameters():
    prof = get_profile("two-ring")
    (ex,) = prof.exchangeable
    assert ex.groups == (RING1, RING2) and ex.keys == ("ring_radius", "ring2_radius")
    assert set(RING1 + RING2) <= set(prof.parameter_names)
    z = special.logit(np.array([[0.1, 0.9], [0.8, 0.2]]))
    assert list(Ordering().in_order(z)) == [True, True]
