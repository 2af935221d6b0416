"""Forecasts: which candidate measurement would most change the ring-vs-smooth verdict.

Stage 1 (four tasks) fits the current compilation with the null (smooth) and the alternative
(ring) model and computes both evidences. Stage 2 runs, for each candidate and each of
``n_draws`` draws, one task: pick the generating model with its current posterior probability
(equal prior odds, a convention), take a posterior draw of its parameters, simulate the
candidate's new records through the full recording model (latent distance, spin, calibration
and age of the new records drawn afresh given the parameters), append them to the observed
data, and recompute 2 ln B (ring vs smooth) and the ring parameters' posterior widths. This is
the preposterior distribution of the verdict under the current state of knowledge.

Ranking criterion: the probability of a decisive answer, P(|2 ln B| > threshold), because the
question the forecast serves is whether the next measurement can settle the verdict, and a
probability is directly interpretable and robust to a few extreme simulated values; ties are
broken by the expected fractional reduction of the ring parameters' posterior widths.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..sampling import SamplerSettings
from .candidates import Candidate, augment_compilation
from .disk import DiskSpec, EvidenceSettings, spec_model, two_ln_bayes_factor
from .runner import Task, task_seed

__all__ = ["ForecastContext", "current_fit_task", "current_evidence_task", "forecast_task",
           "stage_one_tasks", "stage_two_tasks", "context_from_results", "posterior_widths",
           "RANKING_CRITERION"]

RANKING_CRITERION = ("probability of a decisive verdict, P(|2 ln B| > threshold); ties broken "
                     "by the expected fractional reduction of the ring parameters' 68 % widths")

_STAGE_TWO_OFFSET = 10_000_000
_CACHE: dict = {}


def posterior_widths(draws: np.ndarray, names, width_names) -> dict:
    """Half-width of the central 68 % interval, (q84 - q16) / 2, per named parameter."""
    out = {}
    for name in width_names:
        j = list(names).index(name)
        q16, q84 = np.quantile(draws[:, j], [0.16, 0.84])
        out[name] = float((q84 - q16) / 2)
    return out


def _ring_names(names) -> tuple:
    return tuple(n for n in names if n.startswith("ring"))


def current_fit_task(spec: DiskSpec, sampler: SamplerSettings, n_keep: int,
                     seed: np.random.SeedSequence) -> dict:
    """Fit the current data; keep ``n_keep`` posterior draws and the ring widths."""
    from ..sampling import run_sampler
    from .disk import flat_draws

    rng = np.random.default_rng(seed)
    model = spec_model(spec)[2]
    run = run_sampler(model, seed=int(rng.integers(2**31 - 1)), settings=sampler)
    draws, enough = flat_draws(run, n_keep, rng)
    names = tuple(model.parameter_names)
    return {"profile": spec.profile, "parameter_names": list(names), "draws": draws,
            "widths": posterior_widths(draws, names, _ring_names(names)),
            "converged": bool(run.converged), "enough_draws": enough}


def current_evidence_task(spec: DiskSpec, evidence: EvidenceSettings,
                          seed: np.random.SeedSequence) -> dict:
    """ln Z of the current data under ``spec``'s model."""
    from ..evidence import nested_evidence

    rng = np.random.default_rng(seed)
    ev = nested_evidence(spec_model(spec)[2], seed=int(rng.integers(2**31 - 1)),
                         nlive=evidence.nlive, dlogz=evidence.dlogz)
    return {"profile": spec.profile, "ln_evidence": ev.ln_evidence,
            "ln_evidence_err": ev.ln_evidence_err}


def stage_one_tasks(null: DiskSpec, alt: DiskSpec, sampler, evidence, n_keep, seed) -> list:
    """Fits and evidences of the current data (task seeds 0-3)."""
    return [Task("current_fit_null", current_fit_task, (null, sampler, n_keep, task_seed(seed, 0)),
                 {"task": "current_fit", "model": null.profile}),
            Task("current_fit_alternative", current_fit_task,
                 (alt, sampler, n_keep, task_seed(seed, 1)),
                 {"task": "current_fit", "model": alt.profile}),
            Task("current_evidence_null", current_evidence_task,
                 (null, evidence, task_seed(seed, 2)),
                 {"task": "current_evidence", "model": null.profile}),
            Task("current_evidence_alternative", current_evidence_task,
                 (alt, evidence, task_seed(seed, 3)),
                 {"task": "current_evidence", "model": alt.profile})]


@dataclass(frozen=True)
class ForecastContext:
    """What every stage-2 task needs (built from the stage-1 results).

    Attributes
    ----------
    null, alternative : DiskSpec
    banks : tuple
        Per model (null, alternative): (parameter names, posterior draws as nested tuples).
    p_alternative : float
        Current posterior probability of the alternative (equal prior odds).
    sampler : SamplerSettings
    evidence : EvidenceSettings
    """

    null: DiskSpec
    alternative: DiskSpec
    banks: tuple
    p_alternative: float
    sampler: SamplerSettings = SamplerSettings()
    evidence: EvidenceSettings = EvidenceSettings()
    width_names: tuple = field(default=())


def context_from_results(null, alt, results: dict, sampler, evidence) -> ForecastContext:
    """Build the stage-2 context from the stage-1 results (dict task_id -> result)."""
    z0 = results["current_evidence_null"]["ln_evidence"]
    z1 = results["current_evidence_alternative"]["ln_evidence"]
    p_alt = 1.0 / (1.0 + math.exp(-(z1 - z0))) if abs(z1 - z0) < 700 else float(z1 > z0)
    banks = tuple((tuple(results[k]["parameter_names"]),
                   tuple(tuple(row) for row in results[k]["draws"]))
                  for k in ("current_fit_null", "current_fit_alternative"))
    return ForecastContext(null, alt, banks, p_alt, sampler, evidence,
                           _ring_names(results["current_fit_alternative"]["parameter_names"]))


def _augmented(spec: DiskSpec, cand: Candidate):
    key = (spec.key(), repr(cand))  # repr: NaN ages would defeat equality of the dataclass
    if key not in _CACHE:
        from ..likelihood import build_model

        comp, priorset, _ = spec_model(spec)
        aug, new_idx = augment_compilation(comp, cand)
        model = build_model(aug, profile=spec.profile, envelope=spec.envelope, spin=spec.spin,
                            priors=priorset)
        _CACHE[key] = (aug, new_idx, model)
    return _CACHE[key]


def forecast_task(ctx: ForecastContext, cand: Candidate, seed: np.random.SeedSequence) -> dict:
    """One preposterior draw for one candidate: simulate, append, recompute the verdict."""
    import dataclasses

    from ..sampling import run_sampler

    rng = np.random.default_rng(seed)
    use_alt = bool(rng.uniform() < ctx.p_alternative)
    spec = ctx.alternative if use_alt else ctx.null
    names, bank = ctx.banks[int(use_alt)]
    theta = np.asarray(bank[rng.integers(len(bank))], dtype=float)
    aug, new_idx, gen_model = _augmented(spec, cand)
    y = gen_model.simulate_ln_values(theta[None, :], rng)[0]
    ln_value = np.asarray(aug.records.ln_value, dtype=float).copy()
    ln_value[new_idx] = y[new_idx]
    data = dataclasses.replace(aug, records=dataclasses.replace(aug.records, ln_value=ln_value))
    value, error = two_ln_bayes_factor(ctx.null, ctx.alternative, data, rng, ctx.evidence)
    widths, converged = _ring_widths(ctx, cand, data, rng, run_sampler)
    return {"candidate": cand.candidate, "generating_model": spec.profile,
            "truth_names": list(names), "truth": theta, "new_ln_values": y[new_idx],
            "two_ln_bayes_factor": value, "two_ln_bayes_factor_err": error,
            "widths": widths, "converged": converged}


def _ring_widths(ctx, cand, data, rng, run_sampler):
    from ..likelihood import build_model

    spec = ctx.alternative
    priorset = spec_model(spec)[1]
    model = build_model(data, profile=spec.profile, envelope=spec.envelope, spin=spec.spin,
                        priors=priorset)
    run = run_sampler(model, seed=int(rng.integers(2**31 - 1)), settings=ctx.sampler)
    draws = run.draws().reshape(-1, len(model.parameter_names))
    return posterior_widths(draws, model.parameter_names, ctx.width_names), bool(run.converged)


def stage_two_tasks(ctx: ForecastContext, candidates, n_draws: int, seed: int) -> list:
    """``n_draws`` tasks per candidate; seeds depend only on (candidate position, draw)."""
    tasks = []
    for k, cand in enumerate(candidates):
        for j in range(n_draws):
            index = _STAGE_TWO_OFFSET * (k + 1) + j
            tasks.append(Task(f"cand{k:03d}_{j:05d}", forecast_task,
                              (ctx, cand, task_seed(seed, index)),
                              {"task": "forecast", "candidate": cand.candidate, "draw": j}))
    return tasks
