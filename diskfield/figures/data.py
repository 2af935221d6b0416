"""Figure inputs computed from a saved run: record-implied fields, body distances, bands.

Record-implied ambient field (what the profile figures plot for each record)
--------------------------------------------------------------------------
The recording model (DESIGN §4) says a record's value is ``P = B · u · e · c`` with ``u`` the
spin projection, ``e`` the recording fraction and ``c`` the calibration (method × remanence).
Removing the recording terms, ``ln B = ln P − ln e − ln c − ln u``. With ``ln P``, ``ln e``,
``ln c`` Gaussian (measurement error, recording-fraction and calibration priors) and
``−ln u ~ Exponential(1)`` for an isotropic spin axis (derived: ``u = |cos θ| ~ Uniform(0, 1)``),
``ln B`` follows an exponentially modified Gaussian. We plot its median and its 16th–84th
percentiles (an asymmetric bar) — exact quantiles, no sampling. With ``spin = "none"`` the
exponential term is absent; a user obliquity prior is approximated by the isotropic one (the
caption says so). This is the *prior* spread of the recording terms given the record, not a
posterior conditioned on the other records of the body.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = [
    "RecordPoint",
    "BodyPoint",
    "Bands",
    "implied_field_quantiles",
    "record_points",
    "body_points_from_prior",
    "body_points_from_posterior",
    "bands_from_draws",
    "bands_from_profile_rows",
]

_PCTS = (2.5, 16.0, 50.0, 84.0, 97.5)


@dataclass(frozen=True)
class RecordPoint:
    """One fitted record as drawn in the figures.

    Attributes
    ----------
    record, body, reservoir : str
    is_limit : bool
        True for an upper limit (drawn as a downward arrow).
    value_ut : float
        Record value as reported after dividing out any applied spin factor [uT].
    implied_ut : tuple of float
        Record-implied ambient field: (16th, 50th, 84th) percentiles [uT] (module docstring).
    age_myr : tuple of float
        (low, central, high) age [Myr after CAI formation]: ±1 sigma, the window's ends, or
        the reservoir default window when the record gives none.
    """

    record: str
    body: str
    reservoir: str
    is_limit: bool
    value_ut: float
    implied_ut: tuple[float, float, float]
    age_myr: tuple[float, float, float]


@dataclass(frozen=True)
class BodyPoint:
    """A parent body's formation distance: (16th, 50th, 84th) percentiles [AU] and its source."""

    body: str
    reservoir: str
    distance_au: tuple[float, float, float]
    source: str  # "posterior" or "prior"


@dataclass(frozen=True)
class Bands:
    """Posterior field quantiles on a grid.

    Attributes
    ----------
    x : ndarray
        Grid (distance [AU] or time [Myr]).
    q : ndarray, shape (5, len(x))
        Field percentiles 2.5, 16, 50, 84, 97.5 [uT].
    """

    x: np.ndarray
    q: np.ndarray


def implied_field_quantiles(ln_value, ln_sd, spin: str = "body", pct=(16.0, 50.0, 84.0)):
    """Percentiles of the record-implied ambient field (module docstring).

    Parameters
    ----------
    ln_value : float
        ln(P / uT) minus the log-means of recording fraction and calibration.
    ln_sd : float
        Combined Gaussian sd of ln P, ln e and ln c (natural-log units).
    spin : str
        ``"none"`` drops the spin term; anything else uses the isotropic one.
    pct : tuple of float
        Percentiles (0–100).

    Returns
    -------
    ndarray
        Field percentiles [uT].
    """
    q = np.asarray(pct, float) / 100.0
    if spin == "none":
        ln_b = ln_value + (ln_sd * stats.norm.ppf(q) if ln_sd > 0 else 0.0 * q)
    elif ln_sd > 1e-9:
        # ln B = N(ln_value, ln_sd^2) + Exp(1): scipy's exponnorm with K = 1 / (lambda sd)
        ln_b = stats.exponnorm.ppf(q, 1.0 / ln_sd, loc=ln_value, scale=ln_sd)
    else:
        ln_b = ln_value + stats.expon.ppf(q)
    return np.exp(ln_b)


def _ln_moments(prior) -> tuple[float, float]:
    """ln-mean and ln-sd of a calibration prior (log_normal or fixed; None -> no term)."""
    if prior is None:
        return 0.0, 0.0
    if prior.family == "fixed":
        return math.log(prior.value), 0.0
    if prior.family == "log_normal":
        return math.log(prior.median), prior.ln_sd
    raise ValueError(f"calibration prior family {prior.family!r} unsupported in figures; "
                     "valid: log_normal, fixed")


def _float(row, name, default=math.nan) -> float:
    if name not in row.colnames:
        return default
    v = row[name]
    if np.ma.is_masked(v):
        return default
    try:
        v = float(v)
    except (TypeError, ValueError):
        return default
    return default if math.isnan(v) else v


def _text(row, name) -> str:
    if name not in row.colnames or np.ma.is_masked(row[name]):
        return ""
    return str(row[name]).strip()


def _recording_moments(row, calibration, remanence) -> tuple[float, float]:
    mu, var = 0.0, 0.0
    for table, key in ((calibration, "method"), (remanence, "remanence")):
        m, s = _ln_moments(table.get(_text(row, key)))
        mu, var = mu + m, var + s * s
    frac = _float(row, "recording_fraction", 1.0)
    frac_err = _float(row, "recording_fraction_err", 0.0)
    mu += math.log(frac)
    var += (frac_err / frac) ** 2
    return mu, var


def _age(row, age_windows, reservoir) -> tuple[float, float, float]:
    age, err = _float(row, "age"), _float(row, "age_err", 0.0)
    if not math.isnan(age):
        return (age - err, age, age + err)
    lo, hi = _float(row, "age_min"), _float(row, "age_max")
    if math.isnan(lo) or math.isnan(hi):
        prior = age_windows.get(reservoir)
        if prior is None:
            return (math.nan,) * 3
        lo, hi = (float(x) for x in prior.ppf(np.array([0.0, 1.0])))
    return (lo, 0.5 * (lo + hi), hi)


def _is_fitted(row) -> bool:
    if "include" not in row.colnames:
        return True
    return str(row["include"]).strip().lower() not in ("false", "0", "no")


def record_points(table, calibration: dict, remanence: dict, age_windows: dict,
                  spin: str = "body") -> list[RecordPoint]:
    """Record-implied fields and ages of every fitted record.

    Parameters
    ----------
    table : astropy.table.Table
        The compilation as read (``compilation.ecsv``; paleointensity in uT, ages in Myr).
    calibration, remanence : dict of str -> Prior
        Calibration priors by method and remanence type (log_normal or fixed).
    age_windows : dict of str -> Prior
        Default age window by reservoir [Myr].
    spin : str
        The fit's spin treatment (``body``, ``record``, ``none``).

    Returns
    -------
    list of RecordPoint
    """
    points = []
    for row in table:
        if not _is_fitted(row):
            continue
        value = _float(row, "paleointensity") / _float(row, "spin_factor_applied", 1.0)
        err = _float(row, "paleointensity_err", 0.0)
        ln_err = _float(row, "ln_err", err / value if value > 0 else 0.0)
        mu, var = _recording_moments(row, calibration, remanence)
        q = implied_field_quantiles(math.log(value) - mu, math.sqrt(var + ln_err ** 2), spin)
        reservoir = _text(row, "reservoir")
        points.append(RecordPoint(_text(row, "record"), _text(row, "body"), reservoir,
                                  _text(row, "kind") == "upper_limit", value,
                                  tuple(float(x) for x in q), _age(row, age_windows, reservoir)))
    return points


def body_points_from_prior(table, reservoirs: dict) -> list[BodyPoint]:
    """Body distances from the distance prior (per-body override, else the reservoir's).

    Parameters
    ----------
    table : astropy.table.Table
        The compilation as read.
    reservoirs : dict of str -> Prior
        Distance prior of each reservoir [AU].

    Returns
    -------
    list of BodyPoint
        One per body with a fitted record, in order of first appearance.
    """
    points, seen = [], set()
    for row in table:
        body = _text(row, "body")
        if body in seen or not _is_fitted(row):
            continue
        seen.add(body)
        reservoir = _text(row, "reservoir")
        lo, hi = _float(row, "distance_min"), _float(row, "distance_max")
        if not (math.isnan(lo) or math.isnan(hi)):
            q = (lo + 0.16 * (hi - lo), 0.5 * (lo + hi), lo + 0.84 * (hi - lo))
        else:
            q = tuple(float(x) for x in reservoirs[reservoir].ppf(np.array([0.16, 0.5, 0.84])))
        points.append(BodyPoint(body, reservoir, q, "prior"))
    return points


def _weighted_quantiles(x, w, q) -> np.ndarray:
    """Quantiles of a weighted sample, interpolating between weight midpoints (Hazen-type)."""
    keep = w > 0
    x, w = x[keep], w[keep]
    order = np.argsort(x, kind="stable")
    x, w = x[order], w[order] / w.sum()
    return np.interp(q, np.cumsum(w) - 0.5 * w, x)


def body_points_from_posterior(r_nodes, weights, names, reservoirs) -> list[BodyPoint]:
    """Body distances pooled over posterior draws of ``model.body_distance_posterior``.

    Parameters
    ----------
    r_nodes, weights : ndarray, shape (W, n_bodies, K)
        Distance nodes [AU] and their weights (each (w, body) row sums to 1).
    names, reservoirs : sequence of str
        Body names and reservoirs, in the model's body order.

    Returns
    -------
    list of BodyPoint
    """
    out = []
    for j, (name, res) in enumerate(zip(names, reservoirs)):
        q = _weighted_quantiles(r_nodes[:, j].ravel(), weights[:, j].ravel(),
                                [0.16, 0.5, 0.84])
        out.append(BodyPoint(name, res, tuple(float(v) for v in q), "posterior"))
    return out


def bands_from_draws(log_field, theta, r_au, t_myr) -> Bands:
    """Field percentiles along a grid from posterior draws.

    Parameters
    ----------
    log_field : callable
        ``model.log_field(theta, r_au, t_myr) -> ln(B / uT)`` of shape (W,) + grid shape.
    theta : ndarray, shape (W, P)
        Posterior draws.
    r_au, t_myr : float or ndarray
        Grid: one of them an array (the x axis), the other a scalar.

    Returns
    -------
    Bands
        x is whichever of ``r_au``/``t_myr`` is the array.
    """
    r, t = np.asarray(r_au, float), np.asarray(t_myr, float)
    x = r if r.ndim else t
    ln_b = np.asarray(log_field(theta, r, t), float).reshape(len(theta), -1)
    return Bands(x, np.exp(np.percentile(ln_b, _PCTS, axis=0)))


def bands_from_profile_rows(rows: dict, t_myr: float) -> Bands:
    """Radial bands at one epoch from a ``field_profile_<model>.csv`` table.

    Parameters
    ----------
    rows : dict of str -> ndarray
        Columns of the CSV (``r_au, t_myr, b_median_ut, b_q025_ut, b_q16_ut, b_q84_ut,
        b_q975_ut``).
    t_myr : float
        Epoch [Myr]; the nearest epoch in the file is used.

    Returns
    -------
    Bands
    """
    t = np.asarray(rows["t_myr"], float)
    nearest = t[np.argmin(np.abs(t - t_myr))]
    sel = t == nearest
    order = np.argsort(np.asarray(rows["r_au"], float)[sel])
    cols = ("b_q025_ut", "b_q16_ut", "b_median_ut", "b_q84_ut", "b_q975_ut")
    q = np.stack([np.asarray(rows[c], float)[sel][order] for c in cols])
    return Bands(np.asarray(rows["r_au"], float)[sel][order], q)
