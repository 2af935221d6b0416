"""The prior set: the shipped prior TOML files, then the user's, merged by table.

``load_priors(paths=None)`` reads ``reservoirs.toml``, ``recording.toml`` and ``disk.toml``
from the shipped prior folder, then each user file in order; a table in a later file replaces
the table of the same name in an earlier one (``[parameters.ring_width]``,
``[reservoirs.CC]``, ...). The format is DESIGN §4: one table per prior with ``family``, the
family's keys, an optional astropy ``unit`` (values are converted to diskfield's internal unit
of that table) and ``source`` (required in the shipped files).

Every problem of every file is collected and raised at once as a
:class:`~diskfield.errors.PriorFileError`, each naming the file, the line of the table where it
can be found, and the ``section.name.key`` concerned. Files are data: parsed with ``tomllib``,
never evaluated.
"""
from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy import units as u

from .errors import PriorFileError, Problem
from .priorspec import FAMILIES, Prior, make_prior
from .profiles.base import Parameter
from .profiles.registry import all_parameters
from .records import METHODS, REMANENCES
from .resources import priors_dir

__all__ = [
    "SHIPPED_FILES",
    "LIKELIHOOD_PARAMETERS",
    "SECTIONS",
    "PriorSet",
    "load_priors",
    "known_parameters",
    "effective_support",
]

#: Shipped prior files read by :func:`load_priors`, in order.
SHIPPED_FILES = ("reservoirs.toml", "recording.toml", "disk.toml")

#: Parameters of the likelihood itself (not of a profile or envelope).
LIKELIHOOD_PARAMETERS = (
    Parameter("intrinsic_scatter", "", "intrinsic scatter sigma_int of ln paleointensity "
              "beyond the stated errors (natural-log units)", domain=(0.0, np.inf),
              closed_low=True),
)

#: Top-level tables a prior file may hold.
SECTIONS = ("parameters", "reservoirs", "age_windows", "calibration", "remanence", "spin")

_META_KEYS = ("family", "unit", "source")
_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_\-]*$")
_TOML_POS_RE = re.compile(r"at line (\d+), column (\d+)")


def known_parameters() -> dict[str, Parameter]:
    """Every parameter a ``[parameters.X]`` table may name: the registered profiles' and
    envelopes' parameters plus the likelihood's, by name."""
    params = dict(all_parameters())
    for par in LIKELIHOOD_PARAMETERS:
        params.setdefault(par.name, par)
    return params


@dataclass(frozen=True)
class PriorSet:
    """Merged priors of the shipped and user prior files.

    Attributes
    ----------
    parameters : dict of str -> Prior
        Disk and likelihood parameters by name (values in the parameter's internal unit).
    reservoirs : dict of str -> Prior
        Formation-distance prior of each reservoir [AU].
    age_windows : dict of str -> Prior
        Default age prior of a record without an age, by reservoir [Myr after CAI formation].
    calibration : dict of str -> Prior
        Multiplicative calibration factor by method (ARM, IRM, thermal, other), dimensionless.
    remanence : dict of str -> Prior
        Multiplicative factor by remanence type (TRM, CRM, unknown), dimensionless.
    spin_obliquity : Prior or None
        User prior on the spin-axis obliquity [deg], within 0-90; None means isotropic axes.
    files : tuple of str
        Paths read, in order.
    sources : dict of str -> str
        ``"section.name"`` -> the table's source (citation or convention), for reports.
    origins : dict of str -> str
        ``"section.name"`` -> the file that supplied the table.
    """

    parameters: dict
    reservoirs: dict
    age_windows: dict
    calibration: dict
    remanence: dict
    spin_obliquity: Prior | None
    files: tuple[str, ...]
    sources: dict = field(default_factory=dict)
    origins: dict = field(default_factory=dict)

    def parameter_priors(self, names) -> tuple[Prior, ...]:
        """Priors of ``names`` in order; PriorFileError naming any parameter without one."""
        missing = [n for n in names if n not in self.parameters]
        if missing:
            raise PriorFileError([Problem("<prior files>", f"no prior for parameter {n!r}; add "
                                          f"a [parameters.{n}] table to a prior file",
                                          column=f"parameters.{n}") for n in missing])
        return tuple(self.parameters[n] for n in names)

    def as_dict(self) -> dict:
        """Serialisable description of every prior (for manifests and reports)."""
        out = {"files": list(self.files)}
        for section in ("parameters", "reservoirs", "age_windows", "calibration", "remanence"):
            out[section] = {k: p.as_dict() for k, p in getattr(self, section).items()}
        out["spin"] = {"obliquity": self.spin_obliquity.as_dict()} if self.spin_obliquity else {}
        return out


# --------------------------------------------------------------------------- rules


@dataclass(frozen=True)
class _Rule:
    """What a table of one section may hold: its internal unit, domain and families."""

    unit: str
    domain: Parameter
    families: tuple[str, ...] = tuple(FAMILIES)
    finite: bool = False


def _section_rule(section: str, name: str, params: dict) -> _Rule | str:
    """The rule for table ``section.name``, or a message saying why the name is invalid."""
    if section == "parameters":
        if name not in params:
            return f"unknown parameter {name!r}; valid: {', '.join(sorted(params))}"
        par = params[name]
        return _Rule(par.unit, par)
    if section in ("reservoirs", "age_windows"):
        if not _NAME_RE.match(name):
            return f"invalid {section} name {name!r}; use letters, digits, '_' or '-'"
        if section == "reservoirs":
            return _Rule("AU", Parameter(name, "AU", "", domain=(0.0, np.inf)), finite=True)
        return _Rule("Myr", Parameter(name, "Myr", ""), finite=True)
    if section in ("calibration", "remanence"):
        valid = METHODS if section == "calibration" else REMANENCES
        if name not in valid:
            return f"unknown {section} {name!r}; valid: {', '.join(valid)}"
        return _Rule("", Parameter(name, "", "", domain=(0.0, np.inf)), ("log_normal", "fixed"))
    if name != "obliquity":
        return f"unknown spin table {name!r}; valid: obliquity"
    return _Rule("deg", Parameter(name, "deg", "", domain=(0.0, 90.0), closed_low=True),
                 finite=True)


# --------------------------------------------------------------------------- one table


def _unit_factor(unit, internal: str) -> float | str:
    """Factor converting values in ``unit`` to ``internal``, or a message if impossible."""
    want = internal or "dimensionless"
    if not isinstance(unit, str):
        return f"got {unit!r}; must be a unit string convertible to {want}"
    try:
        given = u.Unit(unit)
    except ValueError:
        return f"got {unit!r}; not a unit astropy understands (expected one convertible to {want})"
    try:
        return float(given.to(u.Unit(internal) if internal else u.dimensionless_unscaled))
    except u.UnitsError:
        return f"got {unit!r}; cannot be converted to {want}"


def _numbers(table: dict, keys: tuple[str, ...], where: str, problem) -> dict | None:
    """The numeric keys of a table as floats; reports non-numbers through ``problem``."""
    values, ok = {}, True
    for key in keys:
        if key not in table:
            continue
        value = table[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            problem(f"{where}.{key}", f"got {value!r}; must be a number")
            ok = False
        else:
            values[key] = float(value)
    return values if ok else None


def _check_keys(table: dict, family: str, where: str, problem) -> bool:
    """Report unknown and missing keys of a table of ``family``; True if all are fine."""
    _, required, optional = FAMILIES[family]
    valid = _META_KEYS + required + optional
    ok = True
    for key in table:
        if key not in valid:
            problem(f"{where}.{key}", f"unknown key {key!r} for family {family!r}; valid: "
                                      f"{', '.join(valid)}")
            ok = False
    for key in required:
        if key not in table:
            problem(f"{where}.{key}", f"missing key {key!r}; family {family!r} needs "
                                      f"{', '.join(required)}")
            ok = False
    return ok


def effective_support(prior: Prior) -> tuple[float, float]:
    """Support of ``prior`` as the values it can take: a log_normal's (0, inf) never attains
    0, so its low end is the smallest positive float (for checks against a domain)."""
    low, high = prior.support
    if prior.family == "log_normal":  # support (0, inf) open at 0: never attains 0
        low = float(np.nextafter(0.0, 1.0))
    return low, high


def _check_support(prior: Prior, rule: _Rule, where: str, problem) -> None:
    low, high = effective_support(prior)
    if rule.finite and not (np.isfinite(low) and np.isfinite(high)):
        problem(where, f"got {prior.describe()}, support [{low:g}, {high:g}]; a finite support "
                       "is required here (the likelihood integrates over it): use uniform, "
                       "log_uniform, truncated_normal or half_normal with high")
        return
    dom = rule.domain
    if not dom.accepts(low, high):
        lo, hi = dom.domain
        interval = (("[" if dom.closed_low else "(") + f"{lo:g}, {hi:g}"
                    + ("]" if np.isfinite(hi) else ")"))
        problem(where, f"got {prior.describe()} with support [{low:g}, {high:g}]; values must "
                       f"lie in {interval}")


def _check_source(source, shipped: bool, where: str, problem) -> bool:
    """Shipped tables must cite a source; any source must be a string."""
    if not isinstance(source, str):
        problem(f"{where}.source", f"got {source!r}; must be a string")
        return False
    if shipped and not source.strip():
        problem(f"{where}.source", "missing 'source' (a citation, or 'convention' and why)")
    return True


def _build_prior(table, rule: _Rule, where: str, shipped: bool, problem) -> Prior | None:
    """Validate one TOML table and build its prior (None if it has problems)."""
    if not isinstance(table, dict):
        problem(where, f"got {table!r}; must be a table with a 'family' key")
        return None
    family = table.get("family")
    if family not in rule.families:
        problem(f"{where}.family", f"got {family!r}; valid: {', '.join(rule.families)}")
        return None
    ok = _check_keys(table, family, where, problem)
    source = table.get("source", "")
    ok = _check_source(source, shipped, where, problem) and ok
    factor = _unit_factor(table.get("unit", rule.unit), rule.unit)
    if isinstance(factor, str):
        problem(f"{where}.unit", factor)
        ok = False
    _, required, optional = FAMILIES[family]
    values = _numbers(table, required + optional, where, problem)
    if not ok or values is None:
        return None
    converted = {k: (v if k == "ln_sd" else v * factor) for k, v in values.items()}
    try:
        prior = make_prior(family, unit=rule.unit, source=source, **converted)
    except ValueError as exc:
        converted_note = f" (after conversion to {rule.unit})" if factor != 1.0 else ""
        problem(where, f"{exc}{converted_note}")
        return None
    _check_support(prior, rule, where, problem)
    return prior


# --------------------------------------------------------------------------- one file


def _table_line(text: str, section: str, name: str) -> int | None:
    """1-based line of the header ``[section.name]`` in ``text`` (None if not found)."""
    pattern = re.compile(r"^[ \t]*\[[ \t]*" + re.escape(section) + r"\s*\.\s*[\"']?"
                         + re.escape(name) + r"[\"']?\s*\]", re.MULTILINE)
    match = pattern.search(text)
    return text.count("\n", 0, match.start()) + 1 if match else None


def _parse(path: Path) -> tuple[dict | None, str, list[Problem]]:
    """Parse one TOML file; syntax errors become a Problem with the line number."""
    name = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None, "", [Problem(name, "prior file not found")]
    except (OSError, UnicodeDecodeError) as exc:
        return None, "", [Problem(name, f"cannot read prior file: {exc}")]
    try:
        return tomllib.loads(text), text, []
    except tomllib.TOMLDecodeError as exc:
        pos = _TOML_POS_RE.search(str(exc))
        line = int(pos.group(1)) if pos else None
        message = _TOML_POS_RE.sub("", str(exc)).replace("()", "").strip()
        return None, text, [Problem(name, f"TOML syntax error: {message}", line=line)]


def _read_file(path: Path, shipped: bool, params: dict) -> tuple[dict, list[Problem]]:
    """Read one prior file into ``{(section, name): (prior, source)}`` plus its problems."""
    data, text, problems = _parse(path)
    if data is None:
        return {}, problems
    tables = {}
    for section, body in data.items():
        if section not in SECTIONS:
            problems.append(Problem(str(path), f"unknown top-level table [{section}]; valid: "
                                               f"{', '.join(SECTIONS)}", column=section))
            continue
        if not isinstance(body, dict):
            problems.append(Problem(str(path), f"got {body!r}; [{section}] must hold tables "
                                               f"such as [{section}.NAME]", column=section))
            continue
        for name, table in body.items():
            line = _table_line(text, section, name)

            def problem(column, message, _line=line):
                problems.append(Problem(str(path), message, line=_line, column=column))

            rule = _section_rule(section, name, params)
            if isinstance(rule, str):
                problem(f"{section}.{name}", rule)
                continue
            prior = _build_prior(table, rule, f"{section}.{name}", shipped, problem)
            if prior is not None:
                tables[(section, name)] = (prior, str(path))
    return tables, problems


# --------------------------------------------------------------------------- the set


def _as_paths(paths) -> list[Path]:
    if paths is None:
        return []
    if isinstance(paths, (str, Path)):
        return [Path(paths)]
    return [Path(p) for p in paths]


def _check_reservoir_ages(tables: dict) -> list[Problem]:
    """Every reservoir needs a default age window and every age window a reservoir."""
    res = {n for s, n in tables if s == "reservoirs"}
    ages = {n for s, n in tables if s == "age_windows"}
    problems = []
    for name in sorted(res - ages):
        problems.append(Problem(tables[("reservoirs", name)][1], f"reservoir {name!r} has no "
                                f"default age window; add [age_windows.{name}]",
                                column=f"reservoirs.{name}"))
    for name in sorted(ages - res):
        problems.append(Problem(tables[("age_windows", name)][1], f"age window for unknown "
                                f"reservoir {name!r}; defined reservoirs: {', '.join(sorted(res))}",
                                column=f"age_windows.{name}"))
    return problems


def _assemble(tables: dict, files: list[str], params: dict) -> PriorSet:
    sections = {s: {} for s in SECTIONS}
    sources, origins = {}, {}
    for (section, name), (prior, origin) in tables.items():
        sections[section][name] = prior
        sources[f"{section}.{name}"] = prior.source
        origins[f"{section}.{name}"] = origin
    for name, par in params.items():  # plug-ins may declare a default prior of their own
        if name not in sections["parameters"] and par.default_prior is not None:
            sections["parameters"][name] = par.default_prior
            sources[f"parameters.{name}"] = par.default_prior.source or "plug-in default"
            origins[f"parameters.{name}"] = "<plug-in>"
    return PriorSet(parameters=sections["parameters"], reservoirs=sections["reservoirs"],
                    age_windows=sections["age_windows"], calibration=sections["calibration"],
                    remanence=sections["remanence"],
                    spin_obliquity=sections["spin"].get("obliquity"), files=tuple(files),
                    sources=sources, origins=origins)


def load_priors(paths=None) -> PriorSet:
    """Read the shipped prior files, then the user's, into one :class:`PriorSet`.

    Parameters
    ----------
    paths : str, path, sequence of them, PriorSet or None
        The user's prior files, read after the shipped ones in order; a table in a later
        file replaces the same table of an earlier one. ``None``: shipped files only. A
        PriorSet is returned unchanged.

    Returns
    -------
    PriorSet

    Raises
    ------
    PriorFileError
        Listing every problem of every file (syntax, unknown tables, keys, families or
        parameter names, missing keys, impossible values, unknown or incompatible units).
    """
    if isinstance(paths, PriorSet):
        return paths
    params = known_parameters()
    shipped_dir = priors_dir()
    files = [(shipped_dir / f, True) for f in SHIPPED_FILES]
    files += [(p, False) for p in _as_paths(paths)]
    tables, problems = {}, []
    for path, shipped in files:
        found, issues = _read_file(path, shipped, params)
        tables.update(found)
        problems += issues
    problems += _check_reservoir_ages(tables) if not problems else []
    if problems:
        raise PriorFileError(problems)
    return _assemble(tables, [str(p) for p, _ in files], params)
