"""Compilation reader and writer: units, normalisation, every validation rule, round trips."""
from __future__ import annotations

import csv
import hashlib
import math

import numpy as np
import pytest
from astropy import units as u
from astropy.table import QTable

from diskfield.errors import CompilationError
from diskfield.records import (
    COLUMNS,
    REQUIRED_COLUMNS,
    Compilation,
    read_compilation,
    write_compilation,
)

RESERVOIRS = ("NC", "CC", "CC_distal")
UNITS = {"paleointensity": "uT", "paleointensity_err": "uT", "age": "Myr", "age_err": "Myr",
         "age_min": "Myr", "age_max": "Myr", "distance_min": "AU", "distance_max": "AU"}


def base_rows() -> list[dict]:
    """A valid invented table: two bodies, an upper limit, one excluded row."""
    return [
        {"record": "A-1", "body": "Alpha", "reservoir": "NC", "kind": "estimate",
         "paleointensity": "40", "paleointensity_err": "5", "age": "2.0", "age_err": "0.5"},
        {"record": "A-2", "body": "Alpha", "reservoir": "NC", "kind": "upper_limit",
         "paleointensity": "4"},
        {"record": "B-1", "body": "Beta", "reservoir": "CC", "kind": "estimate",
         "paleointensity": "60", "paleointensity_err": "10"},
        {"record": "B-2", "body": "Beta", "reservoir": "CC", "kind": "estimate",
         "paleointensity": "55", "paleointensity_err": "8", "include": "false",
         "note": "suspect overprint"},
    ]


def header_cell(name: str, units: dict) -> str:
    return f"{name} [{units[name]}]" if units.get(name) else name


def write_rows(path, rows, columns=None, units=None):
    """Write ``rows`` (dicts of cell text) as CSV; columns default to all keys, canonical order."""
    units = UNITS if units is None else units
    if columns is None:
        keys = {k for r in rows for k in r} | set(REQUIRED_COLUMNS)
        columns = [c for c in COLUMNS if c in keys]
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow([header_cell(c, units) for c in columns])
        for row in rows:
            writer.writerow([row.get(c, "") for c in columns])
    return path


def read(path, **kw) -> Compilation:
    return read_compilation(path, known_reservoirs=kw.pop("known_reservoirs", RESERVOIRS), **kw)


def problems_of(path, **kw):
    with pytest.raises(CompilationError) as info:
        read(path, **kw)
    return info.value.problems


def find(problems, *, row=None, column=None):
    return [p for p in problems if (row is None or p.row == row)
            and (column is None or p.column == column)]


# --------------------------------------------------------------------------- normalisation


def test_small_file_normalised(small_compilation):
    comp = small_compilation
    recs = comp.records
    assert comp.body_names == ("Velthar", "Orrindel", "Kessarine")
    assert len(recs) == 6 and len(comp.excluded) == 1 and len(comp.table) == 7
    assert recs.ln_value[0] == pytest.approx(math.log(42.0), rel=1e-14)
    # First-order log error sd(ln P) = sd(P)/P: common practice, no source.
    assert recs.ln_err[0] == pytest.approx(8.0 / 42.0, rel=1e-14)
    assert recs.is_limit.tolist() == [False, False, True, False, False, False]
    assert recs.ln_err[2] == 0.0  # upper limit without an error
    assert recs.ln_value[3] == pytest.approx(math.log(60.0 / 2.0), rel=1e-14)  # spin 2 out
    assert recs.spin_factor.tolist() == [1, 1, 1, 2, 2, 1]
    assert recs.age_kind.tolist() == ["normal", "normal", "uniform", "normal", "default",
                                      "uniform"]
    assert (recs.age_a[2], recs.age_b[2]) == (4.5, 6.0)
    assert np.isnan(recs.age_a[4]) and np.isnan(recs.age_b[4])
    assert recs.ln_fraction_mean[1] == pytest.approx(math.log(0.8), rel=1e-14)
    assert recs.ln_fraction_sd[1] == pytest.approx(0.1 / 0.8, rel=1e-14)
    assert recs.method.tolist() == ["thermal", "ARM", "IRM", "thermal", "other", "ARM"]
    assert recs.remanence.tolist() == ["TRM", "TRM", "", "CRM", "unknown", ""]


def test_bodies_reservoirs_overrides_and_exclusions(small_compilation):
    comp = small_compilation
    velthar, orrindel, kessarine = comp.bodies
    assert velthar.reservoir == "NC" and velthar.record_indices == (0, 1, 2)
    assert math.isnan(velthar.distance_min) and math.isnan(velthar.distance_max)
    assert (kessarine.distance_min, kessarine.distance_max) == (8.0, 12.0)
    assert comp.records.body_index.tolist() == [0, 0, 0, 1, 1, 2]
    (excl,) = comp.excluded
    assert (excl.record, excl.body, excl.row, excl.note) == (
        "KS-2", "Kessarine", 7, "suspect overprint, see text")
    assert comp.reservoirs == ("NC", "CC", "CC_distal")
    assert "record 'OR-1': spin factor 2 divided out" in comp.conversions
    assert comp.table["row"].tolist() == list(range(1, 8))


def test_vocabularies_are_case_insensitive_and_canonicalised(small_compilation):
    table = small_compilation.table
    # small.csv writes 'nc', 'Estimate' and 'yes' on row 2.
    assert table["reservoir"][1] == "NC" and table["kind"][1] == "estimate"
    assert bool(table["include"][1]) is True


def test_data_hash_is_sha256_of_bytes(small_compilation, small_compilation_path):
    assert small_compilation.data_hash == hashlib.sha256(
        small_compilation_path.read_bytes()).hexdigest()


def test_bodies_in_order_of_first_included_appearance(tmp_path):
    rows = base_rows()
    rows.insert(0, dict(rows[3], record="B-0"))  # excluded Beta row comes first
    comp = read(write_rows(tmp_path / "c.csv", rows))
    assert comp.body_names == ("Alpha", "Beta")
    rows[0]["include"] = "true"
    assert read(write_rows(tmp_path / "d.csv", rows)).body_names == ("Beta", "Alpha")


@pytest.mark.parametrize("word, expected", [
    ("true", True), ("FALSE", False), ("Yes", True), ("no", False), ("1", True), ("0", False),
    ("", True)])
def test_include_flag_words(tmp_path, word, expected):
    rows = base_rows()
    rows[0]["include"] = word
    comp = read(write_rows(tmp_path / "c.csv", rows))
    assert ("A-1" in comp.records.record.tolist()) is expected


@pytest.mark.parametrize("unit, factor", [
    # SI definitions: 1 G = 1e-4 T = 100 uT (common practice, no source / SI definition).
    ("G", 100.0), ("gauss", 100.0), ("nT", 1e-3), ("mT", 1e3), ("T", 1e6),
    ("uT", 1.0), ("microTesla", 1.0), ("µT", 1.0)])
def test_flux_density_units_converted_to_microtesla(tmp_path, unit, factor):
    units = dict(UNITS, paleointensity=unit, paleointensity_err=unit)
    comp = read(write_rows(tmp_path / "c.csv", base_rows(), units=units))
    assert comp.table["paleointensity"][0] == pytest.approx(40 * factor, rel=1e-12)
    assert comp.records.ln_value[0] == pytest.approx(math.log(40 * factor), rel=1e-12)
    assert comp.records.ln_err[0] == pytest.approx(5 / 40, rel=1e-12)  # unit-free ratio
    assert str(comp.table["paleointensity"].unit) == "uT"
    noted = [c for c in comp.conversions if c.startswith("paleointensity:")]
    assert bool(noted) is (factor != 1.0)


def test_gauss_note_reads_x100(tmp_path):
    units = dict(UNITS, paleointensity="G", paleointensity_err="G")
    comp = read(write_rows(tmp_path / "c.csv", base_rows(), units=units))
    assert "paleointensity: G -> uT (x100)" in comp.conversions


def test_time_and_distance_units_converted(tmp_path):
    rows = base_rows()
    rows[0].update(age="2500", age_err="500", distance_min="1.5e8", distance_max="3e8")
    units = dict(UNITS, age="kyr", age_err="kyr", distance_min="km", distance_max="km")
    comp = read(write_rows(tmp_path / "c.csv", rows, units=units))
    assert (comp.records.age_a[0], comp.records.age_b[0]) == pytest.approx((2.5, 0.5), rel=1e-12)
    # 1 AU = 149 597 870.7 km exactly (IAU 2012 Resolution B2).
    assert comp.bodies[0].distance_min == pytest.approx(1.5e8 / 149597870.7, rel=1e-12)
    assert any(c.startswith("age: kyr -> Myr") for c in comp.conversions)


def test_unitless_age_and_distance_taken_as_myr_and_au_with_a_note(tmp_path):
    rows = base_rows()
    rows[0].update(distance_min="1", distance_max="2")
    comp = read(write_rows(tmp_path / "c.csv", rows, units={"paleointensity": "uT",
                                                          "paleointensity_err": "uT"}))
    assert comp.records.age_a[0] == 2.0 and comp.bodies[0].distance_max == 2.0
    assert "age: no unit given; taken as Myr" in comp.conversions
    assert "distance_min: no unit given; taken as AU" in comp.conversions


def test_error_without_unit_inherits_paleointensity_unit(tmp_path):
    units = dict(UNITS, paleointensity="nT", paleointensity_err="")
    comp = read(write_rows(tmp_path / "c.csv", base_rows(), units=units))
    assert comp.table["paleointensity_err"][0] == pytest.approx(5e-3, rel=1e-12)
    assert any("paleointensity_err: no unit given" in c for c in comp.conversions)


def test_ln_err_column_and_upper_limit_error(tmp_path):
    rows = base_rows()
    rows[0].pop("paleointensity_err")
    rows[0]["ln_err"] = "0.3"
    rows[1]["paleointensity_err"] = "1"
    comp = read(write_rows(tmp_path / "c.csv", rows))
    assert comp.records.ln_err[0] == 0.3
    assert comp.records.ln_err[1] == pytest.approx(1 / 4, rel=1e-14)


def test_custom_reservoir_from_argument(tmp_path):
    rows = base_rows()
    rows[2]["reservoir"] = rows[3]["reservoir"] = "outer_belt"
    comp = read(write_rows(tmp_path / "c.csv", rows), known_reservoirs=("NC", "Outer_Belt"))
    assert comp.bodies[1].reservoir == "Outer_Belt"
    problems = problems_of(tmp_path / "c.csv")
    assert find(problems, row=3, column="reservoir")


def test_distance_override_given_once_applies_to_the_body(tmp_path):
    rows = base_rows()
    rows[1].update(distance_min="1.2", distance_max="1.8")
    comp = read(write_rows(tmp_path / "c.csv", rows))
    assert (comp.bodies[0].distance_min, comp.bodies[0].distance_max) == (1.2, 1.8)


def test_ecsv_line_numbers_and_column_units(tmp_path):
    comp = read(write_rows(tmp_path / "c.csv", base_rows()))
    path = write_compilation(comp, tmp_path / "c.ecsv")
    text = path.read_text().replace("40.0", "-40.0", 1)
    path.write_text(text)
    (problem,) = problems_of(path)
    line = next(i for i, ln in enumerate(text.splitlines(), 1) if ln.startswith("A-1 "))
    assert (problem.row, problem.line, problem.record, problem.column) == (
        1, line, "A-1", "paleointensity")


# --------------------------------------------------------------------------- validation rules

RULES = [
    # (row index, column, new cell, expected column, fragment of the message)
    (0, "paleointensity", "-4", "paleointensity", "> 0"),
    (0, "paleointensity", "0", "paleointensity", "> 0"),
    (0, "paleointensity", "nan", "paleointensity", "finite"),
    (0, "paleointensity", "inf", "paleointensity", "finite"),
    (0, "paleointensity", "strong", "paleointensity", "finite number"),
    (0, "paleointensity", "", "paleointensity", "blank"),
    (0, "paleointensity_err", "", "paleointensity_err", "needs paleointensity_err or ln_err"),
    (0, "paleointensity_err", "-1", "paleointensity_err", "> 0"),
    (0, "age_err", "0", "age_err", "> 0"),
    (0, "age_err", "", "age_err", "needs age_err"),
    (0, "age", "", "age", "age_err is given"),
    (0, "age", "inf", "age", "finite"),
    (0, "reservoir", "XX", "reservoir", "NC, CC, CC_distal"),
    (0, "reservoir", "", "reservoir", "blank"),
    (0, "kind", "lower_limit", "kind", "estimate, upper_limit"),
    (0, "method", "Thellier", "method", "ARM, IRM, thermal, other"),
    (0, "remanence", "VRM", "remanence", "TRM, CRM, unknown"),
    (0, "include", "maybe", "include", "true/false"),
    (2, "body", "", "body", "blank"),
    (2, "spin_factor_applied", "0", "spin_factor_applied", "> 0"),
    (2, "recording_fraction", "1.5", "recording_fraction", "(0, 1]"),
    (2, "recording_fraction", "0", "recording_fraction", "(0, 1]"),
    (2, "recording_fraction_err", "0.1", "recording_fraction", "give the fraction too"),
    (2, "age_min", "3", "age_max", "together"),
    (2, "distance_max", "3", "distance_min", "together"),
    (2, "distance_min", "-1", "distance_min", "> 0"),
]


@pytest.mark.parametrize("index, column, cell, expected, fragment", RULES)
def test_each_rule_names_row_record_and_column(tmp_path, index, column, cell, expected,
                                               fragment):
    rows = base_rows()
    rows[index][column] = cell
    path = write_rows(tmp_path / "c.csv", rows)
    hits = find(problems_of(path), row=index + 1, column=expected)
    assert hits and fragment in hits[0].message
    assert hits[0].source == str(path) and hits[0].line == index + 2
    assert hits[0].record == rows[index]["record"]
    assert str(path) in str(hits[0]) and f"row {index + 1}" in str(hits[0])


@pytest.mark.parametrize("updates, column, fragment", [
    ({"age_min": "4", "age_max": "2"}, "age_max", "greater than age_min"),
    ({"age_min": "2", "age_max": "2"}, "age_max", "greater than age_min"),
    ({"age": "2", "age_err": "1", "age_min": "1", "age_max": "3"}, "age_min", "not both"),
    ({"distance_min": "5", "distance_max": "4"}, "distance_max", "greater than distance_min"),
    ({"ln_err": "0.2"}, "ln_err", "not both"),
])
def test_contradictory_cells(tmp_path, updates, column, fragment):
    rows = base_rows()
    rows[2].update(updates)
    hits = find(problems_of(write_rows(tmp_path / "c.csv", rows)), row=3, column=column)
    assert hits and fragment in hits[0].message


def test_duplicate_record_ids_name_both_rows(tmp_path):
    rows = base_rows()
    rows[2]["record"] = "A-1"
    (problem,) = problems_of(write_rows(tmp_path / "c.csv", rows))
    assert (problem.row, problem.column) == (3, "record") and "first at row 1" in problem.message


def test_body_reservoir_conflict_names_both_rows(tmp_path):
    rows = base_rows()
    rows[1]["reservoir"] = "CC"
    (problem,) = problems_of(write_rows(tmp_path / "c.csv", rows))
    assert (problem.row, problem.column) == (2, "reservoir")
    assert "row 1" in problem.message and "'A-1'" in problem.message


def test_body_distance_conflict_names_both_rows(tmp_path):
    rows = base_rows()
    rows[0].update(distance_min="1", distance_max="2")
    rows[1].update(distance_min="1", distance_max="3")
    (problem,) = problems_of(write_rows(tmp_path / "c.csv", rows))
    assert problem.row == 2 and "row 1" in problem.message and "one distance" in problem.message


def test_excluded_rows_need_only_ids(tmp_path):
    rows = base_rows()
    rows[3].update(paleointensity="-3", reservoir="nowhere", kind="??", paleointensity_err="")
    comp = read(write_rows(tmp_path / "c.csv", rows))
    assert [e.record for e in comp.excluded] == ["B-2"]
    assert comp.table["reservoir"][3] == "nowhere" and np.isnan(comp.table["paleointensity"][3])
    rows[3]["record"] = ""
    (problem,) = problems_of(write_rows(tmp_path / "d.csv", rows))
    assert (problem.row, problem.column) == (4, "record")


def test_every_row_excluded_is_nothing_to_fit(tmp_path):
    rows = base_rows()
    for row in rows:
        row["include"] = "no"
    (problem,) = problems_of(write_rows(tmp_path / "c.csv", rows))
    assert "nothing to fit" in problem.message and problem.row is None


def test_all_problems_collected_in_one_error(tmp_path):
    rows = base_rows()
    rows[0]["paleointensity"] = "-1"
    rows[1]["kind"] = "maybe"
    rows[2]["reservoir"] = "ZZ"
    problems = problems_of(write_rows(tmp_path / "c.csv", rows))
    assert [(p.row, p.column) for p in problems] == [
        (1, "paleointensity"), (2, "kind"), (3, "reservoir")]


def test_missing_and_renamed_required_columns(tmp_path):
    rows = [{("paleointensty" if k == "paleointensity" else k): v for k, v in r.items()
             if k != "kind"} for r in base_rows()]
    columns = ["record", "body", "reservoir", "paleointensty", "paleointensity_err", "age",
               "age_err", "include", "note"]
    path = write_rows(tmp_path / "c.csv", rows, columns=columns,
                      units=dict(UNITS, paleointensty="uT"))
    problems = problems_of(path)
    missing = find(problems, column="paleointensity")
    assert "missing" in missing[0].message and "'paleointensty'" in missing[0].message
    assert "missing" in find(problems, column="kind")[0].message
    unknown = find(problems, column="paleointensty")[0].message
    assert "did you mean 'paleointensity'" in unknown and "valid columns" in unknown


def test_unknown_column_is_an_error_listing_valid_ones(tmp_path):
    rows = base_rows()
    rows[0]["colour"] = "red"
    columns = list(COLUMNS[:4]) + ["paleointensity", "paleointensity_err", "age", "age_err",
                                   "include", "note", "colour"]
    (problem,) = problems_of(write_rows(tmp_path / "c.csv", rows, columns=columns))
    assert problem.column == "colour" and "reference" in problem.message


@pytest.mark.parametrize("unit", ["", "m", "Myr", "kg", "furlongs per fortnight"])
def test_paleointensity_unit_must_be_flux_density(tmp_path, unit):
    units = dict(UNITS, paleointensity=unit, paleointensity_err="uT")
    problems = problems_of(write_rows(tmp_path / "c.csv", base_rows(), units=units))
    hits = find(problems, column="paleointensity")
    assert hits and "uT" in hits[0].message and "G" in hits[0].message and hits[0].row is None


def test_time_column_with_flux_unit_is_an_error(tmp_path):
    units = dict(UNITS, age="uT")
    (problem,) = problems_of(write_rows(tmp_path / "c.csv", base_rows(), units=units))
    assert problem.column == "age" and "time unit" in problem.message


def test_ragged_csv_row_is_reported(tmp_path):
    path = write_rows(tmp_path / "c.csv", base_rows())
    lines = path.read_text().splitlines()
    lines[2] += ",extra"
    path.write_text("\n".join(lines) + "\n")
    (problem,) = problems_of(path)
    assert (problem.row, problem.line) == (2, 3) and "cells" in problem.message


# --------------------------------------------------------------------------- unreadable files


@pytest.mark.parametrize("name, content, fragment", [
    ("empty.csv", b"", "empty"),
    ("blank.csv", b"  \n\n", "empty"),
    ("binary.csv", bytes(range(256)) * 4, "UTF-8"),
    ("nul.csv", b"record,body\x00\n", "NUL"),
    ("header_only.csv", b"record,body,reservoir,kind,paleointensity [uT]\n", "no data rows"),
    ("comment_only.csv", b"# nothing here\n", "no header"),
    ("other_table.csv", b"lorem,ipsum\n1,2\n", "no compilation column"),
    ("semicolons.csv", b"record;body;reservoir;kind;paleointensity [uT]\nA;B;NC;estimate;3\n",
     "separated by commas, not ';'"),
    ("plain.ecsv", b"record,body\n1,2\n", "# %ECSV"),
    ("broken.ecsv", b"# %ECSV 1.0\n# ---\n# datatype: [\nrecord\nA\n", "cannot be read as ECSV"),
])
def test_unreadable_files_give_one_clear_problem(tmp_path, name, content, fragment):
    path = tmp_path / name
    path.write_bytes(content)
    problems = problems_of(path)
    assert any(fragment in p.message for p in problems)
    assert all(p.source == str(path) for p in problems)


def test_missing_file_and_folder(tmp_path):
    (problem,) = problems_of(tmp_path / "nope.csv")
    assert "not found" in problem.message
    (problem,) = problems_of(tmp_path)
    assert "folder" in problem.message


def test_utf8_bom_and_comment_lines_are_read(tmp_path):
    path = write_rows(tmp_path / "c.csv", base_rows())
    path.write_bytes(b"\xef\xbb\xbf# invented compilation\n" + path.read_bytes())
    assert read(path).records.record.tolist() == ["A-1", "A-2", "B-1"]


# --------------------------------------------------------------------------- round trips


def _numeric_columns(table):
    return [n for n in table.colnames if table[n].dtype.kind == "f"]


@pytest.mark.parametrize("first, second", [("csv", "ecsv"), ("ecsv", "csv")])
def test_round_trip_preserves_values(tmp_path, small_compilation, first, second):
    a = read(write_compilation(small_compilation, tmp_path / f"a.{first}"))
    b = read(write_compilation(a, tmp_path / f"b.{second}"))
    for comp in (a, b):
        assert comp.table.colnames == small_compilation.table.colnames
        for name in _numeric_columns(comp.table):
            np.testing.assert_allclose(comp.table[name], small_compilation.table[name],
                                       rtol=1e-12, equal_nan=True)
        for field in ("ln_value", "ln_err", "age_a", "age_b", "ln_fraction_mean",
                      "ln_fraction_sd", "spin_factor"):
            np.testing.assert_allclose(getattr(comp.records, field),
                                       getattr(small_compilation.records, field),
                                       rtol=1e-12, equal_nan=True)
        assert comp.records.method.tolist() == small_compilation.records.method.tolist()
        assert comp.excluded == small_compilation.excluded


def test_round_trip_of_converted_units_is_in_internal_units(tmp_path):
    units = dict(UNITS, paleointensity="G", paleointensity_err="G")
    comp = read(write_rows(tmp_path / "c.csv", base_rows(), units=units))
    path = write_compilation(comp, tmp_path / "c2.csv")
    assert "paleointensity [uT]" in path.read_text().splitlines()[0]
    again = read(path)
    np.testing.assert_allclose(again.records.ln_value, comp.records.ln_value, rtol=1e-12)
    assert not [c for c in again.conversions if c.startswith("paleointensity:")]


def test_writer_accepts_a_quantity_table(tmp_path):
    table = QTable()
    table["record"] = ["Q-1", "Q-2"]
    table["body"] = ["Quell", "Quell"]
    table["reservoir"] = ["CC", "CC"]
    table["kind"] = ["estimate", "upper_limit"]
    table["paleointensity"] = [0.5, 0.05] * u.G
    table["paleointensity_err"] = [0.1, np.nan] * u.G
    for suffix in ("ecsv", "csv"):
        comp = read(write_compilation(table, tmp_path / f"q.{suffix}"))
        np.testing.assert_allclose(comp.table["paleointensity"], [50.0, 5.0], rtol=1e-12)
        assert comp.records.ln_err[1] == 0.0


def test_writer_rejects_unknown_format(tmp_path, small_compilation):
    from diskfield.errors import OptionError

    with pytest.raises(OptionError, match="ecsv or csv"):
        write_compilation(small_compilation, tmp_path / "c.xlsx")


# --------------------------------------------------------------------------- property-based

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from diskfield.records import KINDS  # noqa: E402

PROPERTY_SETTINGS = settings(max_examples=60, deadline=None,
                             suppress_health_check=[HealthCheck.function_scoped_fixture])
_positive = st.floats(1e-3, 1e4, allow_nan=False, allow_infinity=False)


@st.composite
def valid_rows(draw) -> list[dict]:
    """A valid invented table of 1-10 rows over 1-4 bodies, at least one row included."""
    bodies = [(f"Body{i}", draw(st.sampled_from(RESERVOIRS)))
              for i in range(draw(st.integers(1, 4)))]
    rows = [_valid_row(draw, i, *draw(st.sampled_from(bodies)))
            for i in range(draw(st.integers(1, 10)))]
    rows[draw(st.integers(0, len(rows) - 1))]["include"] = "true"
    return rows


def _valid_row(draw, i, body, reservoir) -> dict:
    kind = draw(st.sampled_from(KINDS))
    row = {"record": f"R-{i}", "body": body, "kind": draw(st.sampled_from([kind, kind.upper()])),
           "reservoir": draw(st.sampled_from([reservoir, reservoir.lower()])),
           "paleointensity": repr(draw(_positive)),
           "spin_factor_applied": draw(st.sampled_from(["", "2", "1.5"])),
           "include": draw(st.sampled_from(["true", "false", "yes", "no", "1", "0", ""]))}
    if kind == "estimate" or draw(st.booleans()):
        row["paleointensity_err"] = repr(draw(_positive))
    age = draw(st.sampled_from(["none", "normal", "uniform"]))
    if age == "normal":
        row.update(age=repr(draw(st.floats(0, 10))), age_err=repr(draw(st.floats(0.01, 3))))
    elif age == "uniform":
        low = draw(st.floats(0, 8))
        row.update(age_min=repr(low), age_max=repr(low + draw(st.floats(0.01, 3))))
    return row


def _included(row) -> bool:
    return row.get("include", "") in ("true", "yes", "1", "")


@PROPERTY_SETTINGS
@given(rows=valid_rows(), fmt=st.sampled_from(["csv", "ecsv"]))
def test_property_valid_tables_keep_every_row(tmp_path_factory, rows, fmt):
    path = write_rows(tmp_path_factory.mktemp("valid") / "c.csv", rows)
    comp = read(path)
    if fmt == "ecsv":
        comp = read(write_compilation(comp, path.with_suffix(".ecsv")))
    assert len(comp.records) + len(comp.excluded) == len(rows) == len(comp.table)
    kept = [r for r in rows if _included(r)]
    assert comp.records.record.tolist() == [r["record"] for r in kept]
    expected = [math.log(float(r["paleointensity"]) / float(r["spin_factor_applied"] or 1))
                for r in kept]
    np.testing.assert_allclose(comp.records.ln_value, expected, rtol=1e-12)
    assert comp.body_names == tuple(dict.fromkeys(r["body"] for r in kept))


def _drop_column(draw, rows):
    column = draw(st.sampled_from(REQUIRED_COLUMNS))
    for row in rows:
        row.pop(column, None)
    columns = [c for c in COLUMNS if c != column and any(c in r for r in rows)]
    return rows, {"columns": columns}, (None, column, "missing")


def _rename_column(draw, rows):
    column = draw(st.sampled_from(REQUIRED_COLUMNS))
    typo = draw(st.sampled_from([column[:-1], column + "s", column.replace("e", "a", 1) + "_"]))
    for row in rows:
        row[typo] = row.pop(column)
    columns = [typo if c == column else c for c in COLUMNS if any(c in r for r in rows)
               or c == column]
    return rows, {"columns": columns, "units": dict(UNITS, **{typo: UNITS.get(column, "")})}, \
        (None, column, "missing")


def _wrong_unit(draw, rows):
    unit = draw(st.sampled_from(["", "m", "Myr", "AU", "kg", "s", "K", "bogus_unit", "uT/s"]))
    return rows, {"units": dict(UNITS, paleointensity=unit)}, (None, "paleointensity", "")


def _bad_value(draw, rows):
    i = draw(st.integers(0, len(rows) - 1))
    bad = draw(st.one_of(st.sampled_from(["-1", "0", "nan", "inf", "-inf", "abc", "", "1e999"]),
                         st.floats(max_value=0).map(repr)))
    rows[i].update(paleointensity=bad, include="true")
    return rows, {}, (i + 1, "paleointensity", "")


def _duplicate_id(draw, rows):
    rows.append(dict(rows[draw(st.integers(0, len(rows) - 1))]))
    return rows, {}, (len(rows), "record", "duplicate")


def _unknown_word(draw, rows, column, valid):
    i = draw(st.integers(0, len(rows) - 1))
    word = draw(st.text("abcdefgxyzXYZ_-", min_size=1, max_size=8).filter(
        lambda w: w.strip("_-") and w.lower().replace("-", "_") not in
        [v.lower() for v in valid]))
    rows[i].update({column: word, "include": "true"})
    return rows, {}, (i + 1, column, "valid")


def _contradictory_override(draw, rows):
    rows.append(dict(rows[0], record="EXTRA-1", include="true", distance_min="1",
                     distance_max="2", paleointensity_err="1"))
    rows.append(dict(rows[-1], record="EXTRA-2", distance_max=draw(st.sampled_from(["3", "2.5"]))))
    rows[0].pop("distance_min", None)
    return rows, {}, (len(rows), "distance_min", "one distance override")


MUTATIONS = {
    "drop_column": _drop_column,
    "rename_column": _rename_column,
    "wrong_unit": _wrong_unit,
    "bad_value": _bad_value,
    "duplicate_id": _duplicate_id,
    "unknown_reservoir": lambda d, r: _unknown_word(d, r, "reservoir", RESERVOIRS),
    "unknown_kind": lambda d, r: _unknown_word(d, r, "kind", KINDS),
    "contradictory_override": _contradictory_override,
}


@PROPERTY_SETTINGS
@given(rows=valid_rows(), mutation=st.sampled_from(sorted(MUTATIONS)), data=st.data())
def test_property_malformed_tables_are_located(tmp_path_factory, rows, mutation, data):
    rows, write_kw, (row, column, fragment) = MUTATIONS[mutation](data.draw, rows)
    path = write_rows(tmp_path_factory.mktemp("bad") / "c.csv", rows, **write_kw)
    problems = problems_of(path)
    hits = find(problems, column=column)
    hits = [p for p in hits if p.row == row and fragment in p.message]
    assert hits, (mutation, [str(p) for p in problems])
    assert all(p.source == str(path) for p in problems)
    if row is not None:
        assert hits[0].line == row + 1  # one header line, one line per row


@PROPERTY_SETTINGS
@given(content=st.one_of(st.binary(max_size=600), st.text(max_size=600).map(str.encode)),
       suffix=st.sampled_from([".csv", ".ecsv"]),
       prefix=st.sampled_from([b"", b"# %ECSV 1.0\n# ---\n",
                               b"record,body,reservoir,kind,paleointensity [uT]\n"]))
def test_property_garbage_is_a_compilation_error(tmp_path_factory, content, suffix, prefix):
    path = tmp_path_factory.mktemp("garbage") / f"g{suffix}"
    path.write_bytes(prefix + content)
    problems = problems_of(path)
    assert problems and all(p.source == str(path) and p.message for p in problems)


def test_hash_row_below_header_is_data_not_a_comment(tmp_path):
    rows = base_rows()
    rows[2]["record"] = "# B-1"
    comp = read(write_rows(tmp_path / "c.csv", rows))
    assert "# B-1" in comp.records.record.tolist() and len(comp.table) == 4


def test_in_memory_compilation_without_table_round_trips(tmp_path, small_compilation):
    import dataclasses

    bare = dataclasses.replace(small_compilation, table=None, excluded=())
    for suffix in ("ecsv", "csv"):
        back = read(write_compilation(bare, tmp_path / f"bare.{suffix}"))
        for name in ("ln_value", "ln_err", "age_a", "age_b", "ln_fraction_mean",
                     "ln_fraction_sd", "spin_factor"):
            np.testing.assert_allclose(getattr(back.records, name),
                                       getattr(small_compilation.records, name),
                                       rtol=1e-12, atol=1e-15, equal_nan=True)
        for field in ("record", "body_index", "is_limit", "age_kind", "method", "remanence"):
            assert (getattr(back.records, field).tolist()
                    == getattr(small_compilation.records, field).tolist())
        assert back.bodies == small_compilation.bodies
