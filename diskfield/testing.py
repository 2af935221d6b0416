"""Conformance check for field-profile plug-ins: ``check_profile(component)``.

Any radial profile or envelope, shipped or third-party, can be checked in its own test suite::

    from diskfield.testing import check_profile
    check_profile(MY_PROFILE)                      # priors from the prior files / plug-in
    check_profile(MY_PROFILE, priors={"my_scale": diskfield.priorspec.Uniform(1, 2)})

Every failed requirement is collected; one AssertionError lists them all.
"""
from __future__ import annotations

import re
from typing import Mapping

import numpy as np
from astropy import units as u

from .priorset import LIKELIHOOD_PARAMETERS, PriorSet, effective_support, load_priors
from .profiles.base import Envelope, Parameter, RadialProfile

__all__ = ["check_profile"]

_NAME_RE = re.compile(r"^[a-z][a-z0-9]*(_[a-z0-9]+)*$")
#: Generic names that say nothing about their component: a, b2, x_0, a_1, ...
_GENERIC_RE = re.compile(r"^[a-z]{1,2}\d*$|_\d+$")
_N_DRAWS = 24
_N_NODES = 7
_N_GROUPS = 3
_EDGE_U = 1e-9  # quantile used as the "edge" of an unbounded support


def _check_declaration(comp, fail) -> None:
    if not isinstance(comp, (RadialProfile, Envelope)):
        fail(f"got {type(comp).__name__}; a component must be a RadialProfile or Envelope")
        return
    for attr in ("name", "description", "formula"):
        if not isinstance(getattr(comp, attr), str) or not getattr(comp, attr).strip():
            fail(f"{attr!r} must be a non-empty string")
    func = comp.log_field if isinstance(comp, RadialProfile) else comp.log_factor
    if not callable(func):
        fail("its log function is not callable")


def _check_parameter(par, comp_name: str, fail) -> None:
    if not isinstance(par, Parameter):
        fail(f"parameter {par!r} is not a diskfield Parameter")
        return
    if not _NAME_RE.match(par.name) or _GENERIC_RE.search(par.name):
        fail(f"parameter name {par.name!r} must be a descriptive, component-qualified "
             "snake_case name (e.g. 'ring_width', 'ring2_radius'; not 'a_0', 'x1')")
    if par.name in {p.name for p in LIKELIHOOD_PARAMETERS}:
        fail(f"parameter name {par.name!r} is reserved for the likelihood")
    try:
        u.Unit(par.unit)
    except (ValueError, TypeError):
        fail(f"parameter {par.name!r}: unit {par.unit!r} is not parseable by astropy")
    if not isinstance(par.description, str) or not par.description.strip():
        fail(f"parameter {par.name!r} has no description")


def _check_parameters(comp, fail) -> None:
    names = [getattr(p, "name", None) for p in comp.parameters]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        fail(f"parameter names are not unique: {', '.join(map(str, dupes))}")
    for par in comp.parameters:
        _check_parameter(par, comp.name, fail)


def _priors_for(comp, priors, fail) -> dict:
    """The prior of each parameter (missing ones reported)."""
    if priors is None:
        priors = load_priors()
    table = priors.parameters if isinstance(priors, PriorSet) else dict(priors)
    found = {}
    for par in comp.parameters:
        prior = table.get(par.name, par.default_prior)
        if prior is None:
            fail(f"parameter {par.name!r} has no default prior (add [parameters.{par.name}] to "
                 "a prior file or declare default_prior)")
            continue
        if not par.accepts(*effective_support(prior)):
            fail(f"parameter {par.name!r}: prior {prior.describe()} leaves the declared "
                 f"domain {par.domain}")
        found[par.name] = prior
    return found


def _edge_values(prior) -> tuple[float, float]:
    lo, hi = prior.support
    lo = lo if np.isfinite(lo) and prior.family != "log_normal" else float(prior.ppf(_EDGE_U))
    hi = hi if np.isfinite(hi) else float(prior.ppf(1 - _EDGE_U))
    return lo, hi


def _draws(priors: Mapping, rng) -> dict[str, np.ndarray]:
    """Random draws plus support-edge points: every parameter at each edge with the others
    random, then all parameters at their low edges and all at their high edges."""
    names = list(priors)
    cols = {n: np.asarray(priors[n].sample(rng, _N_DRAWS), float) for n in names}
    edges = {n: _edge_values(priors[n]) for n in names}
    for i, name in enumerate(names):
        for side in (0, 1):
            for other in names:
                value = edges[other][side] if other == name else cols[other][i % _N_DRAWS]
                cols[other] = np.append(cols[other], value)
    for side in (0, 1):
        for name in names:
            cols[name] = np.append(cols[name], edges[name][side])
    return cols


def _grid(comp, n_walkers: int, rng, shape: tuple[int, ...]) -> np.ndarray:
    """Distances [AU] or times [Myr] of shape (n_walkers,) + shape, spanning the range a
    likelihood can ask for (t < 0 from the tails of Gaussian age priors)."""
    lo, hi = (0.3, 40.0) if isinstance(comp, RadialProfile) else (-1.0, 20.0)
    base = np.linspace(lo, hi, shape[-1])
    jitter = rng.uniform(0.9, 1.0, size=(n_walkers,) + shape)
    return base * jitter if lo > 0 else base + 0.1 * jitter


def _evaluate(comp, x, cols, extra_dims: int):
    func = comp.log_field if isinstance(comp, RadialProfile) else comp.log_factor
    p = {n: v.reshape((-1,) + (1,) * extra_dims) for n, v in cols.items()}
    return np.asarray(func(x, p))


def _check_values(comp, x, out, label, fail) -> bool:
    if out.shape != x.shape:
        fail(f"{label}: output shape {out.shape} differs from the input shape {x.shape}")
        return False
    if np.isnan(out).any():
        fail(f"{label}: NaN in the output for {int(np.isnan(out).sum())} elements")
        return False
    if not np.isfinite(out).all():
        fail(f"{label}: non-finite output (+-inf) for {int((~np.isfinite(out)).sum())} elements")
        return False
    return True


def _check_purity(comp, x, cols, out, fail) -> None:
    x_copy = x.copy()
    cols_copy = {n: v.copy() for n, v in cols.items()}
    again = _evaluate(comp, x, cols, x.ndim - 1)
    if not np.array_equal(x, x_copy) or any(not np.array_equal(cols[n], cols_copy[n])
                                            for n in cols):
        fail("the function mutated its inputs")
    if not np.array_equal(again, out, equal_nan=True):
        fail("the function is not pure: the same input gave different outputs")


def _check_per_walker(comp, x, cols, out, fail) -> None:
    """Vectorised output must equal the output of each walker evaluated alone."""
    for w in range(0, x.shape[0], max(1, x.shape[0] // 8)):
        alone = _evaluate(comp, x[w:w + 1], {n: v[w:w + 1] for n, v in cols.items()},
                          x.ndim - 1)
        if alone.shape != x[w:w + 1].shape or not np.allclose(alone[0], out[w], rtol=1e-12,
                                                              atol=1e-12):
            fail(f"walker {w} evaluated alone differs from the vectorised evaluation: "
                 "parameters are not broadcast per walker")
            return


def _check_normalisation(comp, cols, fail) -> None:
    if not isinstance(comp, Envelope):
        return
    n = len(next(iter(cols.values()))) if cols else 1
    zero = np.zeros((n, 1))
    out = _evaluate(comp, zero, cols, 1)
    if out.shape == zero.shape and not np.allclose(out, 0.0, atol=1e-9):
        fail(f"envelope is not normalised: ln T(0) = {float(np.max(np.abs(out))):.3g} (must be 0)")


def _check_exchangeable(comp, fail) -> bool:
    """Declared exchangeable groups name declared parameters and their key (plug-in contract
    of :class:`~diskfield.profiles.base.Exchangeable`)."""
    names = set(comp.parameter_names)
    ok = True
    for ex in getattr(comp, "exchangeable", ()):
        missing = sorted({n for g in ex.groups for n in g} - names)
        if len(ex.prefixes) < 2 or missing or ex.order_by not in ex.members:
            fail(f"exchangeable groups {ex.prefixes}: need >= 2 groups of declared parameters "
                 f"and order_by among the members; undeclared: {', '.join(missing) or 'none'}")
            ok = False
        if ex.labels and len(ex.labels) != len(ex.prefixes):
            fail(f"exchangeable groups {ex.prefixes}: {len(ex.labels)} labels for "
                 f"{len(ex.prefixes)} groups")
            ok = False
    return ok


def _check_symmetry(comp, x, cols, out, fail) -> None:
    """The function is unchanged when declared exchangeable groups are swapped."""
    for ex in getattr(comp, "exchangeable", ()):
        for g in range(1, len(ex.groups)):  # transpositions with the first group generate all
            swapped = dict(cols)
            for a, b in zip(ex.groups[0], ex.groups[g]):
                swapped[a], swapped[b] = cols[b], cols[a]
            again = _evaluate(comp, x, swapped, x.ndim - 1)
            if not np.allclose(again, out, rtol=1e-10, atol=1e-10):
                fail(f"exchangeable groups {ex.prefixes}: swapping {ex.prefixes[0]} and "
                     f"{ex.prefixes[g]} changes the function, so they are not exchangeable")
                return


def _check_power_law_form(comp, x, cols, out, fail) -> None:
    """A declared power-law form gives the profile's own ln R (the compiled steady likelihood
    evaluates the form, :class:`~diskfield.profiles.base.PowerLawForm`)."""
    form_of = getattr(comp, "power_law_form", None)
    if form_of is None or x.ndim != 2:
        return
    try:
        form = form_of({n: v.reshape(-1) for n, v in cols.items()})
        if len(tuple(form.rings)) > 2 or ((form.break_radius is None)
                                          != (form.index_outer is None)):
            fail("power_law_form: at most two rings, and break_radius with index_outer "
                 "(both or neither)")
            return
        again = form.log_field(x)
    except Exception as exc:  # report, do not crash the conformance run
        fail(f"power_law_form raised {type(exc).__name__}: {exc}")
        return
    if again.shape != out.shape or not np.allclose(again, out, rtol=1e-12, atol=1e-10):
        worst = float(np.max(np.abs(again - out))) if again.shape == out.shape else np.nan
        fail(f"power_law_form differs from log_field (largest difference {worst:.3g} in ln R)")


def _check_function(comp, priors, rng, fail) -> None:
    cols = _draws(priors, rng) if priors else {}
    n = len(next(iter(cols.values()))) if cols else _N_DRAWS
    for extra in ((_N_NODES,), (_N_GROUPS, _N_NODES)):
        x = _grid(comp, n, rng, extra)
        label = f"shape {x.shape} (walkers x {'groups x ' if len(extra) == 2 else ''}nodes)"
        try:
            out = _evaluate(comp, x, cols, len(extra))
        except Exception as exc:  # report, do not crash the conformance run
            fail(f"{label}: raised {type(exc).__name__}: {exc}")
            return
        if _check_values(comp, x, out, label, fail):
            _check_purity(comp, x, cols, out, fail)
            _check_per_walker(comp, x, cols, out, fail)
            _check_symmetry(comp, x, cols, out, fail)
            _check_power_law_form(comp, x, cols, out, fail)
    _check_normalisation(comp, cols, fail)


def check_profile(component, priors=None, seed: int = 20240611) -> None:
    """Check that a radial profile or envelope meets the plug-in contract.

    Parameters
    ----------
    component : RadialProfile or Envelope
        The component to check.
    priors : PriorSet, mapping of str -> Prior, or None
        Priors of its parameters; None reads the shipped prior files (and any
        ``default_prior`` the component declares).
    seed : int, optional
        Seed of the random draws from the priors.

    Raises
    ------
    AssertionError
        Listing every failed requirement: declared name, description, formula; parameters
        with unique, descriptive names, astropy-parseable units, descriptions and a default
        prior inside the declared domain; a function that is vectorised over walkers x nodes
        and walkers x groups x nodes (output shape = input shape, parameters broadcast per
        walker), pure (same output, inputs not mutated), finite and never NaN over random
        draws from the priors and at their support edges; envelopes with ln T(0) = 0;
        declared exchangeable groups made of declared parameters, whose swap leaves the
        function unchanged; a declared ``power_law_form`` equal to ``log_field``.
    """
    failures: list[str] = []
    fail = failures.append
    _check_declaration(component, fail)
    if not failures:
        _check_parameters(component, fail)
        if isinstance(component, RadialProfile):
            _check_exchangeable(component, fail)
        found = _priors_for(component, priors, fail)
        if not failures:
            _check_function(component, found, np.random.default_rng(seed), fail)
    if failures:
        name = getattr(component, "name", repr(component))
        raise AssertionError(f"component {name!r} fails the diskfield plug-in contract:\n  - "
                             + "\n  - ".join(failures))
