"""Simulation-based calibration (SBC) and verdict rates.

SBC (Talts et al. 2018, arXiv:1804.06788): draw parameters from the prior, simulate a data
set, fit it, and take the rank of the true value among L posterior draws. For a correct model
and an exact fit the rank is uniform on {0, ..., L}; a U shape means over-confident posteriors,
a hump under-confident ones, a slope a bias.

Uniformity test (per parameter): Pearson's chi-square on the ranks binned into B equal bins
(B divides L + 1, so each bin holds the same number of rank values; expected count N/B),
B - 1 degrees of freedom; a parameter is flagged non-uniform when p < 0.01. A
Kolmogorov-Smirnov test on randomised normalised ranks ``(rank + U(0,1)) / (L + 1)`` (exactly
Uniform(0, 1) under the null) is reported beside it.

Verdict rates: data simulated from the null model (smooth disk) and from the alternative
(ringed disk, parameters from its prior) are compared by 2 ln B; the false-positive rate is the
fraction of null simulations with 2 ln B > threshold, the detection rate the fraction of
alternative ones. Intervals are Wilson score intervals (Wilson 1927, JASA 22, 209).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .runner import Task, task_seed

__all__ = [
    "SBCSettings",
    "COVERAGE_LEVELS",
    "sbc_task",
    "verdict_task",
    "calibration_tasks",
    "choose_rank_bins",
    "rank_uniformity",
    "coverage_summary",
    "wilson_interval",
    "verdict_rates",
]

#: Central credible-interval levels whose coverage is reported (convention).
COVERAGE_LEVELS = (0.50, 0.68, 0.90, 0.95)

#: Significance level below which a rank histogram is called non-uniform (convention).
UNIFORMITY_ALPHA = 0.01


@dataclass(frozen=True)
class SBCSettings:
    """Settings of one SBC simulation.

    Attributes
    ----------
    n_draws : int
        L, posterior draws the true value is ranked among (thinned from the fit).
    levels : tuple of float
        Central credible-interval levels whose coverage is recorded.
    """

    n_draws: int = 99
    levels: tuple[float, ...] = COVERAGE_LEVELS


def _rank(draws: np.ndarray, truth: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    # Ties (a walker that did not move between thinned draws) are broken at random, as
    # Talts et al. (2018) prescribe, so a discrete tie cannot bias the histogram.
    below = (draws < truth).sum(axis=0)
    equal = (draws == truth).sum(axis=0)
    return below + rng.integers(0, equal + 1)


def _covered(draws: np.ndarray, truth: np.ndarray, levels) -> dict:
    out = {}
    for level in levels:
        lo, hi = np.quantile(draws, [(1 - level) / 2, (1 + level) / 2], axis=0)
        out[f"{level:.2f}"] = ((truth >= lo) & (truth <= hi)).tolist()
    return out


def sbc_task(problem, settings: SBCSettings, seed: np.random.SeedSequence) -> dict:
    """One SBC simulation: prior draw, simulated data, fit, ranks and coverage.

    Parameters
    ----------
    problem : object
        Has ``parameter_names``, ``draw_truth(rng)``, ``simulate(theta, rng)`` and
        ``posterior_draws(data, rng, n_draws) -> (draws (n_draws, P), diagnostics dict)``.
    settings : SBCSettings
    seed : numpy.random.SeedSequence

    Returns
    -------
    dict
        ``truth`` (P,), ``rank`` (P,) in 0..L, ``covered`` {level: (P,) bool},
        ``posterior_sd`` (P,), ``diagnostics``.
    """
    rng = np.random.default_rng(seed)
    truth = np.asarray(problem.draw_truth(rng), dtype=float)
    data = problem.simulate(truth, rng)
    draws, diagnostics = problem.posterior_draws(data, rng, settings.n_draws)
    draws = np.asarray(draws, dtype=float)
    return {"parameter_names": list(problem.parameter_names), "truth": truth,
            "rank": _rank(draws, truth, rng), "covered": _covered(draws, truth, settings.levels),
            "posterior_sd": draws.std(axis=0, ddof=1), "diagnostics": diagnostics}


def verdict_task(problem, generating_model: str, seed: np.random.SeedSequence) -> dict:
    """Simulate from ``generating_model`` and compute 2 ln B (alternative vs null).

    ``problem`` has ``model_names`` (null, alternative),
    ``simulate_from(model_name, rng) -> (data, {parameter: true value})`` and
    ``two_ln_bayes_factor(data, rng) -> (value, error)``.
    """
    rng = np.random.default_rng(seed)
    data, theta = problem.simulate_from(generating_model, rng)
    value, error = problem.two_ln_bayes_factor(data, rng)
    return {"generating_model": generating_model, "truth_names": list(theta),
            "truth": [float(v) for v in theta.values()],
            "two_ln_bayes_factor": float(value), "two_ln_bayes_factor_err": float(error)}


def calibration_tasks(problem, n_sims: int, seed: int, settings: SBCSettings,
                      verdict_problem=None, n_verdict: int = 0) -> list[Task]:
    """The task list of a calibration campaign.

    SBC simulation ``i`` uses seed child ``i``; verdict simulations from the null and the
    alternative use children ``1_000_000 + i`` and ``2_000_000 + i``, so adding simulations
    (or verdict runs) never changes the seeds of existing ones.
    """
    tasks = [Task(f"sbc_{i:06d}", sbc_task, (problem, settings, task_seed(seed, i)),
                  {"task": "sbc", "sim": i}) for i in range(n_sims)]
    if verdict_problem is not None and n_verdict > 0:
        for offset, role in ((1_000_000, "null"), (2_000_000, "alternative")):
            name = verdict_problem.model_names[0 if role == "null" else 1]
            tasks += [Task(f"verdict_{role}_{i:06d}", verdict_task,
                           (verdict_problem, name, task_seed(seed, offset + i)),
                           {"task": f"verdict_{role}", "sim": i}) for i in range(n_verdict)]
    return tasks


def choose_rank_bins(n_draws: int, n_sims: int, max_bins: int = 20) -> int:
    """Number of rank bins B: the largest divisor of L + 1 with B <= max_bins and N/B >= 5.

    Expected counts of at least 5 per bin keep the chi-square approximation usable
    (common practice, no source); B divides L + 1 so every bin spans the same ranks.
    """
    cap = max(2, min(max_bins, n_sims // 5))
    divisors = [b for b in range(2, cap + 1) if (n_draws + 1) % b == 0]
    return max(divisors) if divisors else 1


def rank_uniformity(ranks: np.ndarray, n_draws: int, rng: np.random.Generator,
                    n_bins: int | None = None) -> list[dict]:
    """Chi-square and KS uniformity tests of SBC ranks, per parameter.

    Parameters
    ----------
    ranks : ndarray, shape (N, P)
        Ranks in 0..L.
    n_draws : int
        L.
    rng : numpy.random.Generator
        For the randomised normalised ranks of the KS test.
    n_bins : int, optional
        B (must divide L + 1); default :func:`choose_rank_bins`.

    Returns
    -------
    list of dict
        Per parameter: n_bins, counts, chi2, chi2_dof, chi2_p, ks_stat, ks_p, uniform.
    """
    ranks = np.atleast_2d(np.asarray(ranks, dtype=int))
    n_sims = ranks.shape[0]
    n_bins = n_bins or choose_rank_bins(n_draws, n_sims)
    out = []
    for col in ranks.T:
        counts = np.bincount(col * n_bins // (n_draws + 1), minlength=n_bins)
        chi2, chi2_p = (stats.chisquare(counts) if n_bins > 1 else (np.nan, np.nan))
        u = (col + rng.uniform(size=col.size)) / (n_draws + 1)
        ks = stats.kstest(u, "uniform")
        out.append({"n_bins": n_bins, "counts": counts, "chi2": float(chi2),
                    "chi2_dof": n_bins - 1, "chi2_p": float(chi2_p), "ks_stat": float(ks.statistic),
                    "ks_p": float(ks.pvalue),
                    "uniform": bool(not (chi2_p < UNIFORMITY_ALPHA))})
    return out


def wilson_interval(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (Wilson 1927, JASA 22, 209).

    Returns ``(nan, nan)`` for ``n = 0``.
    """
    if n == 0:
        return (np.nan, np.nan)
    z = stats.norm.ppf(0.5 + level / 2)
    p = k / n
    centre = (p + z**2 / (2 * n)) / (1 + z**2 / n)
    half = z / (1 + z**2 / n) * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2))
    return (float(max(0.0, centre - half)), float(min(1.0, centre + half)))


def coverage_summary(covered: dict[str, np.ndarray]) -> dict[str, list[dict]]:
    """Coverage fraction and Wilson 95 % interval per level and parameter.

    Parameters
    ----------
    covered : dict
        level string -> bool array (N, P).
    """
    out = {}
    for level, flags in covered.items():
        flags = np.atleast_2d(np.asarray(flags, dtype=bool))
        rows = []
        for col in flags.T:
            lo, hi = wilson_interval(int(col.sum()), col.size)
            rows.append({"coverage": float(col.mean()), "lo": lo, "hi": hi})
        out[level] = rows
    return out


def verdict_rates(two_ln_b_null, two_ln_b_alt, threshold: float, null_name: str,
                  alt_name: str) -> list[dict]:
    """False-positive and detection rates at ``2 ln B > threshold``, with Wilson intervals.

    Also the rate at which the null is decisively favoured (``2 ln B < -threshold``) on each
    set, so that "undecided" is visible.
    """
    rows = []
    specs = (("false_positive", null_name, two_ln_b_null, 1),
             ("null_favoured_on_null", null_name, two_ln_b_null, -1),
             ("detection", alt_name, two_ln_b_alt, 1),
             ("null_favoured_on_alternative", alt_name, two_ln_b_alt, -1))
    for rate, model, values, sign in specs:
        values = np.asarray(values, dtype=float)
        k = int((sign * values > threshold).sum())
        lo, hi = wilson_interval(k, values.size)
        rows.append({"rate": rate, "generating_model": model, "threshold": threshold,
                     "n_sims": int(values.size), "n_events": k,
                     "value": k / values.size if values.size else np.nan,
                     "wilson95_lo": lo, "wilson95_hi": hi})
    return rows
