"""Posterior field profile B(r) at chosen epochs, and B(t) at chosen distances."""
from __future__ import annotations

import math

import numpy as np
from matplotlib.patches import Patch

from ..plotstyle import (draw_upper_limits, model_color, model_linestyle, new_figure,
                         plain_log_labels, reservoir_marker, style)
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


def _draw_records(ax, records, x_of, reservoirs, xerr_of=None) -> None:
    """Records at x positions from ``x_of(record)`` with their implied-field bars, drawn as
    one artist per reservoir (many single-point artists make saving slow)."""
    for reservoir in dict.fromkeys(r.reservoir for r in records):
        mine = [r for r in records if r.reservoir == reservoir and np.isfinite(x_of(r))]
        marker = reservoir_marker(reservoir, reservoirs)
        est = [r for r in mine if not r.is_limit]
        lim = [r for r in mine if r.is_limit]
        if est:
            x = np.array([x_of(r) for r in est])
            q = np.array([r.implied_ut for r in est]).T
            xerr = np.array([xerr_of(r) for r in est])[:, :, 0].T if xerr_of else None
            ax.errorbar(x, q[1], yerr=[q[1] - q[0], q[2] - q[1]], xerr=xerr, fmt=marker,
                        color="0.2", mfc="white", ms=4, elinewidth=0.6, capsize=0,
                        label=reservoir)
        if lim:
            x = np.array([x_of(r) for r in lim])
            y = np.array([r.implied_ut[1] for r in lim])
            draw_upper_limits(ax, x, y)
            ax.plot(x, y, ls="none", marker=marker, mfc="white", mec="0.2", label=reservoir)


def _fanned_distance(records, by_body, spread: float = 0.04):
    """x position of each record: its body's median distance, records of one body fanned
    out by a few per cent in log r so that their bars do not overlap (a display offset)."""
    groups: dict[str, list] = {}
    for rec in records:
        groups.setdefault(rec.body, []).append(rec.record)
    x = {}
    for body, ids in groups.items():
        r0 = by_body[body].distance_au[1] if body in by_body else np.nan
        for k, rid in enumerate(ids):
            x[rid] = r0 * np.exp(spread * (k - 0.5 * (len(ids) - 1)) / max(len(ids), 1) ** 0.5)
    return lambda rec: x[rec.record]


def _draw_body_distances(ax, records, by_body) -> None:
    """One horizontal bar per body: its distance's 16th–84th percentiles [AU], drawn at the
    geometric mean of its records' implied fields."""
    for body in dict.fromkeys(r.body for r in records):
        if body not in by_body:
            continue
        lo, mid, hi = by_body[body].distance_au
        y = np.exp(np.mean([np.log(r.implied_ut[1]) for r in records if r.body == body]))
        ax.plot([lo, hi], [y, y], color="0.45", lw=1.6, alpha=0.6, solid_capstyle="butt",
                label="body distance (68%)")


def _legend(fig, axes) -> None:
    """One legend (models, band widths, reservoirs, distance bars of every panel) above the
    panels."""
    handles = {}
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            if not lab.startswith("_"):
                handles.setdefault(lab, h)
    # grey stand-ins for the two shades every model's band uses (alphas as in _draw_bands),
    # listed right after the model lines
    lines = {k: h for k, h in handles.items() if k.endswith("(median)")}
    bands = {"68% band": Patch(color="0.3", alpha=0.3 + 0.15 * 0.7, lw=0),
             "95% band": Patch(color="0.3", alpha=0.15, lw=0)}
    handles = {**lines, **bands, **{k: h for k, h in handles.items() if k not in lines}}
    fig.legend(handles.values(), handles.keys(), loc="outside upper center",
               ncols=min(len(handles), 3))


def field_profile_figure(bands_by_epoch: dict[float, dict[str, Bands]], bodies: list[BodyPoint],
                         records: list[RecordPoint], *, width_in: float = 4.5):
    """B(r) at chosen epochs: bands per model, bodies at their distances, records' fields.

    Parameters
    ----------
    bands_by_epoch : dict of float -> dict of str -> Bands
        Epoch [Myr after CAI formation] -> model name -> radial bands [AU, uT].
    bodies : list of BodyPoint
        Body distances [AU] (posterior or prior; the caption must say which).
    records : list of RecordPoint
        Each record is drawn in the panel whose epoch is nearest its central age, at its
        body's median distance (records of one body fanned out by a few per cent in r for
        legibility); each body's distance spread is one grey horizontal bar.
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
            _draw_body_distances(ax, mine, by_body)
            _draw_records(ax, mine, _fanned_distance(mine, by_body), reservoirs)
            ax.set(xscale="log", yscale="log", ylabel="Field B (µT)")
            plain_log_labels(ax, "x")
            plain_log_labels(ax, "y")
            ax.set_title(f"t = {epoch:g} Myr after CAI formation", loc="left")
        axes[-1, 0].set_xlabel("Heliocentric distance r (AU)")
        _legend(fig, axes[:, 0])
    return fig


def field_time_figure(bands_by_distance: dict[float, dict[str, Bands]],
                      bodies: list[BodyPoint], records: list[RecordPoint], *,
                      width_in: float = 4.5):
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
            _draw_records(ax, mine, lambda r: r.age_myr[1], reservoirs,
                          lambda r: [[r.age_myr[1] - r.age_myr[0]],
                                     [r.age_myr[2] - r.age_myr[1]]])
            ax.set(yscale="log", ylabel="Field B (µT)")
            plain_log_labels(ax, "y")
            ax.set_title(f"r = {dist:g} AU", loc="left")
        axes[-1, 0].set_xlabel("Time after CAI formation t (Myr)")
        _legend(fig, axes[:, 0])
    return fig
