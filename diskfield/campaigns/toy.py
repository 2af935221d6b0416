"""An analytic reference problem for campaigns: the conjugate Gaussian mean.

Data ``y_k ~ Normal(mu, sigma^2)`` (k = 1..n) with prior ``mu ~ Normal(m0, s0^2)`` have the
posterior ``Normal(m_n, s_n^2)``, ``1/s_n^2 = 1/s0^2 + n/sigma^2``,
``m_n = s_n^2 (m0/s0^2 + sum(y)/sigma^2)`` (common practice, no source: the textbook
conjugate update), so its "fit" is exact sampling and simulation-based calibration must
give uniform ranks. Simulating with ``noise_scale != 1`` while fitting with ``sigma``
is a deliberately misspecified model. The nested pair "mu = m0" vs "mu free" has closed-form
evidences, so verdict rates can be checked too. Tests and benchmarks of the campaign
machinery use it; it has nothing to do with disks.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

__all__ = ["ConjugateGaussian"]


@dataclass(frozen=True)
class ConjugateGaussian:
    """Gaussian mean with known noise and a Gaussian prior (an SBC and verdict problem).

    Attributes
    ----------
    n_obs : int
        Observations per simulated data set.
    sigma : float
        Noise standard deviation assumed by the fit (data units).
    prior_mean, prior_sd : float
        Prior of ``mu`` (data units).
    noise_scale : float
        Simulation noise is ``noise_scale * sigma``; 1 is the correct model.
    delay_s : float
        Seconds each "fit" waits, to stand in for a real fit's cost (tests of interruption).
    """

    n_obs: int = 8
    sigma: float = 1.0
    prior_mean: float = 0.0
    prior_sd: float = 1.0
    noise_scale: float = 1.0
    delay_s: float = 0.0

    parameter_names = ("mu",)
    model_names = ("fixed_mean", "free_mean")

    def draw_truth(self, rng: np.random.Generator) -> np.ndarray:
        """A parameter vector from the prior, shape (1,)."""
        return np.array([rng.normal(self.prior_mean, self.prior_sd)])

    def simulate(self, theta: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Observations (n_obs,) given ``theta = [mu]``."""
        return theta[0] + self.noise_scale * self.sigma * rng.standard_normal(self.n_obs)

    def posterior_draws(self, data: np.ndarray, rng: np.random.Generator, n_draws: int):
        """Independent exact posterior draws (n_draws, 1) and an empty diagnostics dict."""
        if self.delay_s > 0:
            time.sleep(self.delay_s)
        precision = 1.0 / self.prior_sd**2 + data.size / self.sigma**2
        mean = (self.prior_mean / self.prior_sd**2 + data.sum() / self.sigma**2) / precision
        draws = mean + rng.standard_normal((n_draws, 1)) / np.sqrt(precision)
        return draws, {"converged": True}

    def simulate_from(self, model_name: str, rng: np.random.Generator):
        """Data and true parameters ({name: value}) from ``fixed_mean`` or ``free_mean``."""
        theta = (np.array([self.prior_mean]) if model_name == "fixed_mean"
                 else self.draw_truth(rng))
        return self.simulate(theta, rng), {"mu": float(theta[0])}

    def two_ln_bayes_factor(self, data: np.ndarray, rng: np.random.Generator):
        """2 ln B of ``free_mean`` against ``fixed_mean`` (exact) and its error (0)."""
        return 2.0 * (self._ln_z(data, self.prior_sd) - self._ln_z(data, 0.0)), 0.0

    def _ln_z(self, data: np.ndarray, prior_sd: float) -> float:
        # Marginal of y: Normal(m0 1, sigma^2 I + prior_sd^2 1 1^T); determinant and inverse
        # by the matrix determinant lemma and Sherman-Morrison (common practice, no source).
        n, s2, v = data.size, self.sigma**2, prior_sd**2
        resid = data - self.prior_mean
        quad = resid @ resid / s2 - v * resid.sum() ** 2 / (s2 * (s2 + n * v))
        logdet = n * np.log(s2) + np.log1p(n * v / s2)
        return float(-0.5 * (quad + logdet + n * np.log(2 * np.pi)))
