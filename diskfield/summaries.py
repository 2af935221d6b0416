"""Posterior summary table and posterior field-profile bands (DESIGN §6 columns).

``posterior_summary_<model>.csv``: parameter, median, q05, q16, q84, q95, mean, sd, rhat,
ess_bulk — quantiles over all kept draws (walkers pooled), in the parameter's internal
unit (uT, AU, Myr or dimensionless).

``field_profile_<model>.csv``: r_au, t_myr, b_median_ut, b_q025_ut, b_q16_ut, b_q84_ut,
b_q975_ut — pointwise posterior quantiles of the disk field B(r, t) in uT (the field the
disk carried, without any recording term), on a log-spaced radius grid and, for a
time-dependent envelope, at a few epochs.
"""
from __future__ import annotations

import csv
import io

import numpy as np

from .manifest import write_atomic

__all__ = ["SUMMARY_COLUMNS", "PROFILE_COLUMNS", "posterior_summary", "field_profile",
           "default_radii", "default_epochs", "write_csv", "format_rows"]

SUMMARY_COLUMNS = ("parameter", "median", "q05", "q16", "q84", "q95", "mean", "sd", "rhat",
                   "ess_bulk")
PROFILE_COLUMNS = ("r_au", "t_myr", "b_median_ut", "b_q025_ut", "b_q16_ut", "b_q84_ut",
                   "b_q975_ut")

#: Draws used for the field bands: 2000 give quantile errors well below the band widths
#: (convention).
_MAX_PROFILE_DRAWS = 2000


def posterior_summary(draws, names, rhat_ess: dict, converged: bool | None = None
                      ) -> list[dict]:
    """One row per parameter.

    Parameters
    ----------
    draws : ndarray, shape (C, D, P)
        Kept posterior draws.
    names : sequence of str
    rhat_ess : dict
        ``{name: (rhat, ess_bulk)}`` from :func:`diskfield.azadapter.rhat_ess`.
    converged : bool, optional
        When given, an extra ``converged`` column (after the DESIGN columns) marks every
        row of an unconverged fit.
    """
    rows = []
    flat = np.asarray(draws, float).reshape(-1, len(names))
    for i, name in enumerate(names):
        x = flat[:, i]
        q = np.percentile(x, [50, 5, 16, 84, 95])
        rhat, ess = rhat_ess.get(name, (np.nan, np.nan))
        row = dict(zip(SUMMARY_COLUMNS, (name, *q, x.mean(), x.std(ddof=1), rhat, ess)))
        if converged is not None:
            row["converged"] = bool(converged)
        rows.append(row)
    return rows


def default_radii() -> np.ndarray:
    """0.5–20 AU, 60 log-spaced radii (covers the shipped distance priors; convention)."""
    return np.geomspace(0.5, 20.0, 60)


def default_epochs(envelope: str) -> np.ndarray:
    """Epochs in Myr after CAI formation: 0 for a steady disk, else 0–5 Myr by 1 Myr."""
    return np.array([0.0]) if envelope == "steady" else np.arange(0.0, 5.01, 1.0)


def field_profile(model, draws, *, radii=None, epochs=None, seed: int = 0) -> list[dict]:
    """Posterior bands of B(r, t) in uT.

    Parameters
    ----------
    model : Model
        Provides ``log_field(theta, r_au, t_myr)`` (ln B / uT, shape (W,) + grid).
    draws : ndarray, shape (C, D, P)
    radii : array_like, optional
        AU (default :func:`default_radii`).
    epochs : array_like, optional
        Myr after CAI formation (default :func:`default_epochs` of the model's envelope).
    seed : int
        Selects the draw subset when there are more than 2000 draws.
    """
    theta = np.asarray(draws, float).reshape(-1, np.shape(draws)[-1])
    if len(theta) > _MAX_PROFILE_DRAWS:
        idx = np.random.default_rng(seed).choice(len(theta), _MAX_PROFILE_DRAWS, replace=False)
        theta = theta[np.sort(idx)]
    radii = default_radii() if radii is None else np.asarray(radii, float)
    if epochs is None:
        epochs = default_epochs(model.config.get("envelope", "steady"))
    rows = []
    for t in np.atleast_1d(epochs):
        ln_b = np.asarray(model.log_field(theta, radii, np.full_like(radii, t)))
        q = np.exp(np.percentile(ln_b, [50, 2.5, 16, 84, 97.5], axis=0))
        for j, r in enumerate(radii):
            rows.append(dict(zip(PROFILE_COLUMNS, (r, t, *q[:, j]))))
    return rows


def format_rows(rows, columns) -> str:
    """Rows of dicts as CSV text with the given column order (floats to 6 significant digits)."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow([_cell(row.get(c, "")) for c in columns])
    return buf.getvalue()


def _cell(value):
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        return "" if np.isnan(value) else f"{value:.6g}"
    return value


def write_csv(path, rows, columns) -> None:
    """Write rows (dicts) to ``path`` as CSV, atomically."""
    write_atomic(path, format_rows(rows, columns))
