"""A small saved run in the team's saved-run schema, for the output tests.

Everything here is invented: fictional parent bodies (``PB-Alpha`` ...), records made up for
the test, posterior draws from a fixed-seed Gaussian around a made-up ring disk. The
per-body log-likelihood is variable ``body`` with dims (chain, draw, body_name), as
:mod:`diskfield.azadapter` writes it (xarray cannot hold a variable named like its dimension). The
per-body log-likelihoods are computed from those draws with a simple Gaussian model so that
PSIS-LOO has something sensible to chew on; nothing asserts on their values.
"""
from __future__ import annotations

import json
import warnings
from pathlib import Path

import arviz as az
import numpy as np
from astropy import units as u
from astropy.table import MaskedColumn, Table

__all__ = ["make_saved_run", "BODIES"]

BODIES = {"PB-Alpha": ("NC", 2.0), "PB-Beta": ("NC", 2.5), "PB-Gamma": ("CC", 4.0),
          "PB-Delta": ("CC", 5.5)}

_RECORDING_TOML = """
[calibration.ARM]
family = "log_normal"
median = 1.0
ln_sd = 0.8
source = "test value"
[calibration.IRM]
family = "log_normal"
median = 1.0
ln_sd = 0.6
source = "test value"
[calibration.thermal]
family = "fixed"
value = 1.0
source = "test value"
[calibration.other]
family = "log_normal"
median = 1.0
ln_sd = 1.0
source = "test value"
[remanence.TRM]
family = "fixed"
value = 1.0
source = "test value"
[remanence.CRM]
family = "log_normal"
median = 0.5
ln_sd = 0.7
source = "test value"
[remanence.unknown]
family = "log_normal"
median = 0.8
ln_sd = 0.8
source = "test value"
[parameters.intrinsic_scatter]
family = "half_normal"
scale = 0.5
source = "test value"
"""

_RESERVOIRS_TOML = """
[reservoirs.NC]
family = "uniform"
low = 1.0
high = 3.0
unit = "AU"
source = "test value"
[reservoirs.CC]
family = "uniform"
low = 3.0
high = 7.0
unit = "AU"
source = "test value"
[age_windows.NC]
family = "uniform"
low = 1.0
high = 4.0
unit = "Myr"
source = "test value"
[age_windows.CC]
family = "uniform"
low = 2.0
high = 5.0
unit = "Myr"
source = "test value"
"""

_TRUTH = {"field_1au": 60.0, "power_index": 1.2, "ring_amplitude": 1.5, "ring_radius": 4.5,
          "ring_width": 0.8, "intrinsic_scatter": 0.5}
_SPREAD = {"field_1au": 8.0, "power_index": 0.15, "ring_amplitude": 0.4, "ring_radius": 0.3,
           "ring_width": 0.15, "intrinsic_scatter": 0.05}
_MODEL_PARAMS = {"smooth": ("field_1au", "power_index", "intrinsic_scatter"),
                 "ring": ("field_1au", "power_index", "ring_amplitude", "ring_radius",
                          "ring_width", "intrinsic_scatter")}


def _compilation() -> Table:
    rows = [("A-1", "PB-Alpha", "estimate", 9.0, 3.0, 2.0, 0.3, "thermal", "TRM", True, ""),
            ("A-2", "PB-Alpha", "estimate", 12.0, 4.0, 2.1, 0.3, "ARM", "TRM", True, ""),
            ("B-1", "PB-Beta", "upper_limit", 6.0, np.nan, 3.0, 0.5, "IRM", "", True, ""),
            ("G-1", "PB-Gamma", "estimate", 14.0, 4.0, 3.5, 0.4, "ARM", "CRM", True,
             "fine_grained matrix & 50% weathered"),
            ("G-2", "PB-Gamma", "estimate", 30.0, 12.0, np.nan, np.nan, "IRM", "", False,
             "excluded: overprint {suspected} ~ 2 $ rows"),
            ("D-1", "PB-Delta", "estimate", 5.0, 2.0, 2.5, 0.5, "thermal", "unknown", True,
             "")]
    cols = list(zip(*rows))
    def masked(values, unit):  # absent values are masked (written blank), never NaN
        values = np.array(values, float)
        return MaskedColumn(values, mask=np.isnan(values), unit=unit)

    def text(values):
        return MaskedColumn(list(values), mask=[v == "" for v in values])

    t = Table([list(cols[0]), list(cols[1]), [BODIES[b][0] for b in cols[1]], list(cols[2]),
               masked(cols[3], u.uT), masked(cols[4], u.uT), masked(cols[5], u.Myr),
               masked(cols[6], u.Myr), text(cols[7]), text(cols[8]), list(cols[9]),
               text(cols[10])],
              names=["record", "body", "reservoir", "kind", "paleointensity",
                     "paleointensity_err", "age", "age_err", "method", "remanence", "include",
                     "note"])
    return t


def _ln_field(draws: dict, r) -> np.ndarray:
    ln_b = np.log(draws["field_1au"]) - draws["power_index"] * np.log(r)
    if "ring_amplitude" in draws:
        g = np.exp(-0.5 * ((r - draws["ring_radius"]) / draws["ring_width"]) ** 2)
        ln_b = ln_b + np.log1p(draws["ring_amplitude"] * g)
    return ln_b


def _draws(model: str, rng, n_chain: int, n_draw: int) -> dict:
    out = {}
    for name in _MODEL_PARAMS[model]:
        x = rng.normal(_TRUTH[name], _SPREAD[name], size=(n_chain, n_draw))
        out[name] = np.abs(x) if name != "ring_amplitude" else x
    return out


def _fitted(comp: Table) -> Table:
    fitted = comp[np.asarray(comp["include"], bool)]
    for name in ("paleointensity_err", "age", "age_err"):
        fitted[name] = np.ma.filled(fitted[name].astype(float), np.nan)
    return fitted


def _body_loglik(draws: dict, fitted: Table, body_names: list) -> np.ndarray:
    ln_val = np.log(np.asarray(fitted["paleointensity"], float))
    ln_err = np.nan_to_num(np.asarray(fitted["paleointensity_err"], float) /
                           np.asarray(fitted["paleointensity"], float))
    out = []
    for name in body_names:
        r = BODIES[name][1]
        mu = _ln_field(draws, r) - np.log(2.0)
        var = ln_err[fitted["body"] == name][:, None, None] ** 2 + draws["intrinsic_scatter"] ** 2
        resid = ln_val[fitted["body"] == name][:, None, None] - mu
        out.append((-0.5 * resid ** 2 / var - 0.5 * np.log(2 * np.pi * var)).sum(axis=0))
    return np.stack(out, axis=-1)


def _idata(model, draws, fitted, body_names, seed):
    ll = _body_loglik(draws, fitted, body_names)
    ln_val = np.log(np.asarray(fitted["paleointensity"], float))
    ln_err = np.nan_to_num(np.asarray(fitted["paleointensity_err"], float) /
                           np.asarray(fitted["paleointensity"], float))
    body_index = np.array([body_names.index(b) for b in fitted["body"]])
    attrs = {"schema_version": "1", "diskfield_version": "0.1.0", "profile": model,
             "envelope": "steady", "spin": "body", "seed": seed, "data_hash": "0" * 64,
             "converged": int(model == "smooth"), "n_steps": 500, "tau_max": 12.0,
             "created": "2026-01-01T00:00:00"}
    with warnings.catch_warnings():
        # the schema keeps the total log-likelihood in sample_stats; ArviZ warns about the name
        warnings.simplefilter("ignore", PendingDeprecationWarning)
        return _from_dict(draws, ll, ln_val, ln_err, fitted, body_index, body_names, attrs)


def _from_dict(draws, ll, ln_val, ln_err, fitted, body_index, body_names, attrs):
    return az.from_dict(
        posterior=draws, log_likelihood={"body": ll},
        sample_stats={"lp": ll.sum(-1) - 3.0, "log_likelihood": ll.sum(-1)},
        observed_data={"ln_value": ln_val},
        constant_data={"ln_err": ln_err, "is_limit": np.asarray(fitted["kind"]) == "upper_limit",
                       "body_index": body_index},
        coords={"body_name": body_names, "record": list(fitted["record"])},
        dims={"body": ["body_name"], "ln_value": ["record"], "ln_err": ["record"],
              "is_limit": ["record"], "body_index": ["record"]},
        attrs=attrs)


def _summary_rows(draws: dict) -> list[dict]:
    rows = []
    for name, x in draws.items():
        q = np.percentile(x, [50, 5, 16, 84, 95])
        rows.append({"parameter": name, "median": q[0], "q05": q[1], "q16": q[2], "q84": q[3],
                     "q95": q[4], "mean": x.mean(), "sd": x.std(), "rhat": 1.004,
                     "ess_bulk": 350.0})
    return rows


def _profile_rows(draws: dict, epochs=(0.0, 3.0)) -> list[dict]:
    rows = []
    for t in epochs:
        for r in np.geomspace(0.5, 10.0, 25):
            b = np.exp(_ln_field(draws, r)).ravel() * np.exp(-t / 10.0)
            q = np.percentile(b, [50, 2.5, 16, 84, 97.5])
            rows.append({"r_au": r, "t_myr": t, "b_median_ut": q[0], "b_q025_ut": q[1],
                         "b_q16_ut": q[2], "b_q84_ut": q[3], "b_q975_ut": q[4]})
    return rows


def _write_csv(path: Path, rows: list[dict]) -> None:
    keys = list(rows[0])
    lines = [",".join(keys)] + [",".join(str(r[k]) for k in keys) for r in rows]
    path.write_text("\n".join(lines) + "\n")


def _write_fit(folder: Path, model: str, comp: Table, rng, seed, n_chain, n_draw,
               evidence: bool) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    fitted = _fitted(comp)
    body_names = list(dict.fromkeys(fitted["body"]))
    draws = _draws(model, rng, n_chain, n_draw)
    _idata(model, draws, fitted, body_names, seed).to_netcdf(folder / "posterior.nc",
                                                            engine="h5netcdf")
    names = list(_MODEL_PARAMS[model])
    fit = {"schema_version": "1", "model": model, "profile": model, "envelope": "steady",
           "spin": "body", "parameter_names": names, "fixed": {},
           "converged": model == "smooth",
           "flags": [] if model == "smooth" else ["chain shorter than 50 tau"],
           "n_walkers": n_chain, "n_steps": 500, "burn_in": 100, "thin": 8,
           "tau": {n: 10.0 + i for i, n in enumerate(names)}, "chain_over_tau": 38.0,
           "acceptance_fraction": 0.31, "max_log_likelihood": -7.5,
           "theta_max_log_likelihood": [_TRUTH[n] for n in names], "rhat_max": 1.004,
           "ess_min": 350.0, "seed": seed, "wall_time_s": 1.5}
    (folder / "fit.json").write_text(json.dumps(fit, indent=1))
    _write_csv(folder / f"posterior_summary_{model}.csv", _summary_rows(draws))
    _write_csv(folder / f"field_profile_{model}.csv", _profile_rows(draws))
    comp.write(folder / "compilation.ecsv", format="ascii.ecsv", overwrite=True)
    _write_priors(folder)
    _write_manifest(folder, seed)
    if evidence:
        ln_z = {"smooth": -12.0, "ring": -9.5}[model]
        (folder / "evidence.json").write_text(json.dumps(
            {"ln_evidence": ln_z, "ln_evidence_err": 0.15, "n_live": 100, "dlogz": 0.5,
             "n_calls": 5000, "seed": seed, "wall_time_s": 2.0}))


def _write_priors(folder: Path) -> None:
    pdir = folder / "priors_used"
    pdir.mkdir(exist_ok=True)
    (pdir / "00_reservoirs.toml").write_text(_RESERVOIRS_TOML)
    (pdir / "01_recording.toml").write_text(_RECORDING_TOML)


def _write_manifest(folder: Path, seed: int) -> None:
    manifest = {"versions": {"python": "3.11", "numpy": "2.4", "diskfield": "0.1.0"},
                "data_hash": "0" * 64, "prior_files": [{"path": "00_reservoirs.toml",
                                                        "sha256": "1" * 64}],
                "seed": seed, "command_line": "diskfield compare demo.ecsv",
                "created": "2026-01-01T00:00:00", "outputs": []}
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=1))


def _write_comparison(folder: Path, models) -> None:
    ln_z = {"smooth": -12.0, "ring": -9.5}
    rows = []
    for m in models:
        k = len(_MODEL_PARAMS[m])
        rows.append({"model": m, "n_params": k, "max_log_likelihood": -7.5 + (m == "ring"),
                     "aic": 2 * k + 15.0, "bic": k * np.log(5) + 15.0, "waic": 16.1,
                     "elpd_loo": -8.2 + (m == "ring"), "elpd_loo_se": 1.3, "p_loo": 2.1,
                     "pareto_k_max": 0.45 + 0.3 * (m == "ring"), "ln_evidence": ln_z[m],
                     "ln_evidence_err": 0.15, "ln_bayes_factor": ln_z[m] - ln_z["smooth"],
                     "converged": m == "smooth", "rhat_max": 1.004, "ess_min": 350.0})
    _write_csv(folder / "comparison.csv", rows)
    (folder / "verdict.md").write_text("The ring model is positively favoured (2 ln B = 5.0) "
                                       "over the smooth disk.\n")
    verdict = {"reference_model": "smooth",
               "models": {"ring": {"two_ln_bayes_factor": 5.0, "category": "positive",
                                   "delta_elpd": 1.0, "delta_elpd_se": 0.8, "agree": True,
                                   "decisive": False,
                                   "sentence": "ring vs smooth: positive, not decisive."}},
               "sentence": "The ring model is positively favoured over the smooth disk."}
    (folder / "verdict.json").write_text(json.dumps(verdict, indent=1))
    sens = [{"model": "ring", "ring_prior_scale": s, "ln_bayes_factor": 2.5 - np.log(s),
             "ln_bayes_factor_err": 0.2, "note": "" if s == 1 else "ring prior rescaled"}
            for s in (0.5, 1.0, 2.0)]
    _write_csv(folder / "prior_sensitivity.csv", sens)


def _write_truth(folder: Path) -> None:
    """A declared-truth recovery as the demo writes it (values invented for the test)."""
    rows = [{"parameter": "ring_radius", "true_value": 4.5, "median": 4.4, "q05": 3.9,
             "q95": 5.0, "posterior_quantile": 0.6, "inside_90": True},
            {"parameter": "ring_width", "true_value": 0.3, "median": 0.8, "q05": 0.55,
             "q95": 1.05, "posterior_quantile": 0.0, "inside_90": False}]
    recovery = {"true_model": "ring", "ring_demanded": False, "rows": rows, "not_sampled": [],
                "sentence": "Truth (ring): 1 of 2 true parameter values lie inside the 90% "
                            "posterior interval; outside: ring_width."}
    (folder / "truth_recovery.json").write_text(json.dumps(recovery, indent=1))
    (folder / "truth_recovery.md").write_text("# Recovery of the declared truth\n")


def make_saved_run(path, *, kind: str = "comparison", models=("smooth", "ring"),
                   n_chain: int = 6, n_draw: int = 40, seed: int = 20260101) -> Path:
    """Write a small saved fit (``kind="fit"``) or comparison (``kind="comparison"``).

    Returns the run folder.
    """
    path = Path(path)
    rng = np.random.default_rng(seed)
    comp = _compilation()
    if kind == "fit":
        _write_fit(path, models[-1], comp, rng, seed, n_chain, n_draw, evidence=False)
        return path
    for m in models:
        _write_fit(path / m, m, comp, rng, seed, n_chain, n_draw, evidence=True)
    _write_comparison(path, models)
    _write_truth(path)
    comp.write(path / "compilation.ecsv", format="ascii.ecsv", overwrite=True)
    _write_priors(path)
    _write_manifest(path, seed)
    return path
