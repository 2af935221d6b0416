"""Information criteria: AIC/BIC formulas, PSIS-LOO and WAIC through the ArviZ adapter
against brute-force leave-one-out on a conjugate Gaussian toy."""
from __future__ import annotations

import numpy as np
import pytest

from diskfield import azadapter
from diskfield.criteria import aic, bic, compute_criteria, elpd_difference

SIGMA, PRIOR_SD = 1.0, 2.0


def test_aic_bic_formulas():
    # AIC = 2k - 2 ln L (Akaike 1974, IEEE TAC 19, 716); BIC = k ln n - 2 ln L (Schwarz 1978,
    # Ann. Stat. 6, 461)
    assert aic(-10.0, 3) == pytest.approx(26.0)
    assert bic(-10.0, 3, 20) == pytest.approx(3 * np.log(20) + 20.0)
    with pytest.raises(ValueError, match="at least one record"):
        bic(-1.0, 1, 0)


def test_elpd_difference_and_se():
    # se = sqrt(n Var(d)) (Vehtari, Gelman & Gabry 2017, Stat. Comput. 27, 1413, eq. 24)
    diff, se = elpd_difference([1.0, 2.0, 3.0], [0.0, 0.0, 0.0])
    assert diff == pytest.approx(6.0) and se == pytest.approx(np.sqrt(3.0))


def _posterior(y):
    # conjugate normal with known sigma (Gelman et al. 2013, BDA3 §2.5)
    var = 1.0 / (1.0 / PRIOR_SD ** 2 + len(y) / SIGMA ** 2)
    return var * np.sum(y) / SIGMA ** 2, var


def _logpdf(x, mean, var):
    return -0.5 * (x - mean) ** 2 / var - 0.5 * np.log(2 * np.pi * var)


def _toy_idata(y, seed=1, n_chain=4, n_draw=1000):
    mean, var = _posterior(y)
    mu = np.random.default_rng(seed).normal(mean, np.sqrt(var), size=(n_chain, n_draw))
    pointwise = _logpdf(y[None, None, :], mu[..., None], SIGMA ** 2)
    idata = azadapter.make_inference_data(mu[..., None], ["field_1au"], pointwise,
                                          lp=pointwise.sum(-1),
                                          body_names=[f"b{i}" for i in range(len(y))])
    return idata, mu, pointwise


def _exact_loo(y):
    total = 0.0
    for g in range(len(y)):
        mean, var = _posterior(np.delete(y, g))
        total += _logpdf(y[g], mean, SIGMA ** 2 + var)  # posterior predictive, BDA3 §2.5
    return total


Y = np.array([0.3, -0.8, 1.1, 0.4, 2.2, -0.1, 0.9, 0.5])


def test_psis_loo_matches_brute_force_loo():
    idata, _, pointwise = _toy_idata(Y)
    loo = azadapter.psis_loo(idata)
    # Monte Carlo error of the importance-sampling estimate, by the delta method on the
    # ratios 1/p(y_g | mu_s) (common practice, no source)
    r = np.exp(-pointwise.reshape(-1, len(Y)))
    mc_se = np.sqrt(np.sum((r.std(axis=0) / r.mean(axis=0)) ** 2 / r.shape[0]))
    assert abs(loo["elpd_loo"] - _exact_loo(Y)) < 5 * mc_se
    assert loo["pareto_k"].shape == (len(Y),) and np.all(loo["pareto_k"] < 0.7)
    assert loo["p_loo"] == pytest.approx(1.0, abs=0.5)  # one parameter


def test_waic_matches_its_definition():
    idata, _, pointwise = _toy_idata(Y)
    w = azadapter.waic(idata)
    flat = pointwise.reshape(-1, len(Y))
    # Watanabe (2010, JMLR 11, 3571): lppd - sum of posterior variances of the log density
    lppd = np.sum(np.log(np.mean(np.exp(flat), axis=0)))
    # (ArviZ divides the variance by S, not S - 1; the two differ by a factor 1 + 1/S)
    p_waic = np.sum(np.var(flat, axis=0, ddof=0))
    assert w["elpd_waic"] == pytest.approx(lppd - p_waic, abs=1e-8)
    assert w["p_waic"] == pytest.approx(p_waic, abs=1e-8)
    # asymptotically equivalent to leave-one-out (Watanabe 2010); loose check
    assert abs(w["elpd_waic"] - _exact_loo(Y)) < 0.5


def test_compute_criteria_flags_an_outlying_body():
    y = np.append(Y, 9.0)  # a body 9 sigma away: its importance weights are heavy-tailed
    idata, mu, _ = _toy_idata(y)
    crit = compute_criteria(idata, max_log_likelihood=-20.0, n_params=1, n_records=12,
                            body_names=[f"b{i}" for i in range(len(y))])
    assert crit.pareto_k_max == pytest.approx(max(crit.pareto_k))
    assert crit.bad_k_bodies == tuple(f"b{i}" for i, k in enumerate(crit.pareto_k) if k > 0.7)
    assert "b8" in crit.bad_k_bodies
    assert crit.bic == pytest.approx(np.log(12) + 40.0)  # n = records, not bodies
    # newer sample-size rule: min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024, JMLR, from memory)
    assert crit.pareto_k_threshold == pytest.approx(min(1 - 1 / np.log10(4000), 0.7))
    assert set(crit.rhat) == {"field_1au"} and crit.rhat_max < 1.01
    assert crit.ess_min > 1000
