"""Label ordering of exchangeable parameter groups (the two rings of ``two-ring``).

A profile declares parameter groups that its function treats symmetrically
(:class:`~diskfield.profiles.base.Exchangeable`). When the groups' priors are identical (same
family, arguments and unit after the user's prior files are read) the posterior is invariant
under permuting the groups: k! copies of every mode, between which a sampler switches labels
and never converges. The model then uses the *ordered prior*

    π_ord(θ) = k! Π_i π_i(θ_i) 1[key_1 <= key_2 <= ... <= key_k],

which leaves the model unchanged: the k! permuted copies of the ordered region tile the
parameter space, so every symmetric function of θ (the likelihood, ln Z, the field profile)
has the same prior and posterior expectation as under the product prior. Every consumer of
the prior follows it:

* ``Model.log_prior`` is ln π_ord: Σ ln π_i + ln k! inside the ordered region, ``-inf``
  outside (ties, of measure zero, count as ordered);
* ``Model.prior_transform`` sorts the groups of the unit cube by the key's coordinate, then
  applies the inverse CDFs: a k!-to-1 fold of the cube whose image density is exactly
  k! × the product prior on the ordered region (identical priors share one increasing ppf,
  so the order in u is the order in θ);
* the emcee walkers (z = logit(u)) start in the ordered region and record θ =
  ``prior_transform(u)``: with a symmetric likelihood the density in z is symmetric, and
  the recorded θ follow the ordered posterior exactly (``SamplerSettings.ordered_region``;
  ``"wall"`` confines the walkers instead); the optimiser's optimum is mapped into it;
* Savage–Dickey tests on a grouped parameter pool its k exchangeable copies
  (:meth:`Ordering.copies`): that is the marginal of the symmetric, unordered posterior.

When the priors differ the groups are not exchangeable and nothing is ordered; the note says
why (``Model.config["label_ordering"]``, the fit's provenance).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

__all__ = ["GroupOrder", "Ordering", "label_ordering"]


@dataclass(frozen=True)
class GroupOrder:
    """One declared set of exchangeable groups and whether it is ordered.

    Attributes
    ----------
    names : tuple of tuple of str
        Parameter names of each group (declaration order).
    key_names : tuple of str
        The ordering parameter of each group.
    applied : bool
        True when the groups' priors are identical and the key is sampled.
    columns : ndarray of int, shape (k, m)
        Columns (in the model's free-parameter order) of each group's sampled members.
    key : int
        Index of the key member along ``columns``' second axis.
    note : str
        What was done, or why not, in plain words.
    """

    names: tuple
    key_names: tuple
    applied: bool
    columns: np.ndarray = field(repr=False, default=None)
    key: int = 0
    note: str = ""

    @property
    def log_norm(self) -> float:
        """ln k! of an applied ordering (0 otherwise)."""
        return float(special.gammaln(len(self.names) + 1)) if self.applied else 0.0


@dataclass(frozen=True)
class Ordering:
    """The label orderings of a model (possibly none).

    Methods act on arrays whose last axis is the model's free parameters (θ, u or z = logit u:
    all three are ordered alike under identical priors).
    """

    parts: tuple = ()

    @property
    def applied(self) -> bool:
        """True if any group set is ordered."""
        return any(p.applied for p in self.parts)

    @property
    def log_norm(self) -> float:
        """Σ ln k! over the applied orderings (added to the log prior inside the region)."""
        return sum(p.log_norm for p in self.parts)

    def sort(self, x) -> np.ndarray:
        """A copy of ``x`` (..., P) with each applied set's whole groups sorted by the key."""
        x = np.array(x, dtype=float, copy=True)
        for part in self.parts:
            if part.applied:
                blocks = x[..., part.columns]                        # (..., k, m)
                perm = np.argsort(blocks[..., part.key], axis=-1, kind="stable")
                x[..., part.columns] = np.take_along_axis(blocks, perm[..., None], axis=-2)
        return x

    def in_order(self, x) -> np.ndarray:
        """Boolean (...,): ``x`` (..., P) lies in the ordered region (ties allowed)."""
        x = np.asarray(x, dtype=float)
        ok = np.ones(x.shape[:-1], dtype=bool)
        for part in self.parts:
            if part.applied:
                keys = x[..., part.columns[:, part.key]]
                ok &= np.all(np.diff(keys, axis=-1) >= 0, axis=-1)
        return ok

    def copies(self, column: int) -> tuple:
        """Free columns exchangeable with ``column`` under an applied ordering (itself first);
        ``(column,)`` when it belongs to no ordered group."""
        for part in self.parts:
            if part.applied and column in part.columns:
                member = int(np.argwhere(part.columns == column)[0, 1])
                others = [int(c) for c in part.columns[:, member] if c != column]
                return (int(column), *others)
        return (int(column),)

    def describe(self) -> str:
        """One line for the model's provenance (empty when nothing is declared)."""
        return "; ".join(p.note for p in self.parts)

    def as_dict(self) -> dict:
        """Serialisable summary (fit.json, InferenceData attributes)."""
        return {"applied": self.applied, "groups": [[list(g) for g in p.names]
                                                    for p in self.parts if p.applied],
                "note": self.describe()}


def _signature(prior) -> tuple:
    """What makes two priors the same distribution: family, arguments and unit (not source)."""
    d = prior.as_dict()
    return tuple(sorted((k, v) for k, v in d.items() if k != "source"))


def _group_order(ex, priors: dict, free: tuple) -> GroupOrder:
    names, keys = ex.groups, ex.keys
    missing = [n for g in names for n in g if n not in priors]
    if missing:
        return GroupOrder(names, keys, False, note="not ordered: no prior for "
                          + ", ".join(missing))
    for j in range(len(ex.members)):
        first = names[0][j]
        for group in names[1:]:
            if _signature(priors[group[j]]) != _signature(priors[first]):
                return GroupOrder(names, keys, False, note=(
                    f"{', '.join(ex.prefixes)} not ordered: {group[j]} has prior "
                    f"{priors[group[j]].describe()} but {first} has "
                    f"{priors[first].describe()}; with different priors the groups are not "
                    "exchangeable (no label switching to remove)"))
    if keys[0] not in free:
        return GroupOrder(names, keys, False, note=(
            f"{', '.join(ex.prefixes)} not ordered: the key {keys[0]} is fixed"))
    sampled = [j for j in range(len(ex.members)) if names[0][j] in free]
    columns = np.array([[free.index(g[j]) for j in sampled] for g in names], dtype=int)
    key = sampled.index(ex.members.index(ex.order_by))
    labels = (", ".join(f"{p} = {lab}" for p, lab in zip(ex.prefixes, ex.labels))
              if ex.labels else "")
    note = (f"{', '.join(ex.prefixes)} ordered by {ex.order_by}: {' <= '.join(keys)}"
            + (f" ({labels})" if labels else "")
            + f"; their priors are identical, so the prior is restricted to this order and "
              f"multiplied by {math.factorial(len(names))} (the same model without label "
              "switching)")
    return GroupOrder(names, keys, True, columns, key, note)


def label_ordering(profile, priors: dict, free) -> Ordering:
    """The label ordering of a profile's exchangeable groups under the given priors.

    Parameters
    ----------
    profile : RadialProfile
        Declares ``exchangeable`` groups (none: an empty Ordering).
    priors : dict of str -> Prior
        Every parameter's prior (fixed ones included), after the user's prior files.
    free : sequence of str
        The sampled parameters, in the model's column order.

    Returns
    -------
    Ordering
    """
    free = tuple(free)
    return Ordering(tuple(_group_order(ex, priors, free)
                          for ex in getattr(profile, "exchangeable", ())))
