"""Posterior predictive check: each record's observed value against its predictive interval."""
from __future__ import annotations

import numpy as np

from ..plotstyle import OKABE_ITO, draw_upper_limits, new_figure, plain_log_labels, style

__all__ = ["predictive_intervals", "predictive_coverage", "predictive_figure"]


def predictive_intervals(simulated_ln: np.ndarray) -> np.ndarray:
    """Percentiles 2.5, 16, 50, 84, 97.5 of simulated values per record.

    Parameters
    ----------
    simulated_ln : ndarray, shape (W, n_records)
        ln(value / uT) simulated through the full recording model for W posterior draws
        (``model.simulate_ln_values``).

    Returns
    -------
    ndarray, shape (5, n_records)
        Predictive percentiles [uT].
    """
    return np.exp(np.percentile(np.asarray(simulated_ln, float), [2.5, 16, 50, 84, 97.5],
                                axis=0))


def predictive_coverage(observed_ln, is_limit, intervals) -> dict:
    """How many records fall inside their predictive intervals.

    Parameters
    ----------
    observed_ln : ndarray, shape (n,)
        Observed ln(value / uT).
    is_limit : ndarray of bool, shape (n,)
        Upper limits: counted as consistent when the 2.5th predictive percentile lies below
        the limit (a detection below the limit was possible).
    intervals : ndarray, shape (5, n)
        From :func:`predictive_intervals` [uT].

    Returns
    -------
    dict
        ``n_estimates``, ``in_68``, ``in_95``, ``n_limits``, ``limits_consistent``.
    """
    obs = np.exp(np.asarray(observed_ln, float))
    lim = np.asarray(is_limit, bool)
    est = ~lim
    in68 = (obs >= intervals[1]) & (obs <= intervals[3])
    in95 = (obs >= intervals[0]) & (obs <= intervals[4])
    return {"n_estimates": int(est.sum()), "in_68": int((in68 & est).sum()),
            "in_95": int((in95 & est).sum()), "n_limits": int(lim.sum()),
            "limits_consistent": int((lim & (intervals[0] <= obs)).sum())}


def predictive_figure(records, observed_ln, is_limit, intervals, *, width_in: float = 6.5):
    """Observed values against 68 % and 95 % predictive intervals, one column per record.

    Parameters
    ----------
    records : sequence of str
        Record ids (x-axis tick labels), e.g. ordered by body.
    observed_ln : ndarray, shape (n,)
        Observed ln(value / uT).
    is_limit : ndarray of bool, shape (n,)
        Upper limits are drawn as downward arrows.
    intervals : ndarray, shape (5, n)
        Predictive percentiles [uT] from :func:`predictive_intervals`.
    width_in : float
        Figure width [inch].

    Returns
    -------
    Figure
    """
    x = np.arange(len(records))
    obs = np.exp(np.asarray(observed_ln, float))
    lim = np.asarray(is_limit, bool)
    with style():
        fig, ax = new_figure(width_in, 2.6)
        ax.vlines(x, intervals[0], intervals[4], color=OKABE_ITO[5], lw=3.0, alpha=0.6,
                  label="95% predictive")
        ax.vlines(x, intervals[1], intervals[3], color=OKABE_ITO[1], lw=3.0,
                  label="68% predictive")
        ax.plot(x, intervals[2], ls="none", marker="_", color=OKABE_ITO[1], ms=8)
        ax.plot(x[~lim], obs[~lim], ls="none", marker="o", mfc="white", mec="0.1",
                label="observed")
        if lim.any():
            draw_upper_limits(ax, x[lim], obs[lim], label="upper limit")
        ax.set(yscale="log", ylabel="Paleointensity (µT)", xlabel="Record (id)")
        plain_log_labels(ax, "y")
        ax.set_xticks(x, [str(r) for r in records], rotation=90)
        ax.legend(loc="best", ncols=2)
    return fig
