"""Ages from chronometers: short-lived isotope ratios and Pb-Pb ages to Myr after CAI formation.

Three short-lived systems (``Al-Mg``, ``Mn-Cr``, ``Hf-W``) and absolute ``Pb-Pb`` ages are
converted to the time after CAI formation (diskfield's time zero) with a propagated 1-sigma
uncertainty. The constants (half-lives, CAI initial ratios, the CAI start age and anchors such
as the D'Orbigny angrite) come from ``priors/chronometers.toml``; a user's own files replace
tables of the same name.

Notes
-----
With the mean life tau = t_half / ln 2 and a sample's initial ratio R:

* relative to the CAI initial ratio R_0: ``dt = tau ln(R_0 / R)``;
* anchored to a rock a with Pb-Pb age t_a and initial ratio R_a:
  ``dt = (t_CAI - t_a) + tau ln(R_a / R)``;
* Pb-Pb: ``dt = t_CAI - t_sample``.

Errors are propagated to first order (each input's 1-sigma times the magnitude of the partial
derivative, added in quadrature); the half-life term is ``|dt_decay| sigma_tau / tau``. The
constants (half-life, R_0, start age, anchor) are shared by every sample, so their error terms
are fully correlated between samples converted with the same constants; only the sample's own
ratio or Pb-Pb error is independent. :class:`AgeResult` keeps the two parts apart
(``shared_err_myr``, ``sample_err_myr``) so that a caller comparing two samples of one system can
drop the shared part.
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from .errors import OptionError, PriorFileError, Problem
from .resources import priors_dir

__all__ = [
    "DECAY_SYSTEMS",
    "SYSTEMS",
    "Measured",
    "DecaySystem",
    "Anchor",
    "ChronometerConstants",
    "AgeResult",
    "load_constants",
    "age_from_ratio",
    "age_from_pbpb",
    "compute_age",
    "resolve_start_age",
]

#: Short-lived decay systems (ratio -> age).
DECAY_SYSTEMS = ("Al-Mg", "Mn-Cr", "Hf-W")
#: Every system ``diskfield ages`` understands.
SYSTEMS = DECAY_SYSTEMS + ("Pb-Pb",)

#: Relative ratio error above which first-order propagation is poor (convention).
_LINEAR_LIMIT = 0.3
#: Beyond this many half-lives a system is effectively extinct (convention).
_EXTINCT_HALF_LIVES = 10.0
#: A Pb-Pb age more than this long after CAIs is outside any disk lifetime (convention).
_PBPB_LATE_MYR = 100.0
#: Components that belong to the sample itself; all others are shared constants.
_SAMPLE_COMPONENTS = ("sample_ratio", "sample_pbpb")

_FILE_NAME = "chronometers.toml"


@dataclass(frozen=True)
class Measured:
    """A constant with its 1-sigma uncertainty and standing.

    Parameters
    ----------
    value : float
        The value (unit given by the field that holds it).
    err : float
        1-sigma uncertainty, same unit (>= 0).
    source : str
        Its standing: ``"published: ..."``, ``"from memory: ..."`` or the user file / option.
    """

    value: float
    err: float
    source: str = ""

    def as_dict(self) -> dict:
        """Serialisable form."""
        return {"value": self.value, "err": self.err, "source": self.source}


@dataclass(frozen=True)
class DecaySystem:
    """A short-lived chronometer.

    Parameters
    ----------
    name : str
        System name, one of :data:`DECAY_SYSTEMS`.
    ratio_label : str
        The ratio measured, e.g. ``"26Al/27Al"``.
    half_life : Measured
        Half-life of the parent nuclide [Myr].
    cai_ratio : Measured
        Initial ratio of CAIs [dimensionless].
    """

    name: str
    ratio_label: str
    half_life: Measured
    cai_ratio: Measured

    @property
    def tau_myr(self) -> float:
        """Mean life tau = t_half / ln 2 [Myr]."""
        return self.half_life.value / math.log(2.0)

    @property
    def tau_rel_err(self) -> float:
        """Relative 1-sigma of tau (equal to that of the half-life) [dimensionless]."""
        return self.half_life.err / self.half_life.value


@dataclass(frozen=True)
class Anchor:
    """A rock dated both absolutely (Pb-Pb) and by initial ratios.

    Parameters
    ----------
    name : str
        Table name, e.g. ``"dorbigny"``.
    label : str
        Human-readable name.
    pbpb_age : Measured
        Absolute Pb-Pb age [Ma].
    ratios : dict of str to Measured
        Initial ratio per decay system [dimensionless].
    """

    name: str
    label: str
    pbpb_age: Measured
    ratios: dict = field(default_factory=dict)


@dataclass(frozen=True)
class ChronometerConstants:
    """Every constant ``diskfield ages`` uses, after merging the files read.

    Attributes
    ----------
    start_age : Measured
        Absolute Pb-Pb age of CAI formation [Ma].
    start_age_note : str
        Remarks on alternative start ages.
    systems : dict of str to DecaySystem
    anchors : dict of str to Anchor
    files : tuple of str
        Files read, in order (later ones replace tables of earlier ones).
    """

    start_age: Measured
    start_age_note: str
    systems: dict
    anchors: dict
    files: tuple

    def as_dict(self) -> dict:
        """Serialisable form (for manifests and JSON output)."""
        return {
            "start_age_ma": self.start_age.as_dict(),
            "systems": {n: {"ratio_label": s.ratio_label, "half_life_myr": s.half_life.as_dict(),
                            "cai_ratio": s.cai_ratio.as_dict()} for n, s in self.systems.items()},
            "anchors": {n: {"label": a.label, "pbpb_age_ma": a.pbpb_age.as_dict(),
                            "ratios": {k: r.as_dict() for k, r in a.ratios.items()}}
                        for n, a in self.anchors.items()},
            "files": list(self.files),
        }


@dataclass(frozen=True)
class AgeResult:
    """An age after CAI formation with its error budget.

    Attributes
    ----------
    system : str
        One of :data:`SYSTEMS`.
    age_myr : float
        Time after CAI formation [Myr]; negative means before the CAIs (see ``warnings``).
    err_myr : float
        Total 1-sigma uncertainty [Myr].
    reference : str
        What the age is measured against: ``"cai_ratio"``, ``"anchor:<name>"`` or
        ``"start_age"`` (Pb-Pb).
    basis : str
        The same in words, e.g. ``"anchored to D'Orbigny angrite (dorbigny)"``.
    components : dict of str to float
        1-sigma contribution of each input [Myr]; ``err_myr`` is their quadrature sum.
    inputs : dict
        The sample's inputs (ratio and error, or Pb-Pb age and error in Ma).
    constants : dict of str to Measured
        Each constant used, with its source.
    warnings : tuple of str
        Caveats (negative age, extinct system, large relative error, anchor offsets).
    cai_relative : AgeResult or None
        For an anchored age, the same ratio converted relative to the CAI initial ratio.
    """

    system: str
    age_myr: float
    err_myr: float
    reference: str
    basis: str
    components: dict
    inputs: dict
    constants: dict
    warnings: tuple = ()
    cai_relative: "AgeResult | None" = None

    @property
    def shared_err_myr(self) -> float:
        """1-sigma from constants shared by every sample (correlated between samples) [Myr]."""
        return math.hypot(*(v for k, v in self.components.items() if k not in _SAMPLE_COMPONENTS))

    @property
    def sample_err_myr(self) -> float:
        """1-sigma from the sample's own measurement (independent between samples) [Myr]."""
        return math.hypot(*(v for k, v in self.components.items() if k in _SAMPLE_COMPONENTS))

    @property
    def offset_myr(self) -> float | None:
        """Anchored minus CAI-relative age [Myr], or None when not anchored."""
        return None if self.cai_relative is None else self.age_myr - self.cai_relative.age_myr

    def as_dict(self) -> dict:
        """Serialisable form (JSON output)."""
        d = {"system": self.system, "age_myr": self.age_myr, "err_myr": self.err_myr,
             "shared_err_myr": self.shared_err_myr, "sample_err_myr": self.sample_err_myr,
             "reference": self.reference, "basis": self.basis,
             "components_myr": dict(self.components),
             "inputs": dict(self.inputs),
             "constants": {k: v.as_dict() for k, v in self.constants.items()},
             "warnings": list(self.warnings)}
        if self.cai_relative is not None:
            d["cai_relative"] = self.cai_relative.as_dict()
            d["offset_myr"] = self.offset_myr
        return d


# --------------------------------------------------------------------------- reading constants

class _Reader:
    """Validates the tables of one TOML file, collecting every problem."""

    def __init__(self, source: str, shipped: bool):
        self.source, self.shipped, self.problems = source, shipped, []

    def problem(self, column: str, message: str) -> None:
        self.problems.append(Problem(self.source, message, column=column))

    def keys(self, table, where: str, required: tuple, optional: tuple = ()) -> bool:
        """Check a table's keys; True when it is a table with every required key."""
        if not isinstance(table, dict):
            self.problem(where, f"got {table!r}; must be a table")
            return False
        valid = ", ".join(required + optional)
        for key in table:
            if key not in required + optional:
                self.problem(f"{where}.{key}", f"unknown key; valid: {valid}")
        missing = [k for k in required if k not in table]
        for key in missing:
            self.problem(f"{where}.{key}", f"missing; required keys: {', '.join(required)}")
        return not missing

    def number(self, table: dict, where: str, key: str, *, zero_ok: bool = False) -> float:
        """A finite number, > 0 (or >= 0 with ``zero_ok``); NaN after recording a problem."""
        value = table.get(key)
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if ok and math.isfinite(value) and (value > 0 or (zero_ok and value == 0)):
            return float(value)
        need = "a finite number >= 0" if zero_ok else "a finite number > 0"
        self.problem(f"{where}.{key}", f"got {value!r}; must be {need}")
        return math.nan

    def text(self, table: dict, where: str, key: str, *, needed: bool = False) -> str:
        """An optional string (a required one when ``needed``)."""
        value = table.get(key)
        if value is None and not needed:
            return ""
        if isinstance(value, str) and value.strip():
            return value
        self.problem(f"{where}.{key}", f"got {value!r}; must be a non-empty string")
        return ""

    def measured(self, table: dict, where: str, keys: tuple[str, str, str]) -> Measured:
        """A value, its error and its source (the source is required in shipped files)."""
        value_key, err_key, source_key = keys
        source = self.text(table, where, source_key, needed=self.shipped)
        return Measured(self.number(table, where, value_key),
                        self.number(table, where, err_key, zero_ok=True),
                        source or f"user file {self.source} (no source given)")


def _source_keys(shipped: bool, *keys: str) -> tuple[tuple, tuple]:
    """Split source keys into (required, optional) by whether the file is shipped."""
    return (keys, ()) if shipped else ((), keys)


def _read_start(rd: _Reader, table) -> tuple[Measured, str] | None:
    req, opt = _source_keys(rd.shipped, "source")
    if not rd.keys(table, "start_age", ("age_ma", "err_ma") + req, opt + ("note",)):
        return None
    return rd.measured(table, "start_age", ("age_ma", "err_ma", "source")), rd.text(
        table, "start_age", "note")


def _read_system(rd: _Reader, name: str, table) -> DecaySystem | None:
    where = f"systems.{name}"
    if name not in DECAY_SYSTEMS:
        rd.problem(where, f"unknown system {name!r}; valid: {', '.join(DECAY_SYSTEMS)}")
        return None
    req, opt = _source_keys(rd.shipped, "half_life_source", "cai_ratio_source")
    base = ("half_life_myr", "half_life_err_myr", "cai_ratio", "cai_ratio_err")
    if not rd.keys(table, where, base + req, opt + ("parent", "ratio_label")):
        return None
    rd.text(table, where, "parent")
    return DecaySystem(
        name, rd.text(table, where, "ratio_label") or f"{name} initial ratio",
        rd.measured(table, where, ("half_life_myr", "half_life_err_myr", "half_life_source")),
        rd.measured(table, where, ("cai_ratio", "cai_ratio_err", "cai_ratio_source")))


def _read_anchor(rd: _Reader, name: str, table) -> Anchor | None:
    where = f"anchors.{name}"
    req, opt = _source_keys(rd.shipped, "pbpb_source")
    if not rd.keys(table, where, ("pbpb_age_ma", "pbpb_err_ma") + req, opt + ("label", "ratios")):
        return None
    ratios_table = table.get("ratios", {})
    ratios = {}
    if rd.keys(ratios_table, f"{where}.ratios", (), DECAY_SYSTEMS):
        req, opt = _source_keys(rd.shipped, "source")
        for system, sub in ratios_table.items():
            if system in DECAY_SYSTEMS and rd.keys(sub, f"{where}.ratios.{system}",
                                                   ("value", "err") + req, opt):
                ratios[system] = rd.measured(sub, f"{where}.ratios.{system}",
                                             ("value", "err", "source"))
    return Anchor(name, rd.text(table, where, "label") or name,
                  rd.measured(table, where, ("pbpb_age_ma", "pbpb_err_ma", "pbpb_source")), ratios)


def _read_toml(path: Path) -> dict:
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise PriorFileError(Problem(str(path), "file not found")) from None
    except (OSError, UnicodeDecodeError) as err:
        raise PriorFileError(Problem(str(path), f"cannot read the file: {err}")) from None
    except tomllib.TOMLDecodeError as err:
        raise PriorFileError(Problem(str(path), f"not valid TOML: {err}")) from None


def _read_file(path: Path, shipped: bool, merged: dict) -> list[Problem]:
    """Read one file into ``merged`` (tables replace same-named ones); return its problems."""
    rd = _Reader(str(path), shipped)
    data = _read_toml(path)
    rd.keys(data, "(top level)", (), ("start_age", "systems", "anchors"))
    if "start_age" in data:
        merged["start_age"] = _read_start(rd, data["start_age"])
    for group, reader in (("systems", _read_system), ("anchors", _read_anchor)):
        tables = data.get(group, {})
        if not isinstance(tables, dict):
            rd.problem(group, f"got {tables!r}; must be a table of named tables")
            continue
        for name, table in tables.items():
            merged[group][name] = reader(rd, name, table)
    return rd.problems


def load_constants(paths=None) -> ChronometerConstants:
    """Read the shipped chronometer constants, then the user's files in order.

    Parameters
    ----------
    paths : str, Path or sequence of them, optional
        User files. A table in a later file replaces the table of the same name
        (``[start_age]`` as a whole, ``[systems.<name>]``, ``[anchors.<name>]``); new anchors
        may be added, systems are the closed list :data:`DECAY_SYSTEMS`. ``source`` keys are
        required in the shipped file and optional in user files.

    Returns
    -------
    ChronometerConstants

    Raises
    ------
    PriorFileError
        Listing every problem (file, ``table.key``, value got, what is valid).
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    files = [(priors_dir() / _FILE_NAME, True)] + [(Path(p), False) for p in (paths or [])]
    merged: dict = {"start_age": None, "systems": {}, "anchors": {}}
    problems: list[Problem] = []
    for path, shipped in files:
        problems += _read_file(path, shipped, merged)
    if problems:
        raise PriorFileError(problems)
    start, note = merged["start_age"]
    return ChronometerConstants(start, note, dict(merged["systems"]), dict(merged["anchors"]),
                                tuple(str(p) for p, _ in files))


# --------------------------------------------------------------------------- validation

def _system_name(system) -> str:
    """Canonical system name (case-insensitive, en dash accepted)."""
    key = str(system).replace("\u2013", "-").strip().lower()
    for name in SYSTEMS:
        if name.lower() == key:
            return name
    raise OptionError("system", system, f"one of {', '.join(SYSTEMS)}")


def _real(option: str, value, *, positive: bool, what: str) -> float:
    """A finite real number, > 0 (``positive``) or >= 0; OptionError otherwise."""
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    if ok and math.isfinite(value) and (value > 0 or (not positive and value == 0)):
        return float(value)
    bound = "> 0" if positive else ">= 0"
    raise OptionError(option, value, f"a finite number {bound} ({what})")


def resolve_start_age(constants: ChronometerConstants, start_age: float | None = None,
                      start_age_err: float | None = None) -> Measured:
    """The CAI start age in use [Ma]: the constants', or an override.

    Parameters
    ----------
    constants : ChronometerConstants
    start_age, start_age_err : float, optional
        Override of the value and of its 1-sigma [Ma]; a value given without an error keeps the
        constants' error.

    Returns
    -------
    Measured

    Raises
    ------
    OptionError
        A non-positive or non-finite start age, a negative or non-finite error.
    """
    if start_age is None and start_age_err is None:
        return constants.start_age
    value = constants.start_age.value if start_age is None else _real(
        "start_age", start_age, positive=True, what="absolute CAI Pb-Pb age in Ma")
    err = constants.start_age.err if start_age_err is None else _real(
        "start_age_err", start_age_err, positive=False, what="1-sigma in Ma")
    return Measured(value, err, "option override (start age "
                    f"{'from the option' if start_age is not None else 'from the file'}, error "
                    f"{'from the option' if start_age_err is not None else 'from the file'})")


def _anchor(constants: ChronometerConstants, anchor: str, system: str) -> Anchor:
    if anchor not in constants.anchors:
        valid = ", ".join(constants.anchors) or "none defined"
        raise OptionError("anchor", anchor, f"one of {valid}")
    found = constants.anchors[anchor]
    if system not in found.ratios:
        usable = [n for n, a in constants.anchors.items() if system in a.ratios]
        raise OptionError("anchor", anchor, f"an anchor with a {system} ratio: "
                          f"{', '.join(usable) or 'none defined'} ({anchor} has "
                          f"{', '.join(found.ratios) or 'no ratios'})")
    return found


# --------------------------------------------------------------------------- arithmetic

_BASIS = {"cai_ratio": "relative to the CAI initial ratio",
          "start_age": "Pb-Pb relative to the CAI start age"}


def _result(system, reference, age, components, inputs, constants, warnings, cai=None,
            basis=None):
    err = math.hypot(*components.values())
    return AgeResult(system, age, err, reference, basis or _BASIS[reference], components,
                     inputs, constants, tuple(warnings), cai)


def _ratio_warnings(sys_: DecaySystem, ratio: float, ratio_err: float, age: float,
                    scale: str) -> list[str]:
    warnings = []
    if age < 0:
        warnings.append(f"negative age: the {sys_.ratio_label} ratio {ratio:.4g} implies "
                        f"formation before the CAIs ({scale}); check the ratio, the constants, "
                        "or an isotopic heterogeneity")
    if age > _EXTINCT_HALF_LIVES * sys_.half_life.value:
        warnings.append(f"age beyond {_EXTINCT_HALF_LIVES:g} half-lives of {sys_.name}: the "
                        "system is effectively extinct and the ratio is likely an upper limit")
    if ratio_err > _LINEAR_LIMIT * ratio:
        warnings.append(f"relative ratio error {ratio_err / ratio:.2f} > {_LINEAR_LIMIT}: "
                        "first-order error propagation is poor; the true interval is asymmetric")
    return warnings


def _cai_relative(sys_: DecaySystem, ratio: float, ratio_err: float) -> AgeResult:
    tau, r0 = sys_.tau_myr, sys_.cai_ratio
    age = tau * math.log(r0.value / ratio)
    components = {"sample_ratio": tau * ratio_err / ratio,
                  "cai_ratio": tau * r0.err / r0.value,
                  "half_life": abs(age) * sys_.tau_rel_err}
    return _result(sys_.name, "cai_ratio", age, components,
                   {"ratio": ratio, "ratio_err": ratio_err},
                   {"half_life_myr": sys_.half_life, "cai_ratio": r0},
                   _ratio_warnings(sys_, ratio, ratio_err, age, _BASIS["cai_ratio"]))


def _anchor_offset(sys_: DecaySystem, anc: Anchor, start: Measured) -> tuple[float, float]:
    """The anchor's Pb-Pb age after CAIs minus its CAI-relative ratio age, with 1-sigma [Myr]."""
    tau, r0, ra = sys_.tau_myr, sys_.cai_ratio, anc.ratios[sys_.name]
    decay = tau * math.log(r0.value / ra.value)
    offset = (start.value - anc.pbpb_age.value) - decay
    err = math.hypot(start.err, anc.pbpb_age.err, tau * r0.err / r0.value,
                     tau * ra.err / ra.value, abs(decay) * sys_.tau_rel_err)
    return offset, err


def _anchored(sys_: DecaySystem, anc: Anchor, start: Measured, ratio: float, ratio_err: float,
              cai: AgeResult) -> AgeResult:
    tau, ra = sys_.tau_myr, anc.ratios[sys_.name]
    decay = tau * math.log(ra.value / ratio)
    age = (start.value - anc.pbpb_age.value) + decay
    components = {"sample_ratio": tau * ratio_err / ratio, "anchor_ratio": tau * ra.err / ra.value,
                  "half_life": abs(decay) * sys_.tau_rel_err, "anchor_pbpb": anc.pbpb_age.err,
                  "start_age": start.err}
    warnings = _ratio_warnings(sys_, ratio, ratio_err, age, f"anchored to {anc.label}")
    offset, offset_err = _anchor_offset(sys_, anc, start)
    if abs(offset) > 2 * offset_err:
        warnings.append(f"{anc.label}: its Pb-Pb age after CAIs and its {sys_.name} age relative "
                        f"to the CAI initial ratio differ by {offset:+.2f} +/- {offset_err:.2f} "
                        "Myr; anchored and CAI-relative ages disagree by this amount")
    return _result(sys_.name, f"anchor:{anc.name}", age, components,
                   {"ratio": ratio, "ratio_err": ratio_err},
                   {"half_life_myr": sys_.half_life, "anchor_ratio": ra,
                    "anchor_pbpb_age_ma": anc.pbpb_age, "start_age_ma": start},
                   warnings, cai, basis=f"anchored to {anc.label} ({anc.name})")


def age_from_ratio(system: str, ratio: float, ratio_err: float, *, anchor: str | None = None,
                   constants: ChronometerConstants | None = None, start_age: float | None = None,
                   start_age_err: float | None = None) -> AgeResult:
    """Age after CAI formation from a short-lived chronometer's initial ratio.

    Parameters
    ----------
    system : str
        ``"Al-Mg"`` (26Al/27Al), ``"Mn-Cr"`` (53Mn/55Mn) or ``"Hf-W"`` (182Hf/180Hf);
        case-insensitive.
    ratio, ratio_err : float
        The sample's initial ratio and its 1-sigma [dimensionless]; ratio > 0, error >= 0.
    anchor : str, optional
        Name of an anchor in the constants (e.g. ``"dorbigny"``). Without one the age is
        relative to the CAI initial ratio.
    constants : ChronometerConstants, optional
        Default: :func:`load_constants` ().
    start_age, start_age_err : float, optional
        Override of the CAI Pb-Pb start age and its 1-sigma [Ma] (used only when anchored).

    Returns
    -------
    AgeResult
        ``age_myr`` and ``err_myr`` [Myr after CAI formation]. Anchored results carry the
        CAI-relative answer in ``cai_relative`` so that an offset between the scales shows.

    Notes
    -----
    CAI-relative: ``dt = tau ln(R_0/R)``, ``sigma^2 = tau^2 [(sigma_R0/R0)^2 + (sigma_R/R)^2]
    + (dt sigma_tau/tau)^2``. Anchored: ``dt = (t_CAI - t_a) + tau ln(R_a/R)``; the variance
    adds (tau sigma_Ra/R_a)^2, sigma_ta^2 and sigma_tCAI^2 to the sample and half-life terms
    (R_0 does not enter). The half-life, R_0, R_a, t_a and t_CAI terms are shared by all samples
    (correlated); only the sample-ratio term is independent. A ratio above the reference value
    gives a negative age, returned with a warning rather than refused, since within its error it
    may be consistent with zero.

    Raises
    ------
    OptionError
        Unknown system (valid ones listed), non-positive or non-finite ratio, negative error,
        unknown anchor or an anchor without this system.
    """
    name = _system_name(system)
    if name not in DECAY_SYSTEMS:
        raise OptionError("system", system, f"a decay system ({', '.join(DECAY_SYSTEMS)}); "
                          "use age_from_pbpb for Pb-Pb ages")
    ratio = _real("ratio", ratio, positive=True, what=f"the {name} initial ratio")
    ratio_err = _real("ratio_err", ratio_err, positive=False, what="1-sigma of the ratio")
    constants = constants or load_constants()
    sys_ = constants.systems[name]
    cai = _cai_relative(sys_, ratio, ratio_err)
    if anchor is None:
        return cai
    anc = _anchor(constants, anchor, name)
    start = resolve_start_age(constants, start_age, start_age_err)
    return _anchored(sys_, anc, start, ratio, ratio_err, cai)


def age_from_pbpb(age_ma: float, err_ma: float, *, start_age: float | None = None,
                  start_age_err: float | None = None,
                  constants: ChronometerConstants | None = None) -> AgeResult:
    """Age after CAI formation from an absolute Pb-Pb age.

    Parameters
    ----------
    age_ma, err_ma : float
        The sample's Pb-Pb age and 1-sigma [Ma before present]; age > 0, error >= 0.
    start_age, start_age_err : float, optional
        Override of the CAI Pb-Pb start age and its 1-sigma [Ma].
    constants : ChronometerConstants, optional
        Default: :func:`load_constants` ().

    Returns
    -------
    AgeResult
        ``dt = t_CAI - t_sample`` [Myr], ``sigma^2 = sigma_tCAI^2 + sigma_sample^2``; the start-age
        term is shared by all samples. A sample older than the start age gets a negative age and
        a warning; one more than 100 Myr after CAIs gets a warning (was Myr after CAI meant?).
    """
    age_ma = _real("age_ma", age_ma, positive=True, what="absolute Pb-Pb age in Ma")
    err_ma = _real("err_ma", err_ma, positive=False, what="1-sigma in Ma")
    start = resolve_start_age(constants or load_constants(), start_age, start_age_err)
    age = start.value - age_ma
    warnings = []
    if age < 0:
        warnings.append(f"negative age: the Pb-Pb age {age_ma:g} Ma is older than the CAI start "
                        f"age {start.value:g} Ma; check the value or the start age")
    if age > _PBPB_LATE_MYR:
        warnings.append(f"{age:.4g} Myr after CAIs is outside any disk lifetime; Pb-Pb ages are "
                        "absolute (Ma before present), not Myr after CAI formation")
    return _result("Pb-Pb", "start_age", age, {"sample_pbpb": err_ma, "start_age": start.err},
                   {"age_ma": age_ma, "err_ma": err_ma}, {"start_age_ma": start}, warnings)


def compute_age(system: str, value: float, err: float, *, anchor: str | None = None,
                constants: ChronometerConstants | None = None, start_age: float | None = None,
                start_age_err: float | None = None) -> AgeResult:
    """Dispatch on ``system``: a ratio for decay systems, an absolute age [Ma] for ``Pb-Pb``.

    Parameters
    ----------
    system : str
        One of :data:`SYSTEMS` (case-insensitive).
    value, err : float
        Initial ratio and 1-sigma [dimensionless], or Pb-Pb age and 1-sigma [Ma].
    anchor, constants, start_age, start_age_err
        As in :func:`age_from_ratio`; an anchor is meaningless for Pb-Pb and is refused.

    Returns
    -------
    AgeResult
    """
    name = _system_name(system)
    if name != "Pb-Pb":
        return age_from_ratio(name, value, err, anchor=anchor, constants=constants,
                              start_age=start_age, start_age_err=start_age_err)
    if anchor is not None:
        raise OptionError("anchor", anchor, f"no anchor with Pb-Pb (anchors apply to "
                          f"{', '.join(DECAY_SYSTEMS)})")
    return age_from_pbpb(value, err, start_age=start_age, start_age_err=start_age_err,
                         constants=constants)
