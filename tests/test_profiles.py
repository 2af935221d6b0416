"""Profile and envelope formulas, the registry with entry points, and the conformance check."""
from __future__ import annotations

import numpy as np
import pytest

from diskfield import OptionError
from diskfield.priorset import known_parameters, load_priors
from diskfield.priorspec import Uniform
from diskfield.profiles import (
    Envelope,
    Parameter,
    RadialProfile,
    all_components,
    available_envelopes,
    available_profiles,
    get_envelope,
    get_profile,
    registry,
)
from diskfield.profiles.ring import MIN_RING_FACTOR
from diskfield.testing import check_profile


def _p(**values):
    """Parameter dict with one walker: each value as shape (1, 1)."""
    return {k: np.array([[float(v)]]) for k, v in values.items()}


SMOOTH_P = dict(field_1au=40.0, power_index=1.3)
RING_P = dict(SMOOTH_P, ring_amplitude=2.5, ring_radius=4.0, ring_width=0.3)
RING2_P = dict(ring2_amplitude=-0.6, ring2_radius=8.0, ring2_width=1.1)
R = np.geomspace(0.4, 30.0, 101)[None, :]


# --------------------------------------------------------------------- registry


def test_builtin_names():
    assert available_profiles()[:6] == ("smooth", "ring", "two-ring", "broken", "accretion",
                                        "accretion-wind")
    assert available_envelopes()[:3] == ("steady", "dissipating", "viscous")


@pytest.mark.parametrize("getter, kind", [(get_profile, "profile"), (get_envelope, "envelope")])
def test_unknown_name_lists_valid_ones(getter, kind):
    with pytest.raises(OptionError) as err:
        getter("rign")
    msg = str(err.value)
    assert kind in msg and "'rign'" in msg
    assert ("smooth" in msg and "two-ring" in msg) if kind == "profile" else "viscous" in msg


class _FakeEntryPoint:
    _count = 0

    def __init__(self, name, obj):
        # a unique target per instance: the registry loads each (name, target) once
        _FakeEntryPoint._count += 1
        self.name, self._obj = name, obj
        self.value = f"fake_pkg.module{_FakeEntryPoint._count}:OBJ"

    def load(self):
        if isinstance(self._obj, Exception):
            raise self._obj
        return self._obj


def _plugin_profile(name="exp-cutoff"):
    scale = Parameter("cutoff_radius", "AU", "exponential cut-off radius",
                      domain=(0.0, np.inf), default_prior=Uniform(5.0, 50.0, unit="AU",
                                                                  source="convention"))

    def log_field(r, p):
        return np.log(p["field_1au"]) - r / p["cutoff_radius"]

    # get_profile inside a plug-in's loading must work (no recursion into the plug-ins)
    return RadialProfile(name, "power-law free exponential cut-off",
                         (get_profile("smooth").parameters[0], scale), log_field,
                         formula="R = field_1au exp(-r / cutoff_radius)")


@pytest.fixture
def fake_entry_points(monkeypatch):
    """Install fake entry points; returns a setter taking a list of (name, object)."""
    def install(items):
        eps = [_FakeEntryPoint(n, o) for n, o in items]
        monkeypatch.setattr(registry.metadata, "entry_points",
                            lambda group=None: eps if group == registry.ENTRY_POINT_GROUP else [])
    return install


def test_entry_point_plugin_is_registered(fake_entry_points, recwarn):
    plugin = _plugin_profile()
    fake_entry_points([("exp", plugin), ("exp-factory", lambda: _plugin_profile("exp2"))])
    assert available_profiles()[-2:] == ("exp-cutoff", "exp2")
    assert get_profile("exp-cutoff") is plugin
    assert "cutoff_radius" in known_parameters()
    # the plug-in's declared default prior joins the prior set, and a prior file may name it
    assert load_priors().parameters["cutoff_radius"].support == (5.0, 50.0)
    check_profile(plugin)
    assert not [w for w in recwarn if "plug-in" in str(w.message)]


def test_broken_and_colliding_plugins_are_skipped_with_a_warning(fake_entry_points):
    fake_entry_points([("bad", ImportError("no module named fake_pkg")),
                       ("notaprofile", 42),
                       ("clash", _plugin_profile("smooth"))])
    with pytest.warns(UserWarning) as record:
        names = available_profiles()
    with pytest.warns(UserWarning) as again:
        available_profiles()
    assert len(again) == 1  # load failures warn once; the name clash every time it is met
    assert names == ("smooth", "ring", "two-ring", "broken", "accretion", "accretion-wind")
    text = " ".join(str(w.message) for w in record)
    assert "'bad'" in text and "no module named fake_pkg" in text
    assert "'notaprofile'" in text and "int" in text
    assert "'clash'" in text and "built-in" in text
    with pytest.warns(UserWarning, match="'clash'"):
        assert get_profile("smooth") is registry.SMOOTH


# --------------------------------------------------------------------- conformance


@pytest.mark.parametrize("component", all_components(), ids=lambda c: c.name)
def test_every_shipped_component_passes_the_conformance_check(component):
    check_profile(component)


def _bad(log_field, params=None, name="bad"):
    params = params or (Parameter("bad_scale", "uT", "a scale", domain=(0, np.inf)),)
    return RadialProfile(name, "a faulty plug-in", params, log_field, formula="R = ?")


_SCALE_PRIOR = {"bad_scale": Uniform(1.0, 2.0)}


@pytest.mark.parametrize("component, priors, expected", [
    (_bad(lambda r, p: np.log(p["bad_scale"]) - np.log(r),
          (Parameter("a_0", "uT", "x"),)), {"a_0": Uniform(1, 2)}, "component-qualified"),
    (_bad(lambda r, p: np.log(p["bad_scale"]) + 0 * r,
          (Parameter("bad_scale", "furlongs per banana", "x"),)), _SCALE_PRIOR, "astropy"),
    (_bad(lambda r, p: np.log(p["bad_scale"]) + 0 * r), {}, "no default prior"),
    (_bad(lambda r, p: np.log(p["bad_scale"]) + 0 * r), {"bad_scale": Uniform(-1.0, 2.0)},
     "leaves the declared domain"),
    (_bad(lambda r, p: np.log(p["bad_scale"] - 1.0) - r), _SCALE_PRIOR, "non-finite"),
    (_bad(lambda r, p: np.sqrt(1.5 - p["bad_scale"]) + r), _SCALE_PRIOR, "NaN"),
    (_bad(lambda r, p: np.log(p["bad_scale"]).ravel()[:1]), _SCALE_PRIOR, "shape"),
    (_bad(lambda r, p: np.log(p["bad_scale"].mean()) + 0 * r), _SCALE_PRIOR, "walker"),
    (_bad(lambda r, p: np.log(np.multiply(r, 2.0, out=r))), _SCALE_PRIOR, "mutated"),
    (_bad(lambda r, p: r * np.random.uniform() + p["bad_scale"]), _SCALE_PRIOR, "not pure"),
])
@pytest.mark.filterwarnings("ignore:divide by zero:RuntimeWarning",
                            "ignore:invalid value:RuntimeWarning")
def test_conformance_check_catches_faulty_plugins(component, priors, expected):
    with pytest.raises(AssertionError, match=expected):
        check_profile(component, priors)


def test_conformance_check_catches_unnormalised_envelope():
    env = Envelope("halving", "a faulty envelope", (), lambda t, p: np.full(np.shape(t), -0.7),
                   formula="T = 1/2")
    with pytest.raises(AssertionError, match="normalised"):
        check_profile(env)


# --------------------------------------------------------------------- radial formulas


def test_smooth_is_a_power_law():
    # analytic: ln R = ln B1 - p ln r
    out = get_profile("smooth").log_field(R, _p(**SMOOTH_P))
    np.testing.assert_allclose(out, np.log(40.0) - 1.3 * np.log(R), rtol=1e-14)


def test_ring_reduces_to_smooth_at_zero_amplitude():
    smooth = get_profile("smooth").log_field(R, _p(**SMOOTH_P))
    ring = get_profile("ring").log_field(R, _p(**dict(RING_P, ring_amplitude=0.0)))
    np.testing.assert_array_equal(ring, smooth)


def test_ring_peak_value():
    # analytic: at r = r0 the Gaussian is 1, so R = smooth (1 + A)
    r0 = np.array([[4.0]])
    ring = get_profile("ring").log_field(r0, _p(**RING_P))
    smooth = get_profile("smooth").log_field(r0, _p(**SMOOTH_P))
    assert ring[0, 0] - smooth[0, 0] == pytest.approx(np.log(3.5), rel=1e-14)


def test_ring_far_from_centre_keeps_full_precision():
    # analytic: ln(1 + A g) ~ A g for tiny g; log1p keeps it where log(1 + .) would give 0
    r = np.array([[4.0 + 0.3 * 12.0]])  # 12 widths out: g = exp(-72) ~ 5e-32
    diff = (get_profile("ring").log_field(r, _p(**RING_P))
            - get_profile("smooth").log_field(r, _p(**SMOOTH_P)))
    assert diff[0, 0] == 0.0 or diff[0, 0] == pytest.approx(2.5 * np.exp(-72.0), rel=1e-6)
    from diskfield.profiles.ring import log_ring_factor
    assert log_ring_factor(r, 2.5, 4.0, 0.3)[0, 0] == pytest.approx(2.5 * np.exp(-72.0), rel=1e-12)


def test_ring_at_the_amplitude_edge_stays_finite():
    # convention: at A = -1 the factor is floored at MIN_RING_FACTOR
    r = np.array([[4.0, 4.3, 9.0]])
    out = get_profile("ring").log_field(r, _p(**dict(RING_P, ring_amplitude=-1.0)))
    smooth = get_profile("smooth").log_field(r, _p(**SMOOTH_P))
    assert np.isfinite(out).all()
    assert out[0, 0] - smooth[0, 0] == pytest.approx(np.log(MIN_RING_FACTOR))
    # analytic, one width out: ln(1 - exp(-1/2))
    assert out[0, 1] - smooth[0, 1] == pytest.approx(np.log1p(-np.exp(-0.5)), rel=1e-12)


def test_two_ring_is_symmetric_under_swapping_rings():
    two = get_profile("two-ring")
    ring2_as_1 = {k.replace("ring2_", "ring_"): v for k, v in RING2_P.items()}
    ring1_as_2 = {k.replace("ring_", "ring2_"): v for k, v in RING_P.items() if "ring_" in k}
    a = two.log_field(R, _p(**RING_P, **RING2_P))
    b = two.log_field(R, _p(**SMOOTH_P, **ring2_as_1, **ring1_as_2))
    np.testing.assert_allclose(a, b, rtol=1e-14, atol=1e-14)


def test_two_ring_reduces_to_ring():
    two = get_profile("two-ring").log_field(R, _p(**RING_P, **dict(RING2_P, ring2_amplitude=0)))
    np.testing.assert_array_equal(two, get_profile("ring").log_field(R, _p(**RING_P)))


def test_broken_power_law_is_continuous_with_the_right_slopes():
    p = _p(field_1au=30.0, power_index=0.8, break_radius=3.5, power_index_outer=2.4)
    f = get_profile("broken").log_field
    rb = 3.5
    near = np.array([[rb * (1 - 1e-12), rb, rb * (1 + 1e-12)]])
    out = f(near, p)
    assert np.ptp(out) < 1e-10
    # analytic: inside, the smooth law with the inner index; log-log slopes -p_in and -p_out
    inner = np.array([[0.5, 1.0, 2.0]])
    np.testing.assert_allclose(f(inner, p), np.log(30.0) - 0.8 * np.log(inner), rtol=1e-14)
    outer = np.array([[5.0, 10.0]])
    slope = np.diff(f(outer, p)[0]) / np.diff(np.log(outer[0]))
    assert slope[0] == pytest.approx(-2.4, rel=1e-12)


def test_profiles_broadcast_over_walkers_groups_and_nodes():
    rng = np.random.default_rng(7)
    w = 5
    p = {k: np.full((w, 1, 1), v) for k, v in RING_P.items()}
    p["ring_width"] = rng.uniform(0.1, 1.0, (w, 1, 1))
    r = rng.uniform(0.5, 10.0, (w, 3, 4))
    out = get_profile("ring").log_field(r, p)
    assert out.shape == (w, 3, 4)
    one = get_profile("ring").log_field(r[2], {k: v[2] for k, v in p.items()})
    np.testing.assert_allclose(out[2], one, rtol=1e-14)


# --------------------------------------------------------------------- envelopes


T = np.array([[0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 10.0, 30.0]])


def test_steady_envelope_is_one():
    assert np.array_equal(get_envelope("steady").log_factor(T, {}), np.zeros(T.shape))


def test_viscous_envelope_formula():
    # Hartmann et al. 1998 (ApJ 495, 385): Mdot ~ (1 + t/t_s)^(-eta); B ~ Mdot^(1/2)
    out = get_envelope("viscous").log_factor(T, _p(viscous_time=0.8, viscous_eta=1.5))
    np.testing.assert_allclose(np.exp(out), (1 + T / 0.8) ** -0.75, rtol=1e-13)
    at_ts = get_envelope("viscous").log_factor(np.array([[0.8]]), _p(viscous_time=0.8,
                                                                     viscous_eta=1.5))
    assert np.exp(at_ts[0, 0]) == pytest.approx(2 ** -0.75, rel=1e-14)


def test_dissipating_envelope_shape():
    p = _p(dissipation_time=3.0, dissipation_edge=0.25, residual_fraction=0.02)
    out = np.exp(get_envelope("dissipating").log_factor(T, p))[0]
    # analytic: normalised at t = 0, residual level at late times, monotone decline
    assert out[0] == pytest.approx(1.0, abs=1e-15)
    assert out[-1] == pytest.approx(0.02, rel=1e-12)
    assert np.all(np.diff(out) <= 0)
    sig0 = 1 / (1 + np.exp(-3.0 / 0.25))
    assert out[4] == pytest.approx(0.02 + 0.98 * 0.5 / sig0, rel=1e-12)


def test_dissipating_envelope_log_stays_finite_deep_in_the_residual():
    p = _p(dissipation_time=0.5, dissipation_edge=0.05, residual_fraction=1e-3)
    out = get_envelope("dissipating").log_factor(np.array([[500.0, 5e4]]), p)
    np.testing.assert_allclose(out, np.log(1e-3), rtol=1e-12)


def test_dissipating_envelope_equals_its_form_in_logs():
    """The linear-space evaluation equals ln[f_r + (1 - f_r) sigma(x) / sigma(x0)] taken in
    logs through scipy.special.log_expit, across edges from 1e-4 to 10 Myr and residuals
    from 1e-12 to 1 (derived from the envelope's definition; scipy as the reference)."""
    from scipy.special import log_expit

    rng = np.random.default_rng(12)
    t = np.concatenate([[0.0], np.geomspace(1e-4, 1e3, 300)])[None, :]
    env = get_envelope("dissipating")
    for _ in range(40):
        t_d, dt = rng.uniform(0.0, 10.0), 10 ** rng.uniform(-4, 1)
        f_r = 1.0 if rng.uniform() < 0.1 else 10 ** rng.uniform(-12, 0)
        got = env.log_factor(t, _p(dissipation_time=t_d, dissipation_edge=dt,
                                   residual_fraction=f_r))
        log_s = log_expit((t_d - t) / dt) - log_expit(t_d / dt)
        with np.errstate(divide="ignore"):
            want = np.logaddexp(np.log(f_r), np.log1p(-f_r) + log_s)
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-13)


@pytest.mark.parametrize("name", ["dissipating", "viscous"])
def test_times_before_cai_formation_count_as_zero(name):
    env = get_envelope(name)
    draw = {k: np.array([[v.sample(np.random.default_rng(3))]])
            for k, v in load_priors().parameters.items() if k in env.parameter_names}
    out = env.log_factor(np.array([[-2.0, -0.1, 0.0]]), draw)
    np.testing.assert_allclose(out, 0.0, atol=1e-15)


def test_ring_factor_lies_between_one_and_one_plus_amplitude(rng):
    # analytic: 0 <= g <= 1, so 1 + A g lies between 1 and 1 + A for any signed A > -1
    priors = load_priors().parameters
    n = 2000
    draw = {k: priors[k].sample(rng, n)[:, None] for k in RING_P}
    r = rng.uniform(0.3, 25.0, (n, 6))
    diff = get_profile("ring").log_field(r, draw) - get_profile("smooth").log_field(r, draw)
    amp = draw["ring_amplitude"]
    lo, hi = np.minimum(0.0, np.log1p(amp)), np.maximum(0.0, np.log1p(amp))
    assert np.all((diff >= lo - 1e-12) & (diff <= hi + 1e-12))
