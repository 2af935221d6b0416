"""Tests of diskfield.chronology and ``diskfield ages``.

Expected numbers are recomputed here from the published constants with plain ``math``, never
by calling the function under test. Sources of the constants (standing as in the project's
reference notes):
  26Al half-life 0.717 +/- 0.024 Myr       from memory: NUBASE2020
  53Mn half-life 3.7 +/- 0.37 Myr          from memory: Honda & Imamura 1971
  182Hf half-life 8.90 +/- 0.09 Myr        from memory: Vockenhuber et al. 2004
  CAI 26Al/27Al (5.23 +/- 0.13)e-5         Jacobsen et al. 2008, EPSL 272, 353
  CAI Pb-Pb age 4567.30 +/- 0.16 Ma        Connelly et al. 2012, Science 338, 651
  D'Orbigny Pb-Pb 4563.37 +/- 0.25 Ma      from memory: Brennecka & Wadhwa 2012
  D'Orbigny 53Mn/55Mn (3.24 +/- 0.04)e-6   from memory: Glavin et al. 2004
  D'Orbigny 26Al/27Al (3.98 +/- 0.15)e-7   Schiller et al. 2015
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from diskfield import chronology, cli
from diskfield.chronology import age_from_pbpb, age_from_ratio, compute_age, load_constants
from diskfield.errors import OptionError, PriorFileError

LN2 = math.log(2.0)
T_HALF = {"Al-Mg": 0.717, "Mn-Cr": 3.7, "Hf-W": 8.90}          # Myr, sources in module docstring
T_HALF_ERR = {"Al-Mg": 0.024, "Mn-Cr": 0.37, "Hf-W": 0.09}
AL_CAI, AL_CAI_ERR = 5.23e-5, 0.13e-5                           # Jacobsen et al. 2008, EPSL 272
T_CAI, T_CAI_ERR = 4567.30, 0.16                                # Connelly et al. 2012, Science 338
DOR_PB, DOR_PB_ERR = 4563.37, 0.25                      # from memory: Brennecka & Wadhwa 2012
DOR_MN, DOR_MN_ERR = 3.24e-6, 0.04e-6                           # from memory: Glavin et al. 2004
DOR_AL, DOR_AL_ERR = 3.98e-7, 0.15e-7                           # Schiller et al. 2015


@pytest.fixture(scope="module")
def constants():
    return load_constants()


# --------------------------------------------------------------------------- decay arithmetic

def test_shipped_constants_match_published_values(constants):
    # Values as listed in the module docstring (sources there).
    al = constants.systems["Al-Mg"]
    assert (al.half_life.value, al.half_life.err) == (0.717, 0.024)
    assert (al.cai_ratio.value, al.cai_ratio.err) == pytest.approx((AL_CAI, AL_CAI_ERR))
    assert (constants.start_age.value, constants.start_age.err) == (T_CAI, T_CAI_ERR)
    dor = constants.anchors["dorbigny"]
    assert (dor.pbpb_age.value, dor.pbpb_age.err) == (DOR_PB, DOR_PB_ERR)
    assert dor.ratios["Mn-Cr"].value == pytest.approx(DOR_MN)
    assert dor.ratios["Al-Mg"].value == pytest.approx(DOR_AL)
    for name, t in T_HALF.items():
        assert constants.systems[name].half_life.value == t
        assert constants.systems[name].half_life.err == T_HALF_ERR[name]


def test_every_shipped_value_states_its_standing(constants):
    sources = [constants.start_age.source]
    for s in constants.systems.values():
        sources += [s.half_life.source, s.cai_ratio.source]
    for a in constants.anchors.values():
        sources += [a.pbpb_age.source] + [r.source for r in a.ratios.values()]
    assert sources and all(s.startswith(("published:", "from memory:")) for s in sources)


def test_dorbigny_al_mg_relative_to_cai(constants):
    # Derived from the published values: dt = tau ln(R_CAI / R), tau = t_half / ln 2.
    tau = 0.717 / LN2
    expected = tau * math.log(AL_CAI / DOR_AL)
    result = age_from_ratio("Al-Mg", DOR_AL, DOR_AL_ERR, constants=constants)
    assert result.age_myr == pytest.approx(expected, rel=1e-12)
    assert result.age_myr == pytest.approx(5.05, abs=0.005)     # check value in the reference notes
    expected_err = math.sqrt(tau**2 * ((AL_CAI_ERR / AL_CAI)**2 + (DOR_AL_ERR / DOR_AL)**2)
                             + (expected * 0.024 / 0.717)**2)
    assert result.err_myr == pytest.approx(expected_err, rel=1e-12)
    assert result.sample_err_myr == pytest.approx(tau * DOR_AL_ERR / DOR_AL, rel=1e-12)


def test_dorbigny_pbpb(constants):
    # Connelly et al. 2012 start age minus the D'Orbigny Pb-Pb age; errors in quadrature.
    result = age_from_pbpb(DOR_PB, DOR_PB_ERR, constants=constants)
    assert result.age_myr == pytest.approx(T_CAI - DOR_PB, abs=1e-9)
    assert result.age_myr == pytest.approx(3.93, abs=1e-9)
    assert result.err_myr == pytest.approx(math.hypot(T_CAI_ERR, DOR_PB_ERR), rel=1e-12)
    assert result.shared_err_myr == pytest.approx(T_CAI_ERR)


@pytest.mark.parametrize("system", ["Al-Mg", "Mn-Cr", "Hf-W"])
def test_half_of_cai_ratio_is_one_half_life(system, constants):
    # Definition of the half-life (derived): R = R_CAI / 2  =>  dt = t_half.
    r0 = constants.systems[system].cai_ratio.value
    result = age_from_ratio(system, r0 / 2, 0.0, constants=constants)
    assert result.age_myr == pytest.approx(T_HALF[system], rel=1e-12)
    assert result.components["half_life"] == pytest.approx(T_HALF_ERR[system], rel=1e-12)


@pytest.mark.parametrize("system", ["Al-Mg", "Mn-Cr", "Hf-W"])
def test_ratio_equal_to_cai_value_gives_zero(system, constants):
    r0 = constants.systems[system].cai_ratio
    result = age_from_ratio(system, r0.value, 0.0, constants=constants)
    assert result.age_myr == 0.0
    assert result.components["half_life"] == 0.0
    # only the CAI ratio's own error remains: tau * sigma_R0 / R0 (derived from the formula)
    tau = T_HALF[system] / LN2
    assert result.err_myr == pytest.approx(tau * r0.err / r0.value, rel=1e-12)
    assert result.warnings == ()


def test_ratio_above_cai_value_gives_negative_age_with_warning(constants):
    result = age_from_ratio("Al-Mg", 6.0e-5, 0.1e-5, constants=constants)
    assert result.age_myr == pytest.approx(0.717 / LN2 * math.log(AL_CAI / 6.0e-5), rel=1e-12)
    assert result.age_myr < 0
    assert any("negative age" in w for w in result.warnings)


@pytest.mark.parametrize("dt_true", [0.5, 3.93, 8.0, 15.0])
def test_anchored_mn_cr_round_trip(dt_true, constants):
    # Invert the anchored relation dt = (t_CAI - t_a) + tau ln(R_a / R) for R (derived).
    tau = 3.7 / LN2
    ratio = DOR_MN * math.exp(-(dt_true - (T_CAI - DOR_PB)) / tau)
    result = age_from_ratio("Mn-Cr", ratio, 0.0, anchor="dorbigny", constants=constants)
    assert result.age_myr == pytest.approx(dt_true, abs=1e-10)
    decay = tau * math.log(DOR_MN / ratio)
    expected_err = math.sqrt(T_CAI_ERR**2 + DOR_PB_ERR**2 + (tau * DOR_MN_ERR / DOR_MN)**2
                             + (decay * 0.37 / 3.7)**2)
    assert result.err_myr == pytest.approx(expected_err, rel=1e-12)
    assert result.sample_err_myr == 0.0


def test_anchored_al_mg_shows_the_offset_to_the_cai_scale(constants):
    # The anchor's own ratio gives its Pb-Pb age (3.93 Myr) anchored, 5.05 Myr CAI-relative.
    result = age_from_ratio("Al-Mg", DOR_AL, DOR_AL_ERR, anchor="dorbigny", constants=constants)
    assert result.age_myr == pytest.approx(T_CAI - DOR_PB, abs=1e-9)
    cai = 0.717 / LN2 * math.log(AL_CAI / DOR_AL)
    assert result.cai_relative.age_myr == pytest.approx(cai, rel=1e-12)
    assert result.offset_myr == pytest.approx((T_CAI - DOR_PB) - cai, rel=1e-9)
    assert any("differ by -1.12" in w for w in result.warnings)


def test_start_age_override_shifts_pbpb_and_anchored_ages(constants):
    older = 4568.2      # an older start age of the kind argued by Desch et al. 2023
    pb = age_from_pbpb(DOR_PB, DOR_PB_ERR, start_age=older, start_age_err=0.3, constants=constants)
    assert pb.age_myr == pytest.approx(older - DOR_PB, abs=1e-9)
    assert pb.err_myr == pytest.approx(math.hypot(0.3, DOR_PB_ERR), rel=1e-12)
    base = age_from_ratio("Mn-Cr", 2e-6, 1e-7, anchor="dorbigny", constants=constants)
    moved = age_from_ratio("Mn-Cr", 2e-6, 1e-7, anchor="dorbigny", constants=constants,
                           start_age=older)
    assert moved.age_myr - base.age_myr == pytest.approx(older - T_CAI, abs=1e-9)
    assert moved.components["start_age"] == T_CAI_ERR   # error kept from the file


# --------------------------------------------------------------------------- error propagation

def test_error_propagation_matches_monte_carlo_cai_relative(constants):
    # First-order propagation against a seeded Monte Carlo of the same formula (common practice,
    # no source). Relative errors here are a few percent, so linearisation holds to ~1 %.
    rng = np.random.default_rng(20260101)
    n = 200_000
    t_half = rng.normal(0.717, 0.024, n)
    r0 = rng.normal(AL_CAI, AL_CAI_ERR, n)
    r = rng.normal(2.0e-6, 0.1e-6, n)
    sd = np.std(t_half / LN2 * np.log(r0 / r))
    result = age_from_ratio("Al-Mg", 2.0e-6, 0.1e-6, constants=constants)
    assert result.err_myr == pytest.approx(sd, rel=0.03)


def test_error_propagation_matches_monte_carlo_anchored(constants):
    rng = np.random.default_rng(7)
    n = 200_000
    t_half = rng.normal(3.7, 0.37, n)
    ra = rng.normal(DOR_MN, DOR_MN_ERR, n)
    r = rng.normal(1.5e-6, 0.05e-6, n)
    t_cai = rng.normal(T_CAI, T_CAI_ERR, n)
    t_a = rng.normal(DOR_PB, DOR_PB_ERR, n)
    sd = np.std((t_cai - t_a) + t_half / LN2 * np.log(ra / r))
    result = age_from_ratio("Mn-Cr", 1.5e-6, 0.05e-6, anchor="dorbigny", constants=constants)
    assert result.err_myr == pytest.approx(sd, rel=0.03)


@settings(max_examples=60, deadline=None)
@given(ratio=st.floats(1e-12, 1e-3), rel_err=st.floats(0, 0.25), system=st.sampled_from(
    ["Al-Mg", "Mn-Cr", "Hf-W"]))
def test_any_positive_ratio_gives_finite_consistent_age(ratio, rel_err, system):
    constants = load_constants()
    result = age_from_ratio(system, ratio, ratio * rel_err, constants=constants)
    assert math.isfinite(result.age_myr) and math.isfinite(result.err_myr)
    assert result.err_myr >= result.sample_err_myr >= 0
    assert result.err_myr == pytest.approx(math.hypot(result.shared_err_myr,
                                                      result.sample_err_myr), rel=1e-12)
    later = age_from_ratio(system, ratio / 2, 0.0, constants=constants)
    assert later.age_myr == pytest.approx(result.age_myr + T_HALF[system], rel=1e-9, abs=1e-9)


# --------------------------------------------------------------------------- bad input (API)

@pytest.mark.parametrize("kwargs, option, fragment", [
    (dict(system="Xe-I", ratio=1e-6, ratio_err=0.0), "system", "Al-Mg, Mn-Cr, Hf-W, Pb-Pb"),
    (dict(system="Pb-Pb", ratio=1e-6, ratio_err=0.0), "system", "age_from_pbpb"),
    (dict(system="Al-Mg", ratio=0.0, ratio_err=0.0), "ratio", "> 0"),
    (dict(system="Al-Mg", ratio=-3e-7, ratio_err=0.0), "ratio", "> 0"),
    (dict(system="Al-Mg", ratio=math.nan, ratio_err=0.0), "ratio", "finite"),
    (dict(system="Al-Mg", ratio=True, ratio_err=0.0), "ratio", "finite number"),
    (dict(system="Al-Mg", ratio="3e-7", ratio_err=0.0), "ratio", "finite number"),
    (dict(system="Al-Mg", ratio=3e-7, ratio_err=-1e-8), "ratio_err", ">= 0"),
    (dict(system="Al-Mg", ratio=3e-7, ratio_err=0.0, anchor="nowhere"), "anchor", "dorbigny"),
    (dict(system="Hf-W", ratio=3e-5, ratio_err=0.0, anchor="dorbigny"), "anchor", "Hf-W"),
])
def test_bad_api_input_names_the_option(kwargs, option, fragment, constants):
    with pytest.raises(OptionError) as info:
        age_from_ratio(**kwargs, constants=constants)
    assert info.value.option == option
    assert fragment in str(info.value)


def test_pbpb_bad_input_and_anchor_refused(constants):
    with pytest.raises(OptionError, match="age_ma"):
        age_from_pbpb(-1.0, 0.2, constants=constants)
    with pytest.raises(OptionError, match="start_age_err"):
        age_from_pbpb(4565.0, 0.2, start_age_err=-0.1, constants=constants)
    with pytest.raises(OptionError, match="anchor"):
        compute_age("Pb-Pb", 4565.0, 0.2, anchor="dorbigny", constants=constants)
    late = age_from_pbpb(3.9, 0.2, constants=constants)      # Myr after CAI given by mistake
    assert any("absolute" in w for w in late.warnings)


def test_system_names_are_case_insensitive(constants):
    a = compute_age("al-mg", 1e-6, 0.0, constants=constants)
    b = compute_age("AL\u2013MG", 1e-6, 0.0, constants=constants)
    assert a.system == b.system == "Al-Mg" and a.age_myr == b.age_myr


# --------------------------------------------------------------------------- constants files

def _write(tmp_path, text, name="user.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_user_file_replaces_a_system_table(tmp_path):
    path = _write(tmp_path, """
[systems.Al-Mg]
half_life_myr = 0.705
half_life_err_myr = 0.024
cai_ratio = 5.23e-5
cai_ratio_err = 0.13e-5
""")
    constants = load_constants([path])
    assert constants.files[-1] == str(path)
    result = age_from_ratio("Al-Mg", DOR_AL, 0.0, constants=constants)
    assert result.age_myr == pytest.approx(0.705 / LN2 * math.log(AL_CAI / DOR_AL), rel=1e-12)
    assert "no source given" in result.constants["half_life_myr"].source
    # the other tables stay as shipped
    assert constants.systems["Mn-Cr"].half_life.value == 3.7


def test_later_file_wins_and_new_anchor_is_usable(tmp_path):
    first = _write(tmp_path, "[start_age]\nage_ma = 4568.0\nerr_ma = 0.2\n", "a.toml")
    second = _write(tmp_path, """
[start_age]
age_ma = 4568.5
err_ma = 0.3
source = "test value"

[anchors.testrock]
pbpb_age_ma = 4565.0
pbpb_err_ma = 0.5
[anchors.testrock.ratios.Mn-Cr]
value = 5.0e-6
err = 0.1e-6
""", "b.toml")
    constants = load_constants([first, second])
    assert constants.start_age.value == 4568.5
    result = age_from_ratio("Mn-Cr", 5.0e-6, 0.0, anchor="testrock", constants=constants)
    assert result.age_myr == pytest.approx(4568.5 - 4565.0, abs=1e-9)


@pytest.mark.parametrize("text, column, fragment", [
    ("[systems.Al-Mg]\nhalf_lif = 1\n", "systems.Al-Mg.half_lif", "valid: half_life_myr"),
    ("[systems.Al-Mg]\nhalf_life_myr = 0.7\n", "systems.Al-Mg.cai_ratio", "missing"),
    ("[systems.I-Xe]\nhalf_life_myr = 16\n", "systems.I-Xe", "valid: Al-Mg, Mn-Cr, Hf-W"),
    ("[start_age]\nage_ma = -5\nerr_ma = 0.1\n", "start_age.age_ma", "> 0"),
    ("[start_age]\nage_ma = 4567\nerr_ma = 'wide'\n", "start_age.err_ma", ">= 0"),
    ("[start_age]\nage_ma = true\nerr_ma = 0.1\n", "start_age.age_ma", "finite number"),
    ("[half_lives]\nx = 1\n", "(top level).half_lives", "valid: start_age, systems, anchors"),
    ("[anchors.x]\npbpb_age_ma = 4565\npbpb_err_ma = 0.1\n[anchors.x.ratios.Pb-Pb]\nvalue = 1\n",
     "anchors.x.ratios.Pb-Pb", "valid: Al-Mg, Mn-Cr, Hf-W"),
])
def test_bad_constants_file_names_table_and_key(tmp_path, text, column, fragment):
    path = _write(tmp_path, text)
    with pytest.raises(PriorFileError) as info:
        load_constants([path])
    hits = [p for p in info.value.problems if p.column == column]
    assert hits, [str(p) for p in info.value.problems]
    assert all(p.source == str(path) for p in info.value.problems)
    assert fragment in hits[0].message


def test_unreadable_constants_files(tmp_path):
    with pytest.raises(PriorFileError, match="file not found"):
        load_constants([tmp_path / "missing.toml"])
    with pytest.raises(PriorFileError, match="not valid TOML"):
        load_constants([_write(tmp_path, "[start_age\nage_ma = 1")])
    with pytest.raises(PriorFileError, match="cannot read"):
        load_constants([tmp_path])                                       # a folder
    garbage = tmp_path / "garbage.toml"
    garbage.write_bytes(b"\xff\xfe\x00binary")
    with pytest.raises(PriorFileError):
        load_constants([garbage])


def test_all_problems_of_a_file_are_reported(tmp_path):
    path = _write(tmp_path, "[start_age]\nage_ma = -1\nerr_ma = -2\ncolour = 'red'\n")
    with pytest.raises(PriorFileError) as info:
        load_constants([path])
    columns = {p.column for p in info.value.problems}
    assert {"start_age.age_ma", "start_age.err_ma", "start_age.colour"} <= columns


# --------------------------------------------------------------------------- command line

@pytest.fixture
def run_cli(monkeypatch, capsys):
    # Only this command is registered, so these tests do not depend on other commands' modules.
    monkeypatch.setattr(cli, "COMMANDS", ("ages",))

    def run(*argv):
        status = cli.main(["ages", *argv])
        out, err = capsys.readouterr()
        return status, out, err
    return run


def test_cli_text_output(run_cli):
    status, out, err = run_cli("--system", "Al-Mg", "--ratio", "3.98e-7", "--ratio-err", "0.15e-7")
    assert status == 0 and err == ""
    assert "age after CAI formation: 5.05 +/- 0.18 Myr" in out
    assert "Jacobsen et al. 2008" in out


def test_cli_json_output(run_cli):
    status, out, _ = run_cli("--system", "Al-Mg", "--ratio", "3.98e-7", "--ratio-err", "0.15e-7",
                             "--format", "json")
    payload = json.loads(out)
    assert status == 0
    assert payload["age_myr"] == pytest.approx(0.717 / LN2 * math.log(AL_CAI / DOR_AL), rel=1e-12)
    assert payload["constants"]["cai_ratio"]["value"] == pytest.approx(AL_CAI)


def test_cli_anchored_shows_both_scales(run_cli):
    status, out, _ = run_cli("--system", "Al-Mg", "--ratio", "3.98e-7", "--ratio-err", "0.15e-7",
                             "--anchor", "dorbigny")
    assert status == 0
    assert "age after CAI formation: 3.9 +/- 0.3 Myr" in out
    assert "relative to the CAI initial ratio instead: 5.05 +/- 0.18 Myr" in out
    assert "anchored minus CAI-relative: -1.12 Myr" in out


def test_cli_pbpb_with_start_age_and_out_folder(run_cli, tmp_path):
    out_dir = tmp_path / "ages_out"
    status, out, _ = run_cli("--pbpb-age", "4563.37", "--pbpb-err", "0.25", "--start-age",
                             "4568.2", "--format", "json", "--out", str(out_dir))
    assert status == 0
    assert json.loads(out)["age_myr"] == pytest.approx(4568.2 - 4563.37, abs=1e-9)
    assert json.loads((out_dir / "ages.json").read_text()) == json.loads(out)
    manifest = json.loads((out_dir / "manifest.json").read_text())
    assert any(f["path"] == "ages.json" for f in manifest["files"])


def test_cli_list_constants_and_user_file(run_cli, tmp_path):
    path = _write(tmp_path, "[start_age]\nage_ma = 4568.4\nerr_ma = 0.2\nsource = 'mine'\n")
    status, out, _ = run_cli("--list-constants", "--constants", str(path))
    assert status == 0
    assert "CAI start age: 4568.4 +/- 0.2 Ma [mine]" in out and str(path) in out


@pytest.mark.parametrize("argv, fragment", [
    (["--system", "Xe-I", "--ratio", "1e-6", "--ratio-err", "0"], "'--system': got 'Xe-I'"),
    (["--system", "Al-Mg", "--ratio=-1e-6", "--ratio-err", "0"], "'--ratio': got -1e-06"),
    (["--system", "Al-Mg", "--ratio", "nan", "--ratio-err", "0"], "'--ratio'"),
    (["--system", "Al-Mg", "--ratio", "1e-6"], "'--ratio-err'"),
    (["--system", "Al-Mg", "--ratio", "1e-6", "--ratio-err", "0", "--anchor", "x"], "dorbigny"),
    (["--pbpb-age", "4563", "--pbpb-err", "0.2", "--ratio", "1e-6"], "'--ratio'"),
    (["--pbpb-age", "4563"], "'--pbpb-err'"),
    (["--pbpb-age", "4563", "--pbpb-err", "0.2", "--system", "Al-Mg"], "Pb-Pb (or omit it)"),
    (["--system", "Pb-Pb", "--ratio", "1e-6", "--ratio-err", "0"], "'--ratio'"),
    (["--pbpb-age", "4563", "--pbpb-err", "0.2", "--start-age-err", "-1"], "'--start-age-err'"),
    ([], "'--system'"),
    (["--table", "samples.csv", "--ratio", "1e-6"], "not used with --table"),
    (["--list-constants", "--constants", "/nonexistent/c.toml"], "file not found"),
])
def test_cli_bad_input_is_one_line_and_exit_2(run_cli, argv, fragment):
    status, out, err = run_cli(*argv)
    assert status == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0] and "Traceback" not in err


# --------------------------------------------------------------------------- batch mode

_TABLE = """sample,system,ratio,ratio_err,pbpb_age [Ma],pbpb_err [Ma],anchor,note
S1,Al-Mg,3.98e-7,0.15e-7,,,,"kept, with a comma"
S2,Mn-Cr,3.24e-6,0.04e-6,,,dorbigny,
S3,Pb-Pb,,,4563.37,0.25,,
"""


def _read_csv_output(text):
    import csv
    import io
    return list(csv.DictReader(io.StringIO(text)))


def test_cli_table_csv_to_stdout(run_cli, tmp_path):
    path = _write(tmp_path, _TABLE, "samples.csv")
    status, out, err = run_cli("--table", str(path))
    assert status == 0 and err == ""
    rows = _read_csv_output(out)
    assert [r["sample"] for r in rows] == ["S1", "S2", "S3"]
    assert rows[0]["note"] == "kept, with a comma"
    # same published arithmetic as above (Jacobsen 2008; Schiller 2015; Connelly 2012)
    assert float(rows[0]["age [Myr]"]) == pytest.approx(0.717 / LN2 * math.log(AL_CAI / DOR_AL))
    assert float(rows[1]["age [Myr]"]) == pytest.approx(T_CAI - DOR_PB, abs=1e-9)
    assert float(rows[2]["age [Myr]"]) == pytest.approx(T_CAI - DOR_PB, abs=1e-9)
    assert float(rows[2]["age_err [Myr]"]) == pytest.approx(math.hypot(T_CAI_ERR, DOR_PB_ERR))


def test_cli_table_ecsv_with_units_to_out_folder(run_cli, tmp_path):
    import astropy.units as u
    from astropy.table import Table
    table = Table({"sample": ["E1"], "system": ["Pb-Pb"], "pbpb_age": [4.56337] * u.Gyr,
                   "pbpb_err": [0.00025] * u.Gyr})
    path = tmp_path / "samples.ecsv"
    table.write(path)
    out_dir = tmp_path / "out"
    status, out, _ = run_cli("--table", str(path), "--out", str(out_dir))
    assert status == 0 and "wrote 1 ages" in out
    result = Table.read(out_dir / "ages.ecsv")
    assert result["age"].unit == u.Myr
    assert result["age"][0] == pytest.approx(T_CAI - DOR_PB, abs=1e-6)   # Gyr converted to Ma
    assert (out_dir / "manifest.json").is_file()


def test_cli_table_reports_every_bad_row(run_cli, tmp_path):
    path = _write(tmp_path, """sample,system,ratio,ratio_err,pbpb_age,pbpb_err
B1,Al-Mg,abc,1e-8,,
B2,Xe-I,2e-6,1e-7,,
B3,Pb-Pb,1e-6,0,4563.37,0.2
B4,Mn-Cr,2e-6,,,
""", "bad.csv")
    status, out, err = run_cli("--table", str(path))
    assert status == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 5
    expected = [("row 1, record 'B1', column 'ratio'", "got 'abc'"),
                ("row 2, record 'B2', column 'system'", "Al-Mg, Mn-Cr, Hf-W, Pb-Pb"),
                ("row 3, record 'B3', column 'ratio'", "leave it empty"),
                ("row 3, record 'B3', column 'ratio_err'", "leave it empty"),
                ("row 4, record 'B4', column 'ratio_err'", "give 0 for no error")]
    for line, (place, fragment) in zip(lines, expected):
        assert str(path) in line and place in line and fragment in line


@pytest.mark.parametrize("text, fragment", [
    ("", "empty file"),
    ("system,ratio,ratio_err\n", "no data rows"),
    ("system,ratio,ratio_err\nAl-Mg,1e-6\n", "row 1: has 2 cells"),
    ("ratio,ratio_err\n1e-6,0\n", "column 'system': missing"),
    ("system,ratio,ratio_err,age\nAl-Mg,1e-6,0,1\n", "column 'age': is an output column"),
    ("system,ratio [uT],ratio_err\nAl-Mg,1e-6,0\n", "a ratio has none"),
    ("system,pbpb_age [uT],pbpb_err\nPb-Pb,4563,0.2\n", "must be a time unit"),
    ("system,ratio,ratio,ratio_err\nAl-Mg,1,1,0\n", "duplicate column 'ratio'"),
])
def test_cli_table_bad_files(run_cli, tmp_path, text, fragment):
    path = _write(tmp_path, text, "t.csv")
    status, out, err = run_cli("--table", str(path))
    assert status == 2 and out == "" and fragment in err and "Traceback" not in err


def test_cli_table_garbage_bytes(run_cli, tmp_path):
    path = tmp_path / "garbage.csv"
    path.write_bytes(bytes(range(256)) * 3)
    status, _, err = run_cli("--table", str(path))
    assert status == 2 and str(path) in err and len(err.strip().splitlines()) == 1
