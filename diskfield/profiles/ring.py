"""The ``ring`` and ``two-ring`` radial profiles: a power law with Gaussian enhancements.

A pressure bump (ring) multiplies the smooth field by ``1 + A g(r)`` with a Gaussian
``g = exp(-(r - r0)^2 / (2 w^2))`` in [0, 1]. The amplitude is signed: ``A < 0`` is a field
deficit (field concentrated outside a gap), and ``A > -1`` keeps the factor positive.
"""
from __future__ import annotations

import numpy as np

from .base import Exchangeable, Parameter, PowerLawForm, RadialProfile
from .smooth import FIELD_1AU, POWER_INDEX, log_power_law

__all__ = ["MIN_RING_FACTOR", "log_ring_factor", "ring_parameters", "RING", "TWO_RING"]

#: Smallest value of the factor 1 + A g: at the edge A -> -1 the ring centre stays finite at
#: ln(1e-9) = -20.7 instead of -inf (a numerical floor, convention).
MIN_RING_FACTOR = 1e-9


def ring_parameters(prefix: str, label: str) -> tuple[Parameter, Parameter, Parameter]:
    """The three declared parameters of one ring, named ``<prefix>_amplitude`` etc."""
    return (
        Parameter(f"{prefix}_amplitude", "", f"fractional field enhancement A at the {label} "
                  "centre (signed; > -1)", domain=(-1.0, np.inf)),
        Parameter(f"{prefix}_radius", "AU", f"{label} centre r0", domain=(0.0, np.inf)),
        Parameter(f"{prefix}_width", "AU", f"{label} Gaussian width w (1-sigma)",
                  domain=(0.0, np.inf)),
    )


def log_ring_factor(r_au, amplitude, radius, width):
    """ln(1 + A exp(-(r - r0)^2 / (2 w^2))), evaluated stably.

    Parameters
    ----------
    r_au : ndarray
        Distance [AU].
    amplitude : ndarray
        A (dimensionless), > -1.
    radius : ndarray
        r0 [AU].
    width : ndarray
        w [AU], > 0.

    Returns
    -------
    ndarray
        ln of the ring factor, >= ln(MIN_RING_FACTOR).

    Notes
    -----
    ``log1p`` keeps full precision far from the ring, where A g is tiny; the factor is
    floored at ``MIN_RING_FACTOR`` so that A = -1 (or round-off near it) stays finite.
    """
    z = (r_au - radius) / width
    a_g = amplitude * np.exp(-0.5 * z * z)
    return np.log1p(np.maximum(a_g, MIN_RING_FACTOR - 1.0))


def _log_field_ring(r_au, p):
    """ln R(r) of the ring profile.

    Notes
    -----
    R(r) = field_1au (r / 1 AU)^(-power_index)
           * (1 + ring_amplitude exp(-(r - ring_radius)^2 / (2 ring_width^2)))  [uT].
    """
    return (log_power_law(r_au, p["field_1au"], p["power_index"])
            + log_ring_factor(r_au, p["ring_amplitude"], p["ring_radius"], p["ring_width"]))


def _log_field_two_ring(r_au, p):
    """ln R(r) of the two-ring profile.

    Notes
    -----
    R(r) = field_1au (r / 1 AU)^(-power_index) * (1 + A1 g1(r)) * (1 + A2 g2(r)) [uT], with
    g_k = exp(-(r - r_k)^2 / (2 w_k^2)); ring 1 is ``ring_*``, ring 2 is ``ring2_*``. The
    product (rather than a sum) keeps the field positive for any signed amplitudes > -1.
    The two rings are exchangeable: the likelihood is symmetric under swapping them. With
    identical priors on both rings the model orders them by radius (``ring_radius <=
    ring2_radius``: ring = inner, ring2 = outer; :mod:`diskfield.ordering`).
    """
    return (_log_field_ring(r_au, p)
            + log_ring_factor(r_au, p["ring2_amplitude"], p["ring2_radius"], p["ring2_width"]))


def _ring(p, prefix):
    return (p[f"{prefix}_amplitude"], p[f"{prefix}_radius"], p[f"{prefix}_width"])


def _form_ring(p):
    return PowerLawForm(np.log(p["field_1au"]), p["power_index"], rings=(_ring(p, "ring"),))


def _form_two_ring(p):
    return PowerLawForm(np.log(p["field_1au"]), p["power_index"],
                        rings=(_ring(p, "ring"), _ring(p, "ring2")))


RING = RadialProfile(
    name="ring",
    description="power law times one Gaussian pressure-bump enhancement",
    parameters=(FIELD_1AU, POWER_INDEX) + ring_parameters("ring", "ring"),
    log_field=_log_field_ring,
    formula=("R(r) = field_1au * (r / 1 AU)^(-power_index) * (1 + ring_amplitude * "
             "exp(-(r - ring_radius)^2 / (2 ring_width^2)))"),
    power_law_form=_form_ring,
)

TWO_RING = RadialProfile(
    name="two-ring",
    description="power law times two Gaussian pressure-bump enhancements",
    parameters=RING.parameters + ring_parameters("ring2", "second ring"),
    log_field=_log_field_two_ring,
    formula=("R(r) = field_1au * (r / 1 AU)^(-power_index) * (1 + ring_amplitude * g1(r)) * "
             "(1 + ring2_amplitude * g2(r)),  g_k = exp(-(r - r_k)^2 / (2 w_k^2))"),
    exchangeable=(Exchangeable(("ring", "ring2"), ("amplitude", "radius", "width"), "radius",
                               ("inner", "outer")),),
    power_law_form=_form_two_ring,
)
