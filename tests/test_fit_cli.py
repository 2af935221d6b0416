"""``diskfield fit`` and ``diskfield compare`` end to end on a tiny invented compilation."""
from __future__ import annotations

import csv
import json

import h5py
import numpy as np
import pytest

from diskfield.cli import main
from diskfield.runs import load_comparison, load_fit
from diskfield.summaries import PROFILE_COLUMNS, SUMMARY_COLUMNS

# Invented records of fictional parent bodies (no real meteorite, lab or published value).
TINY = """\
record,body,reservoir,kind,paleointensity [uT],paleointensity_err [uT],age [Myr],age_err [Myr],method,remanence,include,note
FA-1,Fictava,NC,estimate,21.0,2.5,2.2,0.4,thermal,TRM,true,
FA-2,Fictava,NC,estimate,24.5,3.7,2.2,0.4,thermal,TRM,true,
GL-1,Glimmerholt,NC,estimate,7.4,0.8,2.0,0.5,thermal,TRM,true,
HW-1,Hollowmere,CC,estimate,47.0,4.7,3.5,0.5,thermal,TRM,true,
IX-1,Ixwold,CC,estimate,54.5,5.5,3.9,0.5,thermal,TRM,true,
IX-2,Ixwold,CC,upper_limit,90.0,,3.9,0.5,thermal,TRM,false,kept out on purpose
"""

FIT_JSON_KEYS = {"schema_version", "model", "profile", "envelope", "spin", "parameter_names",
                 "fixed", "converged", "flags", "n_walkers", "n_steps", "burn_in", "thin", "tau",
                 "chain_over_tau", "acceptance_fraction", "max_log_likelihood",
                 "theta_max_log_likelihood", "rhat_max", "ess_min", "seed", "wall_time_s"}
ATTRS = {"schema_version", "diskfield_version", "profile", "envelope", "spin", "seed",
         "data_hash", "converged", "n_steps", "tau_max", "created"}


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "tiny.csv"
    path.write_text(TINY)
    return path


@pytest.fixture(scope="module")
def fitted(tiny, tmp_path_factory):
    out = tmp_path_factory.mktemp("fit") / "smooth"
    # one optimiser start: the serial multi-start search is most of a short fit's cost
    status = main(["fit", str(tiny), "--model", "smooth", "--max-steps", "100", "--starts", "1",
                   "--out", str(out), "--seed", "5", "--quiet"])
    assert status == 0
    return out


def _header(path):
    with open(path) as fh:
        return tuple(next(csv.reader(fh)))


def test_fit_folder_follows_the_schema(fitted):
    for name in ("posterior.nc", "fit.json", "posterior_summary_smooth.csv",
                 "field_profile_smooth.csv", "compilation.ecsv", "checkpoint.h5",
                 "manifest.json"):
        assert (fitted / name).is_file(), name
    assert list((fitted / "priors_used").glob("00_*.toml"))
    fit = json.loads((fitted / "fit.json").read_text())
    assert FIT_JSON_KEYS <= set(fit) and fit["model"] == "smooth" and fit["seed"] == 5
    assert fit["converged"] is False and any("unconverged" in f for f in fit["flags"])
    assert _header(fitted / "posterior_summary_smooth.csv") == SUMMARY_COLUMNS + ("converged",)
    assert _header(fitted / "field_profile_smooth.csv") == PROFILE_COLUMNS
    saved = load_fit(fitted)
    idata = saved.idata
    assert set(idata.posterior.data_vars) == set(fit["parameter_names"])
    assert idata.log_likelihood["body"].dims == ("chain", "draw", "body_name")
    assert list(idata.log_likelihood["body_name"].values) == ["Fictava", "Glimmerholt",
                                                              "Hollowmere", "Ixwold"]
    assert {"lp", "log_likelihood"} <= set(idata.sample_stats.data_vars)
    assert idata.observed_data["ln_value"].shape == (5,)  # the excluded row stays out
    assert {"ln_err", "is_limit", "body_index"} <= set(idata.constant_data.data_vars)
    assert ATTRS <= set(idata.posterior.attrs)
    manifest = json.loads((fitted / "manifest.json").read_text())
    listed = {f["path"] for f in manifest["files"]}
    assert "posterior.nc" in listed and manifest["seed"] == 5 and manifest["data_hash"]


def test_saved_fit_rebuilds_the_model(fitted):
    saved = load_fit(fitted)
    model = saved.model()
    theta = np.array(saved.fit["theta_max_log_likelihood"])
    assert model.log_likelihood(theta[None])[0] == pytest.approx(
        saved.fit["max_log_likelihood"], abs=1e-8)
    pointwise = saved.idata.log_likelihood["body"].values
    draws = np.stack([saved.idata.posterior[n].values for n in model.parameter_names], -1)
    np.testing.assert_allclose(model.log_likelihood_pointwise(draws[0, :3]), pointwise[0, :3])


def test_resume_extends_the_same_chain(fitted, tiny, tmp_path):
    with h5py.File(fitted / "checkpoint.h5") as f:
        first = f["chain"][()]
    # a copy, so the module fixture stays as it was
    import shutil
    copy = tmp_path / "resumed"
    shutil.copytree(fitted, copy)
    status = main(["fit", str(tiny), "--model", "smooth", "--max-steps", "150", "--starts", "1",
                   "--out", str(copy), "--seed", "5", "--quiet", "--resume"])
    assert status == 0
    with h5py.File(copy / "checkpoint.h5") as f:
        longer = f["chain"][()]
    assert longer.shape[0] == 150 and np.array_equal(longer[:100], first)


def test_resume_with_another_seed_is_refused(fitted, tiny, tmp_path, capsys):
    import shutil
    copy = tmp_path / "other"
    shutil.copytree(fitted, copy)
    status = main(["fit", str(tiny), "--model", "smooth", "--max-steps", "150", "--starts", "1",
                   "--out", str(copy), "--seed", "6", "--quiet", "--resume"])
    err = capsys.readouterr().err
    assert status == 2 and "seed" in err and "'5'" in err and "'6'" in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_bad_options_are_one_line_errors(tiny, tmp_path, capsys):
    cases = [(["--model", "smooth", "--max-steps", "0"], "--max-steps"),
             (["--model", "nosuchprofile"], "nosuchprofile"),
             (["--model", "smooth", "--spin", "sideways"], "sideways"),
             (["--model", "smooth", "--starts", "0"], "--starts")]
    for extra, needle in cases:
        status = main(["fit", str(tiny), "--out", str(tmp_path / "x"), "--quiet", *extra])
        err = capsys.readouterr().err
        assert status == 2 and needle in err and "Traceback" not in err, (extra, err)
    status = main(["fit", str(tmp_path / "missing.csv"), "--model", "smooth", "--quiet"])
    assert status == 2 and "missing.csv" in capsys.readouterr().err


def test_strict_unconverged_fit_exits_2(tiny, tmp_path, capsys):
    status = main(["fit", str(tiny), "--model", "smooth", "--max-steps", "50", "--starts", "1",
                   "--strict", "--out", str(tmp_path / "s"), "--quiet"])
    assert status == 2 and "did not converge" in capsys.readouterr().err
    assert (tmp_path / "s" / "fit.json").is_file()  # results are kept for inspection


def test_compare_cli_writes_the_comparison(tiny, tmp_path, capsys):
    # evidence, Bayes factors and the prior-sensitivity runs are exercised on toy models in
    # test_comparison.py; here the real model, the CLI and the folder layout
    out = tmp_path / "cmp"
    status = main(["compare", str(tiny), "--models", "smooth,ring", "--max-steps", "100",
                   "--starts", "1", "--no-evidence", "--out", str(out), "--quiet"])
    assert status == 0
    printed = capsys.readouterr().out
    assert "No evidence was computed" in printed and "verdict.md" in printed
    saved = load_comparison(out)
    assert list(saved.fits) == ["smooth", "ring"]
    assert saved.fits["ring"].evidence is None
    assert {r["ring_prior_scale"] for r in saved.prior_sensitivity} == {"0.5", "1", "2"}
    assert all(r["converged"] == "false" for r in saved.table)  # 100 steps: unconverged
    assert "NOT CONVERGED" in saved.table[0]["note"]
    verdict = json.loads((out / "verdict.json").read_text())
    assert verdict["reference_model"] == "smooth" and not verdict["ring_demanded"]
    assert "provisional" in (out / "verdict.md").read_text()
    for name in ("comparison.md", "comparison.tex", "field_profile_ring.csv",
                 "posterior_summary_smooth.csv", "compilation.ecsv", "manifest.json",
                 "ring/fit.json", "smooth/posterior.nc"):
        assert (out / name).is_file(), name


def test_compare_cli_option_errors(tiny, tmp_path, capsys):
    for extra, needle in ((["--models", "smooth"], "--models"),
                          (["--models", "smooth,ring", "--reference", "two-ring"], "--reference"),
                          (["--nlive", "3"], "--nlive")):
        status = main(["compare", str(tiny), "--out", str(tmp_path / "x"), "--quiet", *extra])
        err = capsys.readouterr().err
        assert status == 2 and needle in err and "Traceback" not in err, (extra, err)
