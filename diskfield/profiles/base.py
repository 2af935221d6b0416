"""Declarative field components: a radial profile or a temporal envelope.

INTERFACE (fixed). A component declares its parameters and one pure, vectorised
function returning the natural log of its contribution to the field:

* radial profile:  ``log_field(r_au, p) -> ln(R / 1 uT)``
* temporal envelope: ``log_factor(t_myr, p) -> ln T`` (dimensionless, T(t) <= 1 typically)

so that ``ln B(r, t) = log_field(r) + log_factor(t)`` in ln(uT).

Broadcasting convention: ``r_au`` (or ``t_myr``) has shape ``(n_walkers, ...)``; ``p`` maps
each parameter name to an array of shape ``(n_walkers,) + (1,) * (r_au.ndim - 1)``.
Functions are pure (no state), return finite values over the prior support, and never NaN.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping

import numpy as np

__all__ = ["Parameter", "RadialProfile", "Envelope"]


@dataclass(frozen=True)
class Parameter:
    """A declared parameter.

    Attributes
    ----------
    name : str
        Stable, component-qualified name (``ring_radius``, ``ring2_width``, ``field_1au``).
    unit : str
        Unit string parseable by astropy (``"uT"``, ``"AU"``, ``"Myr"``) or ``""`` for
        dimensionless.
    description : str
        One line, for ``diskfield profiles`` and reports.
    """

    name: str
    unit: str
    description: str


@dataclass(frozen=True)
class RadialProfile:
    """A radial field profile plug-in.

    Attributes
    ----------
    name : str
        Registry name (``smooth``, ``ring``, ...).
    description : str
    parameters : tuple of Parameter
    log_field : callable
        ``log_field(r_au, p) -> ndarray`` of ln(R / uT); see module docstring.
    formula : str
        The formula in plain text (shown by ``diskfield profiles`` and in reports).
    """

    name: str
    description: str
    parameters: tuple[Parameter, ...]
    log_field: Callable[[np.ndarray, Mapping[str, np.ndarray]], np.ndarray]
    formula: str = ""
    kind: str = "radial"


@dataclass(frozen=True)
class Envelope:
    """A temporal envelope plug-in (``log_factor(t_myr, p) -> ln T``)."""

    name: str
    description: str
    parameters: tuple[Parameter, ...]
    log_factor: Callable[[np.ndarray, Mapping[str, np.ndarray]], np.ndarray]
    formula: str = ""
    kind: str = "envelope"

    @property
    def time_dependent(self) -> bool:
        """False only for an envelope that is constant in time (lets the likelihood skip ages)."""
        return self.name != "steady"
