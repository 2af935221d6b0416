"""Compilation reader: a validated, unit-converted table of paleointensity records.

``read_compilation(path)`` returns a :class:`Compilation`; everything downstream
(likelihood, simulation, reports) uses only the attributes declared here.
``write_compilation`` writes a compilation (or any table with the same columns) back
as ECSV or as CSV with ``name [unit]`` headers.

File format (DESIGN §3): one row per paleointensity record. Column names are matched
case-insensitively; vocabulary values (``reservoir``, ``kind``, ``method``,
``remanence``) are matched case-insensitively, with ``-`` or a space read as ``_``,
and canonicalised (``nc`` -> ``NC``, ``Upper_Limit`` -> ``upper_limit``, ``arm`` ->
``ARM``). ``include`` accepts true/false/yes/no/1/0 in any case (blank: true).
Every problem of a file is collected into one :class:`~diskfield.errors.CompilationError`.
"""
from __future__ import annotations

import csv
import difflib
import hashlib
import io
import math
import os
import re
import tomllib
import dataclasses
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import CompilationError, OptionError, PriorFileError, Problem

__all__ = [
    "Records",
    "Body",
    "Exclusion",
    "Compilation",
    "read_compilation",
    "write_compilation",
    "compilation_table",
    "without_body",
    "known_reservoir_names",
    "KINDS",
    "METHODS",
    "REMANENCES",
    "AGE_KINDS",
    "COLUMNS",
    "REQUIRED_COLUMNS",
    "DEFAULT_RESERVOIRS",
]

#: Closed vocabularies (DESIGN §3). Reservoirs beyond these may be defined in prior files.
KINDS = ("estimate", "upper_limit")
METHODS = ("ARM", "IRM", "thermal", "other")
REMANENCES = ("TRM", "CRM", "unknown")
AGE_KINDS = ("normal", "uniform", "default")
#: Reservoir names used when no shipped ``reservoirs.toml`` exists (convention, DESIGN §3).
DEFAULT_RESERVOIRS = ("NC", "CC", "CC_distal")

# Column -> dimension: "text", "flag", "flux" (-> uT), "time" (-> Myr), "length" (-> AU),
# "ratio" (dimensionless).
_DIMENSIONS = {
    "record": "text", "body": "text", "reservoir": "text", "kind": "text",
    "paleointensity": "flux", "paleointensity_err": "flux", "ln_err": "ratio",
    "age": "time", "age_err": "time", "age_min": "time", "age_max": "time",
    "method": "text", "remanence": "text", "spin_factor_applied": "ratio",
    "recording_fraction": "ratio", "recording_fraction_err": "ratio",
    "distance_min": "length", "distance_max": "length",
    "include": "flag", "note": "text", "reference": "text",
}
#: Every column a compilation file may have, in canonical order.
COLUMNS = tuple(_DIMENSIONS)
#: Columns every compilation file must have.
REQUIRED_COLUMNS = ("record", "body", "reservoir", "kind", "paleointensity")

_INTERNAL_UNIT = {"flux": "uT", "time": "Myr", "length": "AU", "ratio": ""}
_PHYSICAL_NAME = {"flux": "magnetic flux density", "time": "time", "length": "length",
                  "ratio": "dimensionless"}
_VALID_UNITS = {
    "flux": "a magnetic flux density unit (uT, nT, mT, T, G; 'microTesla' and 'µT' also read)",
    "time": "a time unit (Myr, kyr, yr); no unit means Myr",
    "length": "a length unit (AU, km); no unit means AU",
    "ratio": "no unit (dimensionless) or %",
}
_TRUE = ("true", "yes", "1", "t", "y")
_FALSE = ("false", "no", "0", "f", "n")
_HEADER = re.compile(r"^\s*([^\[\]]*?)\s*(?:\[\s*([^\[\]]*?)\s*\])?\s*$")


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


# ----------------------------------------------------------------------------- problems


class _Collector:
    """Gathers every problem of one file; rows are 0-based internally, 1-based in output."""

    def __init__(self, source: str):
        self.source = source
        self.problems: list[Problem] = []
        self.lines: list[int | None] = []
        self.records: dict[int, str] = {}

    def add(self, message: str, *, row: int | None = None, column: str | None = None):
        line = self.lines[row] if row is not None and row < len(self.lines) else None
        record = self.records.get(row) if row is not None else None
        self.problems.append(Problem(self.source, message, row=None if row is None else row + 1,
                                     line=line, record=record, column=column))

    def raise_if_any(self):
        if self.problems:
            # File-level problems first, then by row (stable: a row's problems keep column order).
            ordered = sorted(self.problems, key=lambda p: (p.row is not None, p.row or 0))
            raise CompilationError(ordered, self.source)


def _fail(source: str, message: str):
    raise CompilationError([Problem(source, message)], source)


# ----------------------------------------------------------------------------- raw parsing


@dataclass
class _Raw:
    """A file's header and cells before any interpretation."""

    headers: list[tuple[str, str | None]]  # (name as written, unit string or None)
    rows: list[list]                        # cells: str, bool, int, float or None (blank)
    lines: list[int | None]                 # file line of each data row


def _load_text(path) -> tuple[str, str, bytes]:
    source = os.fspath(path)
    try:
        data = Path(source).read_bytes()
    except FileNotFoundError:
        _fail(source, "file not found")
    except IsADirectoryError:
        _fail(source, "is a folder, not a compilation file")
    except OSError as err:
        _fail(source, f"cannot be read ({err.strerror or err})")
    if not data.strip():
        _fail(source, "file is empty; expected an ECSV or CSV table with columns "
                      + ", ".join(REQUIRED_COLUMNS) + " at least")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        _fail(source, f"not a UTF-8 text file (undecodable byte at offset {err.start}); "
                      "expected an ECSV or CSV table")
    if "\x00" in text:
        _fail(source, "contains NUL bytes: not a text table; expected ECSV or CSV")
    return source, text, data


def _split_header(cell: str, collector: _Collector, position: int) -> tuple[str, str | None]:
    match = _HEADER.match(cell)
    if match is None:
        collector.add(f"header cell {position} {cell!r} is not 'name' or 'name [unit]'")
        return cell.strip(), None
    name, unit = match.group(1), match.group(2)
    return name, unit


def _parse_csv(text: str, collector: _Collector) -> _Raw:
    reader = csv.reader(io.StringIO(text, newline=""))
    headers, rows = None, []
    try:
        for cells in reader:
            if not any(c.strip() for c in cells):
                continue  # blank lines carry no data
            if headers is None and cells[0].lstrip().startswith("#"):
                continue  # comments only above the header: a '#' row below it is data
            if headers is None:
                headers = [_split_header(c, collector, i + 1) for i, c in enumerate(cells)]
                continue
            collector.lines.append(reader.line_num)
            rows.append([c if c.strip() else None for c in cells])
    except csv.Error as err:
        _fail(collector.source, f"line {reader.line_num}: not readable as CSV ({err})")
    if headers is None:
        _fail(collector.source, "no header line found; expected CSV with columns "
                                + ", ".join(REQUIRED_COLUMNS) + " at least")
    _check_row_lengths(rows, len(headers), collector)
    return _Raw(headers, rows, collector.lines)


def _check_row_lengths(rows: list[list], width: int, collector: _Collector):
    for i, cells in enumerate(rows):
        if len(cells) != width:
            collector.add(f"has {len(cells)} cells; the header has {width} columns", row=i)
            cells[:] = (cells + [None] * width)[:width]


def _ecsv_lines(text: str) -> list[int]:
    """File line numbers of the data rows (after the comment header and the names line)."""
    numbered = [(i + 1, ln) for i, ln in enumerate(text.splitlines())
                if ln.strip() and not ln.lstrip().startswith("#")]
    return [n for n, _ in numbered[1:]]


def _cell(value):
    if value is np.ma.masked or value is None:
        return None
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    text = str(value)
    return text if text.strip() else None


def _parse_ecsv(text: str, collector: _Collector) -> _Raw:
    from astropy.table import Table

    try:
        table = Table.read(text.splitlines(), format="ascii.ecsv")
    except Exception as err:  # astropy raises many types on malformed input; report, don't crash
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        _fail(collector.source, f"cannot be read as ECSV ({first})")
    headers, columns = [], []
    for col in table.itercols():
        name, unit = _split_header(col.name, collector, len(headers) + 1)
        if col.unit is not None and str(col.unit):
            unit = col.unit.to_string()
        if col.ndim > 1:
            collector.add(f"has {col.shape[1:]} values per row; every column must hold one value "
                          "per row", column=name)
        headers.append((name, unit))
        columns.append(col)
    lines = _ecsv_lines(text)
    collector.lines = lines if len(lines) == len(table) else [None] * len(table)
    rows = [[_cell(col[i]) if col.ndim == 1 else None for col in columns]
            for i in range(len(table))]
    return _Raw(headers, rows, collector.lines)


def _parse(text: str, source: str, collector: _Collector) -> _Raw:
    if text.lstrip().startswith("# %ECSV"):
        return _parse_ecsv(text, collector)
    if source.lower().endswith(".ecsv"):
        _fail(source, "not an ECSV file: the first line must start with '# %ECSV' "
                      "(rename it .csv if it is a CSV table with 'name [unit]' headers)")
    return _parse_csv(text, collector)


# ----------------------------------------------------------------------------- columns and units


@dataclass
class _Column:
    """A recognised column: its position in the file and the factor to internal units."""

    position: int
    unit: str | None
    factor: float | None  # None: the unit is invalid (already reported)


def _match_columns(raw: _Raw, collector: _Collector) -> dict[str, _Column]:
    found: dict[str, _Column] = {}
    unknown = []
    for position, (name, unit) in enumerate(raw.headers):
        key = name.strip().lower()
        if key in found:
            collector.add(f"column {name!r} appears twice (columns {found[key].position + 1} and "
                          f"{position + 1})", column=name)
        elif key in _DIMENSIONS:
            found[key] = _Column(position, unit, None)
        else:
            unknown.append(name)
    if not found:
        _fail(collector.source, _no_known_columns_message(unknown))
    for name in unknown:
        collector.add(_unknown_column_message(name), column=name)
    for name in REQUIRED_COLUMNS:
        if name not in found:
            collector.add(_missing_column_message(name, unknown), column=name)
    return found


def _no_known_columns_message(names: list[str]) -> str:
    shown = ", ".join(repr(n) for n in names[:5]) + (", ..." if len(names) > 5 else "")
    other = next((d for d in (";", "\t", "|") if any(d in n for n in names)), None)
    hint = f" (columns must be separated by commas, not {other!r})" if other else ""
    return (f"no compilation column in the header (got {shown}){hint}; is this a compilation "
            "file? required columns: " + ", ".join(REQUIRED_COLUMNS))


def _unknown_column_message(name: str) -> str:
    close = difflib.get_close_matches(name.strip().lower(), COLUMNS, n=1, cutoff=0.6)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    shown = name if name.strip() else "(empty name)"
    return (f"unknown column {shown!r}{hint}; valid columns: " + ", ".join(COLUMNS))


def _missing_column_message(name: str, unknown: list[str]) -> str:
    close = difflib.get_close_matches(name, [u.strip().lower() for u in unknown], n=1, cutoff=0.6)
    hint = f" (is column {close[0]!r} meant to be {name!r}?)" if close else ""
    return f"required column {name!r} is missing{hint}; required: " + ", ".join(REQUIRED_COLUMNS)


def _resolve_units(found: dict[str, _Column], collector: _Collector, notes: list[str]):
    for name in COLUMNS:  # canonical order: paleointensity before its error
        if name in found:
            found[name].factor = _column_factor(name, found, collector, notes)


def _column_factor(name, found, collector, notes) -> float | None:
    dimension, unit = _DIMENSIONS[name], found[name].unit
    if dimension in ("text", "flag"):
        if unit:
            collector.add(f"got unit {unit!r}; this column holds text and takes no unit",
                          column=name)
        return 1.0
    if not unit:
        return _default_factor(name, dimension, found, collector, notes)
    return _unit_factor(name, dimension, unit, collector, notes)


def _default_factor(name, dimension, found, collector, notes) -> float | None:
    if name == "paleointensity":
        collector.add("has no unit; write it in the header as 'paleointensity [uT]' (valid: "
                      + _VALID_UNITS["flux"] + ")", column=name)
        return None
    if name == "paleointensity_err":
        parent = found["paleointensity"] if "paleointensity" in found else None
        if parent is None or parent.factor is None:
            return None
        notes.append(f"paleointensity_err: no unit given; taken as paleointensity's unit "
                     f"({parent.unit})")
        return parent.factor
    if dimension in ("time", "length"):
        notes.append(f"{name}: no unit given; taken as {_INTERNAL_UNIT[dimension]}")
    return 1.0


def _unit_factor(name, dimension, unit, collector, notes) -> float | None:
    import astropy.units as u

    try:
        parsed = u.Unit(unit, parse_strict="raise")
    except Exception:  # astropy raises ValueError or TypeError subclasses for unparseable units
        collector.add(f"got unit {unit!r}, which is not a unit; valid: {_VALID_UNITS[dimension]}",
                      column=name)
        return None
    target = u.Unit(_INTERNAL_UNIT[dimension]) if _INTERNAL_UNIT[dimension] else u.one
    if not parsed.is_equivalent(target):
        collector.add(f"got unit {unit!r} ({parsed.physical_type}), not a "
                      f"{_PHYSICAL_NAME[dimension]} unit; valid: {_VALID_UNITS[dimension]}",
                      column=name)
        return None
    factor = float(parsed.to(target))
    if factor != 1.0:
        shown = _INTERNAL_UNIT[dimension] or "dimensionless"
        notes.append(f"{name}: {unit} -> {shown} (x{factor:.10g})")
    return factor


# ----------------------------------------------------------------------------- cells


def _canonical_word(text: str) -> str:
    return re.sub(r"[\s\-]+", "_", text.strip()).lower()


def _to_float(value) -> float | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return float(value)
    try:
        return float(str(value).strip())
    except ValueError:
        return None


class _Cells:
    """Typed access to one data row; problems go to the collector, converted values to ``out``.

    While ``strict`` is False (a row with ``include = false``) only problems of the
    record/body ids and the include flag are reported.
    """

    def __init__(self, raw_row, index, columns, collector):
        self.raw, self.index, self.columns, self.collector = raw_row, index, columns, collector
        self.strict = True
        self.out: dict[str, object] = {}

    def usable(self, name) -> bool:
        """The column exists and its unit is valid (otherwise it was reported already)."""
        column = self.columns.get(name)
        return column is not None and column.factor is not None

    def get(self, name):
        return self.raw[self.columns[name].position] if self.usable(name) else None

    def bad(self, name, got, valid, *, always=False):
        """Report ``valid`` for this cell; ``got`` None for a blank cell."""
        if self.strict or always:
            message = valid if got is None else f"got {got!r}; {valid}"
            self.collector.add(message, row=self.index, column=name)

    def text(self, name, *, required=False, always=False) -> str:
        value = self.get(name)
        text = "" if value is None else str(value).strip()
        if required and not text and self.usable(name):
            self.bad(name, None, "is blank; a value is required", always=always)
        self.out[name] = text
        return text

    def choice(self, name, valid, *, required=False) -> str:
        text = self.text(name, required=required)
        if not text:
            return ""
        lookup = {_canonical_word(v): v for v in valid}
        canonical = lookup.get(_canonical_word(text))
        if canonical is None:
            self.bad(name, text, "valid (any case): " + ", ".join(valid))
            return ""
        self.out[name] = canonical
        return canonical

    def flag(self, name) -> bool:
        value = self.get(name)
        if value is None:
            self.out[name] = True
            return True
        word = str(value).strip().lower()
        if isinstance(value, float) and value in (0.0, 1.0):
            word = str(int(value))
        if word in _TRUE or word in _FALSE:
            self.out[name] = word in _TRUE
            return word in _TRUE
        self.bad(name, str(value), "valid: true/false, yes/no, 1/0", always=True)
        self.out[name] = True
        return True

    def number(self, name, *, required=False, low=None, low_open=False, high=None) -> float | None:
        """Value in internal units; None when blank, NaN when invalid (reported)."""
        value = self.get(name)
        self.out[name] = math.nan
        if name in self.columns and not self.usable(name):
            # The column's unit was rejected: a filled cell is unusable, not blank, so no
            # follow-on problems ("age_err given without age") are reported for it.
            return None if self.raw[self.columns[name].position] is None else math.nan
        if value is None:
            if required and self.usable(name):
                self.bad(name, None, "is blank; a number is required")
            return None
        x = _to_float(value)
        if x is None or not math.isfinite(x):
            self.bad(name, value, "must be a finite number" + _range_text(low, low_open, high))
            return math.nan
        if not _in_range(x, low, low_open, high):
            self.bad(name, value, "must be" + _range_text(low, low_open, high))
            return math.nan
        x *= self.columns[name].factor
        self.out[name] = x
        return x


def _in_range(x, low, low_open, high) -> bool:
    if low is not None and (x < low or (low_open and x == low)):
        return False
    return high is None or x <= high


def _range_text(low, low_open, high) -> str:
    if low is None and high is None:
        return ""
    if high is None:
        return " > 0" if (low == 0 and low_open) else f" >= {low:g}"
    left = "(" if low_open else "["
    return f" in {left}{low:g}, {high:g}]"


# ----------------------------------------------------------------------------- rows


@dataclass
class _Row:
    """One data row after validation (values in internal units)."""

    index: int
    record: str
    body: str
    include: bool
    note: str
    reservoir: str = ""
    kind: str = ""
    ln_value: float = math.nan
    ln_err: float = math.nan
    age: tuple[str, float, float] = ("default", math.nan, math.nan)
    method: str = ""
    remanence: str = ""
    spin: float = 1.0
    ln_fraction: tuple[float, float] = (0.0, 0.0)
    distance: tuple[float, float] | None = None
    values: dict = field(default_factory=dict)


def _parse_row(cells: _Cells, reservoirs) -> _Row:
    record = cells.text("record", required=True, always=True)
    if record:
        cells.collector.records[cells.index] = record
    body = cells.text("body", required=True, always=True)
    include = cells.flag("include")
    cells.strict = include  # excluded rows: only ids and the flag must be valid
    row = _Row(cells.index, record, body, include, cells.text("note"))
    cells.text("reference")
    row.reservoir = cells.choice("reservoir", reservoirs, required=True)
    row.kind = cells.choice("kind", KINDS, required=True)
    value = cells.number("paleointensity", required=True, low=0, low_open=True)
    row.ln_err = _log_error(cells, row.kind, value)
    row.age = _age(cells)
    row.method = cells.choice("method", METHODS)
    row.remanence = cells.choice("remanence", REMANENCES)
    spin = cells.number("spin_factor_applied", low=0, low_open=True)
    row.spin = 1.0 if spin is None or math.isnan(spin) else spin
    if value is not None and value > 0:
        row.ln_value = math.log(value / row.spin)
    row.ln_fraction = _recording_fraction(cells)
    row.distance = _distance(cells)
    row.values = cells.out
    return row


def _log_error(cells: _Cells, kind: str, value) -> float:
    err = cells.number("paleointensity_err", low=0, low_open=kind != "upper_limit")
    ln_err = cells.number("ln_err", low=0, low_open=kind != "upper_limit")
    if err is not None and ln_err is not None:
        cells.bad("ln_err", cells.get("ln_err"),
                  "give either paleointensity_err or ln_err for a record, not both")
        return math.nan
    if ln_err is not None:
        return ln_err
    if err is not None:
        # First-order propagation: sd(ln P) ~ sd(P) / P.
        return err / value if value else math.nan
    if kind == "estimate":
        cells.bad("paleointensity_err", None, "is blank; an estimate needs paleointensity_err or ln_err "
                  "(only an upper_limit may omit its error)")
        return math.nan
    return 0.0


def _age(cells: _Cells) -> tuple[str, float, float]:
    age = cells.number("age")
    age_err = cells.number("age_err", low=0, low_open=True)
    age_min, age_max = cells.number("age_min"), cells.number("age_max")
    if age is not None and (age_min is not None or age_max is not None):
        both = "age_min" if age_min is not None else "age_max"
        cells.bad(both, cells.get(both),
                  "give either age (with age_err) or age_min/age_max for a record, not both")
    elif age is not None:
        if age_err is None:
            cells.bad("age_err", None, "is blank; a record with an age needs age_err (> 0)")
        return ("normal", age, age_err if age_err is not None else math.nan)
    elif age_err is not None:
        cells.bad("age", None, "is blank, but age_err is given, so age is needed too")
    elif (age_min is None) != (age_max is None):
        missing = "age_max" if age_max is None else "age_min"
        cells.bad(missing, None, "is blank; age_min and age_max must be given together")
    elif age_min is not None:
        if age_min >= age_max:
            cells.bad("age_max", cells.get("age_max"),
                      f"must be greater than age_min ({cells.get('age_min')})")
        return ("uniform", age_min, age_max)
    return ("default", math.nan, math.nan)


def _recording_fraction(cells: _Cells) -> tuple[float, float]:
    fraction = cells.number("recording_fraction", low=0, low_open=True, high=1)
    err = cells.number("recording_fraction_err", low=0)
    if fraction is None:
        if err is not None:
            cells.bad("recording_fraction", None, "is blank, but recording_fraction_err is "
                      "given; give the fraction too")
        return (0.0, 0.0)
    if math.isnan(fraction):
        return (math.nan, math.nan)
    sd = 0.0 if err is None else err / fraction  # first-order log error
    return (math.log(fraction), sd)


def _distance(cells: _Cells) -> tuple[float, float] | None:
    low = cells.number("distance_min", low=0, low_open=True)
    high = cells.number("distance_max", low=0, low_open=True)
    if low is None and high is None:
        return None
    if low is None or high is None:
        missing = "distance_min" if low is None else "distance_max"
        cells.bad(missing, None, "is blank; distance_min and distance_max must be given together")
        return None
    if low >= high:
        cells.bad("distance_max", cells.get("distance_max"),
                  f"must be greater than distance_min ({cells.get('distance_min')})")
    return (low, high)


# ----------------------------------------------------------------------------- file-level checks


def _check_duplicates(rows: list[_Row], collector: _Collector):
    first: dict[str, int] = {}
    for row in rows:
        if not row.record:
            continue
        if row.record in first:
            collector.add(f"duplicate record id {row.record!r} (first at row "
                          f"{first[row.record] + 1}); record ids must be unique",
                          row=row.index, column="record")
        else:
            first[row.record] = row.index


def _group_bodies(rows: list[_Row], collector: _Collector) -> dict[str, list[_Row]]:
    groups: dict[str, list[_Row]] = {}
    for row in rows:
        if row.include and row.body:
            groups.setdefault(row.body, []).append(row)
    for body, members in groups.items():
        _check_body_agrees(body, members, collector)
    return groups


def _check_body_agrees(body: str, members: list[_Row], collector: _Collector):
    ref = next((r for r in members if r.reservoir), None)
    dist_ref = next((r for r in members if r.distance is not None), None)
    for row in members:
        if ref and row.reservoir and row.reservoir != ref.reservoir:
            collector.add(f"got {row.reservoir!r}; body {body!r} is in reservoir "
                          f"{ref.reservoir!r} at row {ref.index + 1} (record {ref.record!r}); "
                          "records of a body must share one reservoir",
                          row=row.index, column="reservoir")
        if dist_ref and row.distance is not None and not np.allclose(
                row.distance, dist_ref.distance, rtol=1e-12, atol=0):
            collector.add(f"got distance {row.distance[0]:g}-{row.distance[1]:g} AU; body "
                          f"{body!r} has {dist_ref.distance[0]:g}-{dist_ref.distance[1]:g} AU at "
                          f"row {dist_ref.index + 1} (record {dist_ref.record!r}); a body has "
                          "one distance override", row=row.index, column="distance_min")


def _check_not_empty(rows: list[_Row], collector: _Collector):
    if not rows:
        collector.add("no data rows: the file has a header but no records")
    elif not any(r.include for r in rows):
        collector.add(f"every one of the {len(rows)} rows has include = false: nothing to fit")


# ----------------------------------------------------------------------------- assembly


def _build_records(groups: dict[str, list[_Row]]) -> tuple[Records, tuple[Body, ...]]:
    ordered = [row for members in groups.values() for row in members]
    ordered.sort(key=lambda r: r.index)
    body_order = {name: i for i, name in enumerate(groups)}
    records = Records(
        record=np.array([r.record for r in ordered], dtype=str),
        body_index=np.array([body_order[r.body] for r in ordered], dtype=int),
        is_limit=np.array([r.kind == "upper_limit" for r in ordered], dtype=bool),
        ln_value=np.array([r.ln_value for r in ordered], dtype=float),
        ln_err=np.array([r.ln_err for r in ordered], dtype=float),
        age_kind=np.array([r.age[0] for r in ordered], dtype=str),
        age_a=np.array([r.age[1] for r in ordered], dtype=float),
        age_b=np.array([r.age[2] for r in ordered], dtype=float),
        method=np.array([r.method for r in ordered], dtype=str),
        remanence=np.array([r.remanence for r in ordered], dtype=str),
        ln_fraction_mean=np.array([r.ln_fraction[0] for r in ordered], dtype=float),
        ln_fraction_sd=np.array([r.ln_fraction[1] for r in ordered], dtype=float),
        spin_factor=np.array([r.spin for r in ordered], dtype=float),
    )
    position = {r.index: i for i, r in enumerate(ordered)}
    bodies = tuple(_make_body(name, members, position) for name, members in groups.items())
    return records, bodies


def _make_body(name: str, members: list[_Row], position: dict[int, int]) -> Body:
    override = next((r.distance for r in members if r.distance is not None), None)
    low, high = override if override is not None else (math.nan, math.nan)
    return Body(name=name, reservoir=members[0].reservoir, distance_min=low, distance_max=high,
                record_indices=tuple(position[r.index] for r in members))


def _build_table(rows: list[_Row], found: dict[str, _Column]):
    from astropy.table import Table

    names = sorted(found, key=lambda n: found[n].position)
    table = Table()
    for name in names:
        values = [r.values.get(name) for r in rows]
        dimension = _DIMENSIONS[name]
        if dimension == "text":
            table[name] = np.array([v or "" for v in values], dtype=str)
        elif dimension == "flag":
            table[name] = np.array([bool(v) for v in values], dtype=bool)
        else:
            table[name] = np.array([math.nan if v is None else v for v in values], dtype=float)
            if _INTERNAL_UNIT[dimension]:
                table[name].unit = _INTERNAL_UNIT[dimension]
    table["row"] = np.arange(1, len(rows) + 1, dtype=int)
    return table


def _spin_notes(rows: list[_Row]) -> list[str]:
    return [f"record {r.record!r}: spin factor {r.spin:g} divided out"
            for r in rows if r.include and r.spin != 1.0]


def known_reservoir_names(paths=None) -> tuple[str, ...]:
    """Reservoir names defined by ``[reservoirs.<NAME>]`` tables of prior files.

    Parameters
    ----------
    paths : sequence of str or os.PathLike, optional
        Prior TOML files to read in addition to the shipped ``reservoirs.toml``.

    Returns
    -------
    tuple of str
        Names in order of first definition; ``DEFAULT_RESERVOIRS`` when no file defines any.

    Raises
    ------
    PriorFileError
        A file that is not valid TOML.
    """
    from .resources import priors_dir

    try:
        files = [priors_dir() / "reservoirs.toml"]
    except FileNotFoundError:
        files = []
    files += [Path(p) for p in (paths or ())]
    names: list[str] = []
    for path in files:
        for name in _reservoirs_in(path):
            if name not in names:
                names.append(name)
    return tuple(names) or DEFAULT_RESERVOIRS


def _reservoirs_in(path: Path) -> list[str]:
    if not path.is_file():
        return []
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise PriorFileError(Problem(str(path), f"not valid TOML ({err})")) from None
    table = data.get("reservoirs", {})
    return list(table) if isinstance(table, dict) else []


def read_compilation(path, *, known_reservoirs=None) -> Compilation:
    """Read and validate a compilation file (ECSV, or CSV with ``name [unit]`` headers).

    Parameters
    ----------
    path : str or os.PathLike
        The compilation file. A file starting with ``# %ECSV`` is read as ECSV, any
        other as CSV (a ``.ecsv`` file without that header is an error).
    known_reservoirs : iterable of str, optional
        Valid reservoir names (default: those defined in the shipped prior files,
        falling back to ``("NC", "CC", "CC_distal")``).

    Returns
    -------
    Compilation
        Paleointensities in uT, ages in Myr after CAI formation, distances in AU.
        Column names, reservoirs, kinds, methods and remanence types are matched
        case-insensitively (``-`` and spaces read as ``_``) and canonicalised.

    Raises
    ------
    CompilationError
        Listing every problem of the file, each with file, row, line, record and column.
    """
    source, text, data = _load_text(path)
    collector = _Collector(source)
    raw = _parse(text, source, collector)
    found = _match_columns(raw, collector)
    notes: list[str] = []
    _resolve_units(found, collector, notes)
    reservoirs = tuple(known_reservoirs) if known_reservoirs is not None else known_reservoir_names()
    rows = [_parse_row(_Cells(cells, i, found, collector), reservoirs)
            for i, cells in enumerate(raw.rows)]
    _check_duplicates(rows, collector)
    groups = _group_bodies(rows, collector)
    _check_not_empty(rows, collector)
    collector.raise_if_any()
    records, bodies = _build_records(groups)
    return Compilation(
        source=source, table=_build_table(rows, found), records=records, bodies=bodies,
        excluded=tuple(Exclusion(r.record, r.body, r.index + 1, r.note)
                       for r in rows if not r.include),
        conversions=tuple(notes + _spin_notes(rows)),
        data_hash=hashlib.sha256(data).hexdigest(),
        reservoirs=tuple(dict.fromkeys(b.reservoir for b in bodies)),
    )


def without_body(comp: Compilation, body: str,
                 note: str = "left out for a leave-one-body-out refit") -> Compilation:
    """``comp`` with every included record of ``body`` out of the fit, as ``include = false``.

    The other bodies keep their order, records and distance overrides; the left-out
    records are listed in ``excluded`` with ``note`` (and marked ``include = false`` in
    ``table`` when there is one).

    Parameters
    ----------
    comp : Compilation
    body : str
        A fitted body of ``comp``.
    note : str
        Reason carried into ``excluded``.

    Returns
    -------
    Compilation
        ``source`` says which body was left out; ``data_hash`` is derived from the
        original hash and the body's name (a checkpoint of the full data is not reused).

    Raises
    ------
    OptionError
        ``body`` is not a fitted body, or it is the only one.
    """
    names = comp.body_names
    if body not in names:
        raise OptionError("body", body, "one of the fitted bodies: " + ", ".join(names))
    if len(names) < 2:
        raise OptionError("body", body, "a body of a compilation with at least two bodies "
                          "(leaving out the only body leaves nothing to fit)")
    g = names.index(body)
    recs = comp.records
    keep = np.asarray(recs.body_index) != g
    new_index = np.cumsum(keep) - 1  # old record index -> new (for kept records)
    fields = {f.name: np.asarray(getattr(recs, f.name))[keep] for f in dataclasses.fields(recs)}
    fields["body_index"] = fields["body_index"] - (fields["body_index"] > g)
    bodies = tuple(dataclasses.replace(b, record_indices=tuple(int(new_index[i])
                                                               for i in b.record_indices))
                   for k, b in enumerate(comp.bodies) if k != g)
    left = [str(recs.record[i]) for i in comp.bodies[g].record_indices]
    table, rows = _table_without(comp.table, left)
    digest = (hashlib.sha256(f"{comp.data_hash}\0without\0{body}".encode()).hexdigest()
              if comp.data_hash else "")
    return dataclasses.replace(
        comp, records=dataclasses.replace(recs, **fields), bodies=bodies, table=table,
        excluded=comp.excluded + tuple(Exclusion(r, body, rows.get(r, 0), note) for r in left),
        source=f"{comp.source} without {body}", data_hash=digest,
        reservoirs=tuple(dict.fromkeys(b.reservoir for b in bodies)))


def _table_without(table, left):
    """Copy of ``table`` with the ``left`` records' include flag false; their data rows."""
    if table is None or "record" not in getattr(table, "colnames", ()):
        return table, {}
    out = table.copy()
    ids = np.asarray(out["record"]).astype(str)
    hit = np.isin(ids, left)
    include = (np.asarray(out["include"], bool) if "include" in out.colnames
               else np.ones(len(out), bool))
    out["include"] = include & ~hit
    rows = np.asarray(out["row"]) if "row" in out.colnames else np.arange(1, len(out) + 1)
    return out, {str(r): int(n) for r, n, h in zip(ids, rows, hit) if h}


# ----------------------------------------------------------------------------- writing


def write_compilation(data, path, *, format=None, overwrite=True) -> Path:
    """Write a compilation as ECSV or as CSV with ``name [unit]`` headers.

    Parameters
    ----------
    data : Compilation or astropy.table.Table or mapping of columns
        A read compilation (its ``table`` is written) or a table with compilation
        columns (Quantity columns keep their units). The ``row`` column is dropped;
        NaN and masked values are written as blank cells.
    path : str or os.PathLike
        Output file.
    format : {"ecsv", "csv"}, optional
        Default: from the file suffix.
    overwrite : bool
        Replace an existing file (default True).

    Returns
    -------
    pathlib.Path
        The path written.
    """
    path = Path(path)
    fmt = (format or path.suffix.lstrip(".")).lower()
    if fmt not in ("ecsv", "csv"):
        raise OptionError("format", format or path.suffix, "ecsv or csv (or a .ecsv/.csv suffix)")
    if path.exists() and not overwrite:
        raise OptionError("path", str(path), "a file that does not exist yet (or overwrite=True)")
    table = _writable_table(data)
    if fmt == "ecsv":
        table.write(path, format="ascii.ecsv", overwrite=True)
    else:
        _write_csv(table, path)
    return path


def compilation_table(comp: Compilation):
    """The table ``write_compilation`` writes for ``comp``.

    A compilation read from a file has its ``table``; one built in memory (synthetic,
    ``table=None``) gets a table rebuilt from its records and bodies: paleointensity in
    uT (spin factor re-applied), ``ln_err``, ages, methods, remanence types, recording
    fractions and per-body distance overrides. Reading that table back gives the same
    ``Records`` (to rounding).

    Parameters
    ----------
    comp : Compilation

    Returns
    -------
    astropy.table.Table
    """
    from astropy.table import Table

    if comp.table is not None:
        return comp.table
    recs = comp.records
    body = [comp.bodies[i] for i in recs.body_index]
    table = Table()
    table["record"] = recs.record.astype(str)
    table["body"] = [b.name for b in body]
    table["reservoir"] = [b.reservoir for b in body]
    table["kind"] = np.where(recs.is_limit, "upper_limit", "estimate")
    table["paleointensity"] = np.exp(recs.ln_value) * recs.spin_factor
    table["paleointensity"].unit = "uT"
    table["ln_err"] = recs.ln_err
    _add_age_columns(table, recs)
    table["method"], table["remanence"] = recs.method.astype(str), recs.remanence.astype(str)
    table["spin_factor_applied"] = recs.spin_factor
    table["recording_fraction"] = np.exp(recs.ln_fraction_mean)
    table["recording_fraction_err"] = recs.ln_fraction_sd * np.exp(recs.ln_fraction_mean)
    for name, attr in (("distance_min", "distance_min"), ("distance_max", "distance_max")):
        table[name] = [getattr(b, attr) for b in body]
        table[name].unit = "AU"
    return table


def _add_age_columns(table, recs: Records):
    normal, uniform = recs.age_kind == "normal", recs.age_kind == "uniform"
    for name, mask, values in (("age", normal, recs.age_a), ("age_err", normal, recs.age_b),
                               ("age_min", uniform, recs.age_a),
                               ("age_max", uniform, recs.age_b)):
        table[name] = np.where(mask, values, np.nan)
        table[name].unit = "Myr"


def _writable_table(data):
    from astropy.table import MaskedColumn, Table

    source = compilation_table(data) if isinstance(data, Compilation) else data
    table = Table(source, masked=False, copy=True)
    if "row" in table.colnames:
        table.remove_column("row")
    for name in table.colnames:
        col = table[name]
        if col.dtype.kind == "f":
            mask = ~np.isfinite(np.asarray(col, dtype=float)) | np.ma.getmaskarray(col)
            table[name] = MaskedColumn(np.asarray(col, dtype=float), mask=mask, unit=col.unit)
    return table


def _csv_cell(value) -> str:
    if value is None or value is np.ma.masked:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        return repr(float(value)) if math.isfinite(value) else ""
    return str(value)


def _csv_header(col) -> str:
    unit = col.unit.to_string() if col.unit is not None else ""
    return f"{col.name} [{unit}]" if unit else col.name


def _write_csv(table, path: Path):
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow([_csv_header(table[name]) for name in table.colnames])
        for i in range(len(table)):
            writer.writerow([_csv_cell(table[name][i]) for name in table.colnames])
