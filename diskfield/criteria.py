"""Information criteria and their differences.

Scales and directions (stated in every column name downstream):

* ``max_log_likelihood``: ln L̂, natural log, higher is better.
* ``aic = 2 k − 2 ln L̂`` (Akaike 1974), ``bic = k ln n − 2 ln L̂`` (Schwarz 1978):
  deviance scale, lower is better. ``k`` is the number of *sampled* parameters
  (``fixed`` priors do not count) and ``n`` the number of *included records* — the
  observations the likelihood multiplies — not the number of bodies. With body-shared
  nuisance terms records are not independent, so BIC's ``n`` is an upper bound on the
  effective sample size; BIC is reported as customary, the evidence is the Bayesian answer.
* ``waic``, ``elpd_loo``: expected log pointwise predictive density with the parent
  body as the unit (Watanabe 2010; Vehtari, Gelman & Gabry 2017), natural-log scale,
  higher is better. ``waic`` is reported on the elpd scale too (not × −2).
"""
from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from . import azadapter

__all__ = ["aic", "bic", "Criteria", "compute_criteria", "elpd_difference",
           "PARETO_K_FLAG"]

#: Pareto k above which a body's PSIS-LOO estimate is unreliable (Vehtari, Gelman &
#: Gabry 2017, Stat. Comput. 27, 1413).
PARETO_K_FLAG = 0.7


def aic(max_log_likelihood: float, k: int) -> float:
    """Akaike information criterion ``2 k − 2 ln L̂`` (lower is better)."""
    return 2.0 * k - 2.0 * float(max_log_likelihood)


def bic(max_log_likelihood: float, k: int, n: int) -> float:
    """Bayesian information criterion ``k ln n − 2 ln L̂`` (lower is better).

    Parameters
    ----------
    max_log_likelihood : float
        ln L̂ (natural log).
    k : int
        Number of sampled parameters.
    n : int
        Number of included records.
    """
    if n < 1:
        raise ValueError(f"BIC needs at least one record; got n={n}")
    return k * np.log(n) - 2.0 * float(max_log_likelihood)


@dataclass(frozen=True)
class Criteria:
    """Every criterion of one fitted model (see module docstring for scales)."""

    n_params: int
    n_records: int
    n_bodies: int
    max_log_likelihood: float
    aic: float
    bic: float
    waic: float
    waic_se: float
    p_waic: float
    elpd_loo: float
    elpd_loo_se: float
    p_loo: float
    pareto_k: tuple
    pareto_k_max: float
    pareto_k_threshold: float
    n_bad_k: int
    bad_k_bodies: tuple
    elpd_loo_i: tuple
    rhat: dict
    ess_bulk: dict
    #: Exact leave-one-body-out refits (:mod:`diskfield.loorefit`); empty when not requested.
    #: When bodies were refitted, ``elpd_loo``, ``elpd_loo_se``, ``p_loo`` and
    #: ``elpd_loo_i`` hold the corrected values and this holds the PSIS ones.
    loo_refit: dict = field(default_factory=dict)

    @property
    def rhat_max(self) -> float:
        return float(max(self.rhat.values())) if self.rhat else float("nan")

    @property
    def ess_min(self) -> float:
        return float(min(self.ess_bulk.values())) if self.ess_bulk else float("nan")

    def as_dict(self) -> dict:
        d = asdict(self)
        if not d["loo_refit"]:
            del d["loo_refit"]
        d.update(rhat_max=self.rhat_max, ess_min=self.ess_min)
        return d


def compute_criteria(idata, *, max_log_likelihood: float, n_params: int, n_records: int,
                     body_names) -> Criteria:
    """All criteria of one fit from its InferenceData and its maximum log-likelihood.

    Parameters
    ----------
    idata : arviz.InferenceData
        With ``posterior`` and per-body ``log_likelihood`` groups.
    max_log_likelihood : float
        ln L̂ from the multi-start optimiser (or the best draw, whichever is higher).
    n_params, n_records : int
        ``k`` and ``n`` of AIC/BIC.
    body_names : sequence of str
    """
    loo = azadapter.psis_loo(idata)
    w = azadapter.waic(idata)
    diag = azadapter.rhat_ess(idata)
    n_draws = int(np.prod(azadapter.pointwise_log_likelihood(idata).shape[:2]))
    k = loo["pareto_k"]
    bad = tuple(str(b) for b, kk in zip(body_names, k) if kk > PARETO_K_FLAG)
    return Criteria(
        n_params=n_params, n_records=n_records, n_bodies=len(body_names),
        max_log_likelihood=float(max_log_likelihood),
        aic=aic(max_log_likelihood, n_params), bic=bic(max_log_likelihood, n_params, n_records),
        waic=w["elpd_waic"], waic_se=w["se"], p_waic=w["p_waic"],
        elpd_loo=loo["elpd_loo"], elpd_loo_se=loo["se"], p_loo=loo["p_loo"],
        pareto_k=tuple(float(x) for x in k), pareto_k_max=float(np.max(k)),
        pareto_k_threshold=azadapter.pareto_k_threshold(n_draws),
        n_bad_k=len(bad), bad_k_bodies=bad, elpd_loo_i=tuple(float(x) for x in loo["elpd_i"]),
        rhat={n: v[0] for n, v in diag.items()}, ess_bulk={n: v[1] for n, v in diag.items()})


def elpd_difference(elpd_i_a, elpd_i_b) -> tuple[float, float]:
    """Difference of pointwise elpd (a − b) and its standard error.

    ``se = sqrt(n · Var(d_i))`` over the n bodies (Vehtari, Gelman & Gabry 2017, eq. 24).

    Returns
    -------
    (float, float)
        Δelpd (natural log; positive favours ``a``) and its SE.
    """
    d = np.asarray(elpd_i_a, float) - np.asarray(elpd_i_b, float)
    if d.size < 2:
        return float(d.sum()), float("nan")
    return float(d.sum()), float(np.sqrt(d.size * np.var(d, ddof=1)))
