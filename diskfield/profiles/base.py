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
from typing import Any, Callable, Mapping

import numpy as np

__all__ = ["Parameter", "Exchangeable", "PowerLawForm", "RadialProfile", "Envelope"]


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
    domain : tuple of float, optional
        Half-open interval (low, high] of values the component's function accepts, in
        ``unit`` (e.g. ``(0, inf)`` for a field strength, ``(-1, inf)`` for a ring amplitude,
        ``(0, 1]`` for a fraction). A prior whose support leaves it is rejected when the prior
        files are read.
    closed_low : bool, optional
        True if the lower end of ``domain`` is itself allowed (e.g. a scatter of 0).
    default_prior : diskfield.priorspec.Prior or None, optional
        Default prior for plug-ins that ship no prior file; the shipped profiles take theirs
        from ``priors/disk.toml`` (a table there replaces this default).
    """

    name: str
    unit: str
    description: str
    domain: tuple[float, float] = (-np.inf, np.inf)
    closed_low: bool = False
    default_prior: Any = None

    def accepts(self, low: float, high: float) -> bool:
        """True if the interval [low, high] (a prior's support) lies inside the domain.

        An infinite support end is accepted where the domain is unbounded on that side.
        """
        lo, hi = self.domain
        low_ok = lo < low or (low == lo and (self.closed_low or lo == -np.inf))
        return bool(low_ok and high <= hi)


@dataclass(frozen=True)
class Exchangeable:
    """Parameter groups a component treats symmetrically (e.g. the two rings of ``two-ring``).

    The function's value is unchanged when whole groups are swapped, so with identical priors
    on the groups the posterior has k! copies of every mode (label switching). The model then
    orders the groups by one member (:mod:`diskfield.ordering`): the first prefix gets the
    smallest key. Stable names stay: group ``g`` is ``<prefixes[g]>_<member>``.

    Attributes
    ----------
    prefixes : tuple of str
        One prefix per group, in the order the key increases (``("ring", "ring2")``).
    members : tuple of str
        Member suffixes shared by every group (``("amplitude", "radius", "width")``).
    order_by : str
        The member whose values order the groups (``"radius"``: ring = inner).
    labels : tuple of str, optional
        Plain words for each group once ordered (``("inner", "outer")``), for reports.
    """

    prefixes: tuple[str, ...]
    members: tuple[str, ...]
    order_by: str
    labels: tuple[str, ...] = ()

    @property
    def groups(self) -> tuple[tuple[str, ...], ...]:
        """Parameter names of each group, members in declaration order."""
        return tuple(tuple(f"{p}_{m}" for m in self.members) for p in self.prefixes)

    @property
    def keys(self) -> tuple[str, ...]:
        """The ordering parameter of each group (``ring_radius``, ``ring2_radius``)."""
        return tuple(f"{p}_{self.order_by}" for p in self.prefixes)


@dataclass(frozen=True)
class PowerLawForm:
    """A profile written as a (broken) power law times Gaussian ring factors, per walker.

    ``ln R(r) = log_norm - index ln min(r, r_b) - index_outer ln max(r / r_b, 1)
    + sum_k ln(1 + A_k exp(-(r - r_k)^2 / (2 w_k^2)))`` (r, r_b, r_k, w_k in AU; without a
    break the middle terms are ``- index ln r``), each ring factor floored at
    ``MIN_RING_FACTOR`` as in :func:`diskfield.profiles.ring.log_ring_factor`.

    A profile that declares this form (``RadialProfile.power_law_form``) lets the steady
    likelihood place its distance rule and evaluate ln R in compiled code
    (:mod:`diskfield._rule_jit`); ``log_field`` stays the definition, and
    :func:`diskfield.testing.check_profile` checks that the two agree.

    Attributes
    ----------
    log_norm, index : ndarray (W,)
        ln(R / uT) at 1 AU before any ring factor (inner law), and the (inner) index.
    rings : tuple of (amplitude, radius, width), each ndarray (W,)
        At most two rings.
    break_radius, index_outer : ndarray (W,) or None
        Break radius [AU] and the index beyond it (both or neither).
    """

    log_norm: Any
    index: Any
    rings: tuple = ()
    break_radius: Any = None
    index_outer: Any = None

    def log_field(self, r_au):
        """ln(R / uT) of this form at distances ``r_au`` (W, K) [AU], in array code."""
        from .ring import log_ring_factor

        col = lambda a: np.asarray(a, float)[:, None]  # noqa: E731
        ln_r = np.log(r_au)
        if self.break_radius is None:
            out = col(self.log_norm) - col(self.index) * ln_r
        else:
            ln_rb = np.log(col(self.break_radius))
            out = (col(self.log_norm) - col(self.index) * np.minimum(ln_r, ln_rb)
                   - col(self.index_outer) * np.maximum(ln_r - ln_rb, 0.0))
        for amplitude, radius, width in self.rings:
            out = out + log_ring_factor(r_au, col(amplitude), col(radius), col(width))
        return out


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
    exchangeable : tuple of Exchangeable
        Parameter groups ``log_field`` treats symmetrically (empty: none).
    power_law_form : callable or None
        Optional ``power_law_form(p) -> PowerLawForm`` for parameters ``p`` of shape (W,): the
        same profile in the form the compiled steady likelihood evaluates (None: the
        likelihood calls ``log_field``, which is always correct, only slower).
    """

    name: str
    description: str
    parameters: tuple[Parameter, ...]
    log_field: Callable[[np.ndarray, Mapping[str, np.ndarray]], np.ndarray]
    formula: str = ""
    kind: str = "radial"
    exchangeable: tuple[Exchangeable, ...] = ()
    power_law_form: Callable[[Mapping[str, np.ndarray]], PowerLawForm] | None = None

    @property
    def parameter_names(self) -> tuple[str, ...]:
        """Names of the declared parameters, in declaration order."""
        return tuple(p.name for p in self.parameters)


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
    def parameter_names(self) -> tuple[str, ...]:
        """Names of the declared parameters, in declaration order."""
        return tuple(p.name for p in self.parameters)

    @property
    def time_dependent(self) -> bool:
        """False only for an envelope that is constant in time (lets the likelihood skip ages)."""
        return self.name != "steady"
