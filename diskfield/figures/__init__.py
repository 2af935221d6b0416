"""Manuscript figures built from saved runs (matplotlib, Agg; PDF and 300-dpi PNG).

Each figure function takes plain data (see :mod:`diskfield.figures.data`) and returns a
``matplotlib.figure.Figure``; :func:`diskfield.plotstyle.save_figure` writes it.
"""
from __future__ import annotations

from .comparison import comparison_figure
from .data import (Bands, BodyPoint, RecordPoint, bands_from_draws, bands_from_profile_rows,
                   body_points_from_posterior, body_points_from_prior,
                   implied_field_quantiles, record_points)
from .pairs import ORDERED_RING_LABELS, RING_PARAMETERS, pair_figure
from .predictive import predictive_coverage, predictive_figure, predictive_intervals
from .profile import field_profile_figure, field_time_figure

__all__ = [
    "Bands",
    "BodyPoint",
    "RecordPoint",
    "bands_from_draws",
    "bands_from_profile_rows",
    "body_points_from_posterior",
    "body_points_from_prior",
    "implied_field_quantiles",
    "record_points",
    "ORDERED_RING_LABELS",
    "RING_PARAMETERS",
    "pair_figure",
    "predictive_coverage",
    "predictive_figure",
    "predictive_intervals",
    "field_profile_figure",
    "field_time_figure",
    "comparison_figure",
]
