"""``diskfield ages``: chronometer ratios and Pb-Pb ages to Myr after CAI formation.

Examples::

    diskfield ages --system Al-Mg --ratio 3.98e-7 --ratio-err 0.15e-7
    diskfield ages --system Mn-Cr --ratio 2.1e-6 --ratio-err 0.1e-6 --anchor dorbigny
    diskfield ages --pbpb-age 4563.37 --pbpb-err 0.25 --start-age 4568.2
    diskfield ages --table samples.csv --out ages_out
    diskfield ages --list-constants
"""
from __future__ import annotations

import csv
import io
import json
import re
import sys
from pathlib import Path

import numpy as np

from .. import chronology
from ..errors import CompilationError, OptionError, Problem
from ..sigfig import format_significant, round_with_uncertainty

__all__ = ["NAME", "HELP", "add_arguments", "run"]

NAME = "ages"
HELP = "convert chronometer ratios or Pb-Pb ages to Myr after CAI formation"

#: Python-API argument names -> the options a CLI user typed.
_CLI_NAMES = {"system": "--system", "ratio": "--ratio", "ratio_err": "--ratio-err",
              "anchor": "--anchor", "age_ma": "--pbpb-age", "err_ma": "--pbpb-err",
              "start_age": "--start-age", "start_age_err": "--start-age-err"}

_COMPONENT_LABELS = {"sample_ratio": "sample ratio", "sample_pbpb": "sample Pb-Pb age",
                     "cai_ratio": "CAI initial ratio", "half_life": "half-life",
                     "anchor_ratio": "anchor ratio", "anchor_pbpb": "anchor Pb-Pb age",
                     "start_age": "CAI start age"}

#: AgeResult.constants keys -> (label, unit) for text output.
_CONSTANT_LABELS = {"half_life_myr": ("half-life", "Myr"), "cai_ratio": ("CAI initial ratio", ""),
                    "anchor_ratio": ("anchor initial ratio", ""),
                    "anchor_pbpb_age_ma": ("anchor Pb-Pb age", "Ma"),
                    "start_age_ma": ("CAI start age", "Ma")}


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    parser.add_argument("--system", help="chronometer: " + ", ".join(chronology.SYSTEMS))
    parser.add_argument("--ratio", type=float, help="the sample's initial ratio (e.g. 26Al/27Al)")
    parser.add_argument("--ratio-err", type=float, help="1-sigma of --ratio")
    parser.add_argument("--anchor", help="anchor rock in the constants (e.g. dorbigny); "
                        "default: relative to the CAI initial ratio")
    parser.add_argument("--pbpb-age", type=float, help="absolute Pb-Pb age [Ma]")
    parser.add_argument("--pbpb-err", type=float, help="1-sigma of --pbpb-age [Ma]")
    parser.add_argument("--start-age", type=float,
                        help="CAI Pb-Pb start age [Ma] (default from the constants: 4567.30)")
    parser.add_argument("--start-age-err", type=float,
                        help="1-sigma of --start-age [Ma] (default: the constants' error)")
    parser.add_argument("--constants", action="append", default=[], metavar="FILE",
                        help="TOML file replacing tables of priors/chronometers.toml (repeatable)")
    parser.add_argument("--table", metavar="FILE",
                        help="batch mode: CSV or ECSV with columns system, ratio, ratio_err "
                        "(Pb-Pb rows: pbpb_age, pbpb_err in Ma); optional sample, anchor")
    parser.add_argument("--list-constants", action="store_true",
                        help="print the constants in use with their sources and exit")
    parser.add_argument("--format", choices=("text", "json"), default="text",
                        help="output format (default text)")


def run(args) -> int:
    """Run ``diskfield ages``; returns the exit status (errors raise DiskfieldError)."""
    constants = chronology.load_constants(args.constants)
    if args.list_constants:
        _emit(args, constants.as_dict(), _constants_text(constants))
        return 0
    if args.table:
        _with_cli_names(_refuse, args, ("system", "ratio", "ratio_err", "anchor", "pbpb_age",
                                        "pbpb_err"), "with --table (the table gives them)")
        return _run_table(args, constants)
    result = _with_cli_names(_single, args, constants)
    _emit(args, result.as_dict(), _result_text(result))
    _write_out(args, constants, result.as_dict())
    return 0


def _with_cli_names(func, *a):
    """Call ``func``; re-raise an OptionError under the option name the user typed."""
    try:
        return func(*a)
    except OptionError as err:
        if err.option in _CLI_NAMES:
            raise OptionError(_CLI_NAMES[err.option], err.got, err.valid) from None
        raise


def _single(args, constants) -> chronology.AgeResult:
    """One age from the options given (a ratio or a Pb-Pb age)."""
    start = {"start_age": args.start_age, "start_age_err": args.start_age_err,
             "constants": constants}
    is_pbpb = args.system is not None and args.system.replace("\u2013", "-").lower() == "pb-pb"
    if args.pbpb_age is not None or is_pbpb:
        if args.system is not None and not is_pbpb:
            raise OptionError("--system", args.system, "Pb-Pb (or omit it) with --pbpb-age")
        _refuse(args, ("ratio", "ratio_err", "anchor"), "with a Pb-Pb age")
        _require(args, ("pbpb_age", "pbpb_err"), "for a Pb-Pb age")
        return chronology.age_from_pbpb(args.pbpb_age, args.pbpb_err, **start)
    if args.system is None:
        raise OptionError("--system", None, f"one of {', '.join(chronology.SYSTEMS)} (with "
                          "--ratio and --ratio-err), or --pbpb-age, --table or --list-constants")
    _refuse(args, ("pbpb_err",), "with a ratio")
    _require(args, ("ratio", "ratio_err"), f"for --system {args.system}")
    return chronology.age_from_ratio(args.system, args.ratio, args.ratio_err,
                                     anchor=args.anchor, **start)


def _require(args, names, context) -> None:
    for name in names:
        if getattr(args, name) is None:
            raise OptionError(_flag(name), None, f"a number, required {context}"
                              + (" (give 0 to ignore the error)" if name.endswith("err") else ""))


def _refuse(args, names, context) -> None:
    for name in names:
        if getattr(args, name) is not None:
            raise OptionError(_flag(name), getattr(args, name), f"not used {context}; remove it")


def _flag(name: str) -> str:
    return "--" + name.replace("_", "-")


# --------------------------------------------------------------------------- output

def _emit(args, payload: dict, text: str) -> None:
    if args.format == "json":
        sys.stdout.write(json.dumps(payload, indent=2) + "\n")
    else:
        sys.stdout.write(text + "\n")


def _write_out(args, constants, payload) -> None:
    """With ``--out``: ``ages.json`` and ``manifest.json`` in that folder."""
    if not args.out:
        return
    from ..manifest import write_atomic, write_manifest  # noqa: PLC0415
    write_atomic(Path(args.out) / "ages.json", json.dumps(payload, indent=2) + "\n")
    write_manifest(args.out, prior_files=constants.files, seed=args.seed,
                   extra={"command": NAME})


def _pm(value: float, err: float, unit: str) -> str:
    v, e = round_with_uncertainty(value, err, fallback_sig=4)
    return f"{v} +/- {e} {unit}" if e else f"{v} {unit} (no uncertainty)"


def _measured(m: chronology.Measured, unit: str = "") -> str:
    unit = f" {unit}" if unit else ""
    return f"{m.value:.6g} +/- {m.err:.2g}{unit} [{m.source}]"


def _header(r: chronology.AgeResult) -> str:
    if r.system == "Pb-Pb":
        return f"Pb-Pb: {r.inputs['age_ma']:.6g} +/- {r.inputs['err_ma']:.2g} Ma, {r.basis}"
    return (f"{r.system}: initial ratio {r.inputs['ratio']:.4g} +/- {r.inputs['ratio_err']:.2g}, "
            f"{r.basis}")


def _result_text(r: chronology.AgeResult) -> str:
    budget = ", ".join(f"{_COMPONENT_LABELS.get(k, k)} {format_significant(v, 2)}"
                       for k, v in r.components.items())
    lines = [_header(r),
             f"  age after CAI formation: {_pm(r.age_myr, r.err_myr, 'Myr')} (1-sigma)",
             f"  error budget (1-sigma, Myr): {budget}",
             f"  shared by all samples (correlated): {format_significant(r.shared_err_myr, 2)} Myr;"
             f" sample's own: {format_significant(r.sample_err_myr, 2)} Myr"]
    if r.cai_relative is not None:
        c = r.cai_relative
        lines.append(f"  relative to the CAI initial ratio instead: "
                     f"{_pm(c.age_myr, c.err_myr, 'Myr')} (anchored minus CAI-relative: "
                     f"{r.offset_myr:+.2f} Myr)")
    lines += [f"  {_CONSTANT_LABELS[k][0]}: {_measured(m, _CONSTANT_LABELS[k][1])}"
              for k, m in r.constants.items()]
    lines += [f"  warning: {w}" for w in r.warnings]
    return "\n".join(lines)


def _constants_text(c: chronology.ChronometerConstants) -> str:
    lines = [f"CAI start age: {_measured(c.start_age, 'Ma')}"]
    if c.start_age_note:
        lines.append(f"  note: {c.start_age_note}")
    for s in c.systems.values():
        lines += [f"{s.name} ({s.ratio_label}):",
                  f"  half-life: {_measured(s.half_life, 'Myr')}",
                  f"  CAI initial ratio: {_measured(s.cai_ratio)}"]
    for a in c.anchors.values():
        lines += [f"anchor {a.name} ({a.label}):", f"  Pb-Pb age: {_measured(a.pbpb_age, 'Ma')}"]
        lines += [f"  {k} initial ratio: {_measured(m)}" for k, m in a.ratios.items()]
    lines.append("files read: " + ", ".join(c.files))
    return "\n".join(lines)


# --------------------------------------------------------------------------- batch mode (--table)

#: Input columns read by --table (others are carried through unchanged).
_VALUE_COLUMNS = {"ratio": ("ratio", "ratio_err"), "pbpb": ("pbpb_age", "pbpb_err")}
#: Output columns appended by --table, with units.
_OUTPUT_COLUMNS = {"age": "Myr", "age_err": "Myr", "age_err_shared": "Myr",
                   "age_err_sample": "Myr", "age_basis": "", "age_cai_relative": "Myr",
                   "age_cai_relative_err": "Myr", "age_warnings": ""}
#: API argument names -> table columns.
_TABLE_NAMES = {"system": "system", "ratio": "ratio", "ratio_err": "ratio_err",
                "age_ma": "pbpb_age", "err_ma": "pbpb_err", "anchor": "anchor"}
_HEADER = re.compile(r"^\s*([^\[\]]*?)\s*(?:\[([^\]]*)\])?\s*$")


def _run_table(args, constants) -> int:
    """Batch mode: one age per row of ``--table``; all problems reported together."""
    path = Path(args.table)
    _with_cli_names(chronology.resolve_start_age, constants, args.start_age, args.start_age_err)
    start = {"start_age": args.start_age, "start_age_err": args.start_age_err}
    names, units, rows = _read_table(path)
    results = _table_results(path, names, units, rows, constants, start)
    table_rows = [{**row, **_output_values(r)} for row, r in zip(rows, results)]
    if args.format == "json":
        _emit(args, [{"row": i, **row, "result": r.as_dict()}
                     for i, (row, r) in enumerate(zip(rows, results), 1)], "")
    target = _table_target(args, path)
    text = _write_table(target, path, names, units, table_rows)
    if args.format == "text":
        sys.stdout.write(text if target is None else f"wrote {len(rows)} ages to {target}\n")
    if target is not None:
        _write_manifest_for(args, constants, path)
    return 0


def _table_target(args, path: Path) -> Path | None:
    if not args.out:
        return None
    return Path(args.out) / ("ages.ecsv" if path.suffix.lower() == ".ecsv" else "ages.csv")


def _write_manifest_for(args, constants, path: Path) -> None:
    from ..manifest import sha256_file, write_manifest  # noqa: PLC0415
    write_manifest(args.out, data_hash=sha256_file(path), prior_files=constants.files,
                   seed=args.seed, extra={"command": NAME})


def _output_values(r: chronology.AgeResult) -> dict:
    cai = r.cai_relative
    return {"age": r.age_myr, "age_err": r.err_myr, "age_err_shared": r.shared_err_myr,
            "age_err_sample": r.sample_err_myr, "age_basis": r.basis,
            "age_cai_relative": cai.age_myr if cai else r.age_myr,
            "age_cai_relative_err": cai.err_myr if cai else r.err_myr,
            "age_warnings": "; ".join(r.warnings)}


def _read_table(path: Path) -> tuple[list[str], dict, list[dict]]:
    """Column names, units (name -> unit string) and rows (name -> raw value or None)."""
    if path.suffix.lower() == ".ecsv":
        return _read_ecsv(path)
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            lines = list(csv.reader(fh))
    except FileNotFoundError:
        raise CompilationError(Problem(str(path), "file not found")) from None
    except (OSError, UnicodeDecodeError, csv.Error) as err:
        raise CompilationError(Problem(str(path), f"cannot read as CSV: {err}")) from None
    lines = [ln for ln in lines if any(cell.strip() for cell in ln)]
    if not lines:
        raise CompilationError(Problem(str(path), "empty file; need a header row with "
                                       "system, ratio, ratio_err (or pbpb_age, pbpb_err)"))
    names, units = _parse_header(path, lines[0])
    rows = []
    for i, cells in enumerate(lines[1:], 1):
        if len(cells) != len(names):
            raise CompilationError(Problem(str(path), f"has {len(cells)} cells; the header has "
                                           f"{len(names)}", row=i))
        rows.append({n: (c.strip() or None) for n, c in zip(names, cells)})
    return names, units, rows


def _parse_header(path: Path, header: list[str]) -> tuple[list[str], dict]:
    names, units = [], {}
    for cell in header:
        name, unit = _HEADER.match(cell).groups()
        if not name or name in names:
            why = "empty column name" if not name else f"duplicate column {name!r}"
            raise CompilationError(Problem(str(path), f"header: {why}"))
        names.append(name)
        units[name] = (unit or "").strip()
    return names, units


def _read_ecsv(path: Path) -> tuple[list[str], dict, list[dict]]:
    from astropy.table import Table  # noqa: PLC0415 - only for ECSV input
    try:
        table = Table.read(path, format="ascii.ecsv")
    except FileNotFoundError:
        raise CompilationError(Problem(str(path), "file not found")) from None
    except Exception as err:  # astropy raises many types for a malformed file
        raise CompilationError(Problem(str(path), f"cannot read as ECSV: {err}")) from None
    names = list(table.colnames)
    units = {n: str(table[n].unit or "") for n in names}
    rows = [{n: (None if np.ma.is_masked(row[n]) else row[n].item() if hasattr(row[n], "item")
                 else row[n]) for n in names} for row in table]
    return names, units, rows


def _table_results(path, names, units, rows, constants, start) -> list:
    """Compute every row's age, or raise CompilationError listing every problem."""
    problems = _column_problems(path, names, units)
    if not rows:
        problems.append(Problem(str(path), "no data rows"))
    if problems:
        raise CompilationError(problems)
    scale = {c: _time_scale(units[c]) for c in _VALUE_COLUMNS["pbpb"] if c in units}
    results = []
    for i, row in enumerate(rows, 1):
        try:
            results.append(_row_age(path, i, row, scale, constants, start))
        except CompilationError as err:
            problems += err.problems
    if problems:
        raise CompilationError(problems)
    return results


def _column_problems(path, names, units) -> list[Problem]:
    problems = []
    if "system" not in names:
        problems.append(Problem(str(path), "missing; required columns: system, and ratio, "
                                "ratio_err (decay systems) or pbpb_age, pbpb_err (Pb-Pb, Ma)",
                                column="system"))
    for name in set(names) & set(_OUTPUT_COLUMNS):
        problems.append(Problem(str(path), "is an output column of diskfield ages; rename it",
                                column=name))
    for name in _VALUE_COLUMNS["ratio"]:
        if units.get(name) and units[name] not in ("", "dimensionless", "1"):
            problems.append(Problem(str(path), f"got unit {units[name]!r}; a ratio has none",
                                    column=name))
    for name in _VALUE_COLUMNS["pbpb"]:
        if units.get(name) and _time_scale(units[name]) is None:
            problems.append(Problem(str(path), f"got unit {units[name]!r}; must be a time unit "
                                    "such as Ma or Gyr", column=name))
    return problems


def _time_scale(unit: str) -> float | None:
    """Factor from ``unit`` to Ma (None when not a time unit); no unit means Ma."""
    if not unit:
        return 1.0
    import astropy.units as u  # noqa: PLC0415
    try:
        return float(u.Unit(unit).to(u.Myr))
    except (ValueError, TypeError, u.UnitsError):
        return None


def _row_age(path, i, row, scale, constants, start) -> chronology.AgeResult:
    """One row's age; a CompilationError naming the row and column on bad input."""
    sample = row.get("sample")
    where = dict(row=i, record=None if sample is None else str(sample))
    system = row.get("system")
    kind = "pbpb" if str(system).strip().lower() == "pb-pb" else "ratio"
    unused = _VALUE_COLUMNS["ratio" if kind == "pbpb" else "pbpb"]
    problems = [Problem(str(path), f"got {row[c]!r}; not used on a {system} row: leave it empty",
                        column=c, **where) for c in unused if row.get(c) is not None]
    value, err = (_cell_number(path, row, c, scale.get(c, 1.0), where, problems)
                  for c in _VALUE_COLUMNS[kind])
    if problems:
        raise CompilationError(problems)
    try:
        return chronology.compute_age(system, value, err, anchor=row.get("anchor") or None,
                                      constants=constants, **start)
    except OptionError as bad:
        column = _TABLE_NAMES.get(bad.option, bad.option)
        raise CompilationError(Problem(str(path), f"got {bad.got!r}; valid: {bad.valid}",
                                       column=column, **where)) from None


def _cell_number(path, row, column, factor, where, problems) -> float | None:
    raw = row.get(column)
    try:
        if raw is None:
            raise ValueError("empty")
        return float(raw) * factor
    except (TypeError, ValueError):
        got = "an empty cell" if raw is None else repr(raw)
        problems.append(Problem(str(path), f"got {got}; must be a number (give 0 for no error)"
                                if column.endswith("err") else f"got {got}; must be a number",
                                column=column, **where))
        return None


def _write_table(target, source: Path, names, units, rows) -> str:
    """Write the table (ECSV when the input was ECSV, else CSV with ``name [unit]`` headers).

    Returns the CSV text when ``target`` is None (printed by the caller), else ``""``.
    """
    all_units = {**units, **_OUTPUT_COLUMNS}
    columns = names + list(_OUTPUT_COLUMNS)
    if target is not None and target.suffix == ".ecsv":
        from astropy.table import Table  # noqa: PLC0415

        from ..manifest import atomic_path  # noqa: PLC0415
        table = Table(rows=[[r[c] for c in columns] for r in rows], names=columns, masked=True)
        for c in columns:
            table[c].unit = all_units.get(c) or None
        with atomic_path(target) as tmp:
            table.write(tmp, format="ascii.ecsv", overwrite=True)
        return ""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([f"{c} [{all_units[c]}]" if all_units.get(c) else c for c in columns])
    writer.writerows([["" if r[c] is None else r[c] for c in columns] for r in rows])
    if target is None:
        return buffer.getvalue()
    from ..manifest import write_atomic  # noqa: PLC0415
    write_atomic(target, buffer.getvalue())
    return ""
