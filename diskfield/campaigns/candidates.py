"""Candidate new measurements for ``diskfield forecast``: reading, validation, augmentation.

A candidates file (ECSV, or CSV with ``name [unit]`` headers) has one row per candidate:

* ``candidate`` (required): unique id.
* ``body`` and/or ``reservoir`` (at least one): an existing body (in the refit its new records
  share the body's distance and spin) or a new body's name; a new body needs its reservoir
  (``NC``, ``CC``, ... as defined in the prior files).
* ``age``, ``age_err`` (optional, together): expected age, Myr after CAI formation (Gaussian);
  absent: the reservoir's default window.
* ``method`` (optional): ``ARM``, ``IRM``, ``thermal``, ``other``; blank: no calibration term.
* ``remanence`` (optional): ``TRM``, ``CRM``, ``unknown``; blank: no term.
* ``ln_err`` or ``relative_err`` (exactly one): expected 1-sigma of ln(paleointensity), or the
  relative error (equal to first order).
* ``n_records`` (required): number of new records, an integer >= 1.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import CompilationError, Problem
from ..records import METHODS, REMANENCES, Body

__all__ = ["Candidate", "read_candidates", "augment_compilation", "CANDIDATE_COLUMNS"]

CANDIDATE_COLUMNS = ("candidate", "body", "reservoir", "age", "age_err", "method", "remanence",
                     "ln_err", "relative_err", "n_records")
_UNITS = {"age": "Myr", "age_err": "Myr"}


@dataclass(frozen=True)
class Candidate:
    """One candidate measurement campaign (``n_records`` new records of one body).

    Attributes
    ----------
    candidate : str
    body : str
        Existing body name, or the new body's name.
    reservoir : str
    new_body : bool
    age, age_err : float
        Myr after CAI formation; NaN when the reservoir's default window applies.
    method, remanence : str
        ``""`` for none.
    ln_err : float
        Expected 1-sigma of ln(paleointensity) of each record.
    n_records : int
    """

    candidate: str
    body: str
    reservoir: str
    new_body: bool
    age: float
    age_err: float
    method: str
    remanence: str
    ln_err: float
    n_records: int


def _read_table(path: Path):
    from astropy.table import Table

    fmt = "ascii.ecsv" if path.suffix.lower() == ".ecsv" else "ascii.csv"
    try:
        table = Table.read(path, format=fmt)
    except FileNotFoundError:
        raise CompilationError("file not found; give a candidates file (.ecsv or .csv)",
                               source=str(path)) from None
    except Exception as err:  # astropy raises many types for malformed text
        raise CompilationError(f"cannot be read as {fmt[6:].upper()}: {err}",
                               source=str(path)) from None
    return _strip_unit_headers(table, path)


def _strip_unit_headers(table, path):
    """CSV headers ``name [unit]`` -> column ``name`` converted to the internal unit."""
    import astropy.units as u

    for name in list(table.colnames):
        base, unit = name, table[name].unit
        if "[" in name and name.rstrip().endswith("]"):
            base, unit = name.split("[", 1)[0].strip(), name.split("[", 1)[1].rstrip(" ]")
            table.rename_column(name, base)
        if base in _UNITS and unit not in (None, ""):
            try:
                factor = u.Unit(str(unit)).to(_UNITS[base])
            except (ValueError, u.UnitConversionError):
                raise CompilationError(Problem(str(path), f"unit {unit!s} is not a time unit; "
                                               "give Myr (or kyr, yr)", column=base)) from None
            from astropy.table import MaskedColumn

            values = np.ma.asarray(table[base]).astype(float) * factor
            table[base] = MaskedColumn(values.data, mask=np.ma.getmaskarray(values))
    return table


def _cell(table, row: int, name: str):
    if name not in table.colnames:
        return None
    value = table[name][row]
    if np.ma.is_masked(value):
        return None
    text = str(value).strip()
    return None if text in ("", "--", "nan") else value


class _Checker:
    """Collects every problem of a candidates file."""

    def __init__(self, source: str):
        self.source, self.problems = source, []

    def bad(self, row, cand, column, message):
        self.problems.append(Problem(self.source, message, row=row + 1, record=cand, column=column))

    def number(self, table, row, cand, column, *, positive=False, integer=False):
        value = _cell(table, row, column)
        if value is None:
            return None
        try:
            x = float(value)
        except (TypeError, ValueError):
            self.bad(row, cand, column, f"got {str(value)!r}; must be a number")
            return None
        ok = math.isfinite(x) and (x > 0 or not positive) and (not integer or x == int(x))
        if not ok:
            what = ("a positive integer" if integer else "a positive number" if positive
                    else "finite")
            self.bad(row, cand, column, f"got {str(value)!r}; must be {what}")
            return None
        return x


def read_candidates(path, comp, reservoirs) -> tuple[Candidate, ...]:
    """Read and validate a candidates file against a compilation.

    Parameters
    ----------
    path : path
        ECSV or CSV file (columns: module docstring).
    comp : Compilation
        The current compilation (existing bodies and their reservoirs).
    reservoirs : iterable of str
        Reservoirs with a distance prior (from the prior files).

    Raises
    ------
    CompilationError
        Every problem, each naming the file, row, candidate and column.
    """
    path = Path(path)
    table = _read_table(path)
    check = _Checker(str(path))
    unknown = [c for c in table.colnames if c not in CANDIDATE_COLUMNS]
    for col in unknown:
        check.problems.append(Problem(str(path), f"unknown column; valid: "
                                      f"{', '.join(CANDIDATE_COLUMNS)}", column=col))
    for col in ("candidate", "n_records"):
        if col not in table.colnames:
            check.problems.append(Problem(str(path), "required column is missing", column=col))
    if check.problems:
        raise CompilationError(check.problems)
    bodies = {b.name: b.reservoir for b in comp.bodies}
    out = [_candidate(table, i, check, bodies, tuple(reservoirs)) for i in range(len(table))]
    _check_unique(out, check)
    if not out:
        check.problems.append(Problem(str(path), "no candidate rows"))
    if check.problems:
        raise CompilationError(check.problems)
    return tuple(out)


def _check_unique(cands, check):
    seen = {}
    for i, c in enumerate(cands):
        if c is not None and c.candidate in seen:
            check.bad(i, c.candidate, "candidate",
                      f"duplicate id (also row {seen[c.candidate] + 1}); ids must be unique")
        elif c is not None:
            seen[c.candidate] = i


def _candidate(table, i, check, bodies, reservoirs):
    cand = _cell(table, i, "candidate")
    cand = None if cand is None else str(cand).strip()
    if cand is None:
        check.bad(i, None, "candidate", "is blank; every row needs a candidate id")
    body, reservoir = (_text(table, i, c) for c in ("body", "reservoir"))
    body, reservoir, new = _place(i, cand, body, reservoir, bodies, reservoirs, check)
    age, age_err = _ages(table, i, cand, check)
    method, remanence = _text(table, i, "method"), _text(table, i, "remanence")
    if method and method not in METHODS:
        check.bad(i, cand, "method", f"got {method!r}; valid: {', '.join(METHODS)} or blank")
    if remanence and remanence not in REMANENCES:
        check.bad(i, cand, "remanence", f"got {remanence!r}; valid: {', '.join(REMANENCES)} "
                  "or blank")
    ln_err = _error(table, i, cand, check)
    n = check.number(table, i, cand, "n_records", positive=True, integer=True)
    if n is None and _cell(table, i, "n_records") is None:
        check.bad(i, cand, "n_records", "is blank; give the number of new records (>= 1)")
    if cand is None or body is None or ln_err is None or n is None:
        return None
    return Candidate(cand, body, reservoir, new, age, age_err, method, remanence, ln_err, int(n))


def _text(table, i, column) -> str:
    value = _cell(table, i, column)
    return "" if value is None else str(value).strip()


def _place(i, cand, body, reservoir, bodies, reservoirs, check):
    if not body and not reservoir:
        check.bad(i, cand, "body", "body and reservoir are both blank; give an existing body "
                  "or the reservoir of a new one")
        return None, None, False
    if body in bodies:
        if reservoir and reservoir != bodies[body]:
            check.bad(i, cand, "reservoir", f"got {reservoir!r} but body {body!r} is in "
                      f"reservoir {bodies[body]!r}")
        return body, bodies[body], False
    if reservoir not in reservoirs:
        check.bad(i, cand, "reservoir", f"got {reservoir!r}"
                  + (f" for new body {body!r}" if body else "")
                  + f"; valid: {', '.join(reservoirs)} (or name an existing body: "
                  f"{', '.join(bodies)})")
        return None, None, True
    return body or f"new:{cand}", reservoir, True


def _ages(table, i, cand, check):
    age = check.number(table, i, cand, "age")
    age_err = check.number(table, i, cand, "age_err", positive=True)
    if (age is None) != (age_err is None) and not _blank_pair(table, i):
        column = "age_err" if age_err is None else "age"
        check.bad(i, cand, column, "give age and age_err together (Myr after CAI), or neither "
                  "to use the reservoir's window")
    if age is None or age_err is None:
        return math.nan, math.nan
    return age, age_err


def _blank_pair(table, i) -> bool:
    return _cell(table, i, "age") is None and _cell(table, i, "age_err") is None


def _error(table, i, cand, check):
    ln_err = check.number(table, i, cand, "ln_err", positive=True)
    rel = check.number(table, i, cand, "relative_err", positive=True)
    given = [c for c in ("ln_err", "relative_err") if _cell(table, i, c) is not None]
    if len(given) != 1:
        check.bad(i, cand, "ln_err", "give exactly one of ln_err and relative_err "
                  f"(got {'both' if given else 'neither'})")
        return None
    # First-order propagation, as the compilation reader does: sd(ln P) ~ sd(P) / P.
    return ln_err if ln_err is not None else rel


def augment_compilation(comp, cand: Candidate):
    """``comp`` plus the candidate's records (placeholder values) and the indices of those rows.

    Returns
    -------
    (Compilation, ndarray of int)
    """
    recs, n, k = comp.records, len(comp.records), cand.n_records
    names = [b.name for b in comp.bodies]
    g = names.index(cand.body) if cand.body in names else len(names)
    kind = "default" if math.isnan(cand.age) else "normal"
    extra = {"record": np.array([f"{cand.candidate}-{j + 1}" for j in range(k)]),
             "body_index": np.full(k, g), "is_limit": np.zeros(k, bool),
             "ln_value": np.zeros(k), "ln_err": np.full(k, cand.ln_err),
             "age_kind": np.full(k, kind), "age_a": np.full(k, cand.age),
             "age_b": np.full(k, cand.age_err), "method": np.full(k, cand.method),
             "remanence": np.full(k, cand.remanence), "ln_fraction_mean": np.zeros(k),
             "ln_fraction_sd": np.zeros(k), "spin_factor": np.ones(k)}
    fields = {f.name: np.concatenate([np.asarray(getattr(recs, f.name)), extra[f.name]])
              for f in dataclasses.fields(recs)}
    new_idx = tuple(range(n, n + k))
    bodies = [dataclasses.replace(b, record_indices=b.record_indices + new_idx)
              if b.name == cand.body else b for b in comp.bodies]
    if g == len(names):
        bodies.append(Body(cand.body, cand.reservoir, math.nan, math.nan, new_idx))
    aug = dataclasses.replace(comp, records=dataclasses.replace(recs, **fields),
                              bodies=tuple(bodies), source=f"{comp.source} + {cand.candidate}",
                              data_hash="",
                              reservoirs=tuple(dict.fromkeys(tuple(comp.reservoirs)
                                                             + (cand.reservoir,))))
    return aug, np.array(new_idx)
