"""Bayesian evidence: dynesty nested sampling and the Savage–Dickey density ratio.

Nested sampling (Skilling 2006, Bayesian Analysis 1, 833; dynesty: Speagle 2020, MNRAS
493, 3132) integrates the same likelihood as the MCMC over the model's priors through
their inverse CDFs (``model.prior_transform``), so ln Z and the posterior share every
modelling choice. dynesty's own checkpoint (a pickle tied to its version) is used only to
resume a long run, never as an archive; the archived result is ``evidence.json``.

Prior reweighting: under a prior π' whose support lies inside the prior π of a finished
run, Z' = ∫ L π' = Z Σ_i w_i π'(θ_i)/π(θ_i) over the run's points θ_i with normalised
posterior weights w_i (importance sampling of the posterior; the nested-sampling
weights serve as the importance weights, e.g. Skilling 2006 §9; Chopin & Robert 2010,
Biometrika 97, 741). Its relative error is sqrt(Σ (q_i − w_i)²) with q_i = w_i r_i / Σ w r
(the self-normalised importance-sampling variance), added in quadrature to the run's own
ln Z error; the reweighted points' effective sample size 1/Σ q_i² says whether enough
points carry the new posterior (:data:`MIN_REWEIGHT_ESS`).

Savage–Dickey (Dickey 1971, Ann. Math. Stat. 42, 204; Verdinelli & Wasserman 1995,
JASA 90, 614): for a model that reduces to a simpler one at ``φ = φ0`` with independent
priors, ``B_simple,full = p(φ0 | D, full) / p(φ0 | full)``. The posterior density at φ0
is a Gaussian kernel density estimate over the full model's draws; it is a cross-check,
not the reported evidence, and is "not applicable" when φ0 lies outside (or on the edge
of) the prior support. Under a label ordering (:mod:`diskfield.ordering`) the ordered
prior does not nest cleanly (at φ0 the other group's conditional prior is not its own
prior); the exact ratio of the symmetric, unordered model uses the symmetrised posterior,
whose marginal is the mean of the k exchangeable copies' marginals: the copies' draws are
pooled (``exchangeable=True``) against the unchanged one-group prior density.
"""
from __future__ import annotations

import time
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
from scipy import stats

from . import nsbatch

__all__ = ["Evidence", "NestedDraws", "nested_evidence", "Reweighted", "reweighted_evidence",
           "SavageDickey", "savage_dickey", "DEFAULT_NLIVE", "DEFAULT_DLOGZ",
           "MIN_REWEIGHT_ESS"]

#: Live points. With a likelihood of ~1 ms per 64-walker call the three-model demo
#: comparison (3 evidences + 4 prior-sensitivity evidences) must fit in about two minutes;
#: 100 live points give ln Z errors of ~0.2-0.4 on 3-9 parameters (reported with every
#: value, never hidden). Convention, raise ``--nlive`` for a final answer.
DEFAULT_NLIVE = 100
#: Stopping tolerance on the estimated remaining ln Z (nats). The remaining live points
#: are added to the estimate when the run stops, so the truncation bias is far below this;
#: dynesty's own default for static runs is 0.01 (nlive - 1) + 0.01 = 1.0 at nlive = 100.
DEFAULT_DLOGZ = 0.5

# Multi-ellipsoid bounds enlarged by a fixed 25 % instead of dynesty's bootstrap estimate:
# the bootstrap was half of the run time on 2-D test problems and the fixed enlargement
# reproduced the analytic evidences of the tests (tests/test_evidence.py).
_BOUND_SETTINGS = {"bound": "multi", "bootstrap": 0, "enlarge": 1.25}

# dynesty wants finite log-likelihoods; this is far below any real value.
_LOGL_FLOOR = nsbatch.LOGL_FLOOR
#: Smallest effective sample size of reweighted points for a reweighted evidence to be
#: used (below it, run nested sampling afresh). Convention: as many effective points as
#: the default number of live points.
MIN_REWEIGHT_ESS = 100.0

# Seconds between dynesty checkpoints (dynesty's own default; convention).
_CHECKPOINT_EVERY = 60.0
# dynesty picks its uniform sampler below 10 dimensions (``sample="auto"``); only that
# sampler's proposals are batched (diskfield.nsbatch).
_UNIFORM_MAX_NDIM = 9


@dataclass(frozen=True)
class NestedDraws:
    """A nested-sampling run's dead and final live points with their posterior weights.

    Attributes
    ----------
    theta : ndarray, shape (N, P)
        Parameter values.
    log_weight : ndarray, shape (N,)
        Normalised log posterior weights (``logwt - logz[-1]``; ``exp`` sums to 1).
    """

    theta: np.ndarray
    log_weight: np.ndarray


@dataclass(frozen=True)
class Evidence:
    """Result of :func:`nested_evidence` (written as ``evidence.json``).

    Attributes
    ----------
    ln_evidence, ln_evidence_err : float
        ln Z (natural log) and dynesty's error estimate.
    n_live : int
    dlogz : float
    n_calls : int
        Likelihood evaluations.
    seed : int
    wall_time_s : float
    information : float
        KL divergence prior → posterior (nats), dynesty's ``information[-1]``.
    n_evaluated : int
        Points actually passed to the likelihood: ``n_calls`` plus the batched candidates
        discarded after a proposal's accepted one (equal to ``n_calls`` when not batched).
    batched : bool
        Whether the proposals were evaluated in batches (:mod:`diskfield.nsbatch`).
    draws : NestedDraws or None
        The run's weighted points (kept in memory, not written to ``evidence.json``).
    """

    ln_evidence: float
    ln_evidence_err: float
    n_live: int
    dlogz: float
    n_calls: int
    seed: int
    wall_time_s: float
    information: float = float("nan")
    n_evaluated: int = 0
    batched: bool = False
    draws: NestedDraws | None = field(default=None, repr=False, compare=False)

    def as_dict(self) -> dict:
        d = asdict(self)
        d.pop("draws")
        return d


class _LogLike:
    """Scalar log-likelihood for dynesty from the model's vectorised one (picklable)."""

    def __init__(self, model):
        self.model = model

    def __call__(self, x):
        value = float(self.model.log_likelihood(np.asarray(x, float)[None, :])[0])
        return value if np.isfinite(value) else _LOGL_FLOOR


class _PriorTransform:
    def __init__(self, model):
        self.model = model

    def __call__(self, u):
        return np.asarray(self.model.prior_transform(np.asarray(u, float)), float)


def nested_evidence(model, *, seed: int, nlive: int = DEFAULT_NLIVE,
                    dlogz: float = DEFAULT_DLOGZ, checkpoint_file=None,
                    resume: bool = False, progress: bool = False,
                    batch: bool = True) -> Evidence:
    """ln Z of ``model`` by static nested sampling (dynesty).

    Parameters
    ----------
    model : Model
        Provides ``parameter_names``, ``log_likelihood`` (vectorised) and
        ``prior_transform``.
    seed : int
        Seeds dynesty's Generator; the same seed gives the identical run.
    nlive : int
        Live points.
    dlogz : float
        Stop when the estimated remaining ln Z is below this (nats).
    checkpoint_file : path, optional
        dynesty pickle written every minute for resuming.
    resume : bool
        Continue from ``checkpoint_file`` when it exists.
    progress : bool
        Print dynesty's progress line.
    batch : bool
        Evaluate the uniform sampler's proposals in vectorised batches
        (:class:`diskfield.nsbatch.BatchedPool`; up to 9 parameters, where dynesty samples
        uniformly within its ellipsoids). False: dynesty's one-point-at-a-time path. The
        two give different (equally valid) runs for the same seed; each is reproducible.
    """
    import dynesty

    t0 = time.perf_counter()
    ndim = len(model.parameter_names)
    ckpt = str(checkpoint_file) if checkpoint_file is not None else None
    batched = batch and nsbatch.AVAILABLE and ndim <= _UNIFORM_MAX_NDIM
    if resume and ckpt and Path(ckpt).is_file():
        pool = _restored_pool(ckpt) if batched else None
        sampler = dynesty.NestedSampler.restore(ckpt, pool=pool)
        with warnings.catch_warnings():
            # resuming a run that had already finished is the normal case after a kill
            # during a later stage; dynesty warns about it, we simply reuse the result
            warnings.filterwarnings("ignore", message="You are resuming a finished")
            sampler.run_nested(resume=True, dlogz=dlogz, print_progress=progress,
                               checkpoint_file=ckpt, checkpoint_every=_CHECKPOINT_EVERY)
    else:
        loglike, ptform = _LogLike(model), _PriorTransform(model)
        pool = nsbatch.BatchedPool(model, loglike, ptform) if batched else None
        sampler = dynesty.NestedSampler(loglike, ptform, ndim, nlive=nlive,
                                        rstate=np.random.default_rng(seed), pool=pool,
                                        **_BOUND_SETTINGS)
        sampler.run_nested(dlogz=dlogz, print_progress=progress, checkpoint_file=ckpt,
                           checkpoint_every=_CHECKPOINT_EVERY)
    res = sampler.results
    n_calls = int(np.sum(res.ncall))
    logwt = np.asarray(res.logwt, float) - float(res.logz[-1])
    return Evidence(ln_evidence=float(res.logz[-1]), ln_evidence_err=float(res.logzerr[-1]),
                    n_live=int(nlive), dlogz=float(dlogz), n_calls=n_calls,
                    seed=int(seed), wall_time_s=time.perf_counter() - t0,
                    information=float(res.information[-1]),
                    n_evaluated=_n_evaluated(pool, n_calls), batched=bool(pool),
                    draws=NestedDraws(np.asarray(res.samples, float), logwt))


def _restored_pool(ckpt):
    """A batched pool for the likelihood objects pickled inside a dynesty checkpoint."""
    import pickle

    with open(ckpt, "rb") as fh:
        saved = pickle.load(fh)["sampler"]
    loglike = getattr(getattr(saved.loglikelihood, "loglikelihood", None), "func", None)
    ptform = getattr(saved.prior_transform, "func", None)
    if not isinstance(loglike, _LogLike) or not isinstance(ptform, _PriorTransform):
        return None
    return nsbatch.BatchedPool(loglike.model, loglike, ptform)


def _n_evaluated(pool, n_calls):
    # after a resume the pool saw only the resumed part: report the larger figure
    return max(n_calls, pool.n_evaluated) if pool is not None else n_calls


@dataclass(frozen=True)
class Reweighted:
    """ln Z under a narrower prior by reweighting a finished run (:func:`reweighted_evidence`).

    Attributes
    ----------
    ln_evidence, ln_evidence_err : float
        ln Z' and its error (the run's ln Z error and the reweighting error in quadrature).
    ess : float
        Effective sample size of the reweighted points.
    ln_ratio_err : float
        The reweighting part of the error (nats).
    """

    ln_evidence: float
    ln_evidence_err: float
    ess: float
    ln_ratio_err: float


def reweighted_evidence(evidence: Evidence, log_prior, new_log_prior) -> Reweighted:
    """ln Z under ``new_log_prior`` from a nested-sampling run under ``log_prior``.

    Parameters
    ----------
    evidence : Evidence
        A finished run with its ``draws``.
    log_prior, new_log_prior : callable
        ``(N, P) -> (N,)`` normalised log prior densities of the run and of the new prior;
        the new prior's support must lie inside the old one's (not checked here).

    Returns
    -------
    Reweighted
        ``ess`` is 0 and ln Z' is ``-inf`` when no point lies inside the new support.
    """
    if evidence.draws is None:
        raise ValueError("the evidence run kept no draws to reweight")
    theta, log_w = evidence.draws.theta, evidence.draws.log_weight
    old, new = np.asarray(log_prior(theta), float), np.asarray(new_log_prior(theta), float)
    inside = np.isfinite(new) & np.isfinite(old)
    log_a = np.where(inside, log_w + np.where(inside, new - old, 0.0), -np.inf)
    if not np.any(inside & np.isfinite(log_a)):
        return Reweighted(-np.inf, np.inf, 0.0, np.inf)
    top = log_a.max()
    ln_ratio = top + np.log(np.exp(log_a - top).sum())
    q, w = np.exp(log_a - ln_ratio), np.exp(log_w)
    rel_err = float(np.sqrt(np.sum((q - w) ** 2)))
    return Reweighted(float(evidence.ln_evidence + ln_ratio),
                      float(np.hypot(evidence.ln_evidence_err, rel_err)),
                      float(1.0 / np.sum(q ** 2)), rel_err)


@dataclass(frozen=True)
class SavageDickey:
    """Savage–Dickey ratio at ``parameter = value``.

    Attributes
    ----------
    parameter : str
    value : float
    applicable : bool
    reason : str
        Why not applicable (empty when applicable).
    ln_bayes_factor : float
        ln B of the full model over the nested one, ``ln p(φ0) − ln p(φ0 | D)``.
    ln_bayes_factor_err : float
        Bootstrap SE of the KDE estimate (draws resampled; ignores autocorrelation,
        so thin the draws by τ first).
    posterior_density, prior_density : float
    """

    parameter: str
    value: float
    applicable: bool
    reason: str = ""
    ln_bayes_factor: float = float("nan")
    ln_bayes_factor_err: float = float("nan")
    posterior_density: float = float("nan")
    prior_density: float = float("nan")

    def as_dict(self) -> dict:
        return asdict(self)


def savage_dickey(draws, prior, *, parameter: str, value: float = 0.0,
                  seed: int = 0, n_boot: int = 50, exchangeable: bool = False) -> SavageDickey:
    """Savage–Dickey ln B (full over nested) at ``parameter = value``.

    Parameters
    ----------
    draws : array_like
        Posterior draws of the parameter under the full model (any shape, flattened); with
        ``exchangeable``, shape (..., k): each row holds the k exchangeable copies of the
        parameter in one posterior draw (e.g. ``ring_amplitude``, ``ring2_amplitude``).
    prior : diskfield.priorspec.Prior
        Its prior under the full model (one copy's prior: the groups' priors are identical).
    parameter : str
        Name, for reports.
    value : float
        The nesting value φ0 (0 for a ring amplitude).
    seed : int
        Seed of the bootstrap.
    n_boot : int
        Bootstrap resamples for the error.
    exchangeable : bool
        Pool the copies (the symmetrised posterior's marginal) for the density estimate; the
        bootstrap resamples whole draws (rows), keeping the copies of a draw together.
    """
    lo, hi = prior.support
    if prior.is_fixed:
        return SavageDickey(parameter, value, False, f"{parameter} is fixed, nothing to test")
    if not (lo < value < hi):
        return SavageDickey(parameter, value, False,
                            f"{parameter} = {value:g} is outside the open prior support "
                            f"({lo:g}, {hi:g}); the models do not nest there")
    arr = np.asarray(draws, float)
    rows = arr.reshape(-1, arr.shape[-1]) if exchangeable else arr.reshape(-1, 1)
    x = rows.ravel()
    prior_density = float(np.exp(prior.log_prob(value)))
    post = float(stats.gaussian_kde(x)(value)[0])
    if post <= 0:
        return SavageDickey(parameter, value, False,
                            f"no posterior draws near {parameter} = {value:g}; the density "
                            "ratio cannot be estimated (the nested model is strongly disfavoured)",
                            posterior_density=post, prior_density=prior_density)
    rng = np.random.default_rng(seed)
    boot = [stats.gaussian_kde(rows[rng.integers(0, len(rows), len(rows))].ravel())(value)[0]
            for _ in range(n_boot)]
    boot = np.log(np.maximum(boot, 1e-300))
    return SavageDickey(parameter, value, True, "", np.log(prior_density) - np.log(post),
                        float(np.std(boot, ddof=1)), post, prior_density)
