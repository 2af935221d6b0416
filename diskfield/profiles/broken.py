"""The ``broken`` radial profile: two power laws joined continuously at a break radius."""
from __future__ import annotations

import numpy as np

from .base import Parameter, PowerLawForm, RadialProfile
from .smooth import FIELD_1AU, POWER_INDEX

__all__ = ["BROKEN"]

_BREAK_RADIUS = Parameter("break_radius", "AU", "radius r_b where the power-law index "
                          "changes", domain=(0.0, np.inf))
_POWER_INDEX_OUTER = Parameter("power_index_outer", "", "power-law index beyond the break "
                               "radius")


def _log_field(r_au, p):
    """ln R(r) of the broken power law.

    Notes
    -----
    R(r) = field_1au (r / 1 AU)^(-p_in)                          for r <= r_b,
    R(r) = field_1au (r_b / 1 AU)^(-p_in) (r / r_b)^(-p_out)     for r >  r_b  [uT],
    with p_in = ``power_index``, p_out = ``power_index_outer``, r_b = ``break_radius``.
    ``field_1au`` is the inner law's value at 1 AU (extrapolated if r_b < 1 AU). R is
    continuous at r_b; its slope is not.
    """
    ln_r = np.log(r_au)
    ln_rb = np.log(p["break_radius"])
    inner = np.minimum(ln_r, ln_rb)
    outer = np.maximum(ln_r - ln_rb, 0.0)
    return np.log(p["field_1au"]) - p["power_index"] * inner - p["power_index_outer"] * outer


def _form(p):
    return PowerLawForm(np.log(p["field_1au"]), p["power_index"],
                        break_radius=p["break_radius"], index_outer=p["power_index_outer"])


BROKEN = RadialProfile(
    name="broken",
    description="broken power law: index power_index inside break_radius, "
                "power_index_outer beyond",
    parameters=(FIELD_1AU, POWER_INDEX, _BREAK_RADIUS, _POWER_INDEX_OUTER),
    log_field=_log_field,
    formula=("R(r) = field_1au * (min(r, r_b) / 1 AU)^(-power_index) * "
             "(max(r, r_b) / r_b)^(-power_index_outer),  r_b = break_radius"),
    power_law_form=_form,
)
