"""The invented demo scenario in data_demo/: reproducibility, consistency with its truth, and
how the compilation reader treats the demo and the deliberately flawed files."""
from __future__ import annotations

import csv
import importlib.util
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

DEMO = Path(__file__).resolve().parents[1] / "data_demo"
FILES = ("demo_compilation.ecsv", "demo_compilation.csv", "demo_flawed.csv", "demo_flawed.ecsv")
RING_PARAMETERS = ("field_1au", "power_index", "ring_amplitude", "ring_radius", "ring_width")


def _load_generator():
    spec = importlib.util.spec_from_file_location("demo_generate", DEMO / "generate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


gen = _load_generator()


@pytest.fixture(scope="module")
def truth():
    with open(DEMO / "truth.toml", "rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(scope="module")
def table():
    return Table.read(DEMO / "demo_compilation.ecsv", format="ascii.ecsv")


def _spin_divided(table):
    factor = np.asarray(table["spin_factor_applied"].filled(1.0), dtype=float)
    return np.asarray(table["paleointensity"], dtype=float) / factor


# --- reproducibility and the truth file ----------------------------------------------------

def test_regeneration_reproduces_committed_files_bitwise(tmp_path):
    # Run as a script, the way the README says, with the default seed.
    done = subprocess.run([sys.executable, str(DEMO / "generate.py"), "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    for name in FILES:
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name


def test_other_seed_changes_values_not_design(tmp_path):
    gen.write_demo(tmp_path, seed=7)
    other = Table.read(tmp_path / "demo_compilation.ecsv", format="ascii.ecsv")
    committed = Table.read(DEMO / "demo_compilation.ecsv", format="ascii.ecsv")
    assert list(other["record"]) == list(committed["record"])
    assert list(other["body"]) == list(committed["body"])
    assert not np.array_equal(other["paleointensity"], committed["paleointensity"])


def test_truth_declares_every_ring_parameter(truth):
    for name in RING_PARAMETERS + ("intrinsic_scatter",):
        assert np.isfinite(truth["parameters"][name]), name
    assert truth["meta"]["profile"] == "ring" and truth["meta"]["envelope"] == "steady"


def test_truth_ring_parameters_match_the_ring_plugin(truth):
    profiles = pytest.importorskip("diskfield.profiles")
    ring = profiles.get_profile("ring")
    assert set(ring.parameter_names) == set(RING_PARAMETERS)


def test_generator_field_agrees_with_ring_plugin(truth):
    # Two independent implementations of the ring formula must agree.
    profiles = pytest.importorskip("diskfield.profiles")
    ring = profiles.get_profile("ring")
    r = np.linspace(0.5, 12.0, 200)
    p = {k: np.asarray(truth["parameters"][k]) for k in RING_PARAMETERS}
    np.testing.assert_allclose(ring.log_field(r, p), np.log(gen.ring_field(r, p)), rtol=1e-12)


def test_truth_lies_inside_the_shipped_priors(truth):
    # A demo fit can only recover a truth the shipped priors allow.
    priorset = pytest.importorskip("diskfield.priorset")
    priors = priorset.load_priors()
    for name, value in truth["parameters"].items():
        assert np.isfinite(priors.parameters[name].log_prob(np.array([value]))).all(), name
    for name, body in truth["bodies"].items():
        prior = priors.reservoirs[body["reservoir"]]
        assert np.isfinite(prior.log_prob(np.array([body["distance"]]))).all(), name


def test_ring_field_analytic_values(truth):
    p = truth["parameters"]
    # At the ring centre the Gaussian is 1; far from it the power law alone (derived).
    centre = p["field_1au"] * p["ring_radius"] ** -p["power_index"] * (1 + p["ring_amplitude"])
    assert gen.ring_field(p["ring_radius"], p) == pytest.approx(centre, rel=1e-12)
    assert gen.ring_field(1.0, p) == pytest.approx(p["field_1au"], rel=1e-3)


def test_truth_is_physically_reasonable(truth):
    p = truth["parameters"]
    # Planetary-strength 10-100 uT between 1 and 5 AU (common practice, no source).
    b = gen.ring_field(np.linspace(1.0, 5.0, 81), p)
    assert np.all((b > 10.0) & (b < 100.0))
    assert 0.1 <= p["intrinsic_scatter"] <= 0.2
    # Reservoir distances: NC ~1-3 AU, CC ~3-7 AU, distal CC beyond ~7 AU
    # (Weiss, Bai & Fu 2021, Sci. Adv. 7, eaba5967).
    ranges = {"NC": (1.0, 3.0), "CC": (3.0, 7.0), "CC_distal": (7.0, 20.0)}
    for name, body in truth["bodies"].items():
        lo, hi = ranges[body["reservoir"]]
        assert lo <= body["distance"] <= hi, name
        assert 0.0 < body["spin_projection"] <= 1.0, name
        if "distance_min" in body:
            assert body["distance_min"] <= body["distance"] <= body["distance_max"], name


def test_ring_lies_among_cc_bodies_and_raises_their_field(truth):
    p, bodies = truth["parameters"], truth["bodies"].values()
    cc = [b["distance"] for b in bodies if b["reservoir"] == "CC"]
    nc = [b["distance"] for b in bodies if b["reservoir"] == "NC"]
    assert min(cc) < p["ring_radius"] < max(cc)
    assert np.median(gen.ring_field(np.array(cc), p)) > np.max(gen.ring_field(np.array(nc), p))


def test_truth_states_generating_values_are_not_recommendations(truth):
    assert "not recommendations" in truth["meta"]["calibration_note"]


# --- the forward model of the generator ------------------------------------------------------

def test_forward_model_log_residual_distribution(truth):
    # ln(measured) - ln(B u) is Normal(ln m_method + ln m_rem + ln e, total variance) with the
    # variances adding (sum of independent Gaussians in ln; derived).
    rec = {"id": "X", "body": "Halsquay", "method": "ARM", "remanence": "CRM", "ln_err": 0.25,
           "fraction": [0.6, 0.1]}
    body = truth["bodies"]["Halsquay"]
    base = np.log(gen.ring_field(body["distance"], truth["parameters"]) * body["spin_projection"])
    z = np.random.default_rng(12345).standard_normal((20000, 4))
    resid = np.array([gen._ln_measured(rec, truth, zi) for zi in z]) - base
    cal, rem = truth["calibration"]["ARM"], truth["remanence"]["CRM"]
    mean = np.log(cal["median"]) + np.log(rem["median"]) + np.log(0.6)
    var = cal["ln_sd"] ** 2 + rem["ln_sd"] ** 2 + (0.1 / 0.6) ** 2 + 0.25 ** 2 \
        + truth["parameters"]["intrinsic_scatter"] ** 2
    se = np.sqrt(var / z.shape[0])
    assert abs(resid.mean() - mean) < 4 * se
    assert resid.var() == pytest.approx(var, rel=4 * np.sqrt(2 / z.shape[0]))


def test_limits_and_values_follow_detection_limits(truth, table):
    for row in table:
        body = truth["bodies"][row["body"]]
        factor = body.get("spin_factor_applied", 1.0)
        limit = truth["labs"][body["lab"]]["detection_limit"] * factor
        if row["kind"] == "upper_limit":
            assert row["paleointensity"] == pytest.approx(limit), row["record"]
            assert np.ma.is_masked(row["paleointensity_err"]), row["record"]
        else:
            assert row["paleointensity"] >= limit - 0.005, row["record"]
            assert row["paleointensity_err"] > 0, row["record"]


def test_demo_shows_cc_stronger_than_nc(table):
    value = _spin_divided(table)
    est = (table["kind"] == "estimate") & table["include"]
    assert np.median(value[est & (table["reservoir"] == "CC")]) > \
        np.median(value[est & (table["reservoir"] == "NC")])


def test_demo_covers_the_features_the_readme_promises(truth, table):
    assert len(table) == len(truth["design"]["records"]) == 40
    assert len(set(table["body"])) == len(truth["bodies"]) == 10
    assert set(table["kind"]) == {"estimate", "upper_limit"}
    assert {"ARM", "IRM", "thermal", "other"} <= set(table["method"].compressed())
    assert table["method"].mask.any() and table["remanence"].mask.any()
    assert {"TRM", "CRM", "unknown"} <= set(table["remanence"].compressed())
    assert (~table["age"].mask).any() and (~table["age_min"].mask).any()
    assert (table["age"].mask & table["age_min"].mask).any()
    assert (table["spin_factor_applied"].filled(1.0) == 2.0).any()
    assert (~table["recording_fraction"].mask).sum() >= 2
    excluded = table[~table["include"]]
    assert len(excluded) == 1 and "weathering" in excluded["note"][0]
    assert str(table["paleointensity"].unit) == "uT" and str(table["age"].unit) == "Myr"


# --- CSV and ECSV hold the same table ---------------------------------------------------------

def _read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


def test_csv_and_ecsv_hold_the_same_values(table):
    header, rows = _read_csv(DEMO / "demo_compilation.csv")
    assert len(rows) == len(table)
    for j, head in enumerate(header):
        name, _, unit = head.partition(" [")
        col = table[name]
        assert unit.rstrip("]") == (str(col.unit) if col.unit else ""), head
        for row, cell in zip(table, (r[j] for r in rows)):
            value = row[name]
            if np.ma.is_masked(value):
                assert cell == "", (row["record"], name)
            elif col.dtype.kind == "f":
                assert float(cell) == value, (row["record"], name)
            elif col.dtype.kind == "b":
                assert cell == ("true" if value else "false")
            else:
                assert cell == value, (row["record"], name)


def test_flawed_csv_plants_every_declared_flaw():
    header, rows = _read_csv(DEMO / "demo_flawed.csv")
    ids = [r[0] for r in rows]
    for records, columns, _ in gen.FLAWS:
        assert all(rec in ids for rec in records)
        names = [h.partition(" [")[0] for h in header]
        assert any(c in names for c in columns) or "ln_err" in columns
    assert ids.count("BAD-04") == 2


# --- the compilation reader on the demo files ----------------------------------------------------

def _reader():
    records = pytest.importorskip("diskfield.records")
    try:
        records.read_compilation(DEMO / "demo_compilation.ecsv")
    except NotImplementedError:
        pytest.skip("read_compilation not implemented yet")
    except Exception:  # a real failure is reported by the tests themselves
        pass
    return records.read_compilation


@pytest.mark.parametrize("name", ["demo_compilation.ecsv", "demo_compilation.csv"])
def test_reader_counts_match_the_truth(name, truth):
    comp = _reader()(DEMO / name)
    design = truth["design"]["records"]
    n_excluded = sum(1 for r in design if r.get("include", True) is False)
    assert len(comp.records) == len(design) - n_excluded
    assert len(comp.bodies) == len(truth["bodies"])
    assert [e.record for e in comp.excluded] == [r["id"] for r in design if r.get("include", True) is False]
    raw = Table.read(DEMO / "demo_compilation.ecsv", format="ascii.ecsv")
    assert int(comp.records.is_limit.sum()) == int(np.sum(raw["kind"][raw["include"]] == "upper_limit"))
    by_body = {b.name: b.reservoir for b in comp.bodies}
    assert by_body == {n: b["reservoir"] for n, b in truth["bodies"].items()}


def test_reader_applies_spin_factor_and_override(table, truth):
    comp = _reader()(DEMO / "demo_compilation.ecsv")
    inc = table[table["include"]]
    np.testing.assert_allclose(comp.records.ln_value, np.log(_spin_divided(inc)), rtol=1e-12)
    tarravane = next(b for b in comp.bodies if b.name == "Tarravane")
    body = truth["bodies"]["Tarravane"]
    assert (tarravane.distance_min, tarravane.distance_max) == (body["distance_min"], body["distance_max"])


def test_reader_reports_every_planted_flaw():
    from diskfield.errors import CompilationError
    read = _reader()
    with pytest.raises(CompilationError) as info:
        read(DEMO / "demo_flawed.csv")
    problems = info.value.problems
    for records, columns, what in gen.FLAWS:
        hits = [p for p in problems
                if (p.record in records or any(r in p.message for r in records))
                and (p.column in columns or any(c in p.message for c in columns))]
        assert hits, f"no problem reported for: {what}"
    flagged = {p.record for p in problems}
    assert not flagged & {"GOOD-01", "GOOD-02"}, "valid rows flagged"


def test_reader_rejects_time_unit_for_paleointensity():
    from diskfield.errors import CompilationError
    read = _reader()
    with pytest.raises(CompilationError) as info:
        read(DEMO / "demo_flawed.ecsv")
    assert any(p.column == "paleointensity" and "Myr" in p.message for p in info.value.problems)


def test_reader_reports_one_problem_per_flaw():
    from diskfield.errors import CompilationError
    with pytest.raises(CompilationError) as info:
        _reader()(DEMO / "demo_flawed.csv")
    assert len(info.value.problems) == len(gen.FLAWS)


@pytest.mark.parametrize("name, status, n_lines", [
    ("demo_compilation.ecsv", 0, 0), ("demo_compilation.csv", 0, 0),
    ("demo_flawed.csv", 2, len(gen.FLAWS)), ("demo_flawed.ecsv", 2, 1)])
def test_check_command_on_demo_files(name, status, n_lines, capsys):
    _reader()
    cli = pytest.importorskip("diskfield.cli")
    assert cli.main(["check", str(DEMO / name)]) == status
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == n_lines if n_lines else err == ""
