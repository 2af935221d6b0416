"""Registry of radial profiles and temporal envelopes (built-ins plus entry points).

Third-party packages add components through the entry-point group ``diskfield.profiles``::

    [project.entry-points."diskfield.profiles"]
    my-profile = "mypackage.fields:MY_PROFILE"

Each entry point loads to a :class:`RadialProfile` or :class:`Envelope` (or a callable with no
arguments returning one). A built-in name cannot be replaced; an entry point that fails to load
or loads to something else is skipped with a warning naming it.
"""
from __future__ import annotations

import warnings
from importlib import metadata

from ..errors import OptionError
from .accretion import ACCRETION, ACCRETION_WIND
from .base import Envelope, Parameter, RadialProfile
from .broken import BROKEN
from .envelopes import DISSIPATING, STEADY, VISCOUS
from .ring import RING, TWO_RING
from .smooth import SMOOTH

__all__ = [
    "ENTRY_POINT_GROUP",
    "get_profile",
    "get_envelope",
    "available_profiles",
    "available_envelopes",
    "all_components",
    "all_parameters",
]

ENTRY_POINT_GROUP = "diskfield.profiles"

_BUILTIN_PROFILES = (SMOOTH, RING, TWO_RING, BROKEN, ACCRETION, ACCRETION_WIND)
_BUILTIN_ENVELOPES = (STEADY, DISSIPATING, VISCOUS)


def _load_entry_point(ep):
    """Load one entry point to a component, or return None after warning why not."""
    try:
        obj = ep.load()
        if callable(obj) and not isinstance(obj, (RadialProfile, Envelope)):
            obj = obj()
    except Exception as exc:  # a broken third-party plug-in must not break diskfield
        warnings.warn(f"diskfield plug-in {ep.name!r} ({ep.value}) failed to load and is "
                      f"skipped: {type(exc).__name__}: {exc}", stacklevel=4)
        return None
    if not isinstance(obj, (RadialProfile, Envelope)):
        warnings.warn(f"diskfield plug-in {ep.name!r} ({ep.value}) is skipped: it gave "
                      f"{type(obj).__name__}, not a RadialProfile or Envelope", stacklevel=4)
        return None
    return obj


# Each entry point is loaded once per process (keyed by name and target), so a broken
# plug-in warns once; _LOADING stops a plug-in that calls get_profile while it is being
# loaded (to reuse a built-in parameter) from recursing into the plug-in list.
_LOADED: dict[tuple[str, str], object] = {}
_LOADING: list[bool] = []


def _load_cached(ep):
    key = (ep.name, ep.value)
    if key not in _LOADED:
        _LOADING.append(True)
        try:
            _LOADED[key] = _load_entry_point(ep)
        finally:
            _LOADING.pop()
    return _LOADED[key]


def _plugins() -> list:
    """Components from the entry-point group, in entry-point order."""
    if _LOADING:
        return []
    builtin = {c.name for c in _BUILTIN_PROFILES + _BUILTIN_ENVELOPES}
    found = []
    for ep in metadata.entry_points(group=ENTRY_POINT_GROUP):
        obj = _load_cached(ep)
        if obj is None:
            continue
        if obj.name in builtin:
            warnings.warn(f"diskfield plug-in {ep.name!r} is skipped: its component name "
                          f"{obj.name!r} is a built-in one", stacklevel=2)
            continue
        found.append(obj)
    return found


def _table(kind: type) -> dict:
    builtin = _BUILTIN_PROFILES if kind is RadialProfile else _BUILTIN_ENVELOPES
    table = {c.name: c for c in builtin}
    for obj in _plugins():
        if isinstance(obj, kind):
            table.setdefault(obj.name, obj)
    return table


def available_profiles() -> tuple[str, ...]:
    """Names of every radial profile (built-ins first, then plug-ins)."""
    return tuple(_table(RadialProfile))


def available_envelopes() -> tuple[str, ...]:
    """Names of every temporal envelope (built-ins first, then plug-ins)."""
    return tuple(_table(Envelope))


def get_profile(name: str) -> RadialProfile:
    """The radial profile called ``name``; raises OptionError listing the valid names."""
    table = _table(RadialProfile)
    if name not in table:
        raise OptionError("profile", name, "one of " + ", ".join(table))
    return table[name]


def get_envelope(name: str) -> Envelope:
    """The temporal envelope called ``name``; raises OptionError listing the valid names."""
    table = _table(Envelope)
    if name not in table:
        raise OptionError("envelope", name, "one of " + ", ".join(table))
    return table[name]


def all_components() -> tuple:
    """Every registered profile then every envelope."""
    return tuple(_table(RadialProfile).values()) + tuple(_table(Envelope).values())


def all_parameters() -> dict[str, Parameter]:
    """Every parameter of every registered component, by name (first declaration wins).

    Components that share a parameter (``field_1au`` in several profiles) declare the same
    Parameter; a plug-in that reuses a name with another unit is warned about and its
    declaration ignored.
    """
    params: dict[str, Parameter] = {}
    for comp in all_components():
        for par in comp.parameters:
            first = params.setdefault(par.name, par)
            if first.unit != par.unit:
                warnings.warn(f"parameter {par.name!r} of {comp.name!r} has unit "
                              f"{par.unit!r} but is declared elsewhere with {first.unit!r}; "
                              "the first declaration is used", stacklevel=2)
    return params
