"""A user prior on the spin obliquity is refused clearly, never silently ignored."""
from __future__ import annotations

import pytest

from diskfield import build_model, read_compilation
from diskfield.cli import main
from diskfield.errors import PriorFileError
from diskfield.resources import demo_dir

OBLIQUITY = """
[spin.obliquity]
family = "uniform"
low = 0.0
high = 30.0
unit = "deg"
"""


@pytest.fixture()
def obliquity_file(tmp_path):
    path = tmp_path / "obliquity.toml"
    path.write_text(OBLIQUITY)
    return path


def test_build_model_refuses_obliquity_prior_naming_the_file(obliquity_file):
    comp = read_compilation(demo_dir() / "demo_compilation.ecsv")
    with pytest.raises(PriorFileError) as err:
        build_model(comp, profile="smooth", priors=[obliquity_file])
    line = err.value.lines()[0]
    assert str(obliquity_file) in line and "spin.obliquity" in line and "--spin none" in line


def test_non_rotating_bodies_accept_the_file(obliquity_file):
    comp = read_compilation(demo_dir() / "demo_compilation.ecsv")
    model = build_model(comp, profile="smooth", spin="none", priors=[obliquity_file])
    assert model.parameter_names[0] == "field_1au"


def test_cli_reports_one_line_and_exit_2(obliquity_file, capsys):
    status = main(["fit", str(demo_dir() / "demo_compilation.ecsv"), "--model", "smooth",
                   "--priors", str(obliquity_file), "--max-steps", "10", "--quiet"])
    assert status == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "spin.obliquity" in err[0]
