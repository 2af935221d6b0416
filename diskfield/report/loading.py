"""Read a saved fit or comparison folder (the team's saved-run schema) for the report.

Beside what :mod:`diskfield.runs` loads (posterior, fit.json, evidence, manifest) the report
needs the summary and field-profile CSVs, verdict.md, the compilation and the prior files, and
must tolerate optional files being absent (each absence is listed in the report). Everything is
loaded eagerly; nothing is refitted. The Model is rebuilt by :meth:`diskfield.runs.SavedFit.model`
(see :func:`diskfield.report.attach_models`).
"""
from __future__ import annotations

import csv
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy.table import Table

from ..errors import DiskfieldError, OptionError

__all__ = ["SavedFitData", "SavedRunData", "load_run", "read_csv_rows"]

_VALID_DIR = ("a folder written by 'diskfield fit' (holding fit.json) or "
              "'diskfield compare' (holding comparison.csv)")


@dataclass
class SavedFitData:
    """One fit folder.

    Attributes
    ----------
    name : str
        Model name (``fit.json`` ``model``).
    path : Path
    fit : dict
        ``fit.json``.
    idata : arviz.InferenceData
        ``posterior.nc``, loaded eagerly.
    evidence : dict or None
        ``evidence.json`` when present.
    summary : list of dict
        ``posterior_summary_<model>.csv`` rows.
    profile : dict of str -> ndarray or None
        ``field_profile_<model>.csv`` columns.
    model : object or None
        The rebuilt Model, or None (then ``model_note`` says why).
    model_note : str
    """

    name: str
    path: Path
    fit: dict
    idata: object
    evidence: dict | None
    summary: list
    profile: dict | None
    model: object = None
    model_note: str = ""


@dataclass
class SavedRunData:
    """A fit folder (one model) or a comparison folder (several)."""

    path: Path
    kind: str
    fits: dict
    compilation: Table
    prior_files: list
    manifest: dict
    comparison: list = field(default_factory=list)
    verdict_text: str = ""
    verdict: dict = field(default_factory=dict)
    sensitivity: list = field(default_factory=list)
    missing: list = field(default_factory=list)
    truth: dict = field(default_factory=dict)
    truth_text: str = ""


def _read_json(path: Path) -> dict:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as err:
        raise DiskfieldError(f"{path}: not valid JSON ({err.msg} at line {err.lineno}); "
                             "rerun the command that wrote it") from None


def read_csv_rows(path: Path) -> list[dict]:
    """Rows of a CSV file as dicts of strings (empty list when the file has no rows)."""
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _columns(rows: list[dict], path: Path, required) -> dict:
    missing = [c for c in required if rows and c not in rows[0]]
    if missing or not rows:
        what = f"missing column(s) {', '.join(missing)}" if rows else "no rows"
        raise DiskfieldError(f"{path}: {what}; expected columns {', '.join(required)}")
    try:
        return {c: np.array([float(r[c]) for r in rows]) for c in required}
    except ValueError as err:
        raise DiskfieldError(f"{path}: {err}; expected numbers in {', '.join(required)}") from None


_PROFILE_COLUMNS = ("r_au", "t_myr", "b_median_ut", "b_q025_ut", "b_q16_ut", "b_q84_ut",
                    "b_q975_ut")


def _load_fit(folder: Path, missing: list) -> SavedFitData:
    from ..azadapter import load_netcdf

    fit = _read_json(folder / "fit.json")
    name = str(fit.get("model", folder.name))
    if not (folder / "posterior.nc").is_file():
        raise DiskfieldError(f"{folder / 'posterior.nc'}: missing; the fit folder is incomplete "
                             "(rerun 'diskfield fit')")
    idata = load_netcdf(folder / "posterior.nc")
    evidence = _read_json(folder / "evidence.json") if (folder / "evidence.json").is_file() else None
    summary_path = folder / f"posterior_summary_{name}.csv"
    summary = read_csv_rows(summary_path) if summary_path.is_file() else []
    profile_path = folder / f"field_profile_{name}.csv"
    profile = (_columns(read_csv_rows(profile_path), profile_path, _PROFILE_COLUMNS)
               if profile_path.is_file() else None)
    for path, got in ((summary_path, summary), (profile_path, profile)):
        if not got:
            missing.append(str(path))
    return SavedFitData(name, folder, fit, idata, evidence, summary, profile)


def _fit_folders(path: Path) -> list[Path]:
    return sorted(p for p in path.iterdir() if p.is_dir() and (p / "fit.json").is_file())


def _model_order(folders: list[Path], comparison: list) -> list[Path]:
    order = [str(r.get("model", "")) for r in comparison]
    by_name = {p.name: p for p in folders}
    ordered = [by_name[m] for m in order if m in by_name]
    return ordered + [p for p in folders if p not in ordered]


def _prior_files(path: Path, folders: list[Path]) -> list[Path]:
    for candidate in [path] + folders:
        files = sorted((candidate / "priors_used").glob("*.toml"))
        if files:
            return files
    return []


def load_run(run_dir) -> SavedRunData:
    """Load a saved fit or comparison folder.

    Parameters
    ----------
    run_dir : str or Path
        Folder written by ``diskfield fit`` or ``diskfield compare``.

    Returns
    -------
    SavedRunData

    Raises
    ------
    OptionError
        The folder is neither kind.
    DiskfieldError
        A required file is missing or unreadable (named in the message).
    """
    path = Path(run_dir)
    if not path.is_dir():
        raise OptionError("DIR", str(path), _VALID_DIR)
    missing: list = []
    if (path / "fit.json").is_file():
        kind, folders, comparison = "fit", [path], []
    elif (path / "comparison.csv").is_file():
        comparison = read_csv_rows(path / "comparison.csv")
        kind, folders = "comparison", _model_order(_fit_folders(path), comparison)
    else:
        raise OptionError("DIR", str(path), _VALID_DIR)
    fits = {}
    for folder in folders:
        f = _load_fit(folder, missing)
        fits[f.name] = f
    comp_path = next((p / "compilation.ecsv" for p in [path] + folders
                      if (p / "compilation.ecsv").is_file()), None)
    if comp_path is None:
        raise DiskfieldError(f"{path}: no compilation.ecsv in the run folder; the report needs "
                             "the compilation as read (rerun 'diskfield fit' or 'compare')")
    run = SavedRunData(path, kind, fits, Table.read(comp_path, format="ascii.ecsv"),
                       _prior_files(path, folders), _optional_json(path / "manifest.json", missing),
                       comparison, missing=missing)
    if kind == "comparison":
        _load_comparison_extras(run, missing)
    if (path / "truth_recovery.json").is_file():  # written by the demo (simulated data)
        run.truth = _read_json(path / "truth_recovery.json")
        md = path / "truth_recovery.md"
        run.truth_text = md.read_text(encoding="utf-8").strip() if md.is_file() else ""
    return run


def _optional_json(path: Path, missing: list) -> dict:
    if path.is_file():
        return _read_json(path)
    missing.append(str(path))
    return {}


def _load_comparison_extras(run: SavedRunData, missing: list) -> None:
    p = run.path
    if (p / "verdict.md").is_file():
        run.verdict_text = (p / "verdict.md").read_text(encoding="utf-8").strip()
    else:
        missing.append(str(p / "verdict.md"))
    run.verdict = _optional_json(p / "verdict.json", missing)
    if (p / "prior_sensitivity.csv").is_file():
        run.sensitivity = read_csv_rows(p / "prior_sensitivity.csv")
    else:
        missing.append(str(p / "prior_sensitivity.csv"))
