"""Accretion-driven radial profiles: the field follows from an accretion rate.

Two transport modes are registered as two profiles (stable names):

* ``accretion`` — MRI-type Maxwell stress: B = g sqrt(mu0 Omega Mdot / (4 pi h eps)), with
  h / r from the minimum-mass solar nebula, so B ~ r^(-11/8);
* ``accretion-wind`` — a magnetised wind carrying a fraction f_w of the accretion torque:
  B = g sqrt(mu0 f_w Mdot Omega / (8 pi r)), so B ~ r^(-5/4).

In both, g (``geometry_factor``) converts the field of the relation to the midplane component
a meteorite records, which is uncertain (B_phi may reverse at the midplane; a free factor is
common practice, no source). The star is one solar mass (convention). The relations and their
sources are in :mod:`diskfield.physics`. ``accretion_rate`` is the rate at CAI formation:
combine with the ``viscous`` envelope for B ~ Mdot(t)^(1/2).
"""
from __future__ import annotations

import numpy as np

from .. import physics
from .base import Parameter, PowerLawForm, RadialProfile

__all__ = ["ACCRETION", "ACCRETION_WIND", "MRI_INDEX", "WIND_INDEX"]

_TESLA_TO_UT = 1e6

#: Radial index of the MRI-type field: Omega ~ r^(-3/2) and h ~ r^(5/4) (MMSN) give
#: B ~ (r^(-3/2) / r^(5/4))^(1/2) = r^(-11/8) [derived].
MRI_INDEX = 11.0 / 8.0
#: Radial index of the wind field: (Omega / r)^(1/2) ~ r^(-5/4) [derived].
WIND_INDEX = 5.0 / 4.0

# ln(B / uT) at 1 AU for Mdot = 1 M_sun/yr and unit factors; the profiles add the logs of
# the parameters and the radial power law.
_LN_MRI_1AU = float(np.log(physics.mri_field(1.0, 1.0, 1.0) * _TESLA_TO_UT))
_LN_WIND_1AU = float(np.log(physics.wind_field(1.0, 1.0) * _TESLA_TO_UT))

_ACCRETION_RATE = Parameter("accretion_rate", "solMass / yr", "disk accretion rate Mdot at "
                            "CAI formation", domain=(0.0, np.inf))
_GEOMETRY_FACTOR = Parameter("geometry_factor", "", "ratio g of the recorded midplane field "
                             "to the field of the accretion relation", domain=(0.0, np.inf))
_STRESS_EFFICIENCY = Parameter("stress_efficiency", "", "MRI stress efficiency "
                               "eps = |B_r B_phi| / B^2", domain=(0.0, np.inf))
_WIND_FRACTION = Parameter("wind_fraction", "", "fraction f_w of the accretion rate driven "
                           "by the wind torque", domain=(0.0, 1.0))


def _log_field_mri(r_au, p):
    """ln R(r) of the MRI-type accretion profile.

    Notes
    -----
    R(r) = g sqrt(mu0 Omega(r) Mdot / (4 pi h(r) eps)) [converted to uT], with
    Omega = sqrt(G M_sun / r^3), h = (h/r)_MMSN r; equivalently
    R(r) = R_1 g (Mdot / M_sun yr^-1)^(1/2) eps^(-1/2) (r / 1 AU)^(-11/8).
    """
    return (_LN_MRI_1AU + 0.5 * np.log(p["accretion_rate"]) - 0.5 * np.log(p["stress_efficiency"])
            + np.log(p["geometry_factor"]) - MRI_INDEX * np.log(r_au))


def _log_field_wind(r_au, p):
    """ln R(r) of the wind-driven accretion profile.

    Notes
    -----
    R(r) = g sqrt(mu0 f_w Mdot Omega(r) / (8 pi r)) [converted to uT]; equivalently
    R(r) = R_1 g (f_w Mdot / M_sun yr^-1)^(1/2) (r / 1 AU)^(-5/4).
    """
    return (_LN_WIND_1AU + 0.5 * np.log(p["wind_fraction"] * p["accretion_rate"])
            + np.log(p["geometry_factor"]) - WIND_INDEX * np.log(r_au))


def _form_mri(p):
    return PowerLawForm(_LN_MRI_1AU + 0.5 * np.log(p["accretion_rate"])
                        - 0.5 * np.log(p["stress_efficiency"]) + np.log(p["geometry_factor"]),
                        np.full(np.shape(p["accretion_rate"]), MRI_INDEX))


def _form_wind(p):
    return PowerLawForm(_LN_WIND_1AU + 0.5 * np.log(p["wind_fraction"] * p["accretion_rate"])
                        + np.log(p["geometry_factor"]),
                        np.full(np.shape(p["accretion_rate"]), WIND_INDEX))


ACCRETION = RadialProfile(
    name="accretion",
    description="field of an MRI-type (Maxwell-stress) accreting disk, MMSN thickness",
    parameters=(_ACCRETION_RATE, _STRESS_EFFICIENCY, _GEOMETRY_FACTOR),
    log_field=_log_field_mri,
    formula=("R(r) = geometry_factor * sqrt(mu0 Omega(r) accretion_rate / "
             "(4 pi h(r) stress_efficiency)),  Omega = sqrt(G M_sun / r^3), "
             "h/r = 0.0335 (r / 1 AU)^(1/4)  (~ r^(-11/8))"),
    power_law_form=_form_mri,
)

ACCRETION_WIND = RadialProfile(
    name="accretion-wind",
    description="field of a disk accreting through a magnetised wind",
    parameters=(_ACCRETION_RATE, _WIND_FRACTION, _GEOMETRY_FACTOR),
    log_field=_log_field_wind,
    formula=("R(r) = geometry_factor * sqrt(mu0 wind_fraction accretion_rate Omega(r) / "
             "(8 pi r)),  Omega = sqrt(G M_sun / r^3)  (~ r^(-5/4))"),
    power_law_form=_form_wind,
)
