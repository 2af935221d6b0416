"""Exact leave-one-body-out refits (``--loo-refit``): dropping a body, the exact elpd_i
against the conjugate closed form, the recomputed LOO totals, and the CLI end to end."""
from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from diskfield import azadapter, criteria, loorefit
from diskfield.cli import main
from diskfield.criteria import compute_criteria
from diskfield.errors import OptionError
from diskfield.priorspec import Normal
from diskfield.records import without_body
from diskfield.runs import fit_model
from diskfield.sampling import SamplerSettings
from test_fit_cli import TINY
from test_sampling import SEED, ToyModel

SIGMA, PRIOR_SD = 1.0, 2.0
# eight bodies of one record each and one 9 sigma away (its PSIS weights are heavy-tailed)
Y = np.array([0.3, -0.8, 1.1, 0.4, 2.2, -0.1, 0.9, 0.5, 9.0])
FAST = SamplerSettings(n_walkers=16, chunk=250, max_steps=3000, n_starts=1)


def _logpdf(x, mean, var):
    return -0.5 * (x - mean) ** 2 / var - 0.5 * np.log(2 * np.pi * var)


class _Pointwise:
    def __init__(self, y):
        self.y = np.asarray(y, float)

    def __call__(self, theta):
        return _logpdf(self.y[None, :], theta[:, :1], SIGMA ** 2)


class _ConjugateToy(ToyModel):
    """Bodies of one Gaussian record each, mean ``field_1au`` ~ N(0, 2^2), sigma 1."""

    def __init__(self, y, names=None):
        self.y = np.asarray(y, float)
        names = list(names or [f"b{i}" for i in range(self.y.size)])
        super().__init__(["field_1au"], [Normal(0.0, PRIOR_SD)], _Pointwise(self.y), names)
        self.left_out = []

    def without_body(self, body):
        keep = [n != body for n in self.body_names]
        self.left_out.append(body)
        return _ConjugateToy(self.y[keep], [n for n, k in zip(self.body_names, keep) if k])


def _posterior(y):
    # conjugate normal with known sigma (Gelman et al. 2013, BDA3 §2.5)
    var = 1.0 / (1.0 / PRIOR_SD ** 2 + len(y) / SIGMA ** 2)
    return var * np.sum(y) / SIGMA ** 2, var


def _exact_elpd_i(y, g):
    # ln p(y_g | y_-g): posterior predictive N(mean_-g, sigma^2 + var_-g) (BDA3 §2.5)
    mean, var = _posterior(np.delete(y, g))
    return float(_logpdf(y[g], mean, SIGMA ** 2 + var))


# ------------------------------------------------------------ dropping a body

def test_without_body_removes_its_records_and_keeps_the_rest(small_compilation):
    comp = small_compilation
    name = comp.body_names[0]
    sub = without_body(comp, name)
    dropped = {str(comp.records.record[i]) for i in comp.bodies[0].record_indices}
    assert name not in sub.body_names and sub.body_names == comp.body_names[1:]
    assert dropped.isdisjoint(set(sub.records.record.astype(str)))
    assert len(sub.records) == len(comp.records) - len(dropped)
    for b_new in sub.bodies:  # every remaining body keeps exactly its own records
        b_old = comp.bodies[comp.body_names.index(b_new.name)]
        assert ([str(sub.records.record[i]) for i in b_new.record_indices]
                == [str(comp.records.record[i]) for i in b_old.record_indices])
        assert all(sub.body_names[sub.records.body_index[i]] == b_new.name
                   for i in b_new.record_indices)
    assert {e.record for e in sub.excluded} >= dropped
    table = sub.table
    left = np.isin(np.asarray(table["record"]).astype(str), list(dropped))
    assert not np.any(np.asarray(table["include"], bool)[left])
    assert sub.data_hash != comp.data_hash and name in sub.source
    with pytest.raises(OptionError, match="one of the fitted bodies"):
        without_body(comp, "Nowhere")


def test_model_without_body_rebuilds_the_same_parameters(small_compilation):
    from diskfield import build_model

    model = build_model(small_compilation, profile="ring")
    body = model.body_names[1]
    sub = loorefit.model_without_body(model, body)
    assert sub.parameter_names == model.parameter_names
    assert body not in sub.body_names and sub.n_bodies == model.n_bodies - 1
    assert sub.priorset is model.priorset and sub.config["spin"] == model.config["spin"]


# ------------------------------------------------------------ the exact elpd_i

def test_log_mean_exp_column_is_the_hand_computation():
    model = _ConjugateToy(Y)
    draws = np.random.default_rng(1).normal(0.5, 0.3, size=(4, 300, 1))
    by_hand = np.log(np.mean(np.exp(_logpdf(Y[3], draws.ravel(), SIGMA ** 2))))
    assert loorefit.log_mean_exp_column(model, draws, 3) == pytest.approx(by_hand, abs=1e-12)


def test_refit_body_matches_the_closed_form_and_leaves_the_body_out():
    model = _ConjugateToy(Y)
    idata = _psis_idata(model)
    crit = compute_criteria(idata, max_log_likelihood=0.0, n_params=1, n_records=Y.size,
                            body_names=model.body_names)
    # a body inside the bulk (the 9-sigma one's estimate carries ~0.3 nat of Monte Carlo
    # error at this length, too loose to test the formula)
    g = 4
    r = loorefit.refit_body(model, "b4", crit, seed=SEED, settings=FAST)
    assert model.left_out == ["b4"] and r.converged
    assert r.seed == loorefit.refit_seed(SEED, "b4") != loorefit.refit_seed(SEED, "b3")
    assert r.psis_elpd_i == crit.elpd_loo_i[g] and r.pareto_k == crit.pareto_k[g]
    # Monte Carlo error of a mean of p(y_g | mu_s) over the refit's draws, by the delta
    # method with the draws' count halved for their autocorrelation after thinning
    # (common practice, no source)
    mean, var = _posterior(np.delete(Y, g))
    p = np.exp(_logpdf(Y[g], np.random.default_rng(2).normal(mean, np.sqrt(var), 20000),
                       SIGMA ** 2))
    mc_se = p.std() / p.mean() / np.sqrt(r.n_draws / 2)
    assert abs(r.exact_elpd_i - _exact_elpd_i(Y, g)) < 4 * mc_se, (r, mc_se)


def _psis_idata(model, seed=3, n_chain=4, n_draw=1000):
    mean, var = _posterior(model.y)
    mu = np.random.default_rng(seed).normal(mean, np.sqrt(var), size=(n_chain, n_draw))
    pointwise = _logpdf(model.y[None, None, :], mu[..., None], SIGMA ** 2)
    return azadapter.make_inference_data(mu[..., None], ["field_1au"], pointwise,
                                         lp=pointwise.sum(-1), body_names=model.body_names)


# ------------------------------------------------------------ recomputed totals

def test_corrected_totals_are_sum_se_and_lppd_minus_elpd():
    model = _ConjugateToy(Y)
    idata = _psis_idata(model)
    crit = compute_criteria(idata, max_log_likelihood=0.0, n_params=1, n_records=Y.size,
                            body_names=model.body_names)
    flat = azadapter.pointwise_log_likelihood(idata).reshape(-1, Y.size)
    lppd = loorefit.lppd(azadapter.pointwise_log_likelihood(idata))
    # lppd = sum_i ln mean_s p(y_i | theta_s) (Vehtari, Gelman & Gabry 2017, eq. 3)
    assert lppd == pytest.approx(np.sum(np.log(np.mean(np.exp(flat), axis=0))), abs=1e-10)
    # unchanged elpd_i reproduce ArviZ's own totals (same SE divisor n)
    same = loorefit.corrected_loo(crit.elpd_loo_i, lppd)
    assert same["elpd_loo"] == pytest.approx(crit.elpd_loo, abs=1e-9)
    assert same["elpd_loo_se"] == pytest.approx(crit.elpd_loo_se, abs=1e-9)
    assert same["p_loo"] == pytest.approx(crit.p_loo, abs=1e-9)
    refit = loorefit.BodyRefit("b8", crit.pareto_k[8], crit.elpd_loo_i[8], -30.0, False, 250,
                               5.0, 400, 1)
    new = loorefit.apply_refits(crit, model.body_names, [refit], lppd)
    e = np.array(crit.elpd_loo_i[:8] + (-30.0,))
    assert new.elpd_loo_i == tuple(e)
    assert new.elpd_loo == pytest.approx(e.sum())
    # SE = sqrt(n Var(elpd_i)) (Vehtari, Gelman & Gabry 2017, eq. 23; divisor n as ArviZ)
    assert new.elpd_loo_se == pytest.approx(np.sqrt(e.size * np.var(e, ddof=0)))
    assert new.p_loo == pytest.approx(lppd - e.sum())
    # the PSIS values and the refit's state are kept; unconverged is said, never hidden
    info = new.loo_refit
    assert info["psis"]["elpd_loo"] == crit.elpd_loo and info["unconverged"] == ["b8"]
    assert "NOT CONVERGED for b8" in info["note"] and info["bodies"][0]["exact_elpd_i"] == -30.0
    assert new.pareto_k == crit.pareto_k and new.bad_k_bodies == crit.bad_k_bodies
    # nothing refitted: totals untouched, and said so
    none = loorefit.apply_refits(crit, model.body_names, [], lppd)
    assert none.elpd_loo == crit.elpd_loo and "no body" in none.loo_refit["note"]
    assert "loo_refit" not in crit.as_dict()  # not requested: fit.json as before


def test_loo_refit_of_a_saved_toy_fit_rewrites_fit_json(tmp_path, monkeypatch):
    # every body flagged, so the test does not depend on chance Pareto k values
    monkeypatch.setattr(criteria, "PARETO_K_FLAG", -np.inf)
    y = Y[[0, 1, 8]]
    model = _ConjugateToy(y)
    settings = SamplerSettings(n_walkers=16, chunk=200, max_steps=400, n_starts=1)
    outcome = fit_model(model, seed=SEED, out=tmp_path / "fit", settings=settings)
    lines = []
    new = loorefit.loo_refit(outcome, seed=SEED, settings=settings, log=lines.append)
    assert sorted(model.left_out) == ["b0", "b1", "b2"] and len(lines) == 3
    saved = json.loads((tmp_path / "fit" / "fit.json").read_text())
    assert saved["criteria"]["elpd_loo"] == pytest.approx(new.criteria.elpd_loo)
    assert saved["criteria"]["elpd_loo"] == pytest.approx(
        sum(r["exact_elpd_i"] for r in saved["criteria"]["loo_refit"]["bodies"]))
    assert any("exact refits" in f for f in saved["flags"])
    assert sorted(p.name for p in (tmp_path / "fit" / "loo_refit").iterdir())[0].startswith(
        "checkpoint_b0")


# ------------------------------------------------------------ command line

@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "tiny.csv"
    path.write_text(TINY)
    return path


def test_compare_cli_loo_refit_with_no_evidence(tiny, tmp_path, monkeypatch, capsys):
    # force the flag (every body), then refit only the first body of each model to keep it short
    monkeypatch.setattr(criteria, "PARETO_K_FLAG", -np.inf)
    monkeypatch.setattr(loorefit, "bodies_to_refit", lambda crit: crit.bad_k_bodies[:1])
    out = tmp_path / "cmp"
    status = main(["compare", str(tiny), "--models", "smooth,ring", "--max-steps", "60",
                   "--starts", "1", "--no-evidence", "--loo-refit", "--jobs", "1",
                   "--out", str(out), "--quiet"])
    assert status == 0
    printed = capsys.readouterr().out
    assert printed.count("LOO refit without Fictava") == 2
    with open(out / "comparison.csv") as fh:
        rows = {r["model"]: r for r in csv.DictReader(fh)}
    from diskfield.comparison import COMPARISON_COLUMNS
    with open(out / "comparison.csv") as fh:
        header = next(csv.reader(fh))
    assert tuple(header[:len(COMPARISON_COLUMNS)]) == COMPARISON_COLUMNS  # no new columns
    for name, row in rows.items():
        fit = json.loads((out / name / "fit.json").read_text())
        c = fit["criteria"]
        assert "exact refit for bodies Fictava" in row["note"]
        assert float(row["elpd_loo"]) == pytest.approx(c["elpd_loo"], rel=1e-4)
        assert c["elpd_loo"] == pytest.approx(sum(c["elpd_loo_i"].values()))
        assert c["elpd_loo_i"]["Fictava"] == c["loo_refit"]["bodies"][0]["exact_elpd_i"]
        assert c["elpd_loo_i"]["Fictava"] != c["loo_refit"]["bodies"][0]["psis_elpd_i"]
        assert c["p_loo"] == pytest.approx(c["loo_refit"]["lppd"] - c["elpd_loo"])
    # ΔELPD uses the corrected pointwise values of both models
    ring = json.loads((out / "ring" / "fit.json").read_text())["criteria"]["elpd_loo_i"]
    smooth = json.loads((out / "smooth" / "fit.json").read_text())["criteria"]["elpd_loo_i"]
    assert float(rows["ring"]["elpd_diff"]) == pytest.approx(
        sum(ring.values()) - sum(smooth.values()), abs=1e-4)
    # 60 steps: the refits are unconverged and the row says so
    assert "refit NOT CONVERGED for Fictava" in rows["ring"]["note"]


def test_fit_cli_loo_refit_when_no_body_is_flagged(tiny, tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(criteria, "PARETO_K_FLAG", np.inf)
    out = tmp_path / "fit"
    status = main(["fit", str(tiny), "--model", "smooth", "--max-steps", "60", "--starts", "1",
                   "--loo-refit", "--out", str(out), "--quiet"])
    assert status == 0
    printed = capsys.readouterr().out
    assert "nothing refitted" in printed and "LOO: exact LOO refit requested: no body" in printed
    c = json.loads((out / "fit.json").read_text())["criteria"]
    assert c["loo_refit"]["bodies"] == [] and c["elpd_loo"] == c["loo_refit"]["psis"]["elpd_loo"]
    assert not (out / "loo_refit").exists()
