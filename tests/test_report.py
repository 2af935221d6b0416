"""The report folder: built from saved runs without refitting, well formed, reproducible."""
from __future__ import annotations

import hashlib
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from diskfield.cli import main
from diskfield.errors import DiskfieldError, OptionError
from diskfield.report import build_report

from _saved_run import make_saved_run
from test_tables import assert_balanced, assert_escaped

_FAST = {"dpi": 40, "n_draws": 20}


class _Links(HTMLParser):
    """Collects every src/href of an HTML page and checks tags are closed in order."""

    _VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self):
        super().__init__()
        self.refs, self.stack, self.errors = [], [], []

    def handle_starttag(self, tag, attrs):
        self.refs += [v for k, v in attrs if k in ("src", "href")]
        if tag not in self._VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack.pop() != tag:
            self.errors.append(tag)


def _parse(html_path: Path) -> _Links:
    parser = _Links()
    parser.feed(html_path.read_text(encoding="utf-8"))
    parser.close()
    return parser


def _digest(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def comparison_run(tmp_path_factory):
    return make_saved_run(tmp_path_factory.mktemp("report") / "compare")


@pytest.fixture(scope="module")
def comparison_report(comparison_run):
    return build_report(comparison_run, **_FAST)


def test_report_folder_is_complete_and_self_contained(comparison_report):
    out = comparison_report.parent
    assert comparison_report.name == "report.html" and out.name == "report"
    parser = _parse(comparison_report)
    assert not parser.errors and not parser.stack
    assert parser.refs, "the page references its figures and tables"
    for ref in parser.refs:
        assert "://" not in ref and not ref.startswith("/"), f"external reference {ref}"
        assert (out / ref).is_file(), f"missing {ref}"
    images = [r for r in parser.refs if r.endswith(".png")]
    assert {"figures/field_profile.png", "figures/field_time.png", "figures/comparison.png",
            "figures/ring_parameters_ring.png"} <= set(images)
    for png in images:
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert (out / png).with_suffix(".pdf").read_bytes()[:5] == b"%PDF-"


def test_markdown_references_exist(comparison_report):
    out = comparison_report.parent
    md = (out / "report.md").read_text(encoding="utf-8")
    for ref in re.findall(r"\]\(([^)]+)\)", md):
        assert (out / ref).is_file(), f"missing {ref}"


def test_report_content(comparison_report):
    md = (comparison_report.parent / "report.md").read_text(encoding="utf-8")
    for heading in ("## Verdict", "## Posterior summaries", "## Field profile",
                    "## Ring parameters", "## Posterior predictive check",
                    "## Prior sensitivity", "## Convergence diagnostics",
                    "## Assumptions and cautions", "## Compilation as fitted", "## Provenance"):
        assert heading in md
    assert "positively favoured over the smooth disk" in md  # the saved verdict
    assert "ring vs smooth: positive, not decisive." in md
    assert (comparison_report.parent / "verdict.md").is_file()
    assert "## Declared truth" in md and "outside: ring_width" in md
    assert "| ring_width | 0.3 | 0.8 | 0.55 to 1.05 | 0.00 | no |" in md
    assert "Bayes factors depend on the priors" in md
    assert "steady relative to the parent body" in md       # field-direction assumption
    assert "authors' judgement" in md
    assert "G-2 (PB-Gamma): excluded: overprint" in md      # exclusion with its note
    assert "ring*" in md and "did NOT converge" in md       # unconverged fit marked
    assert "chain shorter than 50 tau" in md                # its flag
    assert '"seed": 20260101' in md                         # the manifest


def test_report_tables_are_well_formed(comparison_report):
    tables = comparison_report.parent / "tables"
    names = {p.name for p in tables.iterdir()}
    for stem in ("comparison", "posterior_summary_smooth", "posterior_summary_ring",
                 "compilation", "convergence", "prior_sensitivity"):
        assert {f"{stem}.tex", f"{stem}_aastex.tex", f"{stem}.md", f"{stem}.csv"} <= names
    for tex in tables.glob("*.tex"):
        text = tex.read_text(encoding="utf-8")
        assert_balanced(text)
        assert_escaped(text)


def test_report_rebuilds_identically(comparison_run, comparison_report, tmp_path):
    again = build_report(comparison_run, tmp_path / "again", **_FAST)
    assert _digest(again.parent) == _digest(comparison_report.parent)


def test_bad_folders_are_clear_errors(tmp_path, capsys):
    with pytest.raises(OptionError, match="fit.json"):
        build_report(tmp_path)
    bad = tmp_path / "broken"
    bad.mkdir()
    (bad / "fit.json").write_text("{not json")
    with pytest.raises(DiskfieldError, match=r"fit\.json: not valid JSON"):
        build_report(bad)
    assert main(["report", str(tmp_path / "absent")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "option 'DIR'" in err[0]
    assert main(["report", str(bad), "--dpi", "3"]) == 2
    assert "--dpi" in capsys.readouterr().err


def test_cli_single_fit_folder_without_model(tmp_path, capsys):
    run = make_saved_run(tmp_path / "fit", kind="fit")
    fit_json = json.loads((run / "fit.json").read_text())
    fit_json["fixed"] = {"ring2_width": 0.5}  # a parameter fixed by a prior file
    (run / "fit.json").write_text(json.dumps(fit_json))
    out = tmp_path / "cli_report"
    assert main(["report", str(run), "--out", str(out), "--dpi", "40", "--draws", "20",
                 "--no-model"]) == 0
    assert f"report: {out / 'report.html'}" in capsys.readouterr().out
    md = (out / "report.md").read_text(encoding="utf-8")
    assert "## Verdict" not in md and "no model comparison" in md
    assert "distance *prior*" in md          # the caption says where distances came from
    assert "model rebuilding switched off" in md
    assert "fixed by the priors (not sampled): ring2_width = 0.5 AU" in md
    parser = _parse(out / "report.html")
    assert parser.refs and all((out / ref).is_file() for ref in parser.refs)


@pytest.mark.slow
def test_report_of_a_tiny_real_fit(tmp_path):
    # a real (short, unconverged) ring fit through the project's own pipeline
    from diskfield.records import read_compilation
    from diskfield.runs import fit
    from diskfield.sampling import SamplerSettings

    from conftest import DATA_DIR, seed_for

    comp = read_compilation(DATA_DIR / "small.csv")
    settings = SamplerSettings(n_walkers=16, chunk=50, max_steps=100, n_starts=1,
                               progress=False)
    fit(comp, "ring", seed=seed_for("report-real-fit"), out=tmp_path / "fit", settings=settings)
    html = build_report(tmp_path / "fit", **_FAST)
    md = html.with_suffix(".md").read_text(encoding="utf-8")
    assert "not rebuilt" not in md                          # the model was rebuilt
    assert "pooled over posterior draws of model ring" in md
    assert "figures/predictive_ring.png" in md and "figures/ring_parameters_ring.png" in md
    assert "KS-2 (Kessarine): suspect overprint, see text" in md
    parser = _parse(html)
    assert all((html.parent / ref).is_file() for ref in parser.refs)


def test_demo_announces_each_model_build(capsys, tmp_path):
    import time

    from diskfield import build_model, read_compilation
    from diskfield.commands.demo import _announcing_builder
    from diskfield.comparison import ring_prior_file
    from diskfield.resources import demo_dir

    comp = read_compilation(demo_dir() / "demo_compilation.ecsv")
    build = _announcing_builder(comp, time.perf_counter())
    model = build("ring", [])
    assert model.parameter_names == build_model(comp, profile="ring").parameter_names
    path, _ = ring_prior_file(model, 0.5, tmp_path / "ring_priors_x0.5.toml")
    scaled = build("ring", [path])
    assert scaled.parameter_names == model.parameter_names
    out = capsys.readouterr().out.splitlines()
    assert out[0].endswith("ring: MCMC, criteria, evidence")
    assert out[1].endswith("ring: evidence with the ring priors scaled by 0.5 (prior sensitivity)")
