"""``diskfield ages``: chronometer ratios and Pb-Pb ages to Myr after CAI formation.

Examples::

    diskfield ages --system Al-Mg --ratio 3.98e-7 --ratio-err 0.15e-7
    diskfield ages --system Mn-Cr --ratio 2.1e-6 --ratio-err 0.1e-6 --anchor dorbigny
    diskfield ages --pbpb-age 4563.37 --pbpb-err 0.25 --start-age 4568.2
    diskfield ages --table samples.csv --out ages_out
    diskfield ages --list-constants
"""
from __future__ import annotations

import json
import sys

from .. import chronology
from ..errors import OptionError
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
    if args.pbpb_age is not None or (args.system and args.system.lower() == "pb-pb"):
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
    from pathlib import Path  # noqa: PLC0415

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
