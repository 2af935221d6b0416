"""Posterior sampling with emcee: initialisation, chunked convergence loop, checkpoints.

Design
------
* One vectorised call per step: the log-probability function receives all walkers
  ``(W, P)`` and returns ``(W, 1 + n_bodies)`` — the log-density in column 0 and the
  per-body log-likelihoods as emcee "blobs" in the remaining columns — so the pointwise
  values that PSIS-LOO needs are recorded with every draw at no extra cost.
* The sampler moves in unconstrained coordinates ``z = logit(u)``, where ``u`` is the
  unit-cube coordinate of the model's ``prior_transform`` (the map nested sampling uses).
  The target density in ``z`` is ln L(θ(u(z))) + ln u + ln(1 − u) summed over axes: the
  prior is uniform in ``u`` and ``du/dz = u (1 − u)`` is the Jacobian, so the draws of
  θ = prior_transform(expit(z)) follow the posterior exactly. Bounded priors have no
  walls (the stretch and DE moves lost proposals at ring_amplitude's upper bound and
  ring_radius's range), a log-uniform ``field_1au`` is sampled in ln field, and the broad
  plateau where the ring lies outside the data becomes a smooth tail. The chain,
  the log-posterior and every output stay in the user's parameters (θ; ln prior + ln L).
  Under a label ordering (:mod:`diskfield.ordering`, e.g. the two rings) the walkers
  start in the ordered region and move over the whole cube; the recorded θ is the fold
  of their position onto the ordered region (``prior_transform``), so the draws are the
  ordered posterior without label switching and without a wall at the region's edge
  (a wall, ``SamplerSettings.ordered_region = "wall"``, doubled the inner ring radius's
  τ on the demo).
* Walkers start in a small ball (1 % of prior mass per axis, in unit-cube coordinates)
  around the best of a multi-start maximum-likelihood search.
* Moves: differential evolution (ter Braak 2006) with its default scale, the same with
  scale 1 (which proposes exact jumps between modes occupied by different walkers — the
  ring position is often multimodal), and the affine-invariant stretch move (Goodman &
  Weare 2010). ``DESnookerMove`` is not used: it is biased in emcee 3.1.6.
  A model with rings adds two moves (``_moves``): an independence move that redraws one
  ring's (amplitude, radius, width) from the prior (15 % of steps; a weakly constrained
  ring jumps between its radius modes at once), and differential evolution on the
  remaining parameters only (30 %; ``field_1au``, ``power_index`` and ``intrinsic_scatter``
  mix in their own 3-d subspace instead of waiting for a good joint 9-d proposal). On the
  demo's two-ring fit the largest τ fell from 160-200 to 95-115 steps and the run from
  10,000+ steps to 5,500-7,500 (``benchmarks/bench_mixing.py`` and ``bench_compare.py``,
  three seeds).
* The chain runs in chunks held in memory. After every chunk the integrated
  autocorrelation time τ is re-estimated and the whole run state (chain, log-probs,
  blobs, acceptance counts, the legacy ``RandomState`` state) is written to a temporary
  HDF5 file that then replaces the checkpoint (``os.replace``): a kill at any moment
  loses at most the unfinished chunk, and ``resume`` continues the *same* chain
  bitwise.
* Convergence (the primary gate): a burn-in of ``burn_tau`` × τ (3 τ) is discarded, τ is
  re-estimated on the part after it (the start-up transient from the small ball inflated
  τ by 5–50 % when it was included), and the run is converged when that part is longer
  than ``n_tau`` × max τ (50 by default; Foreman-Mackey et al. 2013, PASP 125, 306, and
  the emcee documentation) and τ changed by less than ``tau_rtol`` since the previous
  chunk. Otherwise the run stops at ``max_steps`` and is flagged unconverged. Thinning:
  τ / 2. R-hat over walkers is reported as a secondary heuristic only — walkers of an
  ensemble sampler are not independent chains.
"""
from __future__ import annotations

import json
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import emcee
import h5py
import numpy as np

from .errors import CheckpointError, ConvergenceError, OptionError
from .manifest import atomic_path
from scipy import special

from .optimize import maximize_likelihood, unit_to_theta

__all__ = ["SamplerSettings", "SamplerRun", "run_sampler", "log_probability",
           "load_checkpoint", "CHECKPOINT_VERSION"]

CHECKPOINT_VERSION = "2"


@dataclass(frozen=True)
class SamplerSettings:
    """Settings of the emcee run (defaults chosen for the ~2-minute demo budget).

    Attributes
    ----------
    n_walkers : int
        Ensemble size (at least ``2 P + 2``; raised automatically when smaller).
    chunk : int
        Steps between convergence checks and checkpoint writes.
    max_steps : int
        Step limit; a run that reaches it without converging is flagged.
    n_tau : float
        Required chain length in units of the largest τ (50: emcee documentation).
    tau_rtol : float
        Largest relative change of τ between consecutive checks (0.05, within the
        1–5 % that is common practice, no source).
    burn_tau : float
        Burn-in in units of τ (3: common practice, no source).
    thin_tau : float
        Thinning interval in units of τ (0.5: common practice, no source).
    ball : float
        Initial walker spread around the optimum, in unit-cube coordinates.
    n_starts : int
        Local searches of the multi-start optimiser.
    progress : bool
        Show a tqdm progress bar.
    ordered_region : {"fold", "wall"}
        Under a label ordering (:mod:`diskfield.ordering`): ``"fold"`` (default) lets the
        walkers move over the whole unit cube and records θ = ``prior_transform(u)``, the
        fold of their position onto the ordered region (the target in z is symmetric, so
        the recorded θ follow the ordered posterior exactly); ``"wall"`` confines them to
        the ordered region (``-inf`` outside). Both give ordered draws; on the demo's
        two-ring fit the fold had the shorter τ (benchmarks/bench_mixing.py
        ``--ordered-region``).
    """

    n_walkers: int = 32
    chunk: int = 500
    max_steps: int = 10000
    n_tau: float = 50.0
    tau_rtol: float = 0.05
    burn_tau: float = 3.0
    thin_tau: float = 0.5
    ball: float = 0.01
    n_starts: int = 3
    progress: bool = False
    ordered_region: str = "fold"

    def walkers_for(self, n_params: int) -> int:
        """Ensemble size for ``n_params`` parameters (even, ≥ 2 P + 2)."""
        n = max(self.n_walkers, 2 * n_params + 2)
        return n + (n % 2)


@dataclass
class SamplerRun:
    """A finished (or stopped) emcee run.

    Attributes
    ----------
    parameter_names : tuple of str
    chain : ndarray, shape (S, W, P)
        Every step (burn-in included).
    log_prob : ndarray, shape (S, W)
        Log-posterior of every stored position.
    blobs : ndarray, shape (S, W, B)
        Per-body log-likelihood of every stored position.
    n_accepted : ndarray, shape (W,)
        Accepted proposals per walker.
    tau : ndarray, shape (P,)
        Integrated autocorrelation time per parameter (steps) at the end.
    tau_history : ndarray, shape (n_checks, P)
    converged : bool
    flags : list of str
        Plain-words diagnostics (unconverged, low acceptance, ...).
    burn_in, thin : int
        Steps discarded and thinning interval used for the kept draws.
    optimum_theta : ndarray, shape (P,)
    optimum_log_likelihood : float
        Best ln L found by the optimiser or anywhere in the chain.
    wall_time_s : float
        Sampling wall time of this process (a resumed run counts only its own part).
    """

    parameter_names: tuple
    chain: np.ndarray
    log_prob: np.ndarray
    blobs: np.ndarray
    n_accepted: np.ndarray
    tau: np.ndarray
    tau_history: np.ndarray
    converged: bool
    flags: list = field(default_factory=list)
    burn_in: int = 0
    thin: int = 1
    optimum_theta: np.ndarray = None
    optimum_log_likelihood: float = -np.inf
    wall_time_s: float = 0.0

    @property
    def n_steps(self) -> int:
        return self.chain.shape[0]

    @property
    def n_walkers(self) -> int:
        return self.chain.shape[1]

    @property
    def acceptance_fraction(self) -> np.ndarray:
        return self.n_accepted / max(self.n_steps, 1)

    @property
    def chain_over_tau(self) -> float:
        """Chain length after the burn-in divided by the largest τ."""
        kept = self.n_steps - self.burn_in
        return float(kept / np.max(self.tau)) if np.all(np.isfinite(self.tau)) else 0.0

    def draws(self) -> np.ndarray:
        """Kept draws as (W, D, P): walkers as "chains", after burn-in and thinning."""
        return np.swapaxes(self.chain[self.burn_in::self.thin], 0, 1)

    def draws_log_prob(self) -> np.ndarray:
        """Log-posterior of the kept draws, (W, D)."""
        return np.swapaxes(self.log_prob[self.burn_in::self.thin], 0, 1)

    def draws_pointwise(self) -> np.ndarray:
        """Per-body log-likelihood of the kept draws, (W, D, B)."""
        return np.swapaxes(self.blobs[self.burn_in::self.thin], 0, 1)


class log_probability:
    """Vectorised log-posterior with per-body log-likelihoods as blobs.

    ``f(theta)`` with theta of shape (W, P) returns (W, 1 + B): column 0 is
    ln prior + ln L, columns 1.. the per-body ln L (``-inf`` where the prior is zero; the
    likelihood is not evaluated there). A plain class so that it pickles.
    """

    def __init__(self, model):
        self.model = model

    def __call__(self, theta):
        theta = np.atleast_2d(theta)
        lp = np.asarray(self.model.log_prior(theta), float)
        return _with_blobs(self.model, theta, np.isfinite(lp), lp)


class _unit_log_probability:
    """Vectorised log-density in ``z = logit(u)`` with per-body log-likelihoods as blobs.

    Column 0 is ln L(θ) + Σ [ln u + ln(1 − u)] with θ = ``prior_transform(expit(z))``
    (``-inf`` where θ has zero prior density or ln L is not finite); columns 1.. are the
    per-body ln L. A plain class so that it pickles.

    Under a label ordering (:mod:`diskfield.ordering`) ``prior_transform`` folds u onto the
    ordered region, and L is symmetric, so the density in z is the symmetric posterior over
    the whole cube and θ follows the ordered posterior (``wall=False``); with ``wall=True``
    points outside the ordered region get ``-inf`` instead (the walkers sample the ordered
    copy only).
    """

    def __init__(self, model, wall: bool = False):
        self.model = model
        self.wall = wall

    def theta(self, z):
        """Parameters of unconstrained points ``z`` (..., P)."""
        z = np.asarray(z, float)
        return unit_to_theta(self.model, special.expit(z.reshape(-1, z.shape[-1]))
                             ).reshape(z.shape)

    def __call__(self, z):
        z = np.atleast_2d(z)
        log_jac = -(np.logaddexp(0.0, z) + np.logaddexp(0.0, -z)).sum(axis=1)
        theta = self.theta(z)
        ok = np.isfinite(log_jac) & np.isfinite(np.asarray(self.model.log_prior(theta), float))
        ordering = _ordering(self.model) if self.wall else None
        if ordering is not None:
            ok &= ordering.in_order(z)  # logit is increasing: order in z = order in u
        return _with_blobs(self.model, theta, ok, log_jac)


def _with_blobs(model, theta, ok, base):
    """Columns [base + Σ per-body ln L, per-body ln L] (W, 1 + G); ln L is evaluated only
    where ``ok`` and is ``-inf`` elsewhere (so is the total wherever it is not finite)."""
    pointwise = np.full((theta.shape[0], model.n_bodies), -np.inf)
    if np.any(ok):
        pointwise[ok] = model.log_likelihood_pointwise(theta[ok])
    total = base + pointwise.sum(axis=1)
    total = np.where(np.isfinite(total), total, -np.inf)
    return np.column_stack([total, pointwise])


def _moves(model=None):
    blocks = _ring_blocks(model)
    if not blocks:
        return [(emcee.moves.DEMove(), 0.7), (emcee.moves.DEMove(gamma0=1.0), 0.1),
                (emcee.moves.StretchMove(), 0.2)]
    rest = np.setdiff1d(np.arange(len(model.parameter_names)), np.concatenate(blocks))
    if not len(rest):  # every sampled parameter belongs to a ring
        return [(emcee.moves.DEMove(), 0.65), (emcee.moves.DEMove(gamma0=1.0), 0.08),
                (emcee.moves.StretchMove(), 0.12), (_BlockFromPrior(blocks), 0.15)]
    return [(emcee.moves.DEMove(), 0.35), (emcee.moves.DEMove(gamma0=1.0), 0.08),
            (emcee.moves.StretchMove(), 0.12), (_BlockFromPrior(blocks), 0.15),
            (_SubspaceDE(rest), 0.3)]


class _SubspaceDE(emcee.moves.DEMove):
    """Differential evolution in a subset of the coordinates (the others kept).

    The difference of two walkers of the complementary half is applied to ``cols`` only, with
    the stretch 2.38 / sqrt(2 k) of a k-dimensional move. The proposal stays symmetric, so the
    move is valid on its own (ter Braak 2006, Stat. Comput. 16, 239; subspace updates as in
    Vrugt et al. 2009, IJNSNS 10, 273).
    """

    def __init__(self, cols):
        self.cols = np.asarray(cols)
        super().__init__(gamma0=2.38 / np.sqrt(2 * max(len(self.cols), 1)))

    def get_proposal(self, s, c, random):
        q, factor = super().get_proposal(s, c, random)
        keep = np.setdiff1d(np.arange(s.shape[1]), self.cols)
        q[:, keep] = s[:, keep]
        return q, factor


def _ring_blocks(model):
    """Column indices of each ring's sampled (amplitude, radius, width), for the block move."""
    names = list(getattr(model, "parameter_names", ()))
    blocks = []
    for prefix in ("ring", "ring2"):
        cols = [names.index(f"{prefix}_{m}") for m in ("amplitude", "radius", "width")
                if f"{prefix}_{m}" in names]
        if cols:
            blocks.append(np.array(cols))
    return blocks


class _BlockFromPrior(emcee.moves.MHMove):
    """Independence Metropolis–Hastings move: one ring's parameters redrawn from the prior.

    In the sampler's coordinates z = logit(u) the prior is the product of standard logistic
    densities q(z) = u (1 - u), so a block drawn as z' = logit(u'), u' ~ U(0, 1), has
    proposal density q(z'_block) and the MH factor ln q(z_block) - ln q(z'_block); the
    acceptance is then the likelihood ratio (Tierney 1994, Ann. Stat. 22, 1701: independence
    sampler). A ring the data hardly constrain (a second ring, a ring in a gap between
    bodies) jumps between the modes of its radius at once instead of diffusing across them.
    """

    def __init__(self, blocks):
        self.blocks = [np.asarray(b) for b in blocks]
        super().__init__(self._propose)

    def _propose(self, coords, random):
        new = np.array(coords, copy=True)
        pick = random.randint(len(self.blocks), size=len(coords))
        log_factor = np.zeros(len(coords))
        for k, cols in enumerate(self.blocks):
            rows = np.flatnonzero(pick == k)
            if not len(rows):
                continue
            u = random.uniform(size=(len(rows), len(cols)))
            z_new = special.logit(np.clip(u, 1e-12, 1 - 1e-12))
            new[np.ix_(rows, cols)] = z_new
            log_factor[rows] = (_log_logistic(coords[np.ix_(rows, cols)]).sum(axis=1)
                                - _log_logistic(z_new).sum(axis=1))
        return new, log_factor


def _log_logistic(z):
    """ln of the standard logistic density, ln u(1 - u) with u = expit(z)."""
    return -(np.logaddexp(0.0, z) + np.logaddexp(0.0, -z))


def _ordering(model):
    """The model's label ordering when one is applied, else None (toy models have none)."""
    ordering = getattr(model, "ordering", None)
    return ordering if ordering is not None and ordering.applied else None


def _into_order(model, z):
    """``z`` with exchangeable groups swapped whole into the ordered region (if any)."""
    ordering = _ordering(model)
    return z if ordering is None else ordering.sort(z)


def _initial_walkers(model, optimum, rng, n_walkers, ball, logp):
    """Ball of walkers around the optimum (unit-cube spread ``ball``), as z = logit(u),
    all with a finite log-density (and inside the ordered region of a label ordering)."""
    n_params = len(model.parameter_names)
    u = np.clip(optimum.u + ball * rng.standard_normal((n_walkers, n_params)), 1e-6, 1 - 1e-6)
    z = _into_order(model, special.logit(u))
    for _ in range(100):
        bad = ~np.isfinite(logp(z)[:, 0])
        if not np.any(bad):
            return z
        z[bad] = _into_order(model, special.logit(
            rng.uniform(1e-6, 1 - 1e-6, size=(bad.sum(), n_params))))
    raise ConvergenceError("could not find walker starting positions with a finite posterior "
                           "in 100 tries: the likelihood is -inf wherever the priors allow; "
                           "check the prior files against the data")


def _seed32(seed: int) -> int:
    return int(np.random.SeedSequence(seed).generate_state(1)[0])


def _fresh_state(model, settings, seed, logp, n_walkers):
    rng = np.random.default_rng(seed)
    optimum = maximize_likelihood(model, rng, n_starts=settings.n_starts)
    p0 = _initial_walkers(model, optimum, rng, n_walkers, settings.ball, logp)
    state = emcee.State(p0, random_state=np.random.RandomState(_seed32(seed)).get_state())
    return state, optimum.theta, optimum.log_likelihood


def _tau(chain):
    """Integrated autocorrelation time per parameter; NaN for a parameter whose chain has not
    moved yet (emcee divides by its zero variance; callers treat NaN as not converged)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return emcee.autocorr.integrated_time(chain, c=5, tol=0, quiet=True)


def _burn_in(chain, settings):
    """Burn-in (steps) and τ of the part after it.

    τ of the whole chain sets a first burn-in of ``burn_tau`` × τ; τ re-estimated after
    it sets the final one (never more than half the chain). The returned τ is estimated
    on the chain after the final burn-in.
    """
    n = chain.shape[0]
    tau = _tau(chain)
    for _ in range(2):
        if not np.all(np.isfinite(tau)):
            return n // 2, tau
        burn = min(int(np.ceil(settings.burn_tau * np.max(tau))), n // 2)
        tau = _tau(chain[burn:])
    return burn, tau


def _check_tau(chain, tau_prev, settings):
    burn, tau = _burn_in(chain, settings)
    long_enough = chain.shape[0] - burn > settings.n_tau * np.max(tau)
    stable = tau_prev is not None and np.all(np.abs(tau - tau_prev) / tau < settings.tau_rtol)
    return tau, bool(long_enough and stable and np.all(np.isfinite(tau)))


def run_sampler(model, *, seed: int, settings: SamplerSettings = SamplerSettings(),
                checkpoint=None, resume: bool = False, fingerprint: dict | None = None
                ) -> SamplerRun:
    """Sample ``model``'s posterior with emcee until converged or ``max_steps``.

    Parameters
    ----------
    model : Model
        Provides ``parameter_names``, ``log_prior``, ``log_likelihood``,
        ``log_likelihood_pointwise``, ``prior_transform`` and ``n_bodies``.
    seed : int
        Seeds the optimiser, the walker start and emcee's RandomState.
    settings : SamplerSettings
    checkpoint : path, optional
        HDF5 checkpoint written (atomically) after every chunk.
    resume : bool
        Continue the run stored in ``checkpoint`` (same chain, bitwise).
    fingerprint : dict, optional
        Configuration stored with the checkpoint and compared on resume (data hash,
        model, seed, ...). ``seed`` and the parameter names are always included.

    Raises
    ------
    CheckpointError
        ``resume`` without a readable checkpoint, or one from another configuration.
    """
    t0 = time.perf_counter()
    _validate_settings(settings)
    names = tuple(model.parameter_names)
    n_walkers = settings.walkers_for(len(names))
    fp = _fingerprint(fingerprint, seed, names, n_walkers)
    if _ordering(model) is not None:  # a chain walled in the ordered region or not
        fp["ordered_region"] = settings.ordered_region
    logp = _unit_log_probability(model, wall=settings.ordered_region == "wall")
    loop = (_resume_loop(checkpoint, fp) if resume
            else _fresh_loop(model, settings, seed, logp, n_walkers))
    sampler = emcee.EnsembleSampler(n_walkers, len(names), logp, vectorize=True,
                                    moves=_moves(model))
    with _progress(settings, loop.done) as bar:
        while loop.done < settings.max_steps and not loop.converged:
            _advance(loop, sampler, min(settings.chunk, settings.max_steps - loop.done), bar,
                     settings, logp)
            if checkpoint is not None:
                _write_checkpoint(checkpoint, fp, loop)
    return _finish(names, loop, settings, time.perf_counter() - t0)


@dataclass
class _Loop:
    """Mutable state of the chunked run (what a checkpoint stores)."""

    state: object
    parts: dict
    n_accepted: np.ndarray
    tau_history: list
    converged: bool
    optimum_theta: np.ndarray
    optimum_log_likelihood: float

    @property
    def done(self) -> int:
        return sum(p.shape[0] for p in self.parts["chain"])


def _fresh_loop(model, settings, seed, logp, n_walkers) -> _Loop:
    state, opt_theta, opt_lnl = _fresh_state(model, settings, seed, logp, n_walkers)
    return _Loop(state, {"chain": [], "log_prob": [], "blobs": []},
                 np.zeros(n_walkers, dtype=np.int64), [], False, opt_theta, opt_lnl)


def _resume_loop(checkpoint, fp) -> _Loop:
    saved = load_checkpoint(checkpoint, expect=fp)
    state = emcee.State(saved["state_coords"], log_prob=saved["state_log_prob"],
                        blobs=saved["blobs"][-1], random_state=saved["random_state"])
    return _Loop(state, {k: [saved[k]] for k in ("chain", "log_prob", "blobs")},
                 saved["n_accepted"], list(saved["tau_history"]), saved["converged"],
                 saved["optimum_theta"], saved["optimum_log_likelihood"])


def _advance(loop, sampler, n, bar, settings, logp) -> None:
    """Run one chunk of ``n`` steps and update the loop state and convergence test.

    The chunk is stored in the user's parameters: θ and ln prior(θ) + ln L(θ).
    """
    loop.state = _run_chunk(sampler, loop.state, n, bar)
    theta = logp.theta(sampler.get_chain())
    blobs = _blobs(sampler, logp.model.n_bodies, n)
    log_prior = np.asarray(logp.model.log_prior(theta.reshape(-1, theta.shape[-1])), float)
    log_post = log_prior.reshape(theta.shape[:2]) + blobs.sum(axis=2)
    log_post = np.where(np.isfinite(log_post), log_post, -np.inf)
    for key, arr in (("chain", theta), ("log_prob", log_post), ("blobs", blobs)):
        loop.parts[key].append(arr)
    loop.n_accepted = loop.n_accepted + np.asarray(sampler.backend.accepted, dtype=np.int64)
    previous = loop.tau_history[-1] if loop.tau_history else None
    tau, loop.converged = _check_tau(np.concatenate(loop.parts["chain"]), previous, settings)
    loop.tau_history.append(tau)


def _run_chunk(sampler, state, n, bar):
    sampler.reset()
    for state in sampler.sample(state, iterations=n, store=True):
        if bar is not None:
            bar.update(1)
    return state


def _blobs(sampler, n_bodies, n):
    blobs = sampler.get_blobs()
    return np.asarray(blobs, float).reshape(n, sampler.nwalkers, n_bodies)


class _progress:
    """A tqdm bar over steps when enabled and stderr is a terminal; otherwise nothing."""

    def __init__(self, settings, done):
        self.enabled = settings.progress and sys.stderr.isatty()
        self.total, self.done = settings.max_steps, done

    def __enter__(self):
        if not self.enabled:
            return None
        from tqdm import tqdm
        self.bar = tqdm(total=self.total, initial=self.done, unit="step", leave=False)
        return self.bar

    def __exit__(self, *exc):
        if self.enabled:
            self.bar.close()
        return False


def _finish(names, loop, settings, wall):
    chain, log_prob, blobs = (np.concatenate(loop.parts[k]) for k in ("chain", "log_prob",
                                                                       "blobs"))
    burn, tau = _burn_in(chain, settings)
    tau_max = float(np.max(tau)) if np.all(np.isfinite(tau)) else float(chain.shape[0])
    thin = max(1, int(settings.thin_tau * tau_max))
    run = SamplerRun(names, chain, log_prob, blobs, loop.n_accepted, tau,
                     np.asarray(loop.tau_history), bool(loop.converged), [], burn, thin,
                     np.asarray(loop.optimum_theta), float(loop.optimum_log_likelihood), wall)
    chain_lnl = blobs.sum(axis=2)
    best = np.unravel_index(np.argmax(chain_lnl), chain_lnl.shape)
    if chain_lnl[best] > run.optimum_log_likelihood:
        run.optimum_theta, run.optimum_log_likelihood = chain[best], float(chain_lnl[best])
    run.flags = _flags(run, settings)
    return run


def _flags(run, settings):
    flags = []
    if not run.converged:
        flags.append(f"unconverged: {run.n_steps} steps = {run.chain_over_tau:.1f} tau "
                     f"(needs > {settings.n_tau:g} tau and tau stable to "
                     f"{100 * settings.tau_rtol:g}%); results are provisional")
    acc = float(np.mean(run.acceptance_fraction))
    if acc < 0.1:
        flags.append(f"low acceptance fraction {acc:.3f} (< 0.1): walkers may be stuck")
    if run.draws().shape[1] < 10:
        flags.append(f"only {run.draws().shape[1]} draws per walker kept after burn-in and thinning")
    return flags


# ---------------------------------------------------------------- checkpoints

def _fingerprint(extra, seed, names, n_walkers):
    fp = {str(k): str(v) for k, v in (extra or {}).items()}
    fp.update(seed=str(seed), parameter_names=",".join(names), n_walkers=str(n_walkers),
              checkpoint_version=CHECKPOINT_VERSION)
    return fp


def _write_checkpoint(path, fp, loop):
    key, keys, pos, has_gauss, cached = loop.state.random_state
    with atomic_path(path) as tmp, h5py.File(tmp, "w") as f:
        for name in ("chain", "log_prob", "blobs"):
            f.create_dataset(name, data=np.concatenate(loop.parts[name]))
        f.create_dataset("state_coords", data=np.asarray(loop.state.coords, float))
        f.create_dataset("state_log_prob", data=np.asarray(loop.state.log_prob, float))
        f.create_dataset("n_accepted", data=loop.n_accepted)
        f.create_dataset("tau_history", data=np.asarray(loop.tau_history))
        f.create_dataset("rng_keys", data=np.asarray(keys, dtype=np.uint32))
        f.create_dataset("optimum_theta", data=np.asarray(loop.optimum_theta, float))
        f.attrs["rng"] = json.dumps([key, int(pos), int(has_gauss), float(cached)])
        f.attrs["optimum_log_likelihood"] = float(loop.optimum_log_likelihood)
        f.attrs["converged"] = int(loop.converged)
        f.attrs["fingerprint"] = json.dumps(fp, sort_keys=True)


def load_checkpoint(path, expect: dict | None = None) -> dict:
    """Read a checkpoint written by :func:`run_sampler`.

    Parameters
    ----------
    path : path
        The HDF5 checkpoint.
    expect : dict, optional
        Fingerprint the checkpoint must match; every differing entry is named.

    Raises
    ------
    CheckpointError
        Missing, unreadable, or written for another configuration.
    """
    if path is None or not Path(path).is_file():
        raise CheckpointError(f"{path}: no checkpoint to resume from; run without --resume first")
    try:
        with h5py.File(path, "r") as f:
            out = {k: f[k][()] for k in ("chain", "log_prob", "blobs", "n_accepted",
                                         "tau_history", "rng_keys", "optimum_theta")}
            # absent from version-1 checkpoints (refused by the fingerprint comparison)
            out.update({k: f[k][()] if k in f else None
                        for k in ("state_coords", "state_log_prob")})
            rng = json.loads(f.attrs["rng"])
            out["optimum_log_likelihood"] = float(f.attrs["optimum_log_likelihood"])
            out["converged"] = bool(f.attrs["converged"])
            out["fingerprint"] = json.loads(f.attrs["fingerprint"])
    except (OSError, KeyError, ValueError) as err:
        raise CheckpointError(f"{path}: unreadable checkpoint ({err}); delete it and rerun "
                              "without --resume") from None
    out["random_state"] = (rng[0], out.pop("rng_keys"), rng[1], rng[2], rng[3])
    if expect is not None:
        _compare_fingerprint(path, out["fingerprint"], expect)
    return out


def _compare_fingerprint(path, got, expect):
    keys = sorted(set(got) | set(expect))
    diffs = [f"{k}: checkpoint has {got.get(k, '<none>')!r}, this run has {expect.get(k, '<none>')!r}"
             for k in keys if got.get(k) != expect.get(k)]
    if diffs:
        raise CheckpointError(f"{path}: checkpoint is from another configuration ("
                              + "; ".join(diffs) + "); use another --out or drop --resume")


def _validate_settings(settings: SamplerSettings):
    if settings.ordered_region not in ("fold", "wall"):
        raise OptionError("ordered_region", settings.ordered_region, "'fold' or 'wall'")
    if settings.max_steps < 1:
        raise OptionError("--max-steps", settings.max_steps, "a positive integer")
