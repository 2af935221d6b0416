"""Small helpers shared by the likelihood's steady and aged parts."""
from __future__ import annotations

import importlib

import numpy as np

from .errors import PriorFileError
from .recording import LN_SQRT_2PI


def load_kernel(current, name):
    """A compiled-kernel module, imported on first use: ``current`` unless it is ``...`` (not
    tried yet), then ``diskfield.<name>``, or None when numba cannot be used (the array code
    then runs). Each caller keeps the result in its own module global, which tests set to
    None to compare the two implementations; numba's import (~0.3 s) is paid only by
    commands that evaluate a likelihood."""
    if current is not ...:
        return current
    try:
        return importlib.import_module(f"diskfield.{name}")
    except Exception:  # pragma: no cover - numba is a declared dependency
        return None


def _finite_support(prior, what):
    lo, hi = prior.support
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        raise PriorFileError(f"{what}: the prior {prior.describe()} must have a finite support "
                             "(use uniform, log_uniform, truncated_normal or half_normal with high)")
    return lo, hi


def _expand(p, extra_dims):
    return {k: np.reshape(v, (-1,) + (1,) * extra_dims) for k, v in p.items()}


def _detection_stats(z, var, det):
    """Precision-weighted mean, variance V and ln K of each body's detections (W, G).

    Notes
    -----
    prod_i N(z_i; mu, S_i^2) = K N(zbar; mu, V), V = 1/sum S_i^-2, zbar = V sum z_i/S_i^2,
    ln K = -1/2 sum ln(2 pi S_i^2) + 1/2 ln(2 pi V) - 1/2 sum (z_i - zbar)^2 / S_i^2 (derived).
    Bodies without detections get V = inf, zbar = 0, ln K = 0.
    """
    prec = np.where(det, 1.0 / var, 0.0)
    tot = prec.sum(axis=-1)
    has = tot > 0
    v = np.where(has, 1.0 / np.where(has, tot, 1.0), np.inf)
    zbar = np.where(has, (prec * z).sum(axis=-1) * np.where(has, v, 0.0), 0.0)
    resid = np.where(det, z - zbar[..., None], 0.0)
    ln_k = (-0.5 * np.where(det, np.log(var), 0.0).sum(axis=-1) - LN_SQRT_2PI * det.sum(axis=-1)
            + np.where(has, 0.5 * np.log(np.where(has, v, 1.0)) + LN_SQRT_2PI, 0.0)
            - 0.5 * (prec * resid * resid).sum(axis=-1))
    return zbar, v, ln_k
