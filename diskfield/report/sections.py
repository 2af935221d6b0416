"""The report's text sections: verdict, prior sensitivity, convergence, exact leave-one-out
refits, assumptions, exclusions and manifest."""
from __future__ import annotations

import json
import math

import numpy as np

from ..sigfig import round_to_decimals
from ..tables import Column, TextTable, measure
from .render import Items, Links, Para, Pre

__all__ = ["truth_blocks", "verdict_blocks", "sensitivity_blocks", "convergence_table",
           "convergence_blocks", "loo_refit_table", "loo_refit_blocks", "assumption_blocks",
           "exclusion_blocks", "manifest_blocks", "CAUTION"]

CAUTION = ("The conclusions rest with the authors' judgement of each record: the model treats "
           "every fitted record as a faithful, if biased and noisy, recording of the ambient "
           "disk field. Records whose magnetic history is in doubt should be excluded (with a "
           "note) or tested by refitting without them.")

_SPIN_TEXT = {
    "body": ("one spin projection u = |cos θ| shared by all records of a parent body "
             "(its remanence was acquired in one spin geometry), marginalised analytically"),
    "record": "an independent spin projection u = |cos θ| for every record, marginalised",
    "none": "no spin projection (non-rotating parent bodies: u = 1)",
}


def verdict_blocks(ctx, run, ref: str, diffs: dict) -> list:
    """The verdict (verdict.json sentences, verdict.md copied beside the report), with the
    ΔELPD of each model recomputed from the saved per-body log-likelihoods."""
    blocks = []
    sentence = run.verdict.get("sentence")
    if sentence:
        blocks.append(Para(str(sentence)))
    per_model = [str(v["sentence"]) for v in (run.verdict.get("models") or {}).values()
                 if isinstance(v, dict) and v.get("sentence")]
    if per_model:
        blocks.append(Items(tuple(per_model)))
    if run.verdict_text:
        if not blocks:  # no verdict.json: show the Markdown verdict as it was written
            blocks.append(Pre(run.verdict_text))
        (ctx.out_dir / "verdict.md").write_text(run.verdict_text + "\n", encoding="utf-8")
        blocks.append(Links("Full verdict of the comparison", ("verdict.md",)))
    if not blocks:
        blocks.append(Para("No verdict file (verdict.md / verdict.json) in this run."))
    items = [f"{m}: ΔELPD(LOO) vs {ref} = {d['elpd_diff']:.2f} ± {d['elpd_diff_se']:.2f} "
             f"(max Pareto k {d['pareto_k_max']:.2f}), from the saved per-body "
             "log-likelihoods" for m, d in diffs.items() if m != ref]
    if items and not per_model:  # the verdict's own sentences already give ΔELPD
        blocks.append(Items(tuple(items)))
    return blocks


def truth_blocks(ctx, run) -> list:
    """Recovery of a declared truth (simulated compilations such as the demo's)."""
    t = run.truth
    blocks = [Para(str(t.get("sentence", "")))] if t.get("sentence") else []
    rows = t.get("rows") or []
    if rows:
        cols = (Column("parameter", "Parameter", align="l"), Column("true_value", "True"),
                Column("median", "Median"), Column("interval_90", "90% interval"),
                Column("posterior_quantile", "Posterior quantile of truth"),
                Column("inside_90", "Inside 90%"))
        body = tuple((str(r["parameter"]), _num(r.get("true_value"), ".3g"),
                      _num(r.get("median"), ".3g"),
                      f"{_num(r.get('q05'), '.3g')} to {_num(r.get('q95'), '.3g')}",
                      _num(r.get("posterior_quantile"), ".2f"),
                      "yes" if r.get("inside_90") else "no") for r in rows)
        table = TextTable(cols, body, caption=f"Declared truth against the posterior of model "
                          f"{t.get('true_model', '')}", label="tab:truth")
        blocks.append(ctx.table(table, "truth_recovery"))
    if run.truth_text:
        (ctx.out_dir / "truth_recovery.md").write_text(run.truth_text + "\n", encoding="utf-8")
        blocks.append(Links("Truth recovery as written by the run", ("truth_recovery.md",)))
    return blocks


def sensitivity_blocks(ctx, run) -> list:
    """Statement that Bayes factors depend on the priors, and the sensitivity table."""
    blocks = [Para("Bayes factors depend on the priors, in particular on the width of the ring "
                   "priors: a wider prior on the ring parameters spreads the ringed model's "
                   "prior mass and lowers its evidence even when the fit is unchanged. The table "
                   "gives ln B against the reference model with the ring priors scaled by 0.5, 1 "
                   "and 2.")]
    if not run.sensitivity:
        return blocks + [Para("No prior_sensitivity.csv in this run.")]
    cols = (Column("model", "Model", align="l"), Column("ring_prior_scale", "Ring prior scale"),
            Column("ln_bayes_factor", "ln B", latex=r"$\ln B$"), Column("note", "Note", align="l"))
    rows = tuple((str(r.get("model", "")), str(r.get("ring_prior_scale", "")),
                  measure(r.get("ln_bayes_factor"), r.get("ln_bayes_factor_err")),
                  str(r.get("note", ""))) for r in run.sensitivity)
    table = TextTable(cols, rows, caption="Prior sensitivity of the Bayes factor",
                      label="tab:prior_sensitivity")
    return blocks + [ctx.table(table, "prior_sensitivity")]


def _tau_max(fit: dict) -> float:
    tau = fit.get("tau") or {}
    values = tau.values() if isinstance(tau, dict) else tau
    finite = [float(v) for v in values if v is not None and math.isfinite(float(v))]
    return max(finite) if finite else math.nan


def _value(x) -> float | None:
    """``x`` as a float, or None when it is missing, not a number or NaN (an empty cell)."""
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(x) else x


def _num(x, fmt: str) -> str:
    v = _value(x)
    return "" if v is None else format(v, fmt)


def convergence_table(run, diffs: dict) -> TextTable:
    """τ, chain length over τ, R-hat, ESS and Pareto k per model; unconverged marked."""
    cols = (Column("model", "Model", align="l"), Column("converged", "Converged"),
            Column("n_walkers", "Walkers"), Column("n_steps", "Steps"),
            Column("tau_max", "max τ", unit="steps", latex=r"$\max\tau$"),
            Column("chain_over_tau", "Steps / τ", latex=r"steps$/\tau$"),
            Column("acceptance", "Acceptance"), Column("rhat_max", "max R-hat",
                                                       latex=r"$\max\hat R$"),
            Column("ess_min", "min ESS"), Column("pareto_k_max", "max Pareto k",
                                                 latex=r"$\max k$"),
            Column("flags", "Flags", align="l"))
    rows = []
    for name, f in run.fits.items():
        fit, d = f.fit, diffs.get(name, {})
        ok = bool(fit.get("converged"))
        acc = fit.get("acceptance_fraction")
        acc = sum(acc) / len(acc) if isinstance(acc, list) and acc else acc
        rows.append((name + ("" if ok else "*"), "yes" if ok else "NO", str(fit.get("n_walkers", "")),
                     str(fit.get("n_steps", "")), _num(_tau_max(fit), ".1f"),
                     _num(fit.get("chain_over_tau"), ".1f"), _num(acc, ".2f"),
                     _num(fit.get("rhat_max"), ".3f"), _num(fit.get("ess_min"), ".0f"),
                     _num(d.get("pareto_k_max"), ".2f"), "; ".join(map(str, fit.get("flags", [])))))
    notes = ("Chains are trusted when longer than 50 τ (emcee documentation; Foreman-Mackey et "
             "al. 2013, PASP 125); R-hat < 1.01 (Vehtari et al. 2021, Bayesian Analysis); "
             "Pareto k > 0.7 marks an unreliable leave-one-body-out estimate (Vehtari, Gelman & "
             "Gabry 2017, Stat. Comput. 27). * not converged: treat with caution.",)
    return TextTable(cols, tuple(rows), caption="Convergence diagnostics",
                     label="tab:convergence", notes=notes)


def convergence_blocks(ctx, run, diffs: dict) -> list:
    """Convergence table, and a warning line for each unconverged fit or bad Pareto k."""
    blocks = [ctx.table(convergence_table(run, diffs), "convergence")]
    warn = [f"Model {n} did NOT converge; its numbers are provisional."
            for n, f in run.fits.items() if not f.fit.get("converged")]
    warn += [f"Model {n}: {d['n_bad_k']} parent bod{'y' if d['n_bad_k'] == 1 else 'ies'} with "
             "Pareto k > 0.7 (leave-one-out unreliable for them)."
             for n, d in diffs.items() if d.get("n_bad_k")]
    if warn:
        blocks.append(Items(tuple(warn)))
    return blocks


def _loo_refits(run) -> dict:
    """``criteria.loo_refit`` of each fit that requested exact refits (model -> record)."""
    out = {}
    for name, f in run.fits.items():
        info = (f.fit.get("criteria") or {}).get("loo_refit")
        if isinstance(info, dict) and (info.get("requested", True) or info.get("bodies")):
            out[name] = info
    return out


def _decimals(x, decimals: int) -> str:
    v = _value(x)
    return "" if v is None else round_to_decimals(v, decimals)


def loo_refit_table(refits: dict) -> TextTable:
    """Pareto k, PSIS and exact elpd_i and the refit's convergence of each refitted body.

    ``refits`` maps a model name to its ``fit.json`` ``criteria.loo_refit`` record;
    unconverged refits are marked ``*`` in the body column and in a note.
    """
    cols = (Column("model", "Model", align="l"), Column("body", "Body", align="l"),
            Column("pareto_k", "Pareto k", latex=r"$k$"),
            Column("psis_elpd_i", "PSIS elpd_i", latex=r"PSIS elpd$_i$"),
            Column("exact_elpd_i", "Exact elpd_i", latex=r"exact elpd$_i$"),
            Column("converged", "Refit converged"), Column("n_steps", "Steps"))
    rows, bad = [], []
    for model, info in refits.items():
        for b in info.get("bodies") or ():
            ok, body = bool(b.get("converged")), str(b.get("body", ""))
            if not ok:
                bad.append(f"{body} (model {model})")
            rows.append((model, body + ("" if ok else "*"), _decimals(b.get("pareto_k"), 2),
                         _decimals(b.get("psis_elpd_i"), 2), _decimals(b.get("exact_elpd_i"), 2),
                         "yes" if ok else "NO", str(b.get("n_steps", ""))))
    notes = ("elpd_i = ln p(y_i | y_-i) of one parent body (higher is better): PSIS, importance "
             "sampled from the full-data posterior; exact, from a refit of the model without "
             "the body. Pareto k is the PSIS diagnostic of the full-data fit.",)
    if bad:
        notes += (f"* refit not converged ({', '.join(bad)}): exact elpd_i provisional.",)
    return TextTable(cols, tuple(rows), caption="Exact leave-one-out refits",
                     label="tab:loo_refit", notes=notes)


def _refit_sentence(run, refits: dict) -> str:
    where = ("In the model comparison, elpd_loo, its SE, p_loo and ΔELPD"
             if run.kind == "comparison" else "In fit.json, elpd_loo, its SE and p_loo")
    text = (f"{where} use the exact elpd_i of these bodies in place of the PSIS estimates "
            "(Pareto k and max Pareto k stay the full-data PSIS diagnostics).")
    bad = [f"{b.get('body')} (model {m}; {b.get('n_steps', '?')} steps, "
           f"{_num(b.get('chain_over_tau'), '.1f')} τ)"
           for m, info in refits.items() for b in info.get("bodies") or ()
           if not b.get("converged")]
    if bad:
        one = len(bad) == 1
        text += (f" The refit{'' if one else 's'} without {', '.join(bad)} did NOT converge: "
                 f"{'its' if one else 'their'} exact elpd_i {'is' if one else 'are'} "
                 "provisional.")
    return text


def loo_refit_blocks(ctx, run) -> list:
    """The exact leave-one-out refits of ``--loo-refit`` (nothing when none was requested)."""
    refits = _loo_refits(run)
    done = {m: info for m, info in refits.items() if info.get("bodies")}
    none = [m for m in refits if m not in done]
    blocks = []
    if done:
        blocks += [ctx.table(loo_refit_table(done), "loo_refit"),
                   Para(_refit_sentence(run, done))]
    if none:
        flag = refits[none[0]].get("pareto_k_flag", 0.7)
        blocks.append(Para(f"Exact leave-one-out refits were requested for model"
                           f"{'s' if len(none) > 1 else ''} {', '.join(none)}: no body had "
                           f"Pareto k > {flag:g}, so PSIS-LOO is kept unchanged."))
    return blocks


def _prior_lines(section: dict, sources: dict, prefix: str) -> list:
    return [f"{name}: {prior.describe()} — {sources.get(f'{prefix}.{name}', prior.source)}"
            for name, prior in sorted(section.items())]


def assumption_blocks(run, priors) -> list:
    """What the model assumes: field direction, spin, calibration, distances, ages."""
    spins = sorted({str(f.fit.get("spin", "body")) for f in run.fits.values()})
    spin_text = "; ".join(f"{s}: {_SPIN_TEXT.get(s, s)}" for s in spins)
    obliquity = ("isotropic spin axes (u ~ Uniform(0, 1))" if priors.spin_obliquity is None
                 else f"a user prior on the obliquity: {priors.spin_obliquity.describe()}")
    items = (
        "The field direction was steady relative to the parent body while each remanence was "
        "acquired, so a spinning body records the time average B |cos θ|.",
        f"Spin treatment — {spin_text}; {obliquity}.",
        "Calibration: each record's value is multiplied by a lognormal factor of its method and "
        "remanence type (below); records without a method are taken to include calibration in "
        "their stated error. Recording fractions enter as lognormal factors.",
        "Formation distances: all records of a body share one distance, drawn from its "
        "reservoir's prior (below) unless the compilation gives a per-body range.",
        "Ages: Gaussian (age ± age_err), uniform windows, or the reservoir's default window.",
        "Observation: ln values are Gaussian around ln(B u e c) with the stated error and an "
        "intrinsic scatter added in quadrature; upper limits enter through the cumulative "
        "distribution.",
    )
    return [Items(items), Para("Calibration and remanence priors:"),
            Items(tuple(_prior_lines(priors.calibration, priors.sources, "calibration")
                        + _prior_lines(priors.remanence, priors.sources, "remanence"))),
            Para("Distance priors by reservoir and default age windows:"),
            Items(tuple(_prior_lines(priors.reservoirs, priors.sources, "reservoirs")
                        + _prior_lines(priors.age_windows, priors.sources, "age_windows"))),
            Para(CAUTION)]


def exclusion_blocks(run) -> list:
    """Every excluded row with its note."""
    t = run.compilation
    if "include" not in t.colnames:
        return [Para("No record was excluded.")]
    rows = [r for r in t if not np.ma.is_masked(r["include"])
            and str(r["include"]).strip().lower() in ("false", "0", "no")]
    if not rows:
        return [Para("No record was excluded.")]
    note = (lambda r: str(r["note"]).strip() if "note" in t.colnames
            and not np.ma.is_masked(r["note"]) and str(r["note"]).strip() else "(no note given)")
    return [Para(f"{len(rows)} record(s) kept in the file but excluded from the fit:"),
            Items(tuple(f"{r['record']} ({r['body']}): {note(r)}" for r in rows))]


def manifest_blocks(run) -> list:
    """Provenance: versions, data hash, priors, seed and command line (from manifest.json)."""
    m = run.manifest
    if not m:
        return [Para("No manifest.json in the run folder.")]
    keep = {k: v for k, v in m.items() if k not in ("outputs",)}
    lines = [f"{k}: {v}" for k, v in keep.items() if not isinstance(v, (dict, list))]
    return [Items(tuple(lines)), Pre(json.dumps(keep, indent=1, sort_keys=True, default=str))]
