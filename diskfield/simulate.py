"""Forward simulation through the full recording model, and synthetic compilations.

Generative model (the one :mod:`diskfield.likelihood` marginalises, DESIGN §4): for each body a
distance ``r ~`` its distance prior; for each record an age ``t ~`` its age prior; a spin
projection ``X = -ln u`` (one per body, one per record, or none; Exp(1) for isotropic axes, or
``u = |cos theta|`` with theta from the obliquity prior); then the corrected log value::

    z = ln B(r, t) - X + eps,   eps ~ N(0, S^2)

with ``S^2`` the record's total log variance (measurement, recording fraction, calibration by
method and remanence type, intrinsic scatter) and the reported ``ln_value = z + offset``
(the medians of recording fraction and calibration multiplied back in).

Upper limits: a simulated value below the row's limit keeps the row an ``upper_limit`` with its
original limit; a value above it turns the row into an ``estimate`` of the simulated value with
the row's error (the measurement would have detected it). This is the censoring the likelihood
assumes, so simulation-based calibration stays exact.
"""
from __future__ import annotations

import dataclasses

import numpy as np

from .records import Body, Compilation, Records

__all__ = [
    "simulate_ln_values",
    "simulate_compilation",
    "compilation_from_arrays",
    "synthetic_compilation",
]


def _sample_ages(model, rng, w):
    """Ages [Myr] of every record, shape (W, n_records), from each record's age prior."""
    recs, pset = model.compilation.records, model.priorset
    n = len(recs)
    t = np.zeros((w, n))
    res = np.array([model.compilation.bodies[g].reservoir for g in recs.body_index])
    for i in range(n):
        kind = recs.age_kind[i]
        if kind == "normal":
            t[:, i] = recs.age_a[i] + recs.age_b[i] * rng.standard_normal(w)
        elif kind == "uniform":
            t[:, i] = rng.uniform(recs.age_a[i], recs.age_b[i], w)
        else:
            t[:, i] = pset.age_windows[res[i]].sample(rng, w)
    return t


def _sample_spin(model, rng, w):
    """X = -ln u of every record, shape (W, n_records), shared per the spin mode."""
    n, bi = model.n_records, np.asarray(model.compilation.records.body_index)
    if model.spin == "none":
        return np.zeros((w, n))
    size = (w, model.n_bodies) if model.spin == "body" else (w, n)
    obl = model._obliquity
    if obl is None:
        x = rng.exponential(1.0, size)
    else:
        x = -np.log(np.abs(np.cos(np.deg2rad(obl.sample(rng, size)))))
    return x[:, bi] if model.spin == "body" else x


def simulate_ln_values(model, theta, rng):
    """ln(value / uT) of every record simulated through the full recording model.

    Parameters
    ----------
    model : diskfield.likelihood.Model
    theta : ndarray, shape (P,) or (W, P)
        Parameter values (``model.parameter_names`` order).
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (W, n_records)
        Simulated ln values (upper-limit rows too: callers decide censoring).
    """
    theta = np.atleast_2d(np.asarray(theta, float))
    w = len(theta)
    p = model.params(theta)
    bodies = model.compilation.bodies
    bi = np.asarray(model.compilation.records.body_index)
    r = np.column_stack([model._bodies.priors[g].sample(rng, w) for g in range(len(bodies))])
    t = _sample_ages(model, rng, w) if model.envelope.time_dependent else np.zeros((w, len(bi)))
    pe = {k: v[:, None] for k, v in p.items()}
    log_b = model.profile.log_field(r[:, bi], pe) + model.envelope.log_factor(t, pe)
    terms = model._terms
    var = terms.var_fixed[None, :] + p["intrinsic_scatter"][:, None] ** 2
    z = log_b - _sample_spin(model, rng, w) + np.sqrt(var) * rng.standard_normal(var.shape)
    return z + terms.offset[None, :]


def simulate_compilation(comp, model, theta_1d, rng) -> Compilation:
    """A compilation with ``comp``'s design and values simulated from the model at ``theta_1d``.

    Parameters
    ----------
    comp : Compilation
        The design (bodies, reservoirs, ages, methods, errors, kinds); normally the model's.
    model : diskfield.likelihood.Model
        Built on ``comp``.
    theta_1d : ndarray, shape (P,)
    rng : numpy.random.Generator

    Returns
    -------
    Compilation
        Same records and bodies; new ``ln_value`` (and ``is_limit`` where a simulated value
        exceeds its limit: see the module notes); ``source`` marked as simulated.
    """
    y = simulate_ln_values(model, np.asarray(theta_1d, float)[None, :], rng)[0]
    recs = comp.records
    limit = np.asarray(recs.is_limit, bool)
    below = limit & (y < recs.ln_value)
    new_ln = np.where(below, recs.ln_value, y)
    new_records = dataclasses.replace(recs, ln_value=new_ln, is_limit=below)
    table = _updated_table(comp.table, recs, new_ln, below)
    return dataclasses.replace(comp, records=new_records, table=table,
                               source=f"{comp.source} (simulated)", data_hash="")


def _updated_table(table, recs, new_ln, is_limit):
    """Copy of the compilation table with simulated values (errors scaled: ln_err kept)."""
    if table is None or "paleointensity" not in getattr(table, "colnames", ()):
        return table
    out = table.copy()
    index = {rid: k for k, rid in enumerate(np.asarray(out["record"]).astype(str))}
    values = np.array(out["paleointensity"], dtype=float)
    errs = (np.array(out["paleointensity_err"], dtype=float)
            if "paleointensity_err" in out.colnames else None)
    kinds = np.array(out["kind"]).astype(object) if "kind" in out.colnames else None
    for i, rid in enumerate(np.asarray(recs.record).astype(str)):
        k = index.get(rid)
        if k is None:
            continue
        new_value = float(np.exp(new_ln[i]) * recs.spin_factor[i])
        if errs is not None and np.isfinite(errs[k]) and values[k] > 0:
            errs[k] *= new_value / values[k]
        values[k] = new_value
        if kinds is not None:
            kinds[k] = "upper_limit" if is_limit[i] else "estimate"
    out["paleointensity"][:] = values
    if errs is not None:
        out["paleointensity_err"][:] = errs
    if kinds is not None:
        out["kind"] = kinds.astype(str)
    return out


def compilation_from_arrays(body, reservoir, ln_value, ln_err, *, is_limit=None, method=None,
                            remanence=None, age_kind=None, age_a=None, age_b=None,
                            ln_fraction_mean=None, ln_fraction_sd=None, distance=None,
                            source="<synthetic>") -> Compilation:
    """Build a :class:`Compilation` directly from per-record arrays (tests, campaigns).

    Parameters
    ----------
    body, reservoir : sequence of str
        Body name and reservoir of each record (a body's reservoir must not vary).
    ln_value, ln_err : array_like
        ln(value / uT) and its 1-sigma (natural-log units).
    is_limit : array_like of bool, optional
        Upper-limit rows (default none).
    method, remanence : sequence of str, optional
        Calibration method and remanence type ("" for none; default none).
    age_kind, age_a, age_b : optional
        Age priors as in :class:`Records` (default ``"default"``, NaN).
    ln_fraction_mean, ln_fraction_sd : array_like, optional
        Recording fraction lognormal (default 0, 0).
    distance : dict of str -> (float, float), optional
        Per-body distance override [AU].
    source : str
        Label used in messages.
    """
    n = len(body)
    full = lambda v, fill, dt=float: (np.full(n, fill, dtype=dt) if v is None  # noqa: E731
                                      else np.asarray(v, dtype=dt))
    names = list(dict.fromkeys(body))
    body_index = np.array([names.index(b) for b in body])
    records = Records(
        record=np.array([f"R{i + 1:04d}" for i in range(n)]), body_index=body_index,
        is_limit=full(is_limit, False, bool), ln_value=np.asarray(ln_value, float),
        ln_err=full(ln_err, 0.0), age_kind=full(age_kind, "default", object).astype(str),
        age_a=full(age_a, np.nan), age_b=full(age_b, np.nan),
        method=full(method, "", object).astype(str), remanence=full(remanence, "", object).astype(str),
        ln_fraction_mean=full(ln_fraction_mean, 0.0), ln_fraction_sd=full(ln_fraction_sd, 0.0),
        spin_factor=np.ones(n))
    distance = distance or {}
    bodies = tuple(
        Body(name=nm, reservoir=str(reservoir[int(np.flatnonzero(body_index == k)[0])]),
             distance_min=float(distance.get(nm, (np.nan, np.nan))[0]),
             distance_max=float(distance.get(nm, (np.nan, np.nan))[1]),
             record_indices=tuple(int(i) for i in np.flatnonzero(body_index == k)))
        for k, nm in enumerate(names))
    return Compilation(source=source, table=None, records=records, bodies=bodies,
                       reservoirs=tuple(dict.fromkeys(b.reservoir for b in bodies)))


def synthetic_compilation(n_records: int, rng, *, records_per_body: int = 4,
                          limit_fraction: float = 0.1, source="<synthetic>") -> Compilation:
    """An invented compilation of ``n_records`` rows with a demo-like design.

    Bodies of ``records_per_body`` records alternate between reservoirs NC, CC and CC_distal;
    methods, remanence types, ages and errors are drawn at random; values are placeholders
    (ln 20 uT) meant to be replaced by :func:`simulate_compilation`.

    Parameters
    ----------
    n_records : int
    rng : numpy.random.Generator
    records_per_body : int
    limit_fraction : float
        Fraction of rows that are upper limits.
    """
    body = [f"Body{i // records_per_body:03d}" for i in range(n_records)]
    reservoir = [("NC", "CC", "NC", "CC_distal")[(i // records_per_body) % 4]
                 for i in range(n_records)]
    kind = rng.choice(["normal", "uniform", "default"], n_records)
    mean = rng.uniform(1.0, 4.0, n_records)
    age_a = np.where(kind == "normal", mean, np.where(kind == "uniform", mean - 0.5, np.nan))
    age_b = np.where(kind == "normal", 0.4, np.where(kind == "uniform", mean + 0.5, np.nan))
    return compilation_from_arrays(
        body, reservoir, np.full(n_records, np.log(20.0)), rng.uniform(0.1, 0.4, n_records),
        is_limit=rng.uniform(size=n_records) < limit_fraction,
        method=rng.choice(["thermal", "ARM", "IRM", ""], n_records),
        remanence=rng.choice(["TRM", "CRM", ""], n_records),
        age_kind=kind, age_a=age_a, age_b=age_b, source=source)
