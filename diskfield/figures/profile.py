"""Posterior field profile B(r) at chosen epochs, and B(t) at chosen distances."""
from __future__ import annotations

import math

import numpy as np

from ..plotstyle import (draw_upper_limits, model_color, model_linestyle, new_figure,
                         reservoir_marker, style)
from .data import Bands, BodyPoint, RecordPoint

__all__ = ["field_profile_figure", "field_time_figure", "nearest_index"]


def nearest_index(value: float, grid) -> int:
    """Index of the grid point nearest ``value`` (0 for NaN)."""
    grid = np.asarray(grid, float)
    return 0 if math.isnan(value) else int(np.argmin(np.abs(grid - value)))


def _draw_bands(ax, bands: dict[str, Bands]) -> None:
    for i, (model, b) in enumerate(bands.items()):
        color = model_color(i)
        ax.fill_between(b.x, b.q[0], b.q[4], color=color, alpha=0.15, lw=0)
        ax.fill_between(b.x, b.q[1], b.q[3], color=color, alpha=0.3, lw=0)
        ax.plot(b.x, b.q[2], color=color, ls=model_linestyle(i), label=f"{model} (median)")


def _draw_records(ax, records, x_of, xerr_of, reservoirs) -> None:
    """Records at x positions from ``x_of(record)`` with implied-field bars."""
    labelled = set()
    for rec in records:
        x, (lo, mid, hi) = x_of(rec), rec.implied_ut
        if not np.isfinite(x):
            continue
        marker = reservoir_marker(rec.reservoir, reservoirs)
        label = None if rec.reservoir in labelled else rec.reservoir
        labelled.add(rec.reservoir)
        xerr = xerr_of(rec)
        if rec.is_limit:
            draw_upper_limits(ax, [x], [mid])
            ax.plot([x], [mid], ls="none", marker=marker, mfc="white", mec="0.2", label=label)
            continue
        ax.errorbar([x], [mid], yerr=[[mid - lo], [hi - mid]], xerr=xerr, fmt=marker,
                    color="0.2", mfc="white", ms=4, elinewidth=0.7, capsize=0, label=label)


def _legend(axes) -> None:
    """One legend (models and reservoirs of every panel) on the first panel."""
    handles = {}
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            handles.setdefault(lab, h)
    axes[0].legend(handles.values(), handles.keys(), loc="best", ncols=2)


def _body_xerr(body: BodyPoint | None):
    if body is None:
        return None
    lo, mid, hi = body.distance_au
    return [[mid - lo], [hi - mid]]


def field_profile_figure(bands_by_epoch: dict[float, dict[str, Bands]], bodies: list[BodyPoint],
                         records: list[RecordPoint], *, width_in: float = 3.4):
    """B(r) at chosen epochs: bands per model, bodies at their distances, records' fields.

    Parameters
    ----------
    bands_by_epoch : dict of float -> dict of str -> Bands
        Epoch [Myr after CAI formation] -> model name -> radial bands [AU, uT].
    bodies : list of BodyPoint
        Body distances [AU] (posterior or prior; the caption must say which).
    records : list of RecordPoint
        Each record is drawn in the panel whose epoch is nearest its central age, at its
        body's median distance with the distance spread as a horizontal bar.
    width_in : float
        Figure width [inch].

    Returns
    -------
    Figure
    """
    epochs = sorted(bands_by_epoch)
    reservoirs = tuple(dict.fromkeys(r.reservoir for r in records))
    by_body = {b.body: b for b in bodies}
    with style():
        fig, axes = new_figure(width_in, 2.4 * len(epochs), nrows=len(epochs), squeeze=False,
                               sharex=True)
        for k, (ax, epoch) in enumerate(zip(axes[:, 0], epochs)):
            _draw_bands(ax, bands_by_epoch[epoch])
            mine = [r for r in records if nearest_index(r.age_myr[1], epochs) == k]
            _draw_records(ax, mine,
                          lambda r: by_body[r.body].distance_au[1] if r.body in by_body else np.nan,
                          lambda r: _body_xerr(by_body.get(r.body)), reservoirs)
            ax.set(xscale="log", yscale="log", ylabel="Field B (µT)")
            ax.set_title(f"t = {epoch:g} Myr after CAI formation", loc="left")
        axes[-1, 0].set_xlabel("Heliocentric distance r (AU)")
        _legend(axes[:, 0])
    return fig


def field_time_figure(bands_by_distance: dict[float, dict[str, Bands]],
                      bodies: list[BodyPoint], records: list[RecordPoint], *,
                      width_in: float = 3.4):
    """B(t) at chosen distances with the records placed at their ages.

    Parameters
    ----------
    bands_by_distance : dict of float -> dict of str -> Bands
        Distance [AU] -> model name -> time bands [Myr, uT].
    bodies : list of BodyPoint
        Each record goes to the panel whose distance is nearest its body's median distance.
    records : list of RecordPoint
        Drawn at their central age with the age range (±1 sigma or window) as a bar.
    width_in : float
        Figure width [inch].

    Returns
    -------
    Figure
    """
    distances = sorted(bands_by_distance)
    reservoirs = tuple(dict.fromkeys(r.reservoir for r in records))
    by_body = {b.body: b for b in bodies}
    with style():
        fig, axes = new_figure(width_in, 2.4 * len(distances), nrows=len(distances),
                               squeeze=False, sharex=True)
        for k, (ax, dist) in enumerate(zip(axes[:, 0], distances)):
            _draw_bands(ax, bands_by_distance[dist])
            mine = [r for r in records if r.body in by_body
                    and nearest_index(by_body[r.body].distance_au[1], distances) == k]
            _draw_records(ax, mine, lambda r: r.age_myr[1],
                          lambda r: [[r.age_myr[1] - r.age_myr[0]], [r.age_myr[2] - r.age_myr[1]]],
                          reservoirs)
            ax.set(yscale="log", ylabel="Field B (µT)")
            ax.set_title(f"r = {dist:g} AU", loc="left")
        axes[-1, 0].set_xlabel("Time after CAI formation t (Myr)")
        _legend(axes[:, 0])
    return fig
