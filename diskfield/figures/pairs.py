"""Marginal and pair plots of posterior draws (a compact corner-style plot of our own)."""
from __future__ import annotations

import textwrap

import numpy as np
from matplotlib.lines import Line2D

from ..plotstyle import OKABE_ITO, new_figure, style

__all__ = ["ORDERED_RING_LABELS", "RING_PARAMETERS", "pair_figure"]

#: The ring parameters shown by default, with axis labels and units.
RING_PARAMETERS = {
    "ring_radius": "r0, ring radius (AU)",
    "ring_amplitude": "A (dimensionless)",
    "ring_width": "w, ring width (AU)",
    "ring2_radius": "r0 of ring 2 (AU)",
    "ring2_amplitude": "A of ring 2 (dimensionless)",
    "ring2_width": "w of ring 2 (AU)",
}


#: Axis labels when the two rings are ordered by radius (``ring`` inner, ``ring2`` outer;
#: :mod:`diskfield.ordering`).
ORDERED_RING_LABELS = {
    "ring_radius": "r0 of inner ring (AU)",
    "ring_amplitude": "A of inner ring (dimensionless)",
    "ring_width": "w of inner ring (AU)",
    "ring2_radius": "r0 of outer ring (AU)",
    "ring2_amplitude": "A of outer ring (dimensionless)",
    "ring2_width": "w of outer ring (AU)",
}

_TRUTH_COLOR = OKABE_ITO[2]


def _limits(x: np.ndarray, truth: float | None = None) -> tuple[float, float]:
    lo, hi = np.percentile(x, [0.5, 99.5])
    if truth is not None and np.isfinite(truth):  # keep a declared true value in view
        lo, hi = min(lo, truth), max(hi, truth)
    pad = 0.05 * (hi - lo) if hi > lo else 0.5 * max(abs(lo), 1.0)
    return float(lo - pad), float(hi + pad)


def _mark_truth(ax, tx, ty) -> None:
    """Dashed lines at a declared true value (``ty`` None on the diagonal), a cross where two
    meet."""
    if tx is not None:
        ax.axvline(tx, color=_TRUTH_COLOR, ls="--", lw=0.9)
    if ty is not None:
        ax.axhline(ty, color=_TRUTH_COLOR, ls="--", lw=0.9)
    if tx is not None and ty is not None:
        ax.plot([tx], [ty], marker="x", color=_TRUTH_COLOR, ms=5, mew=1.2)


def _diagonal(ax, x, lim, bins) -> None:
    ax.hist(x, bins=bins, range=lim, histtype="stepfilled", color=OKABE_ITO[1], alpha=0.35)
    ax.hist(x, bins=bins, range=lim, histtype="step", color=OKABE_ITO[1], lw=0.9)
    for q, ls in zip(np.percentile(x, [16, 50, 84]), (":", "-", ":")):
        ax.axvline(q, color="0.2", ls=ls, lw=0.7)
    ax.set_yticks([])
    ax.set_xlim(lim)


def _off_diagonal(ax, x, y, xlim, ylim, bins) -> None:
    h, xe, ye = np.histogram2d(x, y, bins=bins, range=[xlim, ylim])
    ax.pcolormesh(xe, ye, h.T, cmap="Greys", shading="flat", rasterized=True)
    ax.set(xlim=xlim, ylim=ylim)


def pair_figure(samples: dict[str, np.ndarray], labels: dict[str, str] | None = None, *,
                truth: dict[str, float] | None = None, bins: int = 30,
                width_in: float | None = None):
    """Corner-style plot: marginal histograms on the diagonal, 2-D histograms below.

    Parameters
    ----------
    samples : dict of str -> ndarray
        Parameter name -> posterior draws (any shape; flattened).
    labels : dict of str -> str, optional
        Axis label with unit per parameter (default :data:`RING_PARAMETERS`, else the name).
    truth : dict of str -> float, optional
        Declared true values (simulated data) drawn as dashed vermilion lines; parameters
        absent from it get no line.
    bins : int
        Histogram bins per axis.
    width_in : float, optional
        Figure width and height [inch]; default 5 up to three parameters, else 7 (a full
        page width), with the axis labels wrapped onto two lines.

    Returns
    -------
    Figure
        The diagonal marks the median (solid) and 16th/84th percentiles (dotted).
    """
    labels = {**RING_PARAMETERS, **(labels or {})}
    names = list(samples)
    data = [np.ravel(np.asarray(samples[n], float)) for n in names]
    true = [(truth or {}).get(n) for n in names]
    lims = [_limits(x, t) for x, t in zip(data, true)]
    n = len(names)
    crowded = n > 3
    width_in = width_in or (7.0 if crowded else 5.0)
    text = {k: labels.get(k, k) for k in names}
    if crowded:
        text = {k: textwrap.fill(v, 16, break_long_words=False) for k, v in text.items()}
    with style():
        fig, axes = new_figure(width_in, width_in, nrows=n, ncols=n, squeeze=False)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                if j > i:
                    ax.set_visible(False)
                elif i == j:
                    _diagonal(ax, data[i], lims[i], bins)
                    _mark_truth(ax, true[i], None)
                else:
                    _off_diagonal(ax, data[j], data[i], lims[j], lims[i], bins)
                    _mark_truth(ax, true[j], true[i])
                if i == n - 1:
                    ax.set_xlabel(text[names[j]], fontsize=7 if crowded else None)
                else:
                    ax.tick_params(labelbottom=False)
                if j == 0 and i > 0:
                    ax.set_ylabel(text[names[i]], fontsize=7 if crowded else None)
                elif j > 0 or i == 0:
                    ax.tick_params(labelleft=False)
        if n == 1:
            axes[0, 0].set_ylabel("Posterior density (arbitrary units)")
        if any(t is not None for t in true):
            fig.legend([Line2D([], [], color=_TRUTH_COLOR, ls="--", marker="x")],
                       ["declared truth (simulated data)"], loc="upper right")
    return fig
