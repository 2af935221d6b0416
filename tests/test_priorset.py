"""Prior files: shipped defaults, user overrides, unit conversion and precise errors."""
from __future__ import annotations

import json
import shutil
import textwrap

import numpy as np
import pytest

from diskfield import PriorFileError
from diskfield.cli import main
from diskfield.priorset import SHIPPED_FILES, known_parameters, load_priors
from diskfield.profiles import all_components


def _write(tmp_path, text, name="user.toml"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def _problems(*paths):
    with pytest.raises(PriorFileError) as err:
        load_priors(list(paths))
    return err.value.lines()


@pytest.fixture(scope="module")
def shipped():
    return load_priors()


# --------------------------------------------------------------------- shipped defaults


def test_shipped_files_are_read_in_order_and_not_chronometers(shipped):
    assert [f.rsplit("/", 1)[-1] for f in shipped.files] == list(SHIPPED_FILES)
    assert not any("chronometers" in f for f in shipped.files)


def test_every_registered_parameter_has_a_sourced_default(shipped):
    for name in known_parameters():
        assert name in shipped.parameters, name
        assert shipped.sources[f"parameters.{name}"].strip(), name


def test_every_shipped_table_has_a_source(shipped):
    for section in ("reservoirs", "age_windows", "calibration", "remanence"):
        for name, prior in getattr(shipped, section).items():
            assert prior.source.strip(), f"{section}.{name}"


def test_reservoir_distances(shipped):
    # Weiss, Bai & Fu 2021 (Sci. Adv. 7, eaba5967); Kruijer et al. 2017 (PNAS): NC ~1-3 AU,
    # CC ~3-7 AU, distal CC beyond ~7 AU. Soft edges: finite support, median in the range.
    expected = {"NC": (1.0, 3.0), "CC": (3.0, 7.0), "CC_distal": (7.0, 20.0)}
    for name, (lo, hi) in expected.items():
        prior = shipped.reservoirs[name]
        assert np.all(np.isfinite(prior.support)) and prior.support[0] > 0
        assert lo <= float(prior.ppf(0.5)) <= hi
        assert set(shipped.age_windows) == set(shipped.reservoirs)


def test_recording_calibration_widths(shipped):
    # Gattacceca & Rochette 2004 (EPSL 227, 377; from memory): IRM uncertain to a factor
    # ~3-5, ln_sd ~ 0.6; ARM at least as wide; thermal narrow; CRM/TRM median <= 1.
    assert shipped.calibration["IRM"].ln_sd == pytest.approx(0.6)
    assert shipped.calibration["ARM"].ln_sd >= shipped.calibration["IRM"].ln_sd
    assert shipped.calibration["thermal"].ln_sd < 0.3
    assert shipped.remanence["CRM"].median <= 1.0
    assert set(shipped.calibration) == {"ARM", "IRM", "thermal", "other"}
    assert set(shipped.remanence) == {"TRM", "CRM", "unknown"}
    assert shipped.spin_obliquity is None


def test_ring_width_prior_reaches_the_narrowest_ring(shipped):
    # convention documented in disk.toml: narrowest width 0.1 AU
    assert shipped.parameters["ring_width"].support == (0.1, 3.0)


def test_as_dict_is_json_serialisable(shipped):
    data = json.loads(json.dumps(shipped.as_dict()))
    assert data["parameters"]["ring_width"]["family"] == "log_uniform"
    assert data["reservoirs"]["CC"]["unit"] == "AU"


def test_parameter_priors_in_order_and_missing_names(shipped):
    priors = shipped.parameter_priors(["power_index", "field_1au"])
    assert [p.family for p in priors] == ["uniform", "log_uniform"]
    with pytest.raises(PriorFileError, match=r"no prior for parameter 'wiggle'"):
        shipped.parameter_priors(["field_1au", "wiggle"])


# --------------------------------------------------------------------- user overrides


def test_user_table_replaces_shipped_one_with_unit_conversion(tmp_path):
    # astropy: 1 AU = 149597870.7 km (IAU 2012), 1 G = 100 uT
    path = _write(tmp_path, """
        [parameters.ring_width]
        family = "log_uniform"
        low = 1.495978707e7
        high = 4.487936121e8
        unit = "km"

        [parameters.field_1au]
        family = "log_normal"
        median = 0.5
        ln_sd = 1.0
        unit = "G"
        """)
    ps = load_priors(path)
    assert ps.parameters["ring_width"].support == pytest.approx((0.1, 3.0), rel=1e-9)
    assert ps.parameters["ring_width"].unit == "AU"
    assert ps.parameters["field_1au"].median == pytest.approx(50.0, rel=1e-12)
    assert ps.parameters["field_1au"].ln_sd == 1.0  # a log width is unit-free
    assert ps.origins["parameters.ring_width"] == str(path)
    assert ps.files[-1] == str(path)
    assert ps.parameters["power_index"].family == "uniform"  # untouched tables stay


def test_later_user_file_wins(tmp_path):
    first = _write(tmp_path, """
        [reservoirs.CC]
        family = "uniform"
        low = 3
        high = 7
        """, "a.toml")
    second = _write(tmp_path, """
        [reservoirs.CC]
        family = "uniform"
        low = 4
        high = 6
        unit = "AU"
        """, "b.toml")
    assert load_priors([first, second]).reservoirs["CC"].support == (4.0, 6.0)
    assert load_priors([second, first]).reservoirs["CC"].support == (3.0, 7.0)


def test_new_reservoir_with_its_age_window_and_an_obliquity_prior(tmp_path):
    path = _write(tmp_path, """
        [reservoirs.outer]
        family = "uniform"
        low = 20
        high = 30

        [age_windows.outer]
        family = "uniform"
        low = 1
        high = 3

        [spin.obliquity]
        family = "uniform"
        low = 0
        high = 0.7853981633974483
        unit = "rad"
        """)
    ps = load_priors(path)
    assert ps.reservoirs["outer"].support == (20.0, 30.0)
    assert ps.spin_obliquity.support == pytest.approx((0.0, 45.0), rel=1e-12)


def test_fixed_prior_is_accepted(tmp_path):
    ps = load_priors(_write(tmp_path, """
        [parameters.power_index]
        family = "fixed"
        value = 1.5
        """))
    assert ps.parameters["power_index"].is_fixed


# --------------------------------------------------------------------- errors


def test_every_problem_is_reported_with_file_line_and_key(tmp_path):
    path = _write(tmp_path, """
        [parameters.ring_wdth]
        family = "uniform"
        low = 1
        high = 2

        [parameters.ring_width]
        family = "log_uniform"
        low = 0.1
        hihg = 3.0

        [parameters.field_1au]
        family = "normal"
        mean = 50
        sd = 10

        [calibration.IRM]
        family = "gamma"
        shape = 2

        [reservoirs.CC]
        family = "uniform"
        low = 7
        high = 3

        [priors.extra]
        family = "uniform"
        """)
    lines = _problems(path)
    text = "\n".join(lines)
    assert len(lines) == 7, text
    assert all(line.startswith(str(path)) for line in lines)
    assert "line 2, column 'parameters.ring_wdth': unknown parameter 'ring_wdth'; valid:" in text
    assert "ring_width" in lines[0] and "intrinsic_scatter" in lines[0]
    assert "column 'parameters.ring_width.hihg': unknown key 'hihg'" in text
    assert "column 'parameters.ring_width.high': missing key 'high'" in text
    assert "line 12, column 'parameters.field_1au'" in text and "(0, inf)" in text
    assert "column 'calibration.IRM.family': got 'gamma'; valid: log_normal, fixed" in text
    assert "column 'reservoirs.CC'" in text and "low < high" in text
    assert "unknown top-level table [priors]" in text


@pytest.mark.parametrize("table, expected", [
    ('[parameters.ring_width]\nfamily = "uniform"\nlow = 0.1\nhigh = 2\nunit = "bananas"\n',
     "'parameters.ring_width.unit': got 'bananas'; not a unit astropy understands"),
    ('[parameters.ring_width]\nfamily = "uniform"\nlow = 0.1\nhigh = 2\nunit = "kg"\n',
     "'parameters.ring_width.unit': got 'kg'; cannot be converted to AU"),
    ('[parameters.power_index]\nfamily = "uniform"\nlow = "0"\nhigh = 2\n',
     "'parameters.power_index.low': got '0'; must be a number"),
    ('[parameters.power_index]\nfamily = "uniform"\nlow = true\nhigh = 2\n',
     "'parameters.power_index.low': got True; must be a number"),
    ('[parameters.ring_amplitude]\nfamily = "uniform"\nlow = -2\nhigh = 3\n',
     "values must lie in (-1, inf)"),
    ('[parameters.residual_fraction]\nfamily = "uniform"\nlow = 0.1\nhigh = 1.5\n',
     "values must lie in (0, 1]"),
    ('[reservoirs.NC]\nfamily = "normal"\nmean = 2\nsd = 1\n', "a finite support is required"),
    ('[spin.obliquity]\nfamily = "uniform"\nlow = 0\nhigh = 120\n', "values must lie in [0, 90]"),
    ('[spin.precession]\nfamily = "uniform"\nlow = 0\nhigh = 1\n', "valid: obliquity"),
    ('[calibration.SQUID]\nfamily = "log_normal"\nmedian = 1\nln_sd = 1\n',
     "unknown calibration 'SQUID'; valid: ARM, IRM, thermal, other"),
    ('[remanence.VRM]\nfamily = "log_normal"\nmedian = 1\nln_sd = 1\n',
     "valid: TRM, CRM, unknown"),
    ('[parameters.power_index]\nfamily = "uniform"\nlow = 0\nhigh = 2\nsource = 3\n',
     "'parameters.power_index.source': got 3; must be a string"),
    ('[parameters]\npower_index = 3\n', "must be a table with a 'family' key"),
    ('parameters = 3\n', "[parameters] must hold tables"),
    ('[age_windows.nowhere]\nfamily = "uniform"\nlow = 0\nhigh = 1\n',
     "age window for unknown reservoir 'nowhere'"),
    ('[reservoirs.outer]\nfamily = "uniform"\nlow = 20\nhigh = 30\n',
     "reservoir 'outer' has no default age window; add [age_windows.outer]"),
])
def test_one_bad_table(tmp_path, table, expected):
    lines = _problems(_write(tmp_path, table))
    assert len(lines) == 1 and expected in lines[0], lines


def test_toml_syntax_error_names_file_and_line(tmp_path):
    path = _write(tmp_path, '[parameters.power_index]\nfamily = "uniform"\nlow = = 0\n')
    (line,) = _problems(path)
    assert line.startswith(f"{path}: line 3: TOML syntax error")


def test_missing_file(tmp_path):
    (line,) = _problems(tmp_path / "nope.toml")
    assert line == f"{tmp_path / 'nope.toml'}: prior file not found"


def test_problems_of_several_files_are_all_reported(tmp_path):
    a = _write(tmp_path, '[parameters.nope]\nfamily = "uniform"\nlow = 0\nhigh = 1\n', "a.toml")
    b = _write(tmp_path, "x = [\n", "b.toml")
    lines = _problems(a, b)
    assert len(lines) == 2 and lines[0].startswith(str(a)) and lines[1].startswith(str(b))


def test_shipped_files_must_carry_sources(tmp_path, monkeypatch):
    for name in SHIPPED_FILES:
        shutil.copy(load_priors().files[SHIPPED_FILES.index(name)], tmp_path / name)
    disk = tmp_path / "disk.toml"
    disk.write_text(disk.read_text().replace(
        'source = "Hartmann et al. 1998, ApJ 495, 385: 1.5 <~ eta <~ 2.8"\n', ""))
    monkeypatch.setattr("diskfield.priorset.priors_dir", lambda: tmp_path)
    (line,) = _problems()
    assert "disk.toml" in line and "'parameters.viscous_eta.source': missing 'source'" in line


def test_user_files_may_omit_the_source(tmp_path):
    user = _write(tmp_path, '[parameters.viscous_eta]\nfamily = "uniform"\nlow = 1\nhigh = 3\n')
    assert load_priors(user).parameters["viscous_eta"].source == ""


def test_every_shipped_prior_is_usable_by_every_component(shipped):
    # each default prior's support lies in the declared domain of its parameter
    for comp in all_components():
        for par in comp.parameters:
            lo, hi = shipped.parameters[par.name].support
            assert par.accepts(lo, hi), par.name


# --------------------------------------------------------------------- CLI


def test_profiles_command_text(capsys):
    assert main(["profiles"]) == 0
    out = capsys.readouterr().out
    for comp in all_components():
        assert f"  {comp.name}: " in out
    assert "ring_width [AU]" in out and "log_uniform(0.1, 3) AU" in out
    assert "Dullemond et al. 2018" in out


def test_profiles_command_json(capsys, tmp_path):
    path = _write(tmp_path, '[parameters.ring_width]\nfamily = "uniform"\nlow = 0.2\nhigh = 1\n')
    assert main(["profiles", "--format", "json", "--priors", str(path)]) == 0
    data = json.loads(capsys.readouterr().out)
    ring = next(c for c in data["profiles"] if c["name"] == "ring")
    width = next(p for p in ring["parameters"] if p["name"] == "ring_width")
    assert width["prior"] == "uniform(0.2, 1) AU" and width["unit"] == "AU"
    assert [e["name"] for e in data["envelopes"]][:3] == ["steady", "dissipating", "viscous"]
    assert data["likelihood"][0]["name"] == "intrinsic_scatter"
    assert data["prior_files"][-1] == str(path)


def test_profiles_command_bad_prior_file_exits_2_one_line_each(capsys, tmp_path):
    path = _write(tmp_path, '[parameters.nope]\nfamily = "uniform"\nlow = 0\nhigh = 1\n'
                            '[foo]\n')
    assert main(["profiles", "--priors", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and all(e.startswith("diskfield profiles: error: ") for e in err)
    assert "Traceback" not in "\n".join(err)
