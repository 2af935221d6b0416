"""Exact leave-one-body-out refits for bodies whose PSIS-LOO estimate is unreliable.

PSIS-LOO (:mod:`diskfield.criteria`) estimates each body's ``elpd_i = ln p(y_i | y_-i)``
by importance sampling the full-data posterior; where the Pareto shape k of the weights
exceeds 0.7 the estimate is unreliable (Vehtari, Gelman & Gabry 2017, Stat. Comput. 27,
1413, §2.1, who recommend refitting those points). Here each flagged body is refitted
exactly:

* the same model (profile, envelope, spin, prior set, quadrature settings) is rebuilt on
  the compilation without the body's records (:func:`diskfield.records.without_body`);
* it is sampled with the same sampler settings and a seed derived from the run's seed
  and the body's name (:func:`refit_seed`), so each refit is reproducible on its own;
* ``elpd_i = ln (1/S) Σ_s p(y_i | θ_s)`` over the refit's S kept draws θ_s, with
  ``p(y_i | θ)`` the body's marginal likelihood from the *full-data* model
  (``log_likelihood_pointwise(θ)[:, i]``; the parameter names are the same);
* the corrected ``elpd_loo = Σ elpd_i``, its ``SE = sqrt(n Var(elpd_i))`` (variance over
  the n bodies with divisor n, as ArviZ 0.23 computes the PSIS-LOO SE) and
  ``p_loo = lppd − elpd_loo`` with ``lppd = Σ_i ln (1/S) Σ_s p(y_i | θ_s)`` over the
  full-data posterior (as ArviZ defines it).

A refit that does not converge is still used, but it is flagged: in its record
(``converged: false``), in ``fit.json``'s flags and in the comparison row's note.
Pareto k and ``pareto_k_max`` stay the PSIS diagnostics of the full-data fit.
"""
from __future__ import annotations

import dataclasses
import json
import re
import zlib
from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

from . import azadapter, criteria as _criteria
from .manifest import write_atomic
from .records import without_body

__all__ = ["BodyRefit", "refit_seed", "model_without_body", "log_mean_exp_column",
           "lppd", "corrected_loo", "refit_body", "bodies_to_refit", "apply_refits",
           "refit_note", "checkpoint_path", "refit_task", "planned_refits", "finish",
           "loo_refit"]

#: Walkers evaluated per call of the full-data model on the refit's draws.
_BATCH = 256


@dataclass(frozen=True)
class BodyRefit:
    """One body's exact leave-one-out refit (natural-log values, higher is better)."""

    body: str
    pareto_k: float
    psis_elpd_i: float
    exact_elpd_i: float
    converged: bool
    n_steps: int
    chain_over_tau: float
    n_draws: int
    seed: int
    flags: tuple = ()

    def describe(self) -> str:
        """One progress line."""
        state = "converged" if self.converged else "NOT converged"
        return (f"{self.n_steps} steps ({state}), elpd_i exact {self.exact_elpd_i:.2f} "
                f"vs PSIS {self.psis_elpd_i:.2f} (k = {self.pareto_k:.2f})")


def refit_seed(seed: int, body: str) -> int:
    """Seed of ``body``'s refit: the run's seed plus a CRC-32 of the name, mod 2**32."""
    return (int(seed) + zlib.crc32(f"loo-refit/{body}".encode("utf-8"))) % 2**32


def model_without_body(model, body: str):
    """``model`` rebuilt on its compilation without ``body`` (same priors and settings).

    A model object may provide its own ``without_body(body)`` (toy models in tests);
    otherwise a :class:`diskfield.likelihood.Model` is rebuilt with
    :func:`diskfield.build_model` from its compilation, profile, envelope, spin, prior set
    and quadrature settings.
    """
    if hasattr(model, "without_body"):
        return model.without_body(body)
    from .likelihood import build_model

    cfg = model.config
    return build_model(without_body(model.compilation, body), profile=cfg["profile"],
                       envelope=cfg["envelope"], spin=cfg["spin"], priors=model.priorset,
                       settings=model.settings)


def log_mean_exp_column(model, draws, i: int) -> float:
    """``ln (1/S) Σ_s exp(model.log_likelihood_pointwise(θ_s)[i])`` over draws (…, P)."""
    theta = np.asarray(draws, float).reshape(-1, np.shape(draws)[-1])
    col = np.concatenate([np.asarray(model.log_likelihood_pointwise(theta[a:a + _BATCH]))[:, i]
                          for a in range(0, len(theta), _BATCH)])
    return float(logsumexp(col) - np.log(col.size))


def lppd(pointwise) -> float:
    """Log pointwise predictive density Σ_i ln (1/S) Σ_s exp(ll[s, i]); ``pointwise``
    is (…, B) with the draws on the leading axes."""
    ll = np.asarray(pointwise, float)
    ll = ll.reshape(-1, ll.shape[-1])
    return float(np.sum(logsumexp(ll, axis=0) - np.log(ll.shape[0])))


def corrected_loo(elpd_i, lppd_value: float) -> dict:
    """``elpd_loo`` (sum), ``elpd_loo_se`` (sqrt(n Var), divisor n) and ``p_loo``."""
    e = np.asarray(elpd_i, float)
    return {"elpd_loo": float(e.sum()), "elpd_loo_se": float(np.sqrt(e.size * np.var(e))),
            "p_loo": float(lppd_value - e.sum())}


def bodies_to_refit(crit) -> tuple:
    """The bodies whose Pareto k exceeds the flag (``Criteria.bad_k_bodies``)."""
    return tuple(crit.bad_k_bodies)


def refit_body(model, body: str, crit, *, seed: int, settings, checkpoint=None,
               resume: bool = False) -> BodyRefit:
    """Refit ``model`` without ``body`` and return its exact ``elpd_i``.

    Parameters
    ----------
    model : Model
        The full-data model (its ``body_names`` contain ``body``).
    body : str
    crit : Criteria
        The full-data criteria (for the body's PSIS ``elpd_i`` and Pareto k).
    seed : int
        The run's seed; the refit uses :func:`refit_seed` of it.
    settings : SamplerSettings
    checkpoint, resume
        As for :func:`diskfield.sampling.run_sampler`; the checkpoint's fingerprint is a
        fit's (data hash of the reduced compilation, model, priors) plus the body.
    """
    from .runs import _fingerprint
    from .sampling import run_sampler

    i = list(model.body_names).index(body)
    sub = model_without_body(model, body)
    if tuple(sub.parameter_names) != tuple(model.parameter_names):
        raise RuntimeError(f"refit without {body!r} changed the parameters: "
                           f"{sub.parameter_names} != {model.parameter_names}")
    if body in tuple(sub.body_names):
        raise RuntimeError(f"refit model still holds body {body!r}")
    s = refit_seed(seed, body)
    fp = dict(_fingerprint(sub, getattr(sub, "compilation", None)), loo_refit_without=body)
    run = run_sampler(sub, seed=s, settings=settings, checkpoint=checkpoint,
                      resume=resume, fingerprint=fp)
    draws = run.draws()
    return BodyRefit(body=body, pareto_k=float(crit.pareto_k[i]),
                     psis_elpd_i=float(crit.elpd_loo_i[i]),
                     exact_elpd_i=log_mean_exp_column(model, draws, i),
                     converged=bool(run.converged), n_steps=int(run.n_steps),
                     chain_over_tau=float(run.chain_over_tau),
                     n_draws=int(np.prod(draws.shape[:2])), seed=s, flags=tuple(run.flags))


def apply_refits(crit, body_names, refits, lppd_value: float, *, requested=True):
    """Criteria with the refitted bodies' ``elpd_i`` replaced and LOO recomputed.

    The record of what was done goes to ``Criteria.loo_refit`` (written into
    ``fit.json``'s criteria): PSIS values before, per-body details, ``lppd``.
    """
    elpd_i = list(crit.elpd_loo_i)
    names = list(body_names)
    for r in refits:
        elpd_i[names.index(r.body)] = r.exact_elpd_i
    info = {"requested": bool(requested), "pareto_k_flag": _criteria.PARETO_K_FLAG,
            "bodies": [dataclasses.asdict(r) for r in refits], "lppd": float(lppd_value),
            "psis": {"elpd_loo": crit.elpd_loo, "elpd_loo_se": crit.elpd_loo_se,
                     "p_loo": crit.p_loo},
            "unconverged": [r.body for r in refits if not r.converged],
            "note": refit_note(refits, requested)}
    if not refits:
        return dataclasses.replace(crit, loo_refit=info)
    new = corrected_loo(elpd_i, lppd_value)
    return dataclasses.replace(crit, elpd_loo=new["elpd_loo"], elpd_loo_se=new["elpd_loo_se"],
                               p_loo=new["p_loo"], elpd_loo_i=tuple(float(x) for x in elpd_i),
                               loo_refit=info)


def refit_note(refits, requested=True) -> str:
    """Plain words for a comparison row's note ("" when refits were not requested)."""
    if not requested:
        return ""
    if not refits:
        return f"exact LOO refit requested: no body with Pareto k > {_criteria.PARETO_K_FLAG:g}"
    text = (f"exact refit for bodies {', '.join(r.body for r in refits)} "
            f"(Pareto k > {_criteria.PARETO_K_FLAG:g})")
    bad = [r.body for r in refits if not r.converged]
    if bad:
        text += f"; refit NOT CONVERGED for {', '.join(bad)} (elpd_i provisional)"
    return text


def _flags(refits) -> list:
    done = ([f"elpd_loo, its SE and p_loo use exact refits for "
             f"{', '.join(r.body for r in refits)} (PSIS values in criteria.loo_refit)"]
            if refits else [])
    return done + [f"exact LOO refit without {r.body} did not converge ({r.n_steps} steps, "
                   f"{r.chain_over_tau:.1f} tau): its elpd_i is provisional"
                   for r in refits if not r.converged]


def checkpoint_path(out, body: str):
    """``out/loo_refit/checkpoint_<body>_<crc32>.h5`` (name made safe, CRC keeps it unique)."""
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", body)
    return out / "loo_refit" / f"checkpoint_{safe}_{zlib.crc32(body.encode()):08x}.h5"


def refit_task(outcome, body: str, *, seed: int, settings, resume: bool = False):
    """A no-argument callable that runs one body's refit (for :mod:`diskfield.workers`)."""
    ckpt = checkpoint_path(outcome.out, body) if outcome.out is not None else None
    started = ckpt is not None and ckpt.is_file()

    def task():
        return refit_body(outcome.model, body, outcome.criteria, seed=seed, settings=settings,
                          checkpoint=ckpt, resume=resume and started)
    return task


def finish(outcome, refits, *, requested=True):
    """The outcome with corrected criteria; ``fit.json`` updated (and rewritten if saved)."""
    crit = apply_refits(outcome.criteria, outcome.model.body_names, refits,
                        lppd(azadapter.pointwise_log_likelihood(outcome.idata)),
                        requested=requested)
    fit_json = dict(outcome.fit_json)
    from .runs import _criteria_json

    fit_json["criteria"] = _criteria_json(crit, outcome.model)
    fit_json["flags"] = list(fit_json["flags"]) + _flags(refits)
    new = dataclasses.replace(outcome, criteria=crit, fit_json=fit_json)
    if outcome.out is not None:
        write_atomic(outcome.out / "fit.json", json.dumps(fit_json, indent=2) + "\n")
    return new


def loo_refit(outcome, *, seed: int, settings, resume: bool = False, log=None):
    """Refit every flagged body of one fit, one after another; return the corrected outcome.

    Parameters
    ----------
    outcome : diskfield.runs.FitOutcome
        The full-data fit (its ``model`` must be set).
    seed : int
        The fit's seed (each body's refit uses :func:`refit_seed`).
    settings : SamplerSettings
    resume : bool
        Continue refit checkpoints found in ``outcome.out/loo_refit/``.
    log : callable, optional
        ``log(str)``: one line per refit, or one saying that nothing was refitted.
    """
    say = log or (lambda line: None)
    name = outcome.model.config.get("profile", "model")
    refits = []
    for label, task in planned_refits(name, outcome, seed=seed, settings=settings,
                                      resume=resume, say=say):
        refits.append(task())
        say(f"{label}: {refits[-1].describe()}")
    return finish(outcome, refits)


def planned_refits(name: str, outcome, *, seed: int, settings, resume: bool, say):
    """(label, task) for every flagged body of one fit, in body order; ``say`` a line when no
    body is flagged. Run the tasks one after another (``fit``) or on worker processes
    (``compare``), then hand the results to :func:`finish`."""
    bodies = bodies_to_refit(outcome.criteria)
    if not bodies:
        say(f"{name}: no body with Pareto k > {_criteria.PARETO_K_FLAG:g}; "
            "nothing refitted (PSIS-LOO kept)")
    return [(f"{name} LOO refit without {body}",
             refit_task(outcome, body, seed=seed, settings=settings, resume=resume))
            for body in bodies]
