"""Field-profile plug-ins: radial profiles and temporal envelopes, with a registry.

Radial profiles: ``smooth``, ``ring``, ``two-ring``, ``broken``, ``accretion`` (MRI-type),
``accretion-wind``. Envelopes: ``steady``, ``dissipating``, ``viscous``. Third-party components
register through the entry-point group ``diskfield.profiles`` (see :mod:`.registry`).
"""
from __future__ import annotations

from .base import Envelope, Exchangeable, Parameter, RadialProfile
from .registry import (
    ENTRY_POINT_GROUP,
    all_components,
    all_parameters,
    available_envelopes,
    available_profiles,
    get_envelope,
    get_profile,
)

__all__ = [
    "Parameter",
    "Exchangeable",
    "RadialProfile",
    "Envelope",
    "ENTRY_POINT_GROUP",
    "get_profile",
    "get_envelope",
    "available_profiles",
    "available_envelopes",
    "all_components",
    "all_parameters",
]
