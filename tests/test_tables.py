"""Manuscript tables: LaTeX escaping and structure, Markdown, CSV, and the table builders."""
from __future__ import annotations

import csv
import io
import re

import pytest
from astropy.table import Table

from diskfield.tables import (Column, Measure, TextTable, comparison_table, compilation_table,
                              latex_escape, markdown_escape, measure, measure_asymmetric,
                              summary_table, to_csv, to_latex, to_markdown, write_table)

from _saved_run import make_saved_run


def _strip_math(tex: str) -> str:
    """LaTeX text with escaped dollars and inline math removed."""
    return re.sub(r"\$[^$]*\$", "", tex.replace(r"\$", ""))


def assert_balanced(tex: str) -> None:
    """Every \\begin{env} has its \\end{env}, properly nested."""
    stack = []
    for kind, env in re.findall(r"\\(begin|end)\{([^}]*)\}", tex):
        if kind == "begin":
            stack.append(env)
        else:
            assert stack and stack.pop() == env, f"unbalanced \\end{{{env}}}"
    assert not stack, f"unclosed environments {stack}"


def assert_escaped(tex: str) -> None:
    """Outside math, no unescaped _ % # ~ ^ remains (& is the column separator)."""
    text = re.sub(r"\\label\{[^}]*\}", "", _strip_math(tex))  # label keys may hold _
    for char in "_%#":
        assert not re.search(rf"(?<!\\){re.escape(char)}", text), f"unescaped {char!r}"
    assert "~" not in text.replace(r"\textasciitilde{}", "")


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    return make_saved_run(tmp_path_factory.mktemp("tables") / "run")


def _example() -> TextTable:
    cols = (Column("name", "Name_of thing", align="l"), Column("b", "B", unit="uT"),
            Column("r", "r", unit="AU", latex=r"$r_0$"))
    rows = (("a_b & c%", measure(12.345, 0.678), measure_asymmetric(2.4567, 0.123, 0.31)),
            ("x|y {z} ~ ^ # $ \\", Measure("1.0"), "n/a"))
    return TextTable(cols, rows, caption="Caption with 50% _under_", label="tab:x",
                     notes=("note #1 & more",))


def test_latex_escape_every_special_character():
    assert latex_escape(r"a_b&c%d$e#f{g}h~i^j\k") == (
        r"a\_b\&c\%d\$e\#f\{g\}h\textasciitilde{}i\textasciicircum{}j\textbackslash{}k")
    assert latex_escape("two\nlines") == "two lines"


@pytest.mark.parametrize("style, env", [("aastex", "deluxetable*"), ("tabular", "tabular")])
def test_latex_is_balanced_escaped_and_rounded(style, env):
    tex = to_latex(_example(), style)
    assert_balanced(tex)
    assert_escaped(tex)
    assert f"\\begin{{{env}}}" in tex
    assert r"a\_b \& c\%" in tex
    assert r"$12.3 \pm 0.7$" in tex and r"$2.46^{+0.31}_{-0.12}$" in tex
    assert r"($\mu$T)" in tex and "(AU)" in tex
    # each body row has one cell per column
    rows = [ln for ln in tex.splitlines() if ln.endswith(r"\\") and "colhead" not in ln]
    for line in rows[-2:]:
        assert len(re.findall(r"(?<!\\)&", line)) == 2


def test_unknown_latex_style_is_an_error():
    with pytest.raises(ValueError, match="valid: aastex, tabular"):
        to_latex(_example(), "longtable")


def test_markdown_escapes_pipes_and_keeps_shape():
    md = to_markdown(_example())
    table_lines = [ln for ln in md.splitlines() if ln.startswith("|")]
    assert len(table_lines) == 4
    assert r"x\|y" in md
    assert "12.3 ± 0.7" in md and "2.46 +0.31/-0.12" in md
    assert markdown_escape("a|b\nc") == r"a\|b c"
    # unescaped pipes delimit exactly 3 cells in every line
    for line in table_lines:
        assert len(re.findall(r"(?<!\\)\|", line)) == 4


def test_csv_expands_measures_into_value_minus_plus():
    rows = list(csv.reader(io.StringIO(to_csv(_example()))))
    assert rows[0] == ["name", "b", "b_minus", "b_plus", "r", "r_minus", "r_plus"]
    assert rows[1] == ["a_b & c%", "12.3", "0.7", "0.7", "2.46", "0.12", "0.31"]
    assert rows[2][4:] == ["n/a", "", ""]


def test_write_table_writes_four_formats(tmp_path):
    files = write_table(_example(), tmp_path / "t" / "example")
    assert sorted(p.name for p in files) == ["example.csv", "example.md", "example.tex",
                                             "example_aastex.tex"]
    for p in files:
        assert p.stat().st_size > 0


def test_comparison_table_from_saved_run(run_dir):
    rows = list(csv.DictReader(open(run_dir / "comparison.csv")))
    table = comparison_table(rows, reference="smooth")
    names = [r[0] for r in table.rows]
    assert names == ["smooth", "ring*"]  # the fixture's ring fit is unconverged
    assert any("not converged: ring" in n for n in table.notes)
    ln_z = [r[8] for r in table.rows]
    assert ln_z[1] == Measure("-9.50", "0.15", "0.15")
    for style in ("aastex", "tabular"):
        tex = to_latex(table, style)
        assert_balanced(tex)
        assert_escaped(tex)
        assert r"ELPD$_{\rm LOO}$" in tex


def test_summary_table_rounds_from_percentiles(run_dir):
    rows = [{"parameter": "ring_radius", "median": 4.4567, "q05": 3.91234, "q16": 4.2,
             "q84": 4.9, "q95": 5.12345, "rhat": 1.0042, "ess_bulk": 812.4}]
    table = summary_table(rows, "ring")
    name, unit, m, interval, rhat, ess = table.rows[0]
    assert (name, unit) == ("ring_radius", "AU")
    assert m == Measure("4.5", "0.3", "0.4")
    assert interval == "3.9 to 5.1"
    assert (rhat, ess) == ("1.004", "812")
    tex = to_latex(table, "aastex")
    assert r"ring\_radius" in tex
    assert_balanced(tex)


def test_compilation_table_marks_exclusions_and_limits(run_dir):
    comp = Table.read(run_dir / "compilation.ecsv", format="ascii.ecsv")
    table = compilation_table(comp)
    by_record = {r[0]: r for r in table.rows}
    assert by_record["G-2"][8] == "no (excluded)"
    assert "overprint" in by_record["G-2"][9]
    assert by_record["B-1"][4] == "< 6.0"
    assert by_record["A-1"][4] == Measure("9", "3", "3")
    assert by_record["A-1"][9] == ""  # an absent (masked) note is blank, not "--"
    assert "1 excluded" in table.notes[0]
    tex = to_latex(table, "tabular")
    assert_balanced(tex)
    assert_escaped(tex)
    assert r"overprint \{suspected\} \textasciitilde{} 2 \$ rows" in tex


def test_latex_escape_writes_our_symbols_as_latex_commands():
    # pdfLaTeX without extra packages stops on Greek letters (common practice, no source)
    assert latex_escape("ΔELPD ± SE, 50 τ, 16th–84th, 5 µT") == (
        r"$\Delta$ELPD $\pm$ SE, 50 $\tau$, 16th--84th, 5 $\mu$T")
    table = comparison_table([{"model": "smooth", "n_params": 3, "elpd_diff": 0.0,
                               "elpd_diff_se": 0.0, "converged": False}])
    for style in ("aastex", "tabular"):
        tex = to_latex(table, style)
        assert tex.isascii(), [c for c in tex if not c.isascii()]
