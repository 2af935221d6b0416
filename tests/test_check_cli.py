"""``diskfield check`` through the CLI dispatcher: summary, one line per problem, JSON."""
from __future__ import annotations

import json
import shutil

import pytest

from diskfield.cli import main
from diskfield.resources import demo_dir

PREFIX = "diskfield check: error: "


def _flawed(tmp_path, small_compilation_path):
    """small.csv with three planted problems on rows 1, 4 and 5."""
    lines = small_compilation_path.read_text().splitlines()
    lines[1] = lines[1].replace(",42.0,", ",-42.0,")
    lines[4] = lines[4].replace(",CC,", ",XC,")
    lines[5] = lines[5].replace(",estimate,", ",lower_limit,")
    path = tmp_path / "flawed.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def test_valid_file_prints_summary_and_exits_0(small_compilation_path, capsys):
    assert main(["check", str(small_compilation_path)]) == 0
    out = capsys.readouterr().out
    assert f"{small_compilation_path}: valid" in out
    assert "7 rows, 6 to fit, 1 excluded; 3 bodies" in out
    assert "record 'OR-1': spin factor 2 divided out" in out
    assert "row 7, record 'KS-2' (Kessarine): suspect overprint, see text" in out
    assert "8-12 AU" in out  # Kessarine's distance override
    velthar = next(ln for ln in out.splitlines() if ln.strip().startswith("Velthar"))
    assert "NC" in velthar and "2 / 1" in velthar


def test_flawed_file_prints_one_line_per_problem_and_exits_2(tmp_path, small_compilation_path,
                                                             capsys):
    path = _flawed(tmp_path, small_compilation_path)
    assert main(["check", str(path)]) == 2
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 3 and captured.out == ""
    assert all(ln.startswith(PREFIX + f"{path}: row ") for ln in lines)
    assert "row 1, line 2, record 'VX-1', column 'paleointensity'" in lines[0]
    assert "column 'reservoir': got 'XC'" in lines[1]
    assert "column 'kind': got 'lower_limit'" in lines[2]


def test_json_for_valid_and_flawed_files(tmp_path, small_compilation_path, capsys):
    assert main(["check", str(small_compilation_path), "--format", "json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["valid"] is True and report["problems"] == []
    summary = report["summary"]
    assert (summary["n_rows"], summary["n_included"], summary["n_excluded"]) == (7, 6, 1)
    assert summary["by_reservoir"]["NC"] == {"estimate": 2, "upper_limit": 1}
    assert summary["bodies"][2]["distance_au"] == [8.0, 12.0]

    path = _flawed(tmp_path, small_compilation_path)
    assert main(["check", str(path), "--format", "json"]) == 2
    report = json.loads(capsys.readouterr().out)
    assert report["valid"] is False and report["summary"] is None
    assert [(p["row"], p["column"]) for p in report["problems"]] == [
        (1, "paleointensity"), (4, "reservoir"), (5, "kind")]
    assert report["problems"][0]["record"] == "VX-1" and report["problems"][0]["line"] == 2


def test_missing_file_is_a_clear_error(tmp_path, capsys):
    assert main(["check", str(tmp_path / "absent.csv")]) == 2
    (line,) = capsys.readouterr().err.strip().splitlines()
    assert line == PREFIX + f"{tmp_path / 'absent.csv'}: file not found"


def test_garbage_file_is_one_line_not_a_traceback(tmp_path, capsys):
    path = tmp_path / "garbage.ecsv"
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(range(200)))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_bad_format_option_exits_2(small_compilation_path, capsys):
    with pytest.raises(SystemExit) as info:
        main(["check", str(small_compilation_path), "--format", "yaml"])
    assert info.value.code == 2
    assert "--format" in capsys.readouterr().err


def _demo_files(pattern):
    try:
        return sorted(demo_dir().glob(pattern))
    except FileNotFoundError:
        return []


@pytest.mark.parametrize("path", _demo_files("demo_compilation.*"), ids=lambda p: p.name)
def test_shipped_demo_compilations_are_valid(path, capsys, tmp_path):
    copy = tmp_path / path.name  # read a copy: the check must not depend on the folder
    shutil.copy(path, copy)
    assert main(["check", str(copy)]) == 0
    assert "valid" in capsys.readouterr().out


@pytest.mark.parametrize("path", _demo_files("demo_flawed.*"), ids=lambda p: p.name)
def test_shipped_flawed_demo_files_are_rejected(path, capsys):
    assert main(["check", str(path)]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert lines and all(ln.startswith(PREFIX + str(path)) for ln in lines)


def test_priors_option_adds_reservoirs(tmp_path, small_compilation_path, capsys):
    path = tmp_path / "custom.csv"
    path.write_text(small_compilation_path.read_text().replace(",CC,", ",outer_belt,"))
    assert main(["check", str(path)]) == 2
    assert "got 'outer_belt'; valid (any case): NC, CC, CC_distal" in capsys.readouterr().err
    priors = tmp_path / "mine.toml"
    priors.write_text('[reservoirs.Outer_Belt]\nfamily = "uniform"\nlow = 9.0\nhigh = 15.0\n'
                      'unit = "AU"\nsource = "convention"\n')
    assert main(["check", str(path), "--priors", str(priors)]) == 0
    assert "Outer_Belt" in capsys.readouterr().out
    priors.write_text("[reservoirs.Outer_Belt\n")
    assert main(["check", str(path), "--priors", str(priors)]) == 2
    assert "not valid TOML" in capsys.readouterr().err
