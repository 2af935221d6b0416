"""Model-comparison figure: ln Z with its error and ΔELPD with its SE per model."""
from __future__ import annotations

import numpy as np

from ..plotstyle import OKABE_ITO, new_figure, style

__all__ = ["comparison_figure"]


def comparison_figure(models, ln_z, ln_z_err, elpd_diff, elpd_diff_se, *,
                      reference: str = "smooth", width_in: float = 6.0):
    """Two panels: ln Z ± error, and ΔELPD ± SE against the reference model.

    Parameters
    ----------
    models : sequence of str
    ln_z, ln_z_err : array-like
        Log evidence and its error (natural-log units; NaN when not computed).
    elpd_diff, elpd_diff_se : array-like
        ELPD(LOO) of each model minus the reference's, and the SE of that difference
        (natural-log units; positive favours the model).
    reference : str
        Reference model name (axis label).
    width_in : float
        Figure width [inch].

    Returns
    -------
    Figure
    """
    y = np.arange(len(models))[::-1]
    ln_z = np.asarray(ln_z, float)
    with style():
        fig, (ax_z, ax_e) = new_figure(width_in, 0.5 + 0.35 * len(models), ncols=2, sharey=True)
        ax_z.errorbar(ln_z, y, xerr=np.asarray(ln_z_err, float), fmt="o",
                      color=OKABE_ITO[1], capsize=2)
        _mark_missing(ax_z, y, ln_z, "ln Z not computed")
        ax_z.set_xlabel("ln Z, log evidence (nats)")
        ax_e.axvline(0.0, color="0.6", lw=0.7)
        ax_e.errorbar(np.asarray(elpd_diff, float), y, xerr=np.asarray(elpd_diff_se, float),
                      fmt="s", color=OKABE_ITO[2], capsize=2)
        _mark_missing(ax_e, y, np.asarray(elpd_diff, float), "ΔELPD not available")
        ax_e.set_xlabel(f"ΔELPD(LOO) vs {reference} (nats)")
        ax_z.set_yticks(y, list(models))  # the tick labels name the models: no axis label
        # every model keeps its row even when it has no finite value to autoscale on
        ax_z.set_ylim(-0.6, len(models) - 0.4)
    return fig


def _mark_missing(ax, y, values, text: str) -> None:
    """Say so in the panel where a model has no value, instead of leaving a silent gap."""
    if not np.any(np.isfinite(values)):
        ax.set_xticks([])  # no scale to show
    for yi, v in zip(y, values):
        if not np.isfinite(v):
            ax.text(0.5, yi, text, transform=ax.get_yaxis_transform(), ha="center",
                    va="center", color="0.4", fontsize="small")
