"""diskfield's figure style: restrained, greyscale-readable and colour-blind safe.

* Colours: the Okabe–Ito palette (Okabe & Ito 2008, "Color Universal Design", J*Fly web
  publication), distinguishable under the common colour-vision deficiencies.
* Every model also gets its own line style, so figures stay readable in greyscale.
* Reservoirs are told apart by marker shape (never colour alone); upper limits are drawn as
  downward arrows.
* Saving is deterministic: no creation date in PDF, no software tag in PNG (convention),
  so the same inputs give byte-identical files.
"""
from __future__ import annotations

import contextlib
from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # figures are written to files only; no display is assumed

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib import ticker  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

__all__ = [
    "OKABE_ITO",
    "LINESTYLES",
    "RESERVOIR_MARKERS",
    "style",
    "new_figure",
    "model_color",
    "model_linestyle",
    "reservoir_marker",
    "draw_upper_limits",
    "plain_log_labels",
    "save_figure",
]

#: Okabe & Ito (2008) palette, black first; yellow is last because it is faint on white.
OKABE_ITO = ("#000000", "#0072B2", "#D55E00", "#009E73", "#CC79A7", "#56B4E9",
             "#E69F00", "#F0E442")

#: One line style per model (greyscale readability; convention).
LINESTYLES = ("-", "--", ":", "-.", (0, (5, 1, 1, 1, 1, 1)))

#: Marker shape per reservoir (convention); reservoirs not listed cycle through the spares.
RESERVOIR_MARKERS = {"NC": "o", "CC": "s", "CC_distal": "D"}
_SPARE_MARKERS = ("^", "v", "P", "X", "h", "<", ">")

_RC = {
    "font.size": 8.0,
    "axes.labelsize": 8.0,
    "axes.titlesize": 8.0,
    "legend.fontsize": 7.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "axes.linewidth": 0.6,
    "lines.linewidth": 1.2,
    "lines.markersize": 4.0,
    "axes.prop_cycle": matplotlib.cycler(color=OKABE_ITO),
    "axes.spines.top": False,
    "axes.spines.right": False,
    "legend.frameon": False,
    "xtick.direction": "in",
    "ytick.direction": "in",
    # matplotlib's default Type 3 fonts: embedding TrueType (42) costs ~1.5 s per PDF here
    "pdf.fonttype": 3,
    "svg.hashsalt": "diskfield",
    "path.simplify": False,
}


@contextlib.contextmanager
def style():
    """Context in which figures are built and saved with diskfield's rc settings."""
    with plt.rc_context(_RC):
        yield


def new_figure(width_in: float = 3.4, height_in: float = 2.6, **subplots_kw):
    """A figure (not registered with pyplot) and its axes.

    Parameters
    ----------
    width_in, height_in : float
        Size in inches (3.4 in is one journal column).
    **subplots_kw
        Passed to ``Figure.subplots`` (``nrows``, ``ncols``, ``sharey``, ...).

    Returns
    -------
    (Figure, Axes or ndarray of Axes)
    """
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    return fig, fig.subplots(**subplots_kw)


def model_color(index: int) -> str:
    """Colour of the ``index``-th model (0-based), skipping black for bands."""
    return OKABE_ITO[1:][index % (len(OKABE_ITO) - 1)]


def model_linestyle(index: int):
    """Line style of the ``index``-th model (0-based)."""
    return LINESTYLES[index % len(LINESTYLES)]


def reservoir_marker(reservoir: str, known: tuple[str, ...] = ()) -> str:
    """Marker shape of a reservoir.

    Parameters
    ----------
    reservoir : str
        Reservoir name.
    known : tuple of str
        Every reservoir of the figure, in a stable order: unlisted reservoirs get spare
        markers by their position in it.
    """
    if reservoir in RESERVOIR_MARKERS:
        return RESERVOIR_MARKERS[reservoir]
    others = [r for r in known if r not in RESERVOIR_MARKERS]
    index = others.index(reservoir) if reservoir in others else 0
    return _SPARE_MARKERS[index % len(_SPARE_MARKERS)]


def draw_upper_limits(ax, x, y, *, marker_color="0.2", drop: float = 0.5, label=None):
    """Draw upper limits as downward arrows on a log-y axis.

    Parameters
    ----------
    ax : matplotlib Axes
    x, y : array-like
        Positions; ``y`` is the limit (the arrow starts there).
    drop : float
        Arrow length as a factor: it ends at ``y * drop`` (0 < drop < 1).
    marker_color : colour
    label : str, optional
        Legend label (given once).
    """
    x, y = np.atleast_1d(np.asarray(x, float)), np.atleast_1d(np.asarray(y, float))
    # an invisible line at the arrow tips makes autoscaling keep the whole arrow in view
    # (an annotation whose tip falls outside the axes is not drawn at all)
    ax.plot(x, y * drop, linestyle="none", marker="none")
    for xi, yi in zip(x, y):
        ax.annotate("", xy=(xi, yi * drop), xytext=(xi, yi),
                    arrowprops={"arrowstyle": "-|>", "color": marker_color, "lw": 0.8,
                                "shrinkA": 0, "shrinkB": 0, "mutation_scale": 6})
    ax.plot(x, y, linestyle="none", marker="_", color=marker_color, markersize=6,
            label=label)


class _PlainLogFormatter(ticker.LogFormatter):
    """matplotlib's choice of which log ticks get a label, written as plain numbers
    (``2``, ``40``, ``100``, ``0.1``) instead of ``2×10⁰`` or ``1e+02``."""

    def __call__(self, x, pos=None):
        return f"{x:g}" if super().__call__(x, pos) else ""


def plain_log_labels(ax, axis: str = "y") -> None:
    """Label a log ``axis`` (``"x"`` or ``"y"``) of ``ax`` with plain numbers.

    Short log ranges otherwise get minor labels such as ``3×10¹`` that are hard to read.
    """
    target = ax.yaxis if axis == "y" else ax.xaxis
    target.set_major_formatter(_PlainLogFormatter(labelOnlyBase=False))
    target.set_minor_formatter(_PlainLogFormatter(labelOnlyBase=False))


def save_figure(fig, stem, *, dpi: int = 300, formats=("pdf", "png")) -> list[Path]:
    """Write ``fig`` as ``stem.pdf`` and ``stem.png`` deterministically.

    Parameters
    ----------
    fig : Figure
    stem : str or Path
        Output path without extension.
    dpi : int
        Raster resolution of the PNG, dots per inch (300 for print; lower for tests).
    formats : tuple of str
        Any of ``"pdf"``, ``"png"``.

    Returns
    -------
    list of Path
        The files written.
    """
    stem = Path(stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    meta = {"pdf": {"CreationDate": None, "ModDate": None}, "png": {"Software": None}}
    written = []
    with style():
        for fmt in formats:
            path = stem.with_suffix(f".{fmt}")
            fig.savefig(path, format=fmt, dpi=dpi, metadata=meta[fmt])
            written.append(path)
    return written
