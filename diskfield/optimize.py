"""Multi-start maximum-likelihood search over a model's prior support.

The search runs in an unconstrained space ``z = logit(u)``, where ``u`` is the unit-cube
coordinate of the model's ``prior_transform``: every ``z`` maps inside the prior support,
the scale of each parameter is set by its prior, and bounds never need special handling.
Starting points are the best of a vectorised batch of prior draws (one cheap call),
each then polished by Nelder–Mead.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

__all__ = ["Optimum", "maximize_likelihood", "unit_to_theta"]

# Keep u away from 0 and 1 so logit(u) stays finite and ppf stays inside open supports.
_U_EPS = 1e-9


@dataclass(frozen=True)
class Optimum:
    """Result of :func:`maximize_likelihood`.

    Attributes
    ----------
    theta : ndarray, shape (P,)
        Parameter vector with the highest log-likelihood found.
    log_likelihood : float
        ln L at ``theta`` (natural log).
    u : ndarray, shape (P,)
        Unit-cube coordinates of ``theta`` (inside the ordered region of a label ordering,
        where ``prior_transform`` is one-to-one).
    starts : ndarray, shape (n_starts, P)
        Polished optimum of every start (best first).
    start_log_likelihoods : ndarray, shape (n_starts,)
        ln L of each polished start, descending.
    n_calls : int
        Likelihood evaluations used (batch rows counted individually).
    """

    theta: np.ndarray
    log_likelihood: float
    u: np.ndarray
    starts: np.ndarray
    start_log_likelihoods: np.ndarray
    n_calls: int


def unit_to_theta(model, u) -> np.ndarray:
    """Map unit-cube points ``u`` (shape (W, P)) to parameters via the model's priors."""
    u = np.clip(np.atleast_2d(np.asarray(u, float)), _U_EPS, 1 - _U_EPS)
    return np.atleast_2d(model.prior_transform(u))


def _objective(model, counter):
    def negloglike(z):
        counter[0] += 1
        value = model.log_likelihood(unit_to_theta(model, special.expit(z)))[0]
        # Nelder-Mead copes with a large finite penalty better than with inf.
        return -value if np.isfinite(value) else 1e300
    return negloglike


def maximize_likelihood(model, rng: np.random.Generator, *, n_starts: int = 3,
                        n_screen: int = 256, max_evals: int | None = None) -> Optimum:
    """Find the maximum of ``model.log_likelihood`` by multi-start Nelder–Mead.

    Parameters
    ----------
    model : Model
        Any object with ``prior_transform`` and vectorised ``log_likelihood``.
    rng : numpy.random.Generator
        Source of the screening draws.
    n_starts : int
        Number of local searches, started from the best screening draws.
    n_screen : int
        Prior draws evaluated in one vectorised call to choose the starts.
    max_evals : int, optional
        Likelihood evaluations per local search (default ``100 * P``; the chain, not the
        optimiser, explores the posterior, so a good start is enough).

    Returns
    -------
    Optimum
    """
    n_params = len(model.parameter_names)
    u0 = rng.uniform(_U_EPS, 1 - _U_EPS, size=(n_screen, n_params))
    screen = np.asarray(model.log_likelihood(unit_to_theta(model, u0)), float)
    screen = np.where(np.isfinite(screen), screen, -np.inf)
    order = np.argsort(-screen)[:max(1, n_starts)]
    counter = [n_screen]
    fun = _objective(model, counter)
    max_evals = max_evals or 100 * n_params
    found = []
    for start in u0[order]:
        res = optimize.minimize(fun, special.logit(start), method="Nelder-Mead",
                                options={"maxfev": max_evals, "xatol": 1e-6, "fatol": 1e-7})
        found.append((-float(res.fun), special.expit(res.x)))
    found.sort(key=lambda item: -item[0])
    u_best = np.array([f[1] for f in found])
    ordering = getattr(model, "ordering", None)
    if ordering is not None and ordering.applied:
        # prior_transform folds any u onto the ordered prior; u itself is mapped there too
        u_best = ordering.sort(u_best)
    values = np.array([f[0] for f in found])
    thetas = unit_to_theta(model, u_best)
    return Optimum(theta=thetas[0], log_likelihood=float(values[0]), u=u_best[0],
                   starts=thetas, start_log_likelihoods=values, n_calls=counter[0])
