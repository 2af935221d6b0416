"""Recording model: closed forms for the spin projection and the per-record error budget.

A record's log value is ``y = ln B + ln u + ln e + ln c + noise``. Every Gaussian log term
(measurement error, recording fraction, calibration by method and remanence type, intrinsic
scatter) adds into one variance ``S^2`` and one offset ``m``; the spin projection
``u = |cos theta|`` enters through ``X = -ln u``, which is Exponential(1) for an isotropic
spin axis (``u ~ Uniform(0, 1)``, so ``P(X > x) = P(u < e^-x) = e^-x``; derived).

With ``d = ln B - z`` (``z = y - m``), the density of a detection marginalised over X is the
exponentially modified Gaussian (EMG) density of ``D = X + N(0, V)`` at ``d``::

    p(d) = exp(-d + V/2) Phi((d - V) / sqrt(V))

(complete the square in ``int_0^inf e^-X N(X; d, V) dX``; derived), and a censored record
(upper limit) has probability ``P(D > d) = Phi(-d / sqrt V) + p(d)``. Both are evaluated in
logs with ``scipy.special.log_ndtr``, which stays accurate in both tails (the ``erfcx`` form
overflows in one tail; see LIBRARIES.md).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .errors import PriorFileError

__all__ = [
    "LN_SQRT_2PI",
    "emg_logpdf",
    "emg_logcdf",
    "emg_logsf",
    "normal_logpdf",
    "RecordTerms",
    "record_terms",
]

LN_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)


def normal_logpdf(x, mean, var):
    """ln N(x; mean, var) (any broadcastable arrays; var > 0)."""
    r = x - mean
    return -0.5 * r * r / var - 0.5 * np.log(var) - LN_SQRT_2PI


def emg_logpdf(d, var):
    """Log density of ``D = X + N(0, var)``, ``X ~ Exponential(1)``, at ``d``.

    Parameters
    ----------
    d : array_like
        Point (natural-log units): ln B - z, the model log field minus the corrected log value.
    var : array_like
        Gaussian variance V (natural-log units squared), > 0.

    Returns
    -------
    ndarray
        ``-d + V/2 + log_ndtr((d - V)/sqrt(V))``; finite for finite input.
    """
    sd = np.sqrt(var)
    return -d + 0.5 * var + special.log_ndtr((d - var) / sd)


def emg_logsf(d, var):
    """Log survival function ``ln P(D > d)`` of the EMG (censored upper limit).

    Parameters
    ----------
    d : array_like
        Point (natural-log units).
    var : array_like
        Gaussian variance V, > 0.

    Returns
    -------
    ndarray
        ``ln[Phi(-d/sqrt V) + exp(-d + V/2) Phi((d - V)/sqrt V)]``, a sum of two positive
        terms, so no cancellation in either tail.
    """
    sd = np.sqrt(var)
    return np.logaddexp(special.log_ndtr(-d / sd), emg_logpdf(d, var))


def emg_logcdf(d, var):
    """Log CDF ``ln P(D <= d)`` of the EMG.

    Parameters
    ----------
    d : array_like
        Point (natural-log units).
    var : array_like
        Gaussian variance V, > 0.

    Returns
    -------
    ndarray
        ``ln[Phi(d/sqrt V) - exp(-d + V/2) Phi((d - V)/sqrt V)]``.

    Notes
    -----
    The difference is taken as ``ln Phi(d/s) + log1p(-exp(ln p - ln Phi(d/s)))``; where the
    CDF is close to 1 the complement ``log1p(-exp(logsf))`` is used instead.
    """
    d, var = np.broadcast_arrays(np.asarray(d, float), np.asarray(var, float))
    sd = np.sqrt(var)
    log_phi = special.log_ndtr(d / sd)
    ratio = np.minimum(emg_logpdf(d, var) - log_phi, 0.0)
    with np.errstate(divide="ignore"):
        lower = log_phi + np.log(-np.expm1(np.minimum(ratio, -1e-300)))
        upper = np.log1p(-np.exp(np.minimum(emg_logsf(d, var), -1e-300)))
    return np.where(d > 1.0 + var, upper, lower)


@dataclass(frozen=True)
class RecordTerms:
    """Per-record offset and variance of the recording model (arrays of length n_records).

    Attributes
    ----------
    z : ndarray
        Corrected log value ``ln(value/uT) - E[ln e] - E[ln c]`` (natural-log units).
    var_fixed : ndarray
        ``ln_err^2 + ln_fraction_sd^2 + sigma_method^2 + sigma_remanence^2`` (without the
        intrinsic scatter, which is a sampled parameter).
    offset : ndarray
        ``E[ln e] + E[ln c]`` subtracted from ``ln_value`` (natural-log units).
    """

    z: np.ndarray
    var_fixed: np.ndarray
    offset: np.ndarray


def _lognormal_terms(labels, table, kind: str):
    """Mean and variance of ln c for each label (blank label: 0, 0)."""
    mean = np.zeros(len(labels))
    var = np.zeros(len(labels))
    for name in sorted(set(labels) - {""}):
        if name not in table:
            raise PriorFileError(f"no [{kind}.{name}] prior in the prior files; records use "
                                 f"{kind} {name!r}; defined: {', '.join(sorted(table)) or 'none'}")
        prior = table[name]
        sel = np.asarray(labels) == name
        if prior.is_fixed:
            mean[sel] = np.log(prior.value)
        elif prior.family == "log_normal":
            mean[sel], var[sel] = np.log(prior.median), prior.ln_sd ** 2
        else:
            raise PriorFileError(f"[{kind}.{name}]: family {prior.family!r} is not supported "
                                 "for a calibration factor; valid: log_normal, fixed")
    return mean, var


def record_terms(records, calibration, remanence) -> RecordTerms:
    """Assemble each record's offset and fixed variance from its columns and the priors.

    Parameters
    ----------
    records : diskfield.records.Records
        The included records.
    calibration, remanence : mapping of str to Prior
        ``PriorSet.calibration`` (by method) and ``PriorSet.remanence`` (by remanence type);
        each ``log_normal`` (median, ln_sd) or ``fixed`` (value).

    Returns
    -------
    RecordTerms

    Raises
    ------
    PriorFileError
        A method or remanence type used by a record has no prior, or an unsupported family.
    """
    m_mean, m_var = _lognormal_terms(records.method, calibration, "calibration")
    k_mean, k_var = _lognormal_terms(records.remanence, remanence, "remanence")
    offset = np.asarray(records.ln_fraction_mean, float) + m_mean + k_mean
    var = (np.asarray(records.ln_err, float) ** 2 + np.asarray(records.ln_fraction_sd, float) ** 2
           + m_var + k_var)
    return RecordTerms(z=np.asarray(records.ln_value, float) - offset, var_fixed=var,
                       offset=offset)
