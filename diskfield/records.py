"""Compilation reader: a validated, unit-converted table of paleointensity records.

INTERFACE (fixed; the reader's implementation fills it): ``read_compilation(path)``
returns a :class:`Compilation`. Everything downstream (likelihood, simulation,
reports) uses only the attributes declared here.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Records", "Body", "Exclusion", "Compilation", "read_compilation"]

#: Closed vocabularies (DESIGN §3). Reservoirs beyond these may be defined in prior files.
KINDS = ("estimate", "upper_limit")
METHODS = ("ARM", "IRM", "thermal", "other")
REMANENCES = ("TRM", "CRM", "unknown")
AGE_KINDS = ("normal", "uniform", "default")


@dataclass(frozen=True)
class Records:
    """Included records as parallel numpy arrays (length ``n``), ready for the likelihood.

    All magnitudes are natural logs of values in microtesla after dividing out any
    author-applied spin factor.

    Attributes
    ----------
    record : ndarray of str
        Record ids.
    body_index : ndarray of int
        Index into ``Compilation.bodies``.
    is_limit : ndarray of bool
        True for ``upper_limit`` rows (the value is an upper bound).
    ln_value : ndarray of float
        ln(paleointensity / 1 uT) for estimates, ln(limit / 1 uT) for upper limits,
        after dividing by ``spin_factor``.
    ln_err : ndarray of float
        1-sigma of ln(paleointensity) (dimensionless). For upper limits without an error: 0.
    age_kind : ndarray of str
        ``"normal"`` (age_a = mean, age_b = sd), ``"uniform"`` (age_a = min, age_b = max),
        or ``"default"`` (use the reservoir's default window from the priors; age_a, age_b NaN).
    age_a, age_b : ndarray of float
        Age parameters in Myr after CAI formation, as described by ``age_kind``.
    method : ndarray of str
        One of METHODS, or ``""`` when absent (no calibration term).
    remanence : ndarray of str
        One of REMANENCES, or ``""`` when absent (no remanence term).
    ln_fraction_mean, ln_fraction_sd : ndarray of float
        Recording fraction e as lognormal: ln(e) ~ N(mean, sd^2); defaults 0, 0.
    spin_factor : ndarray of float
        Factor divided out of the value (already applied to ``ln_value``); default 1.
    """

    record: np.ndarray
    body_index: np.ndarray
    is_limit: np.ndarray
    ln_value: np.ndarray
    ln_err: np.ndarray
    age_kind: np.ndarray
    age_a: np.ndarray
    age_b: np.ndarray
    method: np.ndarray
    remanence: np.ndarray
    ln_fraction_mean: np.ndarray
    ln_fraction_sd: np.ndarray
    spin_factor: np.ndarray

    def __len__(self) -> int:
        return len(self.record)


@dataclass(frozen=True)
class Body:
    """A parent body (all its included records share one formation distance).

    Attributes
    ----------
    name : str
    reservoir : str
        ``NC``, ``CC`` or a reservoir defined in the prior files.
    distance_min, distance_max : float
        Per-body uniform distance override in AU, or NaN when the reservoir prior applies.
    record_indices : tuple of int
        Indices into ``Records`` of this body's included records.
    """

    name: str
    reservoir: str
    distance_min: float
    distance_max: float
    record_indices: tuple[int, ...]


@dataclass(frozen=True)
class Exclusion:
    """A row kept in the file and report but out of the fit (``include = false``)."""

    record: str
    body: str
    row: int
    note: str


@dataclass(frozen=True)
class Compilation:
    """A validated compilation.

    Attributes
    ----------
    source : str
        Path of the file read.
    table : astropy.table.Table
        Every row as read (included and excluded), values converted to uT / Myr / AU,
        with a ``row`` column (1-based data row) for reporting.
    records : Records
        The included records.
    bodies : tuple of Body
        Bodies with at least one included record, in order of first appearance.
    excluded : tuple of Exclusion
    conversions : tuple of str
        Human-readable notes of unit conversions and corrections applied
        (e.g. "paleointensity: G -> uT (x100)", "record 'X-2': spin factor 2 divided out").
    data_hash : str
        SHA-256 of the file's bytes (for manifests).
    """

    source: str
    table: object
    records: Records
    bodies: tuple[Body, ...]
    excluded: tuple[Exclusion, ...] = ()
    conversions: tuple[str, ...] = ()
    data_hash: str = ""
    reservoirs: tuple[str, ...] = field(default=())

    @property
    def body_names(self) -> tuple[str, ...]:
        return tuple(b.name for b in self.bodies)


def read_compilation(path, *, known_reservoirs=None) -> Compilation:
    """Read and validate a compilation file (ECSV, or CSV with ``name [unit]`` headers).

    Parameters
    ----------
    path : str or os.PathLike
        The compilation file.
    known_reservoirs : iterable of str, optional
        Valid reservoir names (default: those defined in the shipped prior files,
        falling back to ``("NC", "CC", "CC_distal")``).

    Raises
    ------
    CompilationError
        Listing every problem of the file, each with file, row, record and column.
    """
    raise NotImplementedError("being implemented")
