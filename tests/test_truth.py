"""Recovery of a declared truth from a small saved comparison (diskfield.truth)."""
from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from diskfield import azadapter
from diskfield.runs import load_comparison
from diskfield.truth import RECOVERY_COLUMNS, truth_recovery, write_truth_recovery

from _saved_run import make_saved_run


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    return make_saved_run(tmp_path_factory.mktemp("truth") / "compare")


def _draws(saved, model, name):
    fit = load_comparison(saved).fits[model]
    return np.ravel(azadapter.posterior_arrays(fit.idata)[name])


def test_rows_match_the_posterior_draws(saved):
    # True values at the draws' own median and far beyond their upper tail.
    radius = _draws(saved, "ring", "ring_radius")
    truth = {"meta": {"profile": "ring"},
             "parameters": {"ring_radius": float(np.median(radius)),
                            "ring_width": 50.0, "dissipation_time": 3.0}}
    rec = truth_recovery(saved, truth)
    rows = {r["parameter"]: r for r in rec["rows"]}
    assert set(rows) == {"ring_radius", "ring_width"}
    assert rec["not_sampled"] == ["dissipation_time"]
    r = rows["ring_radius"]
    assert set(r) == set(RECOVERY_COLUMNS)
    assert r["q05"] < r["median"] < r["q95"] and r["inside_90"]
    # Truth at the sample median: half the draws lie below it (definition of the median).
    assert abs(r["posterior_quantile"] - 0.5) < 1.0 / radius.size + 1e-12
    w = rows["ring_width"]
    assert not w["inside_90"] and w["posterior_quantile"] == 1.0
    assert "1 of 2" in rec["sentence"] and "outside: ring_width" in rec["sentence"]


def test_interval_is_the_empirical_90_percent_interval(saved):
    width = _draws(saved, "ring", "ring_width")
    q05, q95 = np.quantile(width, [0.05, 0.95])
    rec = truth_recovery(saved, {"meta": {"profile": "ring"},
                                 "parameters": {"ring_width": float(q05) - 1e-9}})
    row = rec["rows"][0]
    assert row["q05"] == pytest.approx(q05) and row["q95"] == pytest.approx(q95)
    assert not row["inside_90"]
    # Coverage of the 90% interval over the draws themselves (common practice, no source).
    inside = np.mean((width >= q05) & (width <= q95))
    assert 0.88 <= inside <= 0.92


def test_generating_model_not_fitted_is_said_plainly(saved):
    rec = truth_recovery(saved, {"meta": {"profile": "two-ring"},
                                 "parameters": {"ring2_radius": 6.0}})
    assert rec["rows"] == [] and rec["true_model"] == "two-ring"
    assert "not among the fitted models" in rec["sentence"]


def test_written_files_agree(saved, tmp_path):
    truth = {"meta": {"profile": "ring"},
             "parameters": {"field_1au": 60.0, "power_index": 1.2, "ring_radius": 4.5}}
    rec = truth_recovery(saved, truth)
    paths = write_truth_recovery(tmp_path, rec)
    assert sorted(p.name for p in paths) == ["truth_recovery.csv", "truth_recovery.json",
                                              "truth_recovery.md"]
    with open(tmp_path / "truth_recovery.csv", newline="") as f:
        table = list(csv.DictReader(f))
    assert [row["parameter"] for row in table] == ["field_1au", "power_index", "ring_radius"]
    for row, r in zip(table, rec["rows"]):
        assert float(row["median"]) == r["median"]
        assert row["inside_90"] == ("true" if r["inside_90"] else "false")
    assert json.loads((tmp_path / "truth_recovery.json").read_text()) == rec
    md = (tmp_path / "truth_recovery.md").read_text()
    assert md.count("\n| ") == 1 + len(rec["rows"])   # header row + one per parameter
    assert "nan" not in md.lower()


@pytest.mark.parametrize("true_model, demanded, expected", [
    ("ring", True, "has a ring and the comparison demanded a ring, as it should"),
    ("ring", False, "has a ring but the comparison did not demand a ring"),
    ("smooth", False, "has no ring and the comparison did not demand a ring, as it should"),
    ("smooth", True, "has no ring but the comparison demanded a ring (a false positive)"),
])
def test_sentence_says_whether_the_model_choice_matches(saved, tmp_path, true_model,
                                                         demanded, expected):
    import shutil

    run = shutil.copytree(saved, tmp_path / "run")
    verdict = json.loads((run / "verdict.json").read_text())
    verdict["ring_demanded"] = demanded
    (run / "verdict.json").write_text(json.dumps(verdict))
    rec = truth_recovery(run, {"meta": {"profile": true_model},
                               "parameters": {"field_1au": 60.0}})
    assert rec["ring_demanded"] is demanded
    assert expected in rec["sentence"]
