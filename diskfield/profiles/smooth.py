"""The ``smooth`` radial profile: a single power law in distance."""
from __future__ import annotations

import numpy as np

from .base import Parameter, PowerLawForm, RadialProfile

__all__ = ["FIELD_1AU", "POWER_INDEX", "SMOOTH", "log_power_law"]

FIELD_1AU = Parameter("field_1au", "uT", "disk field at 1 AU (at CAI formation for a "
                      "time-dependent envelope)", domain=(0.0, np.inf))
POWER_INDEX = Parameter("power_index", "", "power-law index p of the radial fall-off, "
                        "B ~ r^(-p)")


def log_power_law(r_au, field_1au, power_index):
    """ln of a power law B1 (r / 1 AU)^(-p).

    Parameters
    ----------
    r_au : ndarray
        Distance [AU], > 0.
    field_1au : ndarray
        B1, the field at 1 AU [uT], > 0.
    power_index : ndarray
        p (dimensionless).

    Returns
    -------
    ndarray
        ln(B / uT), broadcast over the inputs.
    """
    return np.log(field_1au) - power_index * np.log(r_au)


def _log_field(r_au, p):
    """ln R(r) of the smooth profile.

    Notes
    -----
    R(r) = field_1au (r / 1 AU)^(-power_index)  [uT].
    """
    return log_power_law(r_au, p["field_1au"], p["power_index"])


def _form(p):
    return PowerLawForm(np.log(p["field_1au"]), p["power_index"])


SMOOTH = RadialProfile(
    name="smooth",
    description="smooth power-law disk field",
    parameters=(FIELD_1AU, POWER_INDEX),
    log_field=_log_field,
    formula="R(r) = field_1au * (r / 1 AU)^(-power_index)",
    power_law_form=_form,
)
