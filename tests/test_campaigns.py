"""Campaigns on Dask: store, runner (resume, retries, determinism), SBC and verdict rates.

One two-worker loopback LocalCluster is shared by the module; the statistical checks use the
analytic conjugate-Gaussian problem so that what is tested is the campaign machinery and the
SBC statistics, not a sampler.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

import cloudpickle
import numpy as np
import pytest
from scipy import stats

from conftest import seed_for
from diskfield.campaigns.calibration import (SBCSettings, choose_rank_bins, rank_uniformity,
                                             verdict_rates, wilson_interval)
from diskfield.campaigns.orchestrate import run_calibration
from diskfield.campaigns.runner import Task, open_client, run_tasks, task_seed
from diskfield.campaigns.store import ResultStore
from diskfield.campaigns.toy import ConjugateGaussian
from diskfield.errors import CheckpointError, OptionError

# The helper tasks below live in this test module, which workers cannot import: ship them
# by value.
cloudpickle.register_pickle_by_value(sys.modules[__name__])


@pytest.fixture(scope="module")
def client():
    with open_client(workers=2) as c:
        yield c


def _counting_task(marker_dir, index, seed):
    """Leaves one marker file per execution (so tests can count runs) and returns a draw."""
    Path(marker_dir, f"{index}-{np.random.default_rng().integers(1 << 62)}").touch()
    return {"value": float(np.random.default_rng(seed).standard_normal())}


def _flaky_task(marker_dir, index, seed):
    Path(marker_dir, f"{index}-{np.random.default_rng().integers(1 << 62)}").touch()
    if index == 2:
        raise RuntimeError(f"simulated failure of task {index}")
    return {"value": index}


def _tasks(fn, marker_dir, n, seed=11):
    return [Task(f"t{i:03d}", fn, (str(marker_dir), i, task_seed(seed, i)), {"i": i})
            for i in range(n)]


def _executions(marker_dir) -> list[int]:
    return sorted(int(p.name.split("-")[0]) for p in Path(marker_dir).iterdir())


def test_task_seed_matches_spawn():
    # numpy's documented SeedSequence.spawn semantics (child i has spawn_key (i,)).
    children = np.random.SeedSequence(42).spawn(5)
    for i, child in enumerate(children):
        assert np.array_equal(task_seed(42, i).generate_state(4), child.generate_state(4))


def test_workers_are_single_threaded(client, tmp_path):
    store = ResultStore(tmp_path / "c", "test", "fp", 1)
    report = run_tasks(_tasks(_counting_task, tmp_path, 2), store, client, progress=False)
    assert report.n_run == 2 and report.n_workers == 2
    assert {r["worker"]["omp_num_threads"] for r in store.results()} == {"1"}


def test_resume_skips_finished_tasks(client, tmp_path):
    markers = tmp_path / "markers"
    markers.mkdir()
    store = ResultStore(tmp_path / "c", "test", "fp", 11)
    run_tasks(_tasks(_counting_task, markers, 8), store, client, progress=False)
    full = {r["task_id"]: r["result"] for r in store.results()}
    assert _executions(markers) == list(range(8))
    # As if killed before three tasks finished: their result files never appeared.
    for task_id in ("t001", "t004", "t007"):
        (store.tasks_dir / f"{task_id}.json").unlink()
    resumed = ResultStore(tmp_path / "c", "test", "fp", 11, resume=True)
    report = run_tasks(_tasks(_counting_task, markers, 8), resumed, client, progress=False)
    assert (report.n_skipped, report.n_run) == (5, 3)
    assert _executions(markers) == sorted(list(range(8)) + [1, 4, 7])
    assert {r["task_id"]: r["result"] for r in resumed.results()} == full


_KILL_SCRIPT = """
import sys
from diskfield.campaigns.calibration import SBCSettings
from diskfield.campaigns.orchestrate import run_calibration
from diskfield.campaigns.toy import ConjugateGaussian
run_calibration(ConjugateGaussian(delay_s=0.25), sys.argv[2], n_sims=int(sys.argv[3]),
                seed=int(sys.argv[4]), settings=SBCSettings(n_draws=19),
                scheduler=sys.argv[1], progress=False)
"""


def test_killed_campaign_resumes_where_it_stopped(client, tmp_path):
    import signal
    import subprocess
    import time

    out, n, seed = tmp_path / "killed", 12, seed_for("kill-resume")
    proc = subprocess.Popen([sys.executable, "-c", _KILL_SCRIPT, client.scheduler.address,
                             str(out), str(n), str(seed)])
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and len(list(out.glob("tasks/*.json"))) < 5:
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    done_before = len(list(out.glob("tasks/*.json")))
    assert 5 <= done_before < n
    problem = ConjugateGaussian(delay_s=0.25)
    report, resumed, _ = run_calibration(problem, out, n_sims=n, seed=seed,
                                         settings=SBCSettings(n_draws=19), resume=True,
                                         client=client, progress=False)
    assert report.n_skipped >= done_before and report.n_run == n - report.n_skipped
    _, fresh, _ = run_calibration(problem, tmp_path / "fresh", n_sims=n, seed=seed,
                                  settings=SBCSettings(n_draws=19), client=client,
                                  progress=False)
    assert np.array_equal(resumed.ranks, fresh.ranks)


def test_store_refuses_silent_overwrite_and_mismatched_resume(tmp_path):
    ResultStore(tmp_path, "calibration", "other", 7)  # nothing stored yet: may be replaced
    store = ResultStore(tmp_path, "calibration", "abc", 1)
    store.write_result("t000", {"value": 1})
    with pytest.raises(CheckpointError, match="--resume"):
        ResultStore(tmp_path, "calibration", "abc", 1)
    with pytest.raises(CheckpointError, match="fingerprint"):
        ResultStore(tmp_path, "calibration", "other", 1, resume=True)
    with pytest.raises(CheckpointError, match="seed"):
        ResultStore(tmp_path, "calibration", "abc", 2, resume=True)


def test_failing_task_is_retried_then_reported(client, tmp_path):
    markers = tmp_path / "markers"
    markers.mkdir()
    store = ResultStore(tmp_path / "c", "test", "fp", 11)
    report = run_tasks(_tasks(_flaky_task, markers, 4), store, client, retries=2, progress=False)
    assert report.n_run == 3
    assert [f["task_id"] for f in report.failed] == ["t002"]
    assert _executions(markers).count(2) == 3  # first attempt + 2 retries
    saved = store.failures()
    assert saved[0]["error_type"] == "RuntimeError" and saved[0]["attempts"] == 3
    assert "simulated failure of task 2" in saved[0]["message"]
    assert "t002" not in store.finished_ids()


def test_same_seed_same_results_on_one_and_two_workers(client, tmp_path):
    problem = ConjugateGaussian()
    settings = SBCSettings(n_draws=19)
    seed = seed_for("campaign-determinism")
    _, two, _ = run_calibration(problem, tmp_path / "two", n_sims=8, seed=seed,
                                settings=settings, verdict_problem=problem, n_verdict=3,
                                client=client, progress=False)
    _, one, _ = run_calibration(problem, tmp_path / "one", n_sims=8, seed=seed,
                                settings=settings, verdict_problem=problem, n_verdict=3,
                                workers=1, progress=False)
    assert np.array_equal(one.ranks, two.ranks)
    strip = [{k: v for k, v in row.items() if k != "wall_time_s"} for row in one.sim_rows]
    assert strip == [{k: v for k, v in row.items() if k != "wall_time_s"}
                     for row in two.sim_rows]


@pytest.mark.slow
def test_sbc_ranks_uniform_for_correct_model(client, tmp_path):
    problem = ConjugateGaussian(n_obs=8, sigma=1.0, prior_sd=1.0)
    _, summary, paths = run_calibration(problem, tmp_path, n_sims=100,
                                        seed=seed_for("sbc-correct"), client=client,
                                        progress=False)
    row = summary.sbc_rows[0]
    assert row["uniform"] and row["chi2_p"] > 0.01 and row["ks_p"] > 0.01
    # Exact posterior draws: the nominal 90 % level lies in the Wilson interval of coverage.
    assert row["coverage_90_lo"] <= 0.90 <= row["coverage_90_hi"]
    names = {p.name for p in paths}
    assert {"calibration.csv", "sbc_summary.csv", "rank_histograms.pdf", "rank_histograms.png",
            "coverage.png", "calibration.md"} <= names


@pytest.mark.slow
def test_sbc_ranks_non_uniform_for_misspecified_model(client, tmp_path):
    # Data simulated with twice the noise the fit assumes: over-confident posteriors, U-shaped
    # ranks (Talts et al. 2018, arXiv:1804.06788, their Fig. 3 shows the pattern).
    problem = ConjugateGaussian(n_obs=8, sigma=1.0, prior_sd=1.0, noise_scale=2.0)
    _, summary, _ = run_calibration(problem, tmp_path, n_sims=100,
                                    seed=seed_for("sbc-misspecified"), client=client,
                                    progress=False)
    row = summary.sbc_rows[0]
    assert not row["uniform"] and row["chi2_p"] < 1e-6
    edges = summary.ranks[:, 0]
    assert np.mean((edges < 10) | (edges > 89)) > 0.4  # 0.2 expected if uniform
    assert row["coverage_90_hi"] < 0.90


@pytest.mark.slow
def test_verdict_false_positive_rate_matches_analytic(client, tmp_path):
    problem = ConjugateGaussian(n_obs=8, sigma=1.0, prior_sd=1.0)
    threshold = 2.0
    _, summary, _ = run_calibration(problem, tmp_path, n_sims=0, seed=seed_for("verdict"),
                                    verdict_problem=problem, n_verdict=120, threshold=threshold,
                                    client=client, progress=False)
    rates = {r["rate"]: r for r in summary.verdict_rows}
    # Derived from the conjugate evidences: under the null z^2 = n ybar^2 / sigma^2 ~ chi2(1)
    # and 2 ln B = z^2 k - ln(1 + n v / s2), k = n v / (s2 + n v), so
    # P(2 ln B > c) = P(chi2_1 > (c + ln(1 + n v / s2)) / k).
    n, s2, v = 8, 1.0, 1.0
    k = n * v / (s2 + n * v)
    exact = stats.chi2.sf((threshold + np.log1p(n * v / s2)) / k, 1)
    fp = rates["false_positive"]
    assert fp["wilson95_lo"] <= exact <= fp["wilson95_hi"]
    assert rates["detection"]["value"] > fp["value"]


def test_wilson_interval_matches_scipy():
    # Reference library: scipy.stats.binomtest(...).proportion_ci(method="wilson").
    for k, n in ((0, 10), (3, 50), (47, 50), (500, 1000)):
        ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        assert wilson_interval(k, n) == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_rank_bins_divide_rank_range():
    assert choose_rank_bins(99, 1000) == 20
    assert choose_rank_bins(99, 30) == 5
    assert choose_rank_bins(19, 200) == 20
    ranks = np.tile(np.arange(100), 3)[:, None]  # perfectly flat
    res = rank_uniformity(ranks, 99, np.random.default_rng(0))[0]
    assert res["chi2"] == 0 and res["uniform"]


def test_verdict_rates_counts():
    rows = {r["rate"]: r for r in verdict_rates([7, 1, -8, 0], [12, 6.5, 3], 6, "s", "r")}
    assert (rows["false_positive"]["n_events"], rows["false_positive"]["n_sims"]) == (1, 4)
    assert rows["null_favoured_on_null"]["n_events"] == 1
    assert rows["detection"]["n_events"] == 2


def test_bad_worker_count_is_an_option_error():
    with pytest.raises(OptionError, match="--workers"):
        with open_client(workers=0):
            pass


def test_task_results_are_strict_json(client, tmp_path):
    store = ResultStore(tmp_path / "c", "test", "fp", 1)
    run_tasks(_tasks(_counting_task, tmp_path, 1), store, client, progress=False)
    text = next(store.tasks_dir.glob("*.json")).read_text()
    json.loads(text)  # raises on NaN/Infinity tokens
    assert "NaN" not in text


# ----------------------------------------------------------------- disk-model campaigns
DEMO = Path(__file__).resolve().parent.parent / "data_demo"
SMALL = Path(__file__).resolve().parent / "data" / "small.csv"


@pytest.fixture(scope="module")
def demo_comp():
    from diskfield.records import read_compilation

    return read_compilation(DEMO / "demo_compilation.ecsv")


def test_demo_candidates_read(demo_comp):
    from diskfield.campaigns.candidates import read_candidates

    cands = read_candidates(DEMO / "candidates_demo.ecsv", demo_comp, ("NC", "CC", "CC_distal"))
    by_id = {c.candidate: c for c in cands}
    assert len(cands) == 4
    assert not by_id["Ystrelle-detections"].new_body
    assert by_id["new-CC-thermal"].new_body and by_id["new-CC-thermal"].ln_err == 0.15
    assert np.isnan(by_id["new-distal-IRM"].age) and by_id["new-NC-ARM"].age == 2.0


def test_bad_candidates_name_row_and_column(demo_comp, tmp_path):
    from diskfield.campaigns.candidates import read_candidates
    from diskfield.errors import CompilationError

    bad = tmp_path / "bad.csv"
    bad.write_text("candidate,body,reservoir,age [Myr],age_err [Myr],method,ln_err,relative_err,"
                   "n_records\n"
                   "a,Vellmar,CC,,,thermal,0.2,,2\n"
                   "b,,XX,,,thermal,0.2,,2\n"
                   "c,Nova,NC,2.0,,laser,0.2,0.1,1.5\n"
                   "a,Nova2,NC,,,,0.2,,3\n")
    with pytest.raises(CompilationError) as info:
        read_candidates(bad, demo_comp, ("NC", "CC", "CC_distal"))
    lines = info.value.lines()
    text = "\n".join(lines)
    assert "row 1, record 'a', column 'reservoir'" in text and "'NC'" in text
    assert "row 2, record 'b', column 'reservoir': got 'XX'" in text
    assert "row 3, record 'c', column 'method': got 'laser'" in text
    assert "row 3, record 'c', column 'age_err'" in text
    assert "row 3, record 'c', column 'ln_err': give exactly one" in text
    assert "row 3, record 'c', column 'n_records': got '1.5'" in text
    assert "row 4, record 'a', column 'candidate': duplicate id" in text
    assert all(line.startswith(str(bad)) for line in lines)


def test_unknown_candidate_column_lists_valid(demo_comp, tmp_path):
    from diskfield.campaigns.candidates import read_candidates
    from diskfield.errors import CompilationError

    bad = tmp_path / "bad.csv"
    bad.write_text("candidate,reservoir,sigma,n_records\nx,NC,0.2,1\n")
    with pytest.raises(CompilationError, match="column 'sigma': unknown column; valid: candidate"):
        read_candidates(bad, demo_comp, ("NC",))


def test_augmented_compilation_builds_a_model(demo_comp):
    from diskfield.campaigns.candidates import Candidate, augment_compilation
    from diskfield.likelihood import build_model

    new = Candidate("n1", "Nova", "CC", True, 3.0, 0.5, "thermal", "TRM", 0.2, 3)
    old = Candidate("o1", "Vellmar", "NC", False, np.nan, np.nan, "", "", 0.3, 2)
    aug, idx = augment_compilation(demo_comp, new)
    n = len(demo_comp.records)
    assert list(idx) == [n, n + 1, n + 2] and len(aug.bodies) == len(demo_comp.bodies) + 1
    assert aug.bodies[-1].record_indices == tuple(idx)
    assert set(aug.records.body_index[idx]) == {len(demo_comp.bodies)}
    aug2, idx2 = augment_compilation(demo_comp, old)
    g = demo_comp.body_names.index("Vellmar")
    assert aug2.bodies[g].record_indices[-2:] == tuple(idx2)
    assert list(aug2.records.age_kind[idx2]) == ["default", "default"]
    model = build_model(aug, profile="smooth")
    assert model.n_bodies == len(demo_comp.bodies) + 1 and model.n_records == n + 3


def _cli(argv):
    from diskfield.cli import main

    return main([str(a) for a in argv])


@pytest.mark.slow
def test_calibrate_cli_runs_and_resumes(client, tmp_path, capsys):
    out = tmp_path / "cal"
    argv = ["calibrate", SMALL, "--model", "smooth", "--sims", 4, "--verdict-sims", 0,
            "--max-steps", 60, "--walkers", 8, "--starts", 1, "--draws", 9, "--quiet",
            "--scheduler", client.scheduler.address, "--out", out, "--seed", 5]
    assert _cli(argv) == 0
    first = capsys.readouterr().out
    assert "4 task(s) run now, 0 already finished, 0 failed" in first
    for name in ("calibration.csv", "sbc_summary.csv", "rank_histograms.png", "coverage.pdf",
                 "calibration.md", "manifest.json", "priors_used/02_disk.toml"):
        assert (out / name).is_file(), name
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["seed"] == 5 and manifest["campaign"]["tasks"] == 4
    assert _cli(argv) == 2
    assert "--resume" in capsys.readouterr().err
    assert _cli(argv + ["--resume"]) == 0
    assert "0 task(s) run now, 4 already finished" in capsys.readouterr().out


def test_campaign_cli_option_errors(tmp_path, capsys):
    assert _cli(["calibrate", SMALL, "--model", "smooth", "--sims", 2, "--workers", 0,
                 "--out", tmp_path / "x"]) == 2
    assert "option '--workers': got 0" in capsys.readouterr().err
    assert _cli(["calibrate", SMALL, "--model", "spiral", "--sims", 2,
                 "--out", tmp_path / "y"]) == 2
    assert "spiral" in capsys.readouterr().err
    bad = tmp_path / "cands.csv"
    bad.write_text("candidate,reservoir,ln_err,n_records\nx,Mars,0.2,0\n")
    assert _cli(["forecast", SMALL, "--candidates", bad, "--out", tmp_path / "z"]) == 2
    err = capsys.readouterr().err
    assert "row 1, record 'x', column 'reservoir': got 'Mars'" in err
    assert "column 'n_records': got '0'" in err


@pytest.mark.slow
def test_forecast_cli_end_to_end(client, tmp_path, capsys):
    import csv

    cands = tmp_path / "cands.csv"
    cands.write_text("candidate,body,reservoir,age [Myr],age_err [Myr],method,remanence,ln_err,"
                     "relative_err,n_records\n"
                     "farCC,Farrow,CC,3.0,0.5,thermal,TRM,0.1,,3\n"
                     "moreKS,Kessarine,,,,ARM,,,0.3,1\n")
    out = tmp_path / "fc"
    # A plumbing test (ranking, files, resume), not an accuracy one: --dlogz 5 stops each of
    # the six evidences after a third of the likelihood calls that --dlogz 2 needs.
    argv = ["forecast", SMALL, "--candidates", cands, "--draws", 1, "--max-steps", 40,
            "--walkers", 12, "--starts", 1, "--nlive", 20, "--dlogz", 5.0, "--threshold", 2,
            "--quiet", "--scheduler", client.scheduler.address, "--out", out, "--seed", 3]
    assert _cli(argv) == 0
    assert "ranked by P(|2 ln B| > 2)" in capsys.readouterr().out
    with open(out / "forecast.csv") as fh:
        rows = list(csv.DictReader(fh))
    with open(out / "forecast_draws.csv") as fh:
        draws = list(csv.DictReader(fh))
    assert [r["rank"] for r in rows] == ["1", "2"] and len(draws) == 2
    for row in rows:
        b = [float(d["two_ln_bayes_factor"]) for d in draws if d["candidate"] == row["candidate"]]
        assert float(row["p_decisive"]) == pytest.approx(np.mean(np.abs(b) > 2))
    assert float(rows[0]["p_decisive"]) >= float(rows[1]["p_decisive"])
    for name in ("forecast.md", "forecast.png", "manifest.json", "candidates.csv"):
        assert (out / name).is_file(), name
    assert "Ranking criterion: probability of a decisive verdict" in (out / "forecast.md").read_text()
    assert _cli(argv + ["--resume"]) == 0
