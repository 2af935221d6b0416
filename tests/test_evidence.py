"""Evidence: dynesty against analytic linear-Gaussian evidences; Savage–Dickey cross-check."""
from __future__ import annotations

import numpy as np
import pytest

from diskfield.evidence import nested_evidence, savage_dickey
from diskfield.priorspec import Normal, Uniform
from diskfield.sampling import SamplerSettings, run_sampler
from test_sampling import SEED, ToyModel


class _LinearGaussianPointwise:
    """Per-record Gaussian log-likelihood of t ~ N(Phi w, 1/beta) (a class, so it pickles)."""

    def __init__(self, phi, t, beta):
        self.phi, self.t, self.beta = np.asarray(phi, float), np.asarray(t, float), beta

    def __call__(self, theta):
        mean = theta @ self.phi.T
        return -0.5 * self.beta * (self.t - mean) ** 2 + 0.5 * np.log(self.beta / (2 * np.pi))


def _linear_gaussian_model(phi, t, alpha, beta, names):
    """w ~ N(0, 1/alpha) per component; t ~ N(Phi w, 1/beta); one record per body."""
    pointwise = _LinearGaussianPointwise(phi, t, beta)
    priors = [Normal(0.0, 1.0 / np.sqrt(alpha)) for _ in names]
    return ToyModel(names, priors, pointwise, [f"b{i}" for i in range(len(t))])


def _analytic_ln_evidence(phi, t, alpha, beta):
    # ln N(t | 0, beta^-1 I + alpha^-1 Phi Phi^T), Bishop (2006), PRML eq. 3.86 (equivalent form)
    phi = np.asarray(phi, float)
    cov = np.eye(len(t)) / beta + phi @ phi.T / alpha
    _, logdet = np.linalg.slogdet(cov)
    return float(-0.5 * (t @ np.linalg.solve(cov, t) + logdet + len(t) * np.log(2 * np.pi)))


BISHOP_PHI = [[1, 0], [1, 1], [1, 2]]
BISHOP_T = np.array([1.0, 2.0, 2.0])


def test_analytic_bishop_value():
    # check value derived from Bishop (2006), PRML eq. 3.86 (REFERENCES.md table)
    assert _analytic_ln_evidence(BISHOP_PHI, BISHOP_T, 1.0, 4.0) == pytest.approx(-4.177048,
                                                                                   abs=1e-6)


def test_nested_ln_z_matches_bishop_linear_gaussian():
    # source: Bishop (2006), PRML eq. 3.86, alpha = 1, beta = 4 -> ln Z = -4.177048
    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    ev = nested_evidence(model, seed=SEED, nlive=200, dlogz=0.05)
    assert abs(ev.ln_evidence - (-4.177048)) < 4 * ev.ln_evidence_err
    assert 0 < ev.ln_evidence_err < 0.5 and ev.n_calls > 0


def test_nested_same_seed_same_result():
    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    a = nested_evidence(model, seed=3, nlive=50, dlogz=0.5)
    b = nested_evidence(model, seed=3, nlive=50, dlogz=0.5)
    assert a.ln_evidence == b.ln_evidence and a.n_calls == b.n_calls


def _nested_pair():
    x = np.linspace(-1, 1, 8)
    rng = np.random.default_rng(11)
    t = 0.3 + 0.35 * x + rng.normal(0, 0.5, x.size)
    full = _linear_gaussian_model(np.column_stack([np.ones_like(x), x]), t, 1.0, 4.0,
                                  ("field_1au", "ring_amplitude"))
    small = _linear_gaussian_model(np.ones((x.size, 1)), t, 1.0, 4.0, ("field_1au",))
    exact = (_analytic_ln_evidence(np.column_stack([np.ones_like(x), x]), t, 1.0, 4.0)
             - _analytic_ln_evidence(np.ones((x.size, 1)), t, 1.0, 4.0))
    return full, small, exact


@pytest.mark.slow
def test_savage_dickey_agrees_with_nested_sampling_on_nested_models():
    full, small, exact = _nested_pair()
    run = run_sampler(full, seed=SEED, settings=SamplerSettings(n_walkers=16, chunk=500,
                                                                max_steps=4000))
    draws = run.draws()[..., 1]
    sd = savage_dickey(draws, full.priors[1], parameter="ring_amplitude", seed=1)
    assert sd.applicable
    z_full = nested_evidence(full, seed=SEED, nlive=200, dlogz=0.05)
    z_small = nested_evidence(small, seed=SEED, nlive=200, dlogz=0.05)
    ln_b_ns = z_full.ln_evidence - z_small.ln_evidence
    err_ns = np.hypot(z_full.ln_evidence_err, z_small.ln_evidence_err)
    # linear-Gaussian evidences, Bishop (2006) PRML eq. 3.86
    assert abs(ln_b_ns - exact) < 4 * err_ns
    assert abs(sd.ln_bayes_factor - exact) < 4 * sd.ln_bayes_factor_err + 0.05
    assert abs(sd.ln_bayes_factor - ln_b_ns) < 4 * np.hypot(sd.ln_bayes_factor_err, err_ns)


def test_savage_dickey_not_applicable_outside_support():
    sd = savage_dickey(np.ones(100), Uniform(0.1, 2.0), parameter="ring_amplitude")
    assert not sd.applicable and "outside" in sd.reason and np.isnan(sd.ln_bayes_factor)
    edge = savage_dickey(np.ones(100), Uniform(0.0, 2.0), parameter="ring_amplitude")
    assert not edge.applicable


def test_nested_checkpoint_resume(tmp_path):
    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    ckpt = tmp_path / "dynesty.pkl"
    ev = nested_evidence(model, seed=5, nlive=50, dlogz=0.5, checkpoint_file=ckpt)
    assert ckpt.is_file()
    again = nested_evidence(model, seed=5, nlive=50, dlogz=0.5, checkpoint_file=ckpt,
                            resume=True)
    assert again.ln_evidence == pytest.approx(ev.ln_evidence, abs=3 * ev.ln_evidence_err)


# ---------------------------------------------------------------- batched proposals

def test_batched_pool_reproduces_dynesty_serial_map_with_same_queue():
    # The batched pool evaluates the uniform sampler's queued proposals together; with a
    # likelihood whose value for a point does not depend on its batch, the run must equal
    # dynesty's own serial map with the same queue size draw for draw.
    import dynesty

    from diskfield import nsbatch
    from diskfield.evidence import _BOUND_SETTINGS, _LogLike, _PriorTransform

    if not nsbatch.AVAILABLE:
        pytest.skip("dynesty internals for batching not available (plain path in use)")
    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    runs = []
    for batched in (True, False):
        loglike, ptform = _LogLike(model), _PriorTransform(model)
        pool = (nsbatch.BatchedPool(model, loglike, ptform) if batched
                else nsbatch.SerialPool())
        sampler = dynesty.NestedSampler(loglike, ptform, 2, nlive=50, pool=pool,
                                        rstate=np.random.default_rng(4), **_BOUND_SETTINGS)
        sampler.run_nested(dlogz=0.5, print_progress=False)
        runs.append(sampler.results)
    assert runs[0].logz[-1] == runs[1].logz[-1]
    assert np.array_equal(runs[0].samples, runs[1].samples)
    assert np.sum(runs[0].ncall) == np.sum(runs[1].ncall)


def test_batched_evidence_matches_bishop_and_is_reproducible():
    # source: Bishop (2006), PRML eq. 3.86, alpha = 1, beta = 4 -> ln Z = -4.177048
    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    a = nested_evidence(model, seed=SEED, nlive=200, dlogz=0.05)
    b = nested_evidence(model, seed=SEED, nlive=200, dlogz=0.05)
    plain = nested_evidence(model, seed=SEED, nlive=200, dlogz=0.05, batch=False)
    assert a.batched and not plain.batched
    assert a.ln_evidence == b.ln_evidence and a.n_calls == b.n_calls
    assert abs(a.ln_evidence - (-4.177048)) < 4 * a.ln_evidence_err
    assert a.n_evaluated >= a.n_calls and plain.n_evaluated == plain.n_calls
    # the posterior weights are normalised
    assert np.exp(a.draws.log_weight).sum() == pytest.approx(1.0, abs=1e-9)


class _Interrupting:
    """Model wrapper whose likelihood fails after ``limit`` calls (a killed run)."""

    def __init__(self, model, limit):
        self.model, self.limit, self.calls = model, limit, 0
        self.parameter_names, self.priors = model.parameter_names, model.priors

    def prior_transform(self, u):
        return self.model.prior_transform(u)

    def log_likelihood(self, theta):
        self.calls += 1
        if self.calls > self.limit:
            raise KeyboardInterrupt("simulated kill")
        return self.model.log_likelihood(theta)


def test_batched_checkpoint_resume_continues_interrupted_run(tmp_path, monkeypatch):
    import diskfield.evidence as evidence_module

    monkeypatch.setattr(evidence_module, "_CHECKPOINT_EVERY", 0.0)
    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    ckpt = tmp_path / "dynesty.pkl"
    with pytest.raises(KeyboardInterrupt):
        nested_evidence(_Interrupting(model, 40), seed=6, nlive=100, dlogz=0.1,
                        checkpoint_file=ckpt)
    assert ckpt.is_file()
    # the resumed run rebuilds the likelihood from the checkpoint (the limit is pickled
    # with it, so lift it there) and continues batched
    import pickle

    saved = pickle.loads(ckpt.read_bytes())
    saved["sampler"].loglikelihood.loglikelihood.func.model.limit = 10 ** 9
    ckpt.write_bytes(pickle.dumps(saved))
    resumed = nested_evidence(model, seed=6, nlive=100, dlogz=0.1, checkpoint_file=ckpt,
                              resume=True)
    assert resumed.batched and resumed.n_calls > 100
    # Bishop (2006), PRML eq. 3.86
    assert abs(resumed.ln_evidence - (-4.177048)) < 4 * resumed.ln_evidence_err


# ---------------------------------------------------------------- prior reweighting

def test_reweighted_evidence_matches_analytic_and_fresh_run_under_narrower_prior():
    # Bishop (2006), PRML eq. 3.86: the linear-Gaussian evidence for any prior precision
    # alpha; alpha = 1 -> 4 halves the prior sd (a narrower prior, support unchanged and
    # density ratio bounded, so the alpha = 1 run can be reweighted)
    from diskfield.evidence import MIN_REWEIGHT_ESS, reweighted_evidence

    wide = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    narrow = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 4.0, 4.0, ("w0", "w1"))
    exact = _analytic_ln_evidence(BISHOP_PHI, BISHOP_T, 4.0, 4.0)
    run = nested_evidence(wide, seed=SEED, nlive=200, dlogz=0.05)
    rw = reweighted_evidence(run, wide.log_prior, narrow.log_prior)
    assert rw.ess > MIN_REWEIGHT_ESS and 0 < rw.ln_ratio_err < rw.ln_evidence_err
    assert abs(rw.ln_evidence - exact) < 4 * rw.ln_evidence_err
    fresh = nested_evidence(narrow, seed=SEED + 1, nlive=200, dlogz=0.05)
    assert abs(rw.ln_evidence - fresh.ln_evidence) < 4 * np.hypot(rw.ln_evidence_err,
                                                                   fresh.ln_evidence_err)


def test_reweighted_evidence_outside_support_has_no_points():
    from diskfield.evidence import reweighted_evidence

    model = _linear_gaussian_model(BISHOP_PHI, BISHOP_T, 1.0, 4.0, ("w0", "w1"))
    run = nested_evidence(model, seed=2, nlive=50, dlogz=0.5)
    far = Uniform(50.0, 51.0)  # no posterior point there
    rw = reweighted_evidence(run, model.log_prior,
                             lambda th: far.log_prob(th[:, 0]) + far.log_prob(th[:, 1]))
    assert rw.ess == 0 and rw.ln_evidence == -np.inf
