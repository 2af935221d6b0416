"""Generate the invented demo compilation from the declared truth in ``truth.toml``.

Usage::

    python data_demo/generate.py [--seed N] [--out DIR] [--truth FILE]

Writes ``demo_compilation.ecsv`` (native, with units), ``demo_compilation.csv`` (the same
table with ``name [unit]`` headers), ``demo_flawed.csv`` (a file with planted problems for
``diskfield check``) and ``demo_flawed.ecsv`` (a file whose paleointensity column carries a
time unit). With the default seed the output is bitwise identical to the committed files.

Self-contained on purpose (numpy, astropy, tomllib only): it implements the forward model of
the project's design itself instead of importing diskfield, so the demo truth does not depend
on the code it is meant to test.

Forward model of one record i of body g (design §4)::

    measured_i = B(r_g) * u_g * e_i * c_i * exp(n_i),   n_i ~ Normal(0, s_i^2 + sigma_int^2)

with B the ringed power law, u_g = |cos theta_g| the body's spin projection, e_i the true
recording fraction, c_i the calibration factor of the method times that of the remanence type
(each lognormal), s_i the stated log error. A measured value below the lab's detection limit is
reported as an upper limit at that limit. Reported values and limits are multiplied by any
author-applied spin factor.
"""
from __future__ import annotations

import argparse
import csv
import sys
import tomllib
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import MaskedColumn, Table

__all__ = ["COLUMNS", "FLAWS", "ring_field", "load_truth", "simulate_rows", "build_table",
           "write_csv", "write_flawed_csv", "write_flawed_ecsv", "write_demo", "main"]

HERE = Path(__file__).resolve().parent

#: Output columns in file order (names as in the design's compilation format) and their units.
COLUMNS = (
    ("record", None), ("body", None), ("reservoir", None), ("kind", None),
    ("paleointensity", "uT"), ("paleointensity_err", "uT"),
    ("age", "Myr"), ("age_err", "Myr"), ("age_min", "Myr"), ("age_max", "Myr"),
    ("method", None), ("remanence", None), ("spin_factor_applied", None),
    ("recording_fraction", None), ("recording_fraction_err", None),
    ("distance_min", "AU"), ("distance_max", "AU"),
    ("include", None), ("note", None), ("reference", None),
)
_FLOAT_COLUMNS = {"paleointensity", "paleointensity_err", "age", "age_err", "age_min",
                  "age_max", "spin_factor_applied", "recording_fraction",
                  "recording_fraction_err", "distance_min", "distance_max"}
_RING_PARAMETERS = ("field_1au", "power_index", "ring_amplitude", "ring_radius", "ring_width")


def ring_field(r_au, params):
    """Ringed power-law field.

    Parameters
    ----------
    r_au : float or ndarray
        Heliocentric distance [AU].
    params : mapping
        ``field_1au`` [uT], ``power_index`` [-], ``ring_amplitude`` [-], ``ring_radius`` [AU],
        ``ring_width`` [AU].

    Returns
    -------
    float or ndarray
        Field [uT].

    Notes
    -----
    ``B = field_1au (r / 1 AU)^(-power_index)
    (1 + ring_amplitude exp(-(r - ring_radius)^2 / (2 ring_width^2)))``.
    """
    r = np.asarray(r_au, dtype=float)
    smooth = params["field_1au"] * r ** (-params["power_index"])
    bump = np.exp(-0.5 * ((r - params["ring_radius"]) / params["ring_width"]) ** 2)
    return smooth * (1.0 + params["ring_amplitude"] * bump)


def load_truth(path=HERE / "truth.toml"):
    """Read the declared truth and check it is complete.

    Parameters
    ----------
    path : str or Path
        The truth TOML file.

    Returns
    -------
    dict
        The parsed TOML.

    Raises
    ------
    ValueError
        If a ring parameter, a body used by a record, or a lab used by a body is missing.
    """
    with open(path, "rb") as fh:
        truth = tomllib.load(fh)
    names = _RING_PARAMETERS + ("intrinsic_scatter",)
    missing = [p for p in names if p not in truth["parameters"]]
    missing += [f"bodies.{r['body']}" for r in truth["design"]["records"]
                if r["body"] not in truth["bodies"]]
    missing += [f"labs.{b['lab']}" for b in truth["bodies"].values()
                if b["lab"] not in truth["labs"]]
    if missing:
        raise ValueError(f"{path}: missing {', '.join(sorted(set(missing)))}")
    return truth


def _ln_factor(spec, z):
    """ln of a multiplicative factor drawn from a ``log_normal`` or ``fixed`` spec, given z ~ N(0,1)."""
    if spec is None:
        return 0.0
    if spec["family"] == "fixed":
        return float(np.log(spec["value"]))
    return float(np.log(spec["median"]) + spec["ln_sd"] * z)


def _ln_recording_fraction(rec, z):
    """True ln e: lognormal around the reported fraction with sd err/value (0 if absent)."""
    if "fraction" not in rec:
        return 0.0
    value, err = rec["fraction"]
    return float(np.log(value) + (err / value) * z)


def _ln_measured(rec, truth, z):
    """ln of the value a lab measures for record ``rec`` (before any author factor), ln uT."""
    body = truth["bodies"][rec["body"]]
    ln_b = np.log(ring_field(body["distance"], truth["parameters"]))
    ln_c = (_ln_factor(truth["calibration"].get(rec.get("method")), z[0])
            + _ln_factor(truth["remanence"].get(rec.get("remanence")), z[1]))
    sd = np.hypot(rec["ln_err"], truth["parameters"]["intrinsic_scatter"])
    return float(ln_b + np.log(body["spin_projection"]) + _ln_recording_fraction(rec, z[2])
                 + ln_c + np.log(rec.get("overprint", 1.0)) + sd * z[3])


def _row(rec, truth, ln_measured):
    """One output row (dict of column -> value, None for blank) from a record's measurement."""
    body = truth["bodies"][rec["body"]]
    factor = body.get("spin_factor_applied", 1.0)
    limit = truth["labs"][body["lab"]]["detection_limit"]
    detected = np.exp(ln_measured) >= limit
    value = round(float(np.exp(ln_measured) if detected else limit) * factor, 2)
    age, window = rec.get("age", (None, None)), rec.get("window", (None, None))
    fraction = rec.get("fraction", (None, None))
    return {
        "record": rec["id"], "body": rec["body"], "reservoir": body["reservoir"],
        "kind": "estimate" if detected else "upper_limit", "paleointensity": value,
        "paleointensity_err": round(value * rec["ln_err"], 2) if detected else None,
        "age": age[0], "age_err": age[1], "age_min": window[0], "age_max": window[1],
        "method": rec.get("method"), "remanence": rec.get("remanence"),
        "spin_factor_applied": body.get("spin_factor_applied"),
        "recording_fraction": fraction[0], "recording_fraction_err": fraction[1],
        "distance_min": body.get("distance_min"), "distance_max": body.get("distance_max"),
        "include": rec.get("include", True),
        "note": _note(rec, body), "reference": body["reference"],
    }


def _note(rec, body):
    """Free-text note: the (invented) lab, plus the reason for an exclusion."""
    note = f"measured at {body['lab']}"
    return f"{note}; {rec['note']}" if "note" in rec else note


def simulate_rows(truth, seed):
    """Draw every record of the design through the forward model.

    Parameters
    ----------
    truth : dict
        Output of :func:`load_truth`.
    seed : int
        Seed of ``numpy.random.default_rng``.

    Returns
    -------
    list of dict
        One row per record, in the design's order (see :data:`COLUMNS`).
    """
    rng = np.random.default_rng(seed)
    # Four normals per record, always drawn, so editing one record leaves the others' draws alone.
    design = truth["design"]["records"]
    z = rng.standard_normal((len(design), 4))
    return [_row(rec, truth, _ln_measured(rec, truth, zi)) for rec, zi in zip(design, z)]


def _column(name, values, unit):
    """A masked astropy column (blank where the value is None)."""
    mask = [v is None for v in values]
    if name in _FLOAT_COLUMNS:
        data = np.array([np.nan if v is None else v for v in values], dtype=float)
    elif name == "include":
        data = np.array([bool(v) for v in values])
    else:
        data = np.array(["" if v is None else v for v in values], dtype=str)
    return MaskedColumn(data, name=name, mask=mask, unit=unit)


def build_table(rows, meta=None):
    """The compilation as an astropy Table with units and blanks masked.

    Parameters
    ----------
    rows : list of dict
        Output of :func:`simulate_rows`.
    meta : dict, optional
        Table metadata written into the ECSV header.

    Returns
    -------
    astropy.table.Table
    """
    cols = [_column(name, [row[name] for row in rows], unit) for name, unit in COLUMNS]
    return Table(cols, meta=meta or {})


def _csv_cell(value):
    """Text of one CSV cell (blank for masked; floats in their shortest round-trip form)."""
    if value is np.ma.masked:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        return repr(float(value))
    return str(value)


def _csv_header(name, unit):
    return f"{name} [{unit}]" if unit else name


def write_csv(table, path):
    """Write ``table`` as CSV with ``name [unit]`` headers.

    Parameters
    ----------
    table : astropy.table.Table
    path : str or Path
    """
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow([_csv_header(c.name, c.unit) for c in table.columns.values()])
        for row in table:
            writer.writerow([_csv_cell(row[name]) for name in table.colnames])


# --- the deliberately flawed files -------------------------------------------------------

#: Planted problems of demo_flawed.csv: (records concerned, columns concerned, what is wrong).
FLAWS = (
    (("BAD-01",), ("paleointensity",), "negative paleointensity"),
    (("BAD-02",), ("reservoir",), "unknown reservoir 'XC'"),
    (("BAD-03",), ("paleointensity_err", "ln_err"), "estimate without an error"),
    (("BAD-04",), ("record",), "duplicate record id"),
    (("BAD-05",), ("age_min", "age_max"), "age_min greater than age_max"),
    (("BAD-06",), ("kind",), "unknown kind 'lower_limit'"),
    (("BAD-07", "BAD-08"), ("distance_min", "distance_max"), "contradictory distance overrides of one body"),
    (("BAD-09",), ("recording_fraction",), "recording fraction 1.5 (must be in (0, 1])"),
    (("BAD-10",), ("method",), "unknown method 'Thellier'"),
)

_FLAWED_HEADER = ("record", "body", "reservoir", "kind", "paleointensity [uT]",
                  "paleointensity_err [uT]", "age_min [Myr]", "age_max [Myr]", "method",
                  "remanence", "recording_fraction", "recording_fraction_err",
                  "distance_min [AU]", "distance_max [AU]", "include", "note")
_FLAWED_ROWS = (
    ("GOOD-01", "Vellmar", "NC", "estimate", "24.1", "3.6", "1.5", "3.5", "thermal", "TRM", "", "", "", "", "true", "a valid row"),
    ("GOOD-02", "Tarravane", "CC", "upper_limit", "3.0", "", "", "", "ARM", "CRM", "", "", "", "", "true", "a valid non-detection"),
    ("BAD-01", "Oskenby", "NC", "estimate", "-4.2", "1.1", "", "", "ARM", "CRM", "", "", "", "", "true", ""),
    ("BAD-02", "Brackwater", "XC", "estimate", "12.5", "2.5", "", "", "IRM", "", "", "", "", "", "true", ""),
    ("BAD-03", "Drummaret", "NC", "estimate", "18.0", "", "", "", "IRM", "TRM", "", "", "", "", "true", ""),
    ("BAD-04", "Quillimor", "NC", "upper_limit", "2.0", "", "", "", "thermal", "TRM", "", "", "", "", "true", ""),
    ("BAD-04", "Quillimor", "NC", "upper_limit", "2.0", "", "", "", "ARM", "TRM", "", "", "", "", "true", "same id as the row above"),
    ("BAD-05", "Halsquay", "CC", "estimate", "30.2", "6.0", "4.0", "2.0", "thermal", "TRM", "", "", "", "", "true", ""),
    ("BAD-06", "Pellucar", "CC", "lower_limit", "5.0", "", "", "", "ARM", "", "", "", "", "", "true", ""),
    ("BAD-07", "Skarnhold", "CC", "estimate", "15.3", "3.1", "", "", "ARM", "CRM", "", "", "3.0", "4.0", "true", ""),
    ("BAD-08", "Skarnhold", "CC", "estimate", "14.8", "3.0", "", "", "ARM", "CRM", "", "", "5.0", "6.0", "true", "override differs from BAD-07"),
    ("BAD-09", "Corvaneth", "CC", "estimate", "9.6", "2.4", "", "", "ARM", "CRM", "1.5", "0.2", "", "", "true", ""),
    ("BAD-10", "Myrrowen", "CC", "estimate", "21.0", "4.2", "", "", "Thellier", "TRM", "", "", "", "", "true", ""),
)


def write_flawed_csv(path):
    """Write the CSV with one planted problem per :data:`FLAWS` entry (and two valid rows)."""
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(_FLAWED_HEADER)
        writer.writerows(_FLAWED_ROWS)


def write_flawed_ecsv(path):
    """Write a two-row ECSV whose ``paleointensity`` column has a time unit (Myr)."""
    table = Table({"record": ["UNIT-01", "UNIT-02"], "body": ["Vellmar", "Tarravane"],
                   "reservoir": ["NC", "CC"], "kind": ["estimate", "estimate"],
                   "paleointensity": [24.1, 31.0] * u.Myr,
                   "paleointensity_err": [3.6, 6.2] * u.uT},
                  meta={"description": "invented demo data with a planted unit error: "
                                       "paleointensity is declared in Myr"})
    table.write(path, format="ascii.ecsv", overwrite=True)


# --- entry point ---------------------------------------------------------------------------

def write_demo(out_dir, seed=None, truth_path=HERE / "truth.toml"):
    """Write all demo files into ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
        Destination folder (created if missing).
    seed : int, optional
        Random seed; default: ``meta.seed`` of the truth file.
    truth_path : str or Path
        The declared truth.

    Returns
    -------
    list of Path
        The files written.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    truth = load_truth(truth_path)
    seed = truth["meta"]["seed"] if seed is None else int(seed)
    meta = {"description": "Invented demo compilation: fictional parent bodies, labs, "
                           "references and values, generated by data_demo/generate.py "
                           "from data_demo/truth.toml",
            "seed": seed}
    table = build_table(simulate_rows(truth, seed), meta=meta)
    paths = [out / name for name in ("demo_compilation.ecsv", "demo_compilation.csv",
                                     "demo_flawed.csv", "demo_flawed.ecsv")]
    table.write(paths[0], format="ascii.ecsv", overwrite=True)
    write_csv(table, paths[1])
    write_flawed_csv(paths[2])
    write_flawed_ecsv(paths[3])
    return paths


def main(argv=None):
    """Command-line entry point; returns the exit status."""
    parser = argparse.ArgumentParser(description="Regenerate the invented demo compilation.")
    parser.add_argument("--seed", type=int, default=None, help="random seed (default: truth.toml meta.seed)")
    parser.add_argument("--out", default=str(HERE), help="output folder (default: this folder)")
    parser.add_argument("--truth", default=str(HERE / "truth.toml"), help="declared truth (TOML)")
    args = parser.parse_args(argv)
    for path in write_demo(args.out, args.seed, args.truth):
        print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
