"""emcee driver: posterior moments, reproducibility, checkpoints and resume.

Also defines the small toy models (same protocol as ``diskfield.build_model``'s Model)
that the evidence, criteria and comparison tests import.
"""
from __future__ import annotations

import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from diskfield.errors import CheckpointError
from diskfield.priorspec import Normal, Uniform
from diskfield.sampling import SamplerSettings, load_checkpoint, run_sampler

SEED = 20261202


class ToyModel:
    """A model implementing the Model protocol from a per-body log-likelihood function.

    Parameters
    ----------
    names : sequence of str
    priors : sequence of Prior
    pointwise : callable
        ``pointwise(theta (W, P)) -> (W, B)`` per-body log-likelihoods.
    body_names : sequence of str
    n_records : int
    profile : str
    """

    def __init__(self, names, priors, pointwise, body_names, n_records=None, profile="toy"):
        self.parameter_names = tuple(names)
        self.priors = tuple(priors)
        self.fixed = {}
        self._pointwise = pointwise
        self.body_names = tuple(body_names)
        self.n_bodies = len(self.body_names)
        self.n_records = n_records or self.n_bodies
        self.config = {"profile": profile, "envelope": "steady", "spin": "none",
                       "prior_files": []}

    def log_prior(self, theta):
        theta = np.atleast_2d(theta)
        return sum(p.log_prob(theta[:, i]) for i, p in enumerate(self.priors))

    def log_likelihood_pointwise(self, theta):
        return self._pointwise(np.atleast_2d(theta))

    def log_likelihood(self, theta):
        return self.log_likelihood_pointwise(theta).sum(axis=1)

    def prior_transform(self, u):
        u = np.asarray(u, float)
        return np.stack([p.ppf(u[..., i]) for i, p in enumerate(self.priors)], axis=-1)

    def log_field(self, theta, r_au, t_myr):
        # ln B = a - b ln r, with a, b the first two parameters (or a constant slope 1).
        theta = np.atleast_2d(theta)
        r = np.broadcast_to(np.asarray(r_au, float), np.broadcast(r_au, t_myr).shape)
        extra = (1,) * r.ndim
        a = theta[:, 0].reshape((-1,) + extra)
        b = theta[:, 1].reshape((-1,) + extra) if theta.shape[1] > 1 else 1.0
        return a - b * np.log(r)[None]


def _normal_logpdf(x, mean, var):
    return -0.5 * (x - mean) ** 2 / var - 0.5 * np.log(2 * np.pi * var)


def conjugate_gaussian_model(n=6, sigma=0.5):
    """Two independent means, each with ``n`` one-record bodies; N(0, 1) priors.

    Returns the model and the analytic posterior (means, sds), conjugate normal
    (Gelman et al. 2013, BDA3 §2.5).
    """
    rng = np.random.default_rng(7)
    y = np.stack([rng.normal(0.8, sigma, n), rng.normal(-0.4, sigma, n)])

    def pointwise(theta):
        return np.concatenate([_normal_logpdf(y[k][None, :], theta[:, k:k + 1], sigma ** 2)
                               for k in range(2)], axis=1)

    model = ToyModel(("field_1au", "power_index"), (Normal(0, 1), Normal(0, 1)), pointwise,
                     [f"body{k}" for k in range(2 * n)])
    post_var = 1.0 / (1.0 + n / sigma ** 2)
    post_mean = post_var * y.sum(axis=1) / sigma ** 2
    return model, post_mean, np.sqrt(post_var) * np.ones(2)


FAST = SamplerSettings(n_walkers=16, chunk=200, max_steps=600, n_starts=2)


def test_posterior_moments_match_conjugate_normal():
    # source: conjugate normal posterior, Gelman et al. 2013, BDA3 §2.5
    model, mean, sd = conjugate_gaussian_model()
    run = run_sampler(model, seed=SEED, settings=SamplerSettings(n_walkers=16, chunk=500,
                                                                 max_steps=6000))
    draws = run.draws().reshape(-1, 2)
    n_eff = run.n_steps * run.n_walkers / np.max(run.tau)
    # Monte Carlo standard error of the mean is sd / sqrt(n_eff); 5 of them is a loose gate.
    assert np.all(np.abs(draws.mean(axis=0) - mean) < 5 * sd / np.sqrt(n_eff))
    # sd of a sample sd is about sd / sqrt(2 n_eff) for a Gaussian (common practice, no source)
    assert np.all(np.abs(draws.std(axis=0) - sd) < 5 * sd / np.sqrt(2 * n_eff))
    assert run.converged
    assert run.draws_pointwise().shape[2] == model.n_bodies


def test_blobs_are_the_per_body_log_likelihoods():
    model, _, _ = conjugate_gaussian_model()
    run = run_sampler(model, seed=SEED, settings=FAST)
    theta = run.chain[-1]
    np.testing.assert_allclose(run.blobs[-1], model.log_likelihood_pointwise(theta))
    lp = model.log_prior(theta) + model.log_likelihood(theta)
    np.testing.assert_allclose(run.log_prob[-1], lp)


def test_optimum_is_the_analytic_maximum_likelihood():
    model, _, _ = conjugate_gaussian_model()
    run = run_sampler(model, seed=SEED, settings=FAST)
    # The maximum-likelihood mean of a Gaussian is the sample mean (standard result).
    rng = np.random.default_rng(7)
    y = np.stack([rng.normal(0.8, 0.5, 6), rng.normal(-0.4, 0.5, 6)])
    np.testing.assert_allclose(run.optimum_theta, y.mean(axis=1), atol=1e-3)


def test_same_seed_is_bitwise_reproducible():
    model, _, _ = conjugate_gaussian_model()
    a = run_sampler(model, seed=SEED, settings=FAST)
    b = run_sampler(model, seed=SEED, settings=FAST)
    c = run_sampler(model, seed=SEED + 1, settings=FAST)
    assert np.array_equal(a.chain, b.chain) and np.array_equal(a.blobs, b.blobs)
    assert not np.array_equal(a.chain, c.chain)


def test_stop_and_resume_gives_the_same_chain(tmp_path):
    model, _, _ = conjugate_gaussian_model()
    settings = SamplerSettings(n_walkers=16, chunk=100, max_steps=600, n_tau=1e9)
    full = run_sampler(model, seed=SEED, settings=settings)
    ckpt = tmp_path / "checkpoint.h5"
    part = SamplerSettings(n_walkers=16, chunk=100, max_steps=300, n_tau=1e9)
    run_sampler(model, seed=SEED, settings=part, checkpoint=ckpt, fingerprint={"model": "toy"})
    resumed = run_sampler(model, seed=SEED, settings=settings, checkpoint=ckpt, resume=True,
                          fingerprint={"model": "toy"})
    for key in ("chain", "log_prob", "blobs", "n_accepted"):
        assert np.array_equal(getattr(full, key), getattr(resumed, key)), key
    assert not full.converged and any("unconverged" in f for f in full.flags)


def test_checkpoint_from_another_configuration_is_refused(tmp_path):
    model, _, _ = conjugate_gaussian_model()
    ckpt = tmp_path / "checkpoint.h5"
    settings = SamplerSettings(n_walkers=16, chunk=50, max_steps=50)
    run_sampler(model, seed=SEED, settings=settings, checkpoint=ckpt,
                fingerprint={"data_hash": "aaa", "model": "toy"})
    with pytest.raises(CheckpointError, match="data_hash.*'aaa'.*'bbb'"):
        run_sampler(model, seed=SEED, settings=settings, checkpoint=ckpt, resume=True,
                    fingerprint={"data_hash": "bbb", "model": "toy"})
    with pytest.raises(CheckpointError, match="seed"):
        run_sampler(model, seed=SEED + 1, settings=settings, checkpoint=ckpt, resume=True,
                    fingerprint={"data_hash": "aaa", "model": "toy"})
    with pytest.raises(CheckpointError, match="no checkpoint"):
        run_sampler(model, seed=SEED, settings=settings, checkpoint=tmp_path / "none.h5",
                    resume=True)
    (tmp_path / "junk.h5").write_bytes(b"not hdf5")
    with pytest.raises(CheckpointError, match="unreadable"):
        load_checkpoint(tmp_path / "junk.h5")


_KILL_SCRIPT = textwrap.dedent("""
    import sys, time
    sys.path.insert(0, {tests!r})
    import numpy as np
    from test_sampling import conjugate_gaussian_model, SEED
    from diskfield.sampling import SamplerSettings, run_sampler
    model, _, _ = conjugate_gaussian_model()
    slow = model.log_likelihood_pointwise
    def pointwise(theta):
        time.sleep(0.002)  # slow enough that the parent can kill mid-run
        return slow(theta)
    model.log_likelihood_pointwise = pointwise
    settings = SamplerSettings(n_walkers=16, chunk=50, max_steps=int(sys.argv[2]), n_tau=1e9)
    run_sampler(model, seed=SEED, settings=settings, checkpoint=sys.argv[1])
""")


def test_resume_after_sigkill_gives_the_same_chain(tmp_path):
    script = tmp_path / "run.py"
    script.write_text(_KILL_SCRIPT.format(tests=str(Path(__file__).parent)))
    ckpt = tmp_path / "ck.h5"
    proc = subprocess.Popen([sys.executable, str(script), str(ckpt), "100000"])
    deadline = time.time() + 60
    while not ckpt.exists() and time.time() < deadline:
        time.sleep(0.05)
    time.sleep(0.3)  # let it get into a later chunk, possibly mid-write
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    k = load_checkpoint(ckpt)["chain"].shape[0]
    assert k % 50 == 0 and k >= 50
    target = k + 100
    # Resume and the uninterrupted reference run in this process: the script's sleep only
    # slows the likelihood down without changing a value, and two interpreter start-ups
    # (diskfield, emcee, h5py, scipy imports) were most of this test's time.
    model, _, _ = conjugate_gaussian_model()
    settings = SamplerSettings(n_walkers=16, chunk=50, max_steps=target, n_tau=1e9)
    resumed = run_sampler(model, seed=SEED, settings=settings, checkpoint=ckpt,
                          resume=True).chain
    uninterrupted = run_sampler(model, seed=SEED, settings=settings,
                                checkpoint=tmp_path / "ref.h5").chain
    assert resumed.shape == (target, 16, 2)
    assert np.array_equal(resumed, uninterrupted)


def test_atomic_writes_get_ordinary_file_permissions(tmp_path):
    # common practice, no source: a new output file is readable like any file the user creates
    import os

    from diskfield.manifest import write_atomic

    mask = os.umask(0o022)
    try:
        path = write_atomic(tmp_path / "out.txt", "x")
    finally:
        os.umask(mask)
    assert (path.stat().st_mode & 0o777) == 0o644 and path.read_text() == "x"


def _ringed_conjugate_model(n=6, sigma=0.5):
    """Four independent conjugate-normal means named like a ring model (so the sampler adds
    its ring-block and subspace moves); N(0, 1) priors. Returns model, means, sds."""
    rng = np.random.default_rng(11)
    truth = np.array([0.8, -0.4, 0.3, 1.1])
    y = truth[:, None] + rng.normal(0.0, sigma, (4, n))

    def pointwise(theta):
        return np.concatenate([_normal_logpdf(y[k][None, :], theta[:, k:k + 1], sigma ** 2)
                               for k in range(4)], axis=1)

    names = ("field_1au", "ring_amplitude", "ring_radius", "ring_width")
    model = ToyModel(names, (Normal(0, 1),) * 4, pointwise, [f"b{k}" for k in range(4 * n)])
    post_var = 1.0 / (1.0 + n / sigma ** 2)
    return model, post_var * y.sum(axis=1) / sigma ** 2, np.sqrt(post_var) * np.ones(4)


@pytest.mark.parametrize("move", ["block", "subspace"])
def test_ring_block_and_subspace_moves_keep_the_posterior(move):
    """Each added move alone (with plain DE for the coordinates it leaves alone) samples the
    conjugate-normal posterior (Gelman et al. 2013, BDA3 §2.5): a wrong MH factor in the
    independence move, or an asymmetric subspace proposal, shifts the moments by many
    Monte Carlo errors."""
    import emcee

    from diskfield import sampling

    model, mean, sd = _ringed_conjugate_model()
    blocks = sampling._ring_blocks(model)
    assert [list(b) for b in blocks] == [[1, 2, 3]]
    logp = sampling._unit_log_probability(model)
    added = (sampling._BlockFromPrior(blocks) if move == "block"
             else sampling._SubspaceDE([1, 2, 3]))
    moves = [(added, 0.7), (sampling._SubspaceDE([0]), 0.3)]
    rng = np.random.default_rng(SEED)
    z0 = rng.normal(0.0, 0.5, (32, 4))
    sampler = emcee.EnsembleSampler(32, 4, logp, vectorize=True, moves=moves)
    sampler.random_state = np.random.RandomState(SEED).get_state()
    sampler.run_mcmc(z0, 4000)
    z = sampler.get_chain(discard=500)
    tau = emcee.autocorr.integrated_time(z, c=5, tol=0, quiet=True).max()
    draws = logp.theta(z).reshape(-1, 4)
    n_eff = draws.shape[0] / tau
    assert np.all(np.abs(draws.mean(axis=0) - mean) < 5 * sd / np.sqrt(n_eff))
    # sd of a sample sd is about sd / sqrt(2 n_eff) for a Gaussian (common practice, no source)
    assert np.all(np.abs(draws.std(axis=0) - sd) < 5 * sd / np.sqrt(2 * n_eff))


def test_ringed_model_run_uses_the_added_moves_and_matches_the_posterior():
    """The driver's move mixture for a ringed model converges to the analytic posterior."""
    from diskfield import sampling

    model, mean, sd = _ringed_conjugate_model()
    kinds = {type(m).__name__ for m, _ in sampling._moves(model)}
    assert {"_BlockFromPrior", "_SubspaceDE"} <= kinds
    run = run_sampler(model, seed=SEED, settings=SamplerSettings(n_walkers=16, chunk=500,
                                                                 max_steps=6000))
    draws = run.draws().reshape(-1, 4)
    n_eff = run.n_steps * run.n_walkers / np.max(run.tau)
    assert run.converged
    assert np.all(np.abs(draws.mean(axis=0) - mean) < 5 * sd / np.sqrt(n_eff))
    assert np.all(np.abs(draws.std(axis=0) - sd) < 5 * sd / np.sqrt(2 * n_eff))


def test_move_mixture_without_non_ring_parameters_has_no_empty_subspace_move():
    """When every sampled parameter belongs to a ring, no subspace move is added (it would
    propose the walker's own position)."""
    from diskfield import sampling

    model = ToyModel(("ring_amplitude", "ring_radius", "ring_width"), (Normal(0, 1),) * 3,
                     lambda t: np.zeros((len(t), 1)), ["b0"])
    moves = sampling._moves(model)
    assert {type(m).__name__ for m, _ in moves} == {"DEMove", "StretchMove", "_BlockFromPrior"}
    assert sum(w for _, w in moves) == pytest.approx(1.0)
    assert sum(w for _, w in sampling._moves(_ringed_conjugate_model()[0])) == pytest.approx(1.0)


def test_tau_of_a_chain_that_has_not_moved_is_nan_without_a_warning():
    """A parameter whose walkers have not moved has zero variance: its τ is NaN (read as not
    converged) and no RuntimeWarning reaches the user's terminal."""
    import warnings

    from diskfield.sampling import _tau

    chain = np.zeros((200, 8, 2))
    chain[:, :, 1] = np.random.default_rng(0).normal(size=(200, 8))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        tau = _tau(chain)
    assert np.isnan(tau[0]) and np.isfinite(tau[1])
