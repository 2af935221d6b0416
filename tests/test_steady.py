"""The body-shared spin integral with upper limits (diskfield.steady.body_spin_with_limits).

F(phi) = int_-inf^phi e^(Y - phi) h(Y) dY with h the detections' Gaussian product times the
limits' normal CDFs (derived from the isotropic spin projection, README's statistical model).
The reference is a dense trapezoid rule on a grid far finer than any feature (common
practice, no source), written here from that definition and not from the module's code.
"""
from __future__ import annotations

import types

import numpy as np
import pytest
from scipy import special

from diskfield import steady
from diskfield._lkcommon import _detection_stats
from diskfield.likelihood import QuadratureSettings

SPAN = 60.0        # the integrand e^(Y - phi) is below e^-60 further down
GRID = 60_001      # spacing 1e-3: 50 points per sd of the narrowest feature used (0.05)


def _reference(phi, z, sd, is_lim):
    """ln F(phi) by a dense trapezoid over Y in [phi - SPAN, phi]."""
    ys = np.linspace(phi - SPAN, phi, GRID)
    lf = ys - phi
    for zi, si, li in zip(z, sd, is_lim):
        u = (zi - ys) / si
        lf = lf + (special.log_ndtr(u) if li
                   else -0.5 * u * u - np.log(si) - 0.5 * np.log(2.0 * np.pi))
    top = lf.max()
    return top + np.log(np.trapezoid(np.exp(lf - top), ys))


def _model_values(phis, z, sd, is_lim, n_nodes):
    b = types.SimpleNamespace(z=z[None], lim=is_lim[None], det=~is_lim[None])
    var = (sd ** 2)[None, None]
    stats = _detection_stats(b.z[None], var, b.det[None])
    n = len(phis)
    zeros = np.zeros(n, int)
    return steady.body_spin_with_limits(phis, zeros, zeros, np.array([0]), b, var, stats,
                                        n_nodes)


def _check(z, sd, is_lim, n_phi=41, tol=0.01):
    z, sd, is_lim = np.asarray(z, float), np.asarray(sd, float), np.asarray(is_lim, bool)
    phis = np.linspace(z.min() - 12.0, z.max() + 12.0, n_phi)
    got = _model_values(phis, z, sd, is_lim, QuadratureSettings().spin_panel_nodes)
    ref = np.array([_reference(p, z, sd, is_lim) for p in phis])
    assert np.all(np.isfinite(got))
    near = ref > ref.max() - 30.0
    err = np.abs(got - ref)[near]
    assert err.max() < tol, (err.max(), phis[near][np.argmax(err)])
    # far out: ordered like the reference wherever it moves by more than a nat per step
    step = np.diff(ref)
    big = np.abs(step) > 1.0
    assert np.all(np.sign(np.diff(got))[big] == np.sign(step)[big])
    return got, ref


def test_limit_below_the_detections_of_the_same_body():
    # the body's mass sits between a precise limit and detections far above it: interpolating
    # e^q on the panels read here was off by ~50 nats within 30 nats of the maximum
    _check(z=[4.556, 5.202, 2.192, 0.932], sd=[0.055, 0.525, 0.059, 0.061],
           is_lim=[True, False, False, True])


def test_limit_far_below_precise_detections_is_not_lost_below_the_table():
    # 40 sd apart: the whole mass lies below the detections' peak - 20 sd
    got, ref = _check(z=[3.0, 3.05, 1.0], sd=[0.05, 0.05, 0.05], is_lim=[False, False, True])
    assert np.isfinite(got).all() and got.max() == pytest.approx(ref.max(), abs=0.01)


def test_limits_only_body_never_exceeds_certainty():
    # derived: h <= 1, so F(phi) <= e^-phi int_-inf^phi e^Y dY = 1 (ln F <= 0 up to the
    # quadrature's error; the table it replaced gave ln F = +7 for some limits-only bodies)
    got, _ = _check(z=[1.743, 1.549, 1.549], sd=[0.97, 0.90, 0.97], is_lim=[True, True, True])
    assert got.max() < 1e-3


@pytest.mark.parametrize("seed", range(6))
def test_random_bodies_against_the_dense_reference(seed):
    rng = np.random.default_rng(seed)
    for _ in range(5):
        n = int(rng.integers(1, 5))
        is_lim = np.zeros(n, bool)
        is_lim[: rng.integers(1, n + 1)] = True
        rng.shuffle(is_lim)
        z = rng.normal(3.0, 1.5, n)
        sd = np.exp(rng.uniform(np.log(0.05), np.log(2.5), n))
        _check(z, sd, is_lim, n_phi=25)


def test_likelihood_of_the_demo_matches_the_dense_reference_per_body(monkeypatch):
    # the whole model with the table swapped for the dense reference: same per-body values
    from diskfield.likelihood import build_model
    from diskfield.records import read_compilation
    from diskfield.resources import demo_dir

    comp = read_compilation(demo_dir() / "demo_compilation.ecsv")
    model = build_model(comp, profile="ring")
    rng = np.random.default_rng(3)
    theta = np.column_stack([p.sample(rng, 4) for p in model.priors])
    got = model.log_likelihood_pointwise(theta)

    def dense(phi, wi, gi, gx, b, var, stats, n_nodes):
        out = np.empty(len(phi))
        for k in range(len(phi)):
            m = b.lim[gi[k]] | b.det[gi[k]]
            out[k] = _reference(phi[k], b.z[gi[k]][m], np.sqrt(var[wi[k], gi[k]][m]),
                                b.lim[gi[k]][m])
        return out

    monkeypatch.setattr(steady, "body_spin_with_limits", dense)
    ref = model.log_likelihood_pointwise(theta)
    with_limits = model._bodies.lim.any(axis=1)
    assert with_limits.sum() >= 2
    np.testing.assert_allclose(got[:, with_limits], ref[:, with_limits], atol=0.01)


def _random_body(rng):
    n = int(rng.integers(1, 6))
    is_lim = np.zeros(n, bool)
    is_lim[: rng.integers(1, n + 1)] = True
    rng.shuffle(is_lim)
    return rng.normal(3.0, 1.5, n), np.exp(rng.uniform(np.log(0.02), np.log(2.5), n)), is_lim


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_compiled_kernel_follows_the_array_rule(monkeypatch):
    # the compiled kernel implements the same rule (breaks, skips, sub-panels, reads) as the
    # array code: equal to round-off over random bodies and reads from far below to far above
    rng = np.random.default_rng(11)
    for _ in range(40):
        z, sd, is_lim = _random_body(rng)
        phis = np.sort(rng.uniform(z.min() - 25.0, z.max() + 25.0, 60))
        got = _model_values(phis, z, sd, is_lim, 5)
        with monkeypatch.context() as m:
            m.setattr(steady, "_compiled", None)
            ref = _model_values(phis, z, sd, is_lim, 5)
        np.testing.assert_allclose(got, ref, rtol=1e-11, atol=1e-11)


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_compiled_reads_do_not_depend_on_their_order():
    # the kernel starts a read's panel search from the previous read's panel when both are of
    # the same row: reads shuffled across rows, or in runs per row either way, give the same
    rng = np.random.default_rng(5)
    z = np.array([2.0, 3.5, 1.2, 4.0])
    sd = np.array([0.3, 0.1, 0.05, 0.8])
    is_lim = np.array([True, False, True, False])
    b = types.SimpleNamespace(z=z[None], lim=is_lim[None], det=~is_lim[None])
    var = (sd ** 2)[None, None] * rng.uniform(0.5, 2.0, (3, 1, 1))
    stats = _detection_stats(b.z[None], var, b.det[None])
    phi = rng.uniform(z.min() - 25.0, z.max() + 25.0, 400)
    wi = rng.integers(0, 3, 400)
    gi = np.zeros(400, int)

    def values(order):
        return steady.body_spin_with_limits(phi[order], wi[order], gi, np.array([0]), b, var,
                                            stats, 5)

    shuffled = values(np.arange(400))
    assert np.isfinite(shuffled).all()
    for order in (np.lexsort((phi, wi)), np.lexsort((-phi, wi))):
        np.testing.assert_array_equal(values(order), shuffled[order])


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_compiled_log_ndtr_matches_scipy():
    # reference library: scipy.special.log_ndtr, across both tails and the series switch
    from diskfield import _special_jit

    x = np.concatenate([np.linspace(-80.0, 40.0, 4001), [-20.0, -19.999, -20.001, 6.0, 6.001]])
    exact = np.array([_special_jit.log_ndtr_erfc(v) for v in x])
    # above x = 6 scipy returns -Phi(-x) and the kernel log1p(-Phi(-x)): they differ by
    # Phi(-x)^2 / 2 < 1e-18, hence the absolute floor
    np.testing.assert_allclose(exact, special.log_ndtr(x), rtol=1e-13, atol=1e-15)


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_tabulated_log_ndtr_matches_scipy():
    # reference library: scipy.special.log_ndtr. The kernels' table of quintic Hermite
    # pieces: ~6e-13 absolute inside it (its own design figure), held here to 1e-11 on a
    # grid 7x finer than its pieces with off-node points, relative 1e-13 in the lower series,
    # exactly 0 at and above its top end; -inf and NaN pass through
    from diskfield import _special_jit

    inside = np.linspace(_special_jit._X0, _special_jit._X1, 5431)[:-1] + 1e-7
    got = np.array([_special_jit.log_ndtr(v) for v in inside])
    np.testing.assert_allclose(got, special.log_ndtr(inside), rtol=0, atol=1e-11)
    edge = np.nextafter(_special_jit._X1, 0.0)     # rounds to the table's end: the last piece
    assert abs(_special_jit.log_ndtr(edge) - special.log_ndtr(edge)) < 1e-15
    below = np.linspace(-300.0, _special_jit._X0, 1001)[:-1]
    np.testing.assert_allclose([_special_jit.log_ndtr(v) for v in below],
                               special.log_ndtr(below), rtol=1e-13)
    assert [_special_jit.log_ndtr(v) for v in (8.5, 40.0, np.inf)] == [0.0, 0.0, 0.0]
    assert _special_jit.log_ndtr(-np.inf) == -np.inf and np.isnan(_special_jit.log_ndtr(np.nan))


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_compiled_log1p_matches_numpy():
    # reference library: numpy.log1p, on both sides of the series switch at |x| = 1e-4,
    # near -1 and far above; held to 2e-16 absolute (the kernels' sums need absolute accuracy)
    # and 1e-12 relative
    from diskfield import _special_jit

    x = np.concatenate([-np.logspace(-20, np.log10(0.999999), 400),
                        np.logspace(-20, 8, 400), [0.0, 1e-4, -1e-4, 1.0001e-4, -0.9999e-4]])
    got = np.array([_special_jit.log1p(v) for v in x])
    ref = np.log1p(x)
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=2e-16)


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_compiled_exp_matches_numpy():
    # reference library: numpy.exp, over the whole range the kernels use and its edges; held
    # to 1e-15 relative (the Taylor series to degree 12 on |r| <= ln 2 / 2 leaves < 4e-16)
    from diskfield import _special_jit

    x = np.concatenate([np.linspace(-708.0, 709.0, 20001), np.linspace(-1.0, 1.0, 2001),
                        [0.0, -0.0, 1e-300, -1e-300, 0.5 * np.log(2.0), -0.5 * np.log(2.0)]])
    got = np.array([_special_jit.exp_ftz(v) for v in x])
    np.testing.assert_allclose(got, np.exp(x), rtol=1e-15, atol=0.0)
    # below e^-708 the kernels' sums treat values as underflowed: flushed to zero; above 709
    # (e^709.78 overflows) infinity; NaN passes through
    assert [_special_jit.exp_ftz(v) for v in (-708.5, -745.2, -1e6, -np.inf)] == [0.0] * 4
    assert [_special_jit.exp_ftz(v) for v in (709.5, 1e6, np.inf)] == [np.inf] * 3
    assert np.isnan(_special_jit.exp_ftz(np.nan))


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_branch_free_log_ndtr_is_the_table_above_its_floor():
    # reference library: scipy.special.log_ndtr above x = -40 (to the table's 1e-11); below
    # it -1000, whose exp is 0 as Phi(x) < 1e-349 is in double precision
    from diskfield import _special_jit

    x = np.concatenate([np.linspace(-40.0, 12.0, 20001), [8.5, np.nextafter(8.5, 0.0), 40.0]])
    got = np.array([_special_jit.log_ndtr_ftz(v) for v in x])
    np.testing.assert_allclose(got, special.log_ndtr(x), rtol=0.0, atol=1e-11)
    below = [_special_jit.log_ndtr_ftz(v) for v in (np.nextafter(-40.0, -41.0), -300.0, -np.inf)]
    assert below == [-1000.0] * 3 and float(special.ndtr(-40.0)) == 0.0
    assert _special_jit.log_ndtr_ftz(np.inf) == 0.0 and np.isnan(_special_jit.log_ndtr_ftz(np.nan))


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_branch_free_log_ndtr_with_its_tail_matches_scipy():
    # reference library: scipy.special.log_ndtr over both tails, to 1e-12 relative (the
    # table above -40, the asymptotic series A&S 26.2.12 below), and its edges
    from diskfield import _special_jit

    x = np.concatenate([-np.geomspace(1e-3, 1e6, 4001), np.linspace(-45.0, 12.0, 20001),
                        [np.nextafter(-40.0, -41.0), -40.0, 40.0]])
    got = np.array([_special_jit.log_ndtr_vec(v) for v in x])
    want = special.log_ndtr(x)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-11)
    assert _special_jit.log_ndtr_vec(-np.inf) == -np.inf
    assert _special_jit.log_ndtr_vec(np.inf) == 0.0 and np.isnan(_special_jit.log_ndtr_vec(np.nan))


@pytest.mark.skipif(steady._kernel() is None, reason="numba not importable")
def test_compiled_log_matches_numpy():
    # reference library: numpy.log over the positive normal doubles and around the reduction's
    # switch at sqrt(2); held to 1 ulp (fdlibm's bound for this reduction and polynomial)
    from diskfield import _special_jit

    rng = np.random.default_rng(3)
    x = np.concatenate([np.logspace(-307, 308, 20001), rng.uniform(0.01, 100.0, 5000),
                        np.nextafter(np.sqrt(2.0), [0.0, 2.0]), [1.0, 2.0, 0.5, 2.2250738585072014e-308,
                                                                1.7976931348623157e308]])
    got = np.array([_special_jit.log_vec(v) for v in x])
    ref = np.log(x)
    assert np.all(np.abs(got - ref) <= np.spacing(np.abs(ref)) + 1e-300)
    assert _special_jit.log_vec(0.0) == -np.inf and _special_jit.log_vec(np.inf) == np.inf
    assert np.isnan(_special_jit.log_vec(-1.0)) and np.isnan(_special_jit.log_vec(np.nan))
