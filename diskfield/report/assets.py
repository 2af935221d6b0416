"""The report's figure and table files, built from a loaded saved run.

Each builder writes its files under the report folder and returns report blocks (see
:mod:`diskfield.report.render`); a figure that cannot be drawn from what the run holds is
replaced by a sentence saying why, never silently dropped.
"""
from __future__ import annotations

import math
import warnings

import numpy as np

from .. import figures as F
from ..plotstyle import save_figure
from ..tables import PARAMETER_UNITS, comparison_table, compilation_table, summary_table, write_table
from .render import Figure, Para, TableBlock

__all__ = ["ReportContext", "theta_draws", "profile_blocks", "time_blocks", "pair_blocks",
           "predictive_blocks", "comparison_blocks", "summary_blocks", "compilation_blocks",
           "body_points", "reference_model", "elpd_differences"]


class ReportContext:
    """Where and how the report's files are written.

    Parameters
    ----------
    out_dir : Path
        Report folder (``figures/`` and ``tables/`` are made inside it).
    dpi : int
        PNG resolution [dots per inch].
    n_draws : int
        Posterior draws used to recompute bands, distances and predictive intervals.
    """

    def __init__(self, out_dir, dpi: int = 300, n_draws: int = 200):
        self.out_dir, self.dpi, self.n_draws = out_dir, dpi, n_draws

    def figure(self, fig, name: str, caption: str) -> Figure:
        save_figure(fig, self.out_dir / "figures" / name, dpi=self.dpi)
        return Figure(f"figures/{name}.png", f"figures/{name}.pdf", caption)

    def table(self, table, name: str) -> TableBlock:
        files = write_table(table, self.out_dir / "tables" / name)
        return TableBlock(table, tuple(f"tables/{p.name}" for p in files))


def theta_draws(fit, n: int) -> np.ndarray:
    """Up to ``n`` evenly spaced posterior draws of the model's sampled parameters, (n, P)."""
    names = list(fit.model.parameter_names) if fit.model is not None else list(
        fit.fit.get("parameter_names", fit.idata.posterior.data_vars))
    cols = [np.asarray(fit.idata.posterior[name].values, float).ravel() for name in names]
    theta = np.stack(cols, axis=-1)
    idx = np.unique(np.linspace(0, len(theta) - 1, min(n, len(theta))).round().astype(int))
    return theta[idx]


def reference_model(run) -> str:
    """Reference model of the comparison (verdict.json, else ``smooth``, else the first)."""
    ref = run.verdict.get("reference_model") or run.verdict.get("reference")
    if ref in run.fits:
        return ref
    return "smooth" if "smooth" in run.fits else next(iter(run.fits))


def body_points(run, fit, priors):
    """Body distances: posterior (rebuilt Model) or prior; and which it was."""
    if fit.model is not None:
        r, w = fit.model.body_distance_posterior(theta_draws(fit, 50))
        res = {str(row["body"]): str(row["reservoir"]) for row in run.compilation}
        names = list(fit.model.body_names)
        return F.body_points_from_posterior(r, w, names, [res.get(n, "") for n in names]), \
            f"posterior:{fit.name}"
    return F.body_points_from_prior(run.compilation, priors.reservoirs), "prior"


def _epochs(run) -> list[float]:
    ts = sorted({float(t) for f in run.fits.values() if f.profile is not None
                 for t in f.profile["t_myr"]})
    if len(ts) <= 3:
        return ts
    return [ts[0], ts[len(ts) // 2], ts[-1]]


def _distance_caption(source: str) -> str:
    if source.startswith("posterior"):
        return ("Body distances: posterior median and 16th–84th percentiles (horizontal bars), "
                f"pooled over posterior draws of model {source.split(':')[1]}.")
    return ("Body distances: median and 16th–84th percentiles of the distance *prior* "
            "(the model could not be rebuilt, so no posterior distances are shown).")


_IMPLIED = ("Record-implied ambient field: the value with the recording terms removed — "
            "median and 16th–84th percentiles of ln P − ln e − ln c − ln u, with measurement "
            "error, recording fraction and calibration as lognormal terms and the spin "
            "projection u isotropic (exact quantiles of an exponentially modified Gaussian; "
            "the prior spread of the recording terms, not conditioned on other records). "
            "Upper limits: downward arrows at the median implied value. Reservoirs by marker "
            "shape. Bands: 68% and 95% posterior intervals of B with the median line.")


def profile_blocks(ctx, run, records, bodies, source) -> list:
    """B(r) figure at the saved epochs (from the field_profile CSVs)."""
    epochs = _epochs(run)
    if not epochs:
        return [Para("No field_profile CSV in the run: the B(r) figure cannot be drawn.")]
    bands = {e: {n: F.bands_from_profile_rows(f.profile, e) for n, f in run.fits.items()
                 if f.profile is not None} for e in epochs}
    caption = ("Posterior field profile B(r) at the saved epochs, per model. Each record is drawn "
               "in the panel nearest its age, at its body's distance. "
               f"{_distance_caption(source)} {_IMPLIED}")
    return [ctx.figure(F.field_profile_figure(bands, bodies, records), "field_profile", caption)]


def _time_bands(fit, distance, t_grid, ctx):
    if fit.model is not None:
        return F.bands_from_draws(fit.model.log_field, theta_draws(fit, ctx.n_draws), distance,
                                  t_grid)
    if fit.profile is None:
        return None
    times = sorted(set(fit.profile["t_myr"].tolist()))
    if len(times) == 1 and fit.fit.get("envelope", "steady") != "steady":
        return None
    qs = [F.bands_from_profile_rows(fit.profile, t) for t in times]
    cols = [np.array([np.interp(np.log(distance), np.log(b.x), np.log(b.q[k])) for b in qs])
            for k in range(5)]
    if len(times) == 1:  # steady envelope: the field is the same at every time
        return F.Bands(np.asarray(t_grid, float), np.exp(np.repeat(np.stack(cols), len(t_grid), 1)))
    return F.Bands(np.asarray(times), np.exp(np.stack(cols)))


def time_blocks(ctx, run, records, bodies, source) -> list:
    """B(t) figure at each reservoir's median body distance, records at their ages."""
    by_res = {}
    for b in bodies:
        by_res.setdefault(b.reservoir, []).append(b.distance_au[1])
    distances = sorted({float(f"{np.median(v):.2g}") for v in by_res.values()})[:3]
    ages = [a for r in records for a in r.age_myr if math.isfinite(a)]
    t_grid = np.linspace(0.0, max(ages + [5.0]) + 1.0, 60)
    bands = {d: {} for d in distances}
    for d in distances:
        for name, fit in run.fits.items():
            b = _time_bands(fit, d, t_grid, ctx)
            if b is not None:
                bands[d][name] = b
    if not distances or not any(bands.values()):
        return [Para("The field-against-time figure needs the rebuilt model or a field_profile "
                     "CSV with several epochs; neither is available for this run.")]
    caption = ("Field against time at each reservoir's median body distance, with the records "
               "at their ages (bars: ±1 sigma, the stated window, or the reservoir's default "
               "window) in the panel nearest their body's distance. "
               f"{_distance_caption(source)} {_IMPLIED}")
    return [ctx.figure(F.field_time_figure(bands, bodies, records), "field_time", caption)]


def pair_blocks(ctx, run) -> list:
    """Marginal and pair plots of ring parameters, one figure per ringed model."""
    out = []
    for name, fit in run.fits.items():
        ring = {p: fit.idata.posterior[p].values for p in F.RING_PARAMETERS
                if p in fit.idata.posterior.data_vars}
        if ring:
            truth = _declared_truth(run, name)
            ordered = bool((fit.fit.get("label_ordering") or {}).get("applied"))
            caption = (f"Ring parameters of model {name}: marginal posteriors (diagonal; median "
                       "solid, 16th/84th percentiles dotted) and pairwise 2-D histograms."
                       + (" The two rings are labelled by radius (inner, outer): their priors "
                          "are identical, so the model is sampled with ring_radius <= "
                          "ring2_radius." if ordered else "")
                       + (" Dashed vermilion lines and crosses: the declared true values of "
                          "the simulated compilation." if truth else ""))
            labels = F.ORDERED_RING_LABELS if ordered else None
            out.append(ctx.figure(F.pair_figure(ring, labels, truth=truth),
                                  f"ring_parameters_{name}", caption))
    return out or [Para("No model of this run has ring parameters.")]


def _declared_truth(run, model: str) -> dict:
    """True parameter values from truth_recovery.json when ``model`` generated the data."""
    if not run.truth or run.truth.get("true_model") != model:
        return {}
    return {str(r["parameter"]): float(r["true_value"]) for r in run.truth.get("rows") or []
            if r.get("true_value") is not None}


def predictive_blocks(ctx, run) -> list:
    """Posterior predictive check per model (needs the rebuilt model)."""
    out = []
    for name, fit in run.fits.items():
        if fit.model is None:
            out.append(Para(f"Model {name}: no posterior predictive check — the model could not "
                            f"be rebuilt ({fit.model_note})."))
            continue
        rng = np.random.default_rng(int(fit.fit.get("seed") or 0))
        sim = fit.model.simulate_ln_values(theta_draws(fit, ctx.n_draws), rng)
        obs = fit.idata.observed_data["ln_value"].values
        lim = fit.idata.constant_data["is_limit"].values.astype(bool)
        records = fit.idata.observed_data["record"].values
        iv = F.predictive_intervals(sim)
        cov = F.predictive_coverage(obs, lim, iv)
        caption = (f"Posterior predictive check, model {name}: each record's observed value "
                   "against 68% and 95% intervals of values simulated through the full "
                   f"recording model over {len(sim)} posterior draws. {cov['in_68']} of "
                   f"{cov['n_estimates']} estimates lie in their 68% interval, {cov['in_95']} in "
                   f"their 95% interval; {cov['limits_consistent']} of {cov['n_limits']} upper "
                   "limits lie above the 2.5th predictive percentile.")
        out.append(ctx.figure(F.predictive_figure(records, obs, lim, iv), f"predictive_{name}",
                              caption))
    return out


def elpd_differences(run, ref: str) -> dict:
    """ΔELPD(LOO) and its SE of each model against ``ref``, from the per-body log-likelihoods."""
    from ..azadapter import psis_loo

    loo = {n: psis_loo(f.idata) for n, f in run.fits.items()}
    out = {}
    for name, res in loo.items():
        d = res["elpd_i"] - loo[ref]["elpd_i"]
        se = float(np.sqrt(d.size * np.var(d, ddof=1))) if d.size > 1 and name != ref else 0.0
        out[name] = {"elpd_diff": float(d.sum()), "elpd_diff_se": se,
                     "pareto_k_max": float(np.max(res["pareto_k"])),
                     "n_bad_k": int(np.sum(res["pareto_k"] > 0.7))}
    return out


def _with_elpd_diff(rows: list, diffs: dict) -> list:
    out = []
    for r in rows:
        r = dict(r)
        d = diffs.get(str(r.get("model")), {})
        r.setdefault("elpd_diff", d.get("elpd_diff", math.nan))
        r.setdefault("elpd_diff_se", d.get("elpd_diff_se", math.nan))
        out.append(r)
    return out


def comparison_blocks(ctx, run, diffs: dict, ref: str) -> list:
    """Comparison table (all formats) and the ln Z / ΔELPD figure."""
    rows = _with_elpd_diff(run.comparison, diffs)
    block = ctx.table(comparison_table(rows, reference=ref), "comparison")
    models = [str(r["model"]) for r in rows]
    get = lambda r, k: float(r.get(k) or math.nan)  # noqa: E731
    fig = F.comparison_figure(models, [get(r, "ln_evidence") for r in rows],
                              [get(r, "ln_evidence_err") for r in rows],
                              [get(r, "elpd_diff") for r in rows],
                              [get(r, "elpd_diff_se") for r in rows], reference=ref)
    caption = (f"Left: log evidence ln Z with its nested-sampling error. Right: ΔELPD(LOO) "
               f"against {ref}, leaving out one parent body at a time, with the SE of the "
               "difference. Higher is better on both.")
    return [block, ctx.figure(fig, "comparison", caption)]


def _parameter_units() -> dict:
    """Units of every declared parameter (the plug-ins' declarations win over the fallback)."""
    try:
        from ..priorset import known_parameters
    except ImportError:
        return dict(PARAMETER_UNITS)
    return {**PARAMETER_UNITS, **{n: p.unit for n, p in known_parameters().items()}}


def summary_blocks(ctx, run) -> list:
    """Posterior-summary table of each model (all formats), and its fixed parameters."""
    out, units = [], _parameter_units()
    for name, fit in run.fits.items():
        if fit.summary:
            out.append(ctx.table(summary_table(fit.summary, name, units),
                                 f"posterior_summary_{name}"))
        else:
            out.append(Para(f"Model {name}: posterior_summary_{name}.csv is missing."))
        fixed = fit.fit.get("fixed") or {}
        if fixed:
            out.append(Para(f"Model {name}, fixed by the priors (not sampled): " + ", ".join(
                f"{k} = {v:g} {units.get(k, '')}".rstrip() for k, v in sorted(fixed.items()))))
    return out


def compilation_blocks(ctx, run) -> list:
    """The compilation as fitted, with exclusions and their notes."""
    return [ctx.table(compilation_table(run.compilation), "compilation")]


def record_points(run, priors, spin: str):
    """Record-implied fields of every fitted record (warnings of scipy's ppf silenced)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return F.record_points(run.compilation, priors.calibration, priors.remanence,
                               priors.age_windows, spin)
