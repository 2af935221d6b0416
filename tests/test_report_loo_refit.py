"""The report's block of exact leave-one-out refits (``--loo-refit``): the table and its
sentence when bodies were refitted, one sentence when none was flagged, nothing otherwise."""
from __future__ import annotations

import csv
import json
from html import escape

import pytest

from diskfield import azadapter, loorefit
from diskfield.criteria import compute_criteria
from diskfield.report import build_report

from _saved_run import make_saved_run
from test_report import _parse
from test_tables import assert_balanced, assert_escaped

_FAST = {"dpi": 40, "n_draws": 20, "rebuild_model": False}

# Invented refit results (no sampling): PB-Delta's refit did not converge.
_REFITS = (loorefit.BodyRefit(body="PB-Beta", pareto_k=0.834, psis_elpd_i=-3.456,
                              exact_elpd_i=-4.1234, converged=True, n_steps=2500,
                              chain_over_tau=61.0, n_draws=1200, seed=11),
           loorefit.BodyRefit(body="PB-Delta", pareto_k=1.125, psis_elpd_i=-2.0049,
                              exact_elpd_i=-5.678, converged=False, n_steps=1000,
                              chain_over_tau=21.34, n_draws=480, seed=12,
                              flags=("chain shorter than 50 tau",)))


def _inject(fit_dir, refits) -> dict:
    """Write ``criteria`` with ``loo_refit`` into a saved fit.json, as ``loorefit.finish`` does."""
    path = fit_dir / "fit.json"
    fit = json.loads(path.read_text())
    idata = azadapter.load_netcdf(fit_dir / "posterior.nc")
    bodies = [str(b) for b in idata.log_likelihood["body_name"].values]
    crit = compute_criteria(idata, max_log_likelihood=fit["max_log_likelihood"],
                            n_params=len(fit["parameter_names"]), n_records=5,
                            body_names=bodies)
    crit = loorefit.apply_refits(crit, bodies, refits,
                                 loorefit.lppd(azadapter.pointwise_log_likelihood(idata)))
    fit["criteria"] = crit.as_dict()
    path.write_text(json.dumps(fit, indent=1))
    return fit["criteria"]


@pytest.fixture(scope="module")
def refit_report(tmp_path_factory):
    run = make_saved_run(tmp_path_factory.mktemp("report_refit") / "compare")
    _inject(run / "ring", _REFITS)
    _inject(run / "smooth", ())   # requested, but no body flagged
    return build_report(run, **_FAST)


def test_refit_block_in_markdown_and_html(refit_report):
    md = refit_report.with_suffix(".md").read_text(encoding="utf-8")
    html = refit_report.read_text(encoding="utf-8")
    conv = md.index("## Convergence diagnostics")
    assert conv < md.index("**Exact leave-one-out refits**") < md.index("## Assumptions")
    assert ("| Model | Body | Pareto k | PSIS elpd_i | Exact elpd_i | Refit converged | "
            "Steps |") in md
    assert "| ring | PB-Beta | 0.83 | -3.46 | -4.12 | yes | 2500 |" in md
    assert "| ring | PB-Delta* | 1.13 | -2.00 | -5.68 | NO | 1000 |" in md
    assert "* refit not converged (PB-Delta (model ring)): exact elpd_i provisional." in md
    sentence = ("In the model comparison, elpd_loo, its SE, p_loo and ΔELPD use the exact "
                "elpd_i of these bodies in place of the PSIS estimates")
    flag = ("The refit without PB-Delta (model ring; 1000 steps, 21.3 τ) did NOT converge: "
            "its exact elpd_i is provisional.")
    none = ("Exact leave-one-out refits were requested for model smooth: no body had "
            "Pareto k > 0.7, so PSIS-LOO is kept unchanged.")
    for text in (sentence, flag, none):
        assert text in md and escape(text) in html
    assert "<caption>Exact leave-one-out refits</caption>" in html
    assert ("<tr><td>ring</td><td>PB-Delta*</td><td>1.13</td><td>-2.00</td><td>-5.68</td>"
            "<td>NO</td><td>1000</td></tr>") in html
    assert "<td>PB-Beta</td><td>0.83</td><td>-3.46</td><td>-4.12</td><td>yes</td>" in html
    parser = _parse(refit_report)
    assert not parser.errors and not parser.stack
    assert all((refit_report.parent / ref).is_file() for ref in parser.refs)


def test_refit_table_files(refit_report):
    tables = refit_report.parent / "tables"
    for name in ("loo_refit.tex", "loo_refit_aastex.tex", "loo_refit.md", "loo_refit.csv"):
        assert (tables / name).is_file()
    with open(tables / "loo_refit.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r["model"], r["body"], r["exact_elpd_i"], r["converged"]) for r in rows] == [
        ("ring", "PB-Beta", "-4.12", "yes"), ("ring", "PB-Delta*", "-5.68", "NO")]
    for tex in tables.glob("loo_refit*.tex"):
        text = tex.read_text(encoding="utf-8")
        assert_balanced(text)
        assert_escaped(text)
        assert "PB-Delta*" in text


def test_single_fit_with_no_flagged_body(tmp_path):
    run = make_saved_run(tmp_path / "fit", kind="fit")
    criteria = _inject(run, ())
    assert criteria["loo_refit"]["bodies"] == []
    md = build_report(run, tmp_path / "out", **_FAST).with_suffix(".md").read_text("utf-8")
    assert ("Exact leave-one-out refits were requested for model ring: no body had Pareto "
            "k > 0.7, so PSIS-LOO is kept unchanged.") in md
    assert "**Exact leave-one-out refits**" not in md
    assert not (tmp_path / "out" / "tables" / "loo_refit.csv").exists()


def test_single_fit_sentence_names_fit_json(tmp_path):
    run = make_saved_run(tmp_path / "fit", kind="fit")
    _inject(run, _REFITS[:1])
    md = build_report(run, tmp_path / "out", **_FAST).with_suffix(".md").read_text("utf-8")
    assert "| ring | PB-Beta | 0.83 | -3.46 | -4.12 | yes | 2500 |" in md
    assert "In fit.json, elpd_loo, its SE and p_loo use the exact elpd_i" in md
    assert "did NOT converge: its exact" not in md


def test_no_block_without_loo_refit(tmp_path):
    run = make_saved_run(tmp_path / "compare")
    html = build_report(run, **_FAST)
    md = html.with_suffix(".md").read_text(encoding="utf-8")
    for text in (md, html.read_text(encoding="utf-8")):
        assert "leave-one-out refit" not in text.lower()
    assert not (html.parent / "tables" / "loo_refit.csv").exists()
