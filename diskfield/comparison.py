"""Model comparison: fits, evidences, the comparison table, the verdict, prior sensitivity.

Directions: ``elpd_loo``, ``waic`` (elpd scale), ``ln_evidence``, ``ln_bayes_factor``:
higher is better; ``aic``, ``bic``: lower is better. Bayes factors and ΔELPD are against a
named reference model (default ``smooth``); positive favours the model of the row.

Verdict scale: Kass & Raftery (1995, JASA 90, 773) on 2 ln B — below 2 "not worth more
than a bare mention", 2–6 "positive", 6–10 "strong", above 10 "very strong". A ring is
called *demanded* only when 2 ln B > 6 with its ±2σ estimator error, under every prior
scale of the sensitivity check, and every fit involved converged. PSIS-LOO "prefers" a
model when |ΔELPD| > 2 SE (common practice, no source); otherwise LOO cannot tell.

Prior sensitivity (``prior_sensitivity.csv``): ln B against the reference under the
default ring priors and with every ring parameter's prior width scaled by 0.5 and 2.
Precisely, for scale s:

* amplitudes (``ring_amplitude``, ``ring2_amplitude``) are scaled about 0, the value at
  which the ring vanishes, so every scaled prior still contains the smooth disk:
  ``uniform(lo, hi) -> uniform(max(s lo, -0.99), s hi)``;
* radii and widths are scaled about their centre: ``uniform(lo, hi)`` about (lo + hi)/2,
  ``log_uniform`` about the geometric centre (width in ln), ``normal``/``log_normal``/
  ``half_normal``: sd, ln_sd, scale (and a half-normal's ``high``) times s,
  ``truncated_normal``: sd and the bounds' distances to the mean times s;
* results are clipped at physical limits (amplitude ≥ −0.99, radius ≥ 0.1 AU, width
  ≥ 0.01 AU; convention) and the ``note`` column says when clipping happened;
* the scaled priors are written as a prior file read after the user's (kept in the
  model's folder); the evidence under them is obtained (column ``method``):

  - scale < 1 (narrower priors, support inside the default one): by importance
    reweighting of the default run's weighted points (:func:`diskfield.evidence.
    reweighted_evidence`), no new run; when the reweighted points' effective sample size
    is below :data:`diskfield.evidence.MIN_REWEIGHT_ESS` (convention) by a fresh nested
    sampling run instead;
  - scale > 1 (wider priors, which the default run never explored): by a fresh nested
    sampling run (same seed and settings, checkpointed as ``dynesty_x<scale>.pkl``).

Parallel work (``jobs``): every model's fit-and-evidence and every wider-prior evidence
run are independent tasks, run on ``jobs`` worker processes (:mod:`diskfield.workers`);
the results are identical to ``jobs=1``. Each finished task prints one progress line.

Exact LOO refits (``loo_refit``, ``--loo-refit``): after the fits, every body whose Pareto
k exceeds 0.7 is refitted out of the data, one task per (model, body) on the same workers
(:mod:`diskfield.loorefit`); the exact ``elpd_i`` replace the PSIS ones in ``elpd_loo``,
``elpd_loo_se``, ``p_loo`` and ΔELPD, and the row's ``note`` names the refitted bodies
(and any refit that did not converge). No column is added.
"""
from __future__ import annotations

import json
import sys
import tempfile
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from . import tables
from .criteria import elpd_difference
from .errors import ConvergenceError, OptionError
from .evidence import (DEFAULT_DLOGZ, DEFAULT_NLIVE, MIN_REWEIGHT_ESS, nested_evidence,
                       reweighted_evidence, savage_dickey)
from .manifest import write_atomic, write_manifest
from .priorspec import make_prior
from .runs import DEFAULT_SEED, fit_model, write_inputs
from .sampling import SamplerSettings
from .summaries import format_rows
from .workers import check_jobs, run_tasks

__all__ = ["COMPARISON_COLUMNS", "SENSITIVITY_COLUMNS", "PRIOR_SCALES", "kass_raftery",
           "scale_prior", "ring_prior_file", "ComparisonOutcome", "compare", "verdict",
           "verdict_markdown", "comparison_rows",
           "NESTING"]

COMPARISON_COLUMNS = ("model", "n_params", "max_log_likelihood", "aic", "bic", "waic",
                      "elpd_loo", "elpd_loo_se", "p_loo", "pareto_k_max", "ln_evidence",
                      "ln_evidence_err", "ln_bayes_factor", "converged", "rhat_max", "ess_min")
_EXTRA_COLUMNS = ("reference_model", "ln_bayes_factor_err", "two_ln_bayes_factor",
                  "kass_raftery", "elpd_diff", "elpd_diff_se", "waic_se", "p_waic",
                  "n_bad_pareto_k", "pareto_k_threshold", "bic_n_records", "chain_over_tau",
                  "savage_dickey_vs", "savage_dickey_ln_bf", "savage_dickey_ln_bf_err", "note")
SENSITIVITY_COLUMNS = ("model", "ring_prior_scale", "ln_bayes_factor", "ln_bayes_factor_err",
                       "method", "reweight_ess", "note")
PRIOR_SCALES = (0.5, 1.0, 2.0)

#: model -> (nested model, parameter whose value 0 turns the model into the nested one)
NESTING = {"ring": ("smooth", "ring_amplitude"), "two-ring": ("ring", "ring2_amplitude")}

_KR = ((10.0, "very strong"), (6.0, "strong"), (2.0, "positive"),
       (0.0, "not worth more than a bare mention"))
_PHYSICAL_LOW = {"amplitude": -0.99, "radius": 0.1, "width": 0.01}


def kass_raftery(two_ln_b: float) -> str:
    """Kass & Raftery (1995) category of ``|2 ln B|`` (the sign gives the direction)."""
    if not np.isfinite(two_ln_b):
        return "not computed"
    return next(name for cut, name in _KR if abs(two_ln_b) >= cut)


# ---------------------------------------------------------------- prior scaling

def _kind(name: str) -> str:
    return name.rsplit("_", 1)[-1]


def scale_prior(name: str, prior, scale: float):
    """The prior of ring parameter ``name`` with its width scaled by ``scale``.

    Returns
    -------
    (Prior, str)
        The scaled prior and a note ("" or what was clipped / left alone).
    """
    fam, a = prior.family, prior.as_dict()
    kind = _kind(name)
    floor = _PHYSICAL_LOW.get(kind, -np.inf)
    if fam == "fixed":
        return prior, f"{name} is fixed; not scaled"
    if fam in ("uniform", "log_uniform"):
        lo, hi = _scaled_bounds(fam, a["low"], a["high"], scale, kind == "amplitude")
        new, note = _clip(name, lo, hi, floor)
        return make_prior(fam, prior.unit, prior.source, low=new[0], high=new[1]), note
    if fam == "truncated_normal":
        lo = a["mean"] + scale * (a["low"] - a["mean"])
        hi = a["mean"] + scale * (a["high"] - a["mean"])
        (lo, hi), note = _clip(name, lo, hi, floor)
        return make_prior(fam, prior.unit, prior.source, mean=a["mean"], sd=scale * a["sd"],
                          low=lo, high=hi), note
    widths = {"normal": ("sd",), "log_normal": ("ln_sd",), "half_normal": ("scale", "high")}
    args = {k: (v * scale if k in widths[fam] else v) for k, v in a.items()
            if k not in ("family", "unit", "source")}
    return make_prior(fam, prior.unit, prior.source, **args), ""


def _scaled_bounds(family, lo, hi, scale, about_zero):
    if about_zero:
        return scale * lo, scale * hi
    if family == "log_uniform":
        c, h = 0.5 * (np.log(lo) + np.log(hi)), 0.5 * np.log(hi / lo)
        return float(np.exp(c - scale * h)), float(np.exp(c + scale * h))
    c, h = 0.5 * (lo + hi), 0.5 * (hi - lo)
    return c - scale * h, c + scale * h


def _clip(name, lo, hi, floor):
    if lo >= floor:
        return (lo, hi), ""
    return (floor, hi), f"{name} lower bound clipped at {floor:g} (physical limit)"


def _toml_table(name, prior) -> str:
    d = prior.as_dict()
    lines = [f"[parameters.{name}]"]
    for key, value in d.items():
        lines.append(f"{key} = {json.dumps(value) if isinstance(value, str) else repr(float(value))}")
    return "\n".join(lines)


def ring_prior_file(model, scale: float, path) -> tuple[Path, list]:
    """Write a prior file with every ring parameter's prior scaled (see module docstring).

    Returns
    -------
    (pathlib.Path, list of str)
        The file and the notes of the scaling.
    """
    tables_, notes = [], []
    for name, prior in zip(model.parameter_names, model.priors):
        if name.startswith("ring"):
            new, note = scale_prior(name, prior, scale)
            new.source = f"diskfield prior-sensitivity check: default width x {scale:g}"
            tables_.append(_toml_table(name, new))
            notes += [note] if note else []
    write_atomic(path, f"# ring priors with widths scaled by {scale:g}\n\n"
                 + "\n\n".join(tables_) + "\n")
    return Path(path), notes


# ---------------------------------------------------------------- the comparison

@dataclass
class ComparisonOutcome:
    """Everything ``compare`` computed (also written to its folder).

    Attributes
    ----------
    fits : dict
        Model name -> :class:`diskfield.runs.FitOutcome`.
    evidence : dict
        Model name -> :class:`diskfield.evidence.Evidence` (empty with ``evidence=False``).
    rows : list of dict
        ``comparison.csv`` rows.
    sensitivity : list of dict
    verdict : dict
        ``verdict.json``.
    out : pathlib.Path or None
    """

    fits: dict
    evidence: dict
    rows: list
    sensitivity: list
    verdict: dict
    savage_dickey: dict = field(default_factory=dict)
    out: Path | None = None


def _check_models(models, reference):
    models = [m.strip() for m in models if m.strip()]
    if len(models) < 2 or len(set(models)) != len(models):
        raise OptionError("--models", ",".join(models),
                          "at least two different profile names, comma-separated "
                          "(e.g. smooth,ring,two-ring)")
    if reference not in models:
        raise OptionError("--reference", reference, "one of the compared models: "
                          + ", ".join(models))
    return models


def compare(comp, models=("smooth", "ring", "two-ring"), *, envelope="steady", spin="body",
            priors=None, reference="smooth", evidence=True, seed=DEFAULT_SEED, out=None,
            settings: SamplerSettings = SamplerSettings(), nlive=DEFAULT_NLIVE,
            dlogz=DEFAULT_DLOGZ, resume=False, strict=False, sensitivity=True,
            argv=None, build=None, jobs=1, log=None, loo_refit=False) -> ComparisonOutcome:
    """Fit several models to one compilation and compare them.

    Parameters
    ----------
    comp : Compilation or None
        The data (None only with ``build``, for tests with toy models).
    models : sequence of str
        Profile names; the first fits are written to ``out/<model>/``.
    envelope, spin, priors
        As for :func:`diskfield.build_model` (``priors``: user prior files).
    reference : str
        Model the Bayes factors and ΔELPD refer to.
    evidence : bool
        Run nested sampling (False: ``--no-evidence``; ln Z columns empty).
    seed : int
        One seed for every fit and evidence run (each model's run is seeded identically).
    out : path, optional
        Comparison folder (nothing written when None).
    settings : SamplerSettings
    nlive, dlogz : int, float
        Nested-sampling settings.
    resume : bool
        Resume each model's MCMC and nested-sampling checkpoints.
    strict : bool
        Raise :class:`ConvergenceError` (after writing everything) if a fit is unconverged.
    sensitivity : bool
        Ring-model evidences under half- and double-width ring priors (module docstring).
    build : callable, optional
        ``build(name, extra_prior_files) -> Model`` (default: :func:`diskfield.build_model`
        with the options above). Called in this process only.
    jobs : int or None
        Worker processes for the independent fits and evidence runs (None: the usable
        cores); capped at the number of tasks. Results do not depend on it.
    log : callable, optional
        ``log(str)`` receives one line per finished stage with its wall time [s].
    loo_refit : bool
        After the fits, refit every model once without each body whose Pareto k exceeds
        0.7 (:mod:`diskfield.loorefit`; the refits are tasks like the fits, on ``jobs``
        workers) and use the exact ``elpd_i`` in ``elpd_loo``, its SE, ``p_loo`` and
        ΔELPD; the row's note names the refitted bodies, ``fit.json`` holds the details.
    """
    models = _check_models(models, reference)
    out = Path(out) if out is not None else None
    build = build or _builder(comp, envelope, spin, priors)
    say = log or (lambda line: None)
    built = {name: build(name, []) for name in models}
    ringed = [n for n in models if _is_ringed(built[n])] if evidence and sensitivity else []
    with tempfile.TemporaryDirectory() as scratch:
        folder = (lambda name: out / name) if out is not None else (lambda name: Path(scratch))
        wide = {(n, s): _scaled_model(built[n], n, s, build, folder(n))
                for n in ringed for s in PRIOR_SCALES if s > 1.0}
        narrow = {(n, s): _scaled_model(built[n], n, s, build, folder(n))
                  for n in ringed for s in PRIOR_SCALES if s < 1.0}
    run = _TaskRunner(comp, seed, out, settings, resume, argv, nlive, dlogz, jobs, say)
    fits, evid, scaled = run.fits_and_wide(built, evidence, wide)
    if loo_refit:
        fits = run.loo_refits(fits)
    scaled.update(_narrow_evidence(run, evid, built, narrow))
    sds = _savage_dickey(fits, seed)
    rows = comparison_rows(fits, evid, sds, reference)
    sens = (_sensitivity(fits, evid, scaled, reference) if ringed
            else _no_sensitivity(fits, reference, evidence))
    result = ComparisonOutcome(fits, evid, rows, sens, verdict(rows, sens, reference), sds, out)
    if out is not None:
        _write_comparison(result, comp, seed, argv)
    bad = [r["model"] for r in rows if not r["converged"]]
    if strict and bad:
        raise ConvergenceError(f"unconverged fit(s): {', '.join(bad)} "
                               "(raise --max-steps or drop --strict)")
    return result


def _is_ringed(model) -> bool:
    return any(n.startswith("ring") for n in model.parameter_names)


def _scaled_model(model, name, scale, build, folder):
    """``name`` rebuilt with its ring priors scaled; the prior file is written to ``folder``."""
    path, notes = ring_prior_file(model, scale, folder / f"ring_priors_x{scale:g}.toml")
    return build(name, [path]), notes


class _TaskRunner:
    """The comparison's independent tasks on worker processes, with progress lines."""

    def __init__(self, comp, seed, out, settings, resume, argv, nlive, dlogz, jobs, say):
        self.comp, self.seed, self.out, self.settings = comp, seed, out, settings
        self.resume, self.argv, self.nlive, self.dlogz = resume, argv, nlive, dlogz
        self.jobs, self.say, self.t0 = jobs, say, time.perf_counter()

    def run(self, tasks):
        """``tasks``: list of (label, callable); longest first. Returns the results."""
        jobs = check_jobs(self.jobs, len(tasks))
        labels = [label for label, _ in tasks]

        def done(i, result, seconds):
            self.say(f"[{time.perf_counter() - self.t0:5.0f} s] {labels[i]}: "
                     f"{_describe(result)}; {seconds:.0f} s")
        self._task_settings = self._settings_for(len(tasks))
        return run_tasks([fn for _, fn in tasks], jobs, done)

    def _settings_for(self, n_tasks):
        """Sampler settings for a batch of ``n_tasks`` tasks (no progress bars when they run
        on worker processes)."""
        jobs = check_jobs(self.jobs, n_tasks)
        return self.settings if jobs == 1 else replace(self.settings, progress=False)

    def fits_and_wide(self, built, evidence, wide):
        # expected cost grows with the number of parameters: submit the largest first
        order = sorted(built, key=lambda n: -len(built[n].parameter_names))
        tasks = [(f"{n} fit" + (" and evidence" if evidence else ""),
                  lambda n=n: self._fit(built[n], n, evidence)) for n in order]
        keys = sorted(wide, key=lambda k: -len(wide[k][0].parameter_names))
        tasks += [(f"{n} evidence, ring priors x{s:g}",
                   lambda k=(n, s): self._evidence(wide[k][0], k)) for n, s in keys]
        results = dict(zip([label for label, _ in tasks], self.run(tasks)))
        fits, evid = {}, {}
        for n in built:  # in the order the user gave
            fit, ev = results[tasks[order.index(n)][0]]
            fits[n] = replace(fit, model=built[n])
            if ev is not None:
                evid[n] = ev
        scaled = {k: (results[tasks[len(order) + i][0]], wide[k][1], "nested sampling", None)
                  for i, k in enumerate(keys)}
        return fits, evid, scaled

    def loo_refits(self, fits):
        """Exact leave-one-body-out refits of every flagged body of every model."""
        from .loorefit import bodies_to_refit, finish, planned_refits

        settings = self._settings_for(sum(len(bodies_to_refit(f.criteria))
                                          for f in fits.values()))
        tasks, owner = [], []
        for name, f in fits.items():
            planned = planned_refits(
                name, f, seed=self.seed, settings=settings, resume=self.resume,
                say=lambda line: self.say(f"[{time.perf_counter() - self.t0:5.0f} s] {line}"))
            tasks += planned
            owner += [name] * len(planned)
        results = self.run(tasks) if tasks else []
        return {name: finish(f, [r for o, r in zip(owner, results) if o == name])
                for name, f in fits.items()}

    def _fit(self, model, name, evidence):
        sub = self.out / name if self.out else None
        # with --resume, a model whose fit never started simply starts
        started = sub is not None and (sub / "checkpoint.h5").is_file()
        fit = fit_model(model, comp=self.comp, seed=self.seed, out=sub,
                        settings=self._task_settings, resume=self.resume and started,
                        argv=self.argv)
        ev = None
        if evidence:
            ev = nested_evidence(model, seed=self.seed, nlive=self.nlive, dlogz=self.dlogz,
                                 checkpoint_file=sub / "dynesty.pkl" if sub else None,
                                 resume=self.resume,
                                 progress=self._task_settings.progress and sys.stderr.isatty())
            if sub:
                write_atomic(sub / "evidence.json", json.dumps(ev.as_dict(), indent=2))
        return replace(fit, model=None), ev  # the parent holds the model

    def _evidence(self, model, key):
        name, scale = key
        ckpt = self.out / name / f"dynesty_x{scale:g}.pkl" if self.out else None
        ev = nested_evidence(model, seed=self.seed, nlive=self.nlive, dlogz=self.dlogz,
                             checkpoint_file=ckpt, resume=self.resume)
        return replace(ev, draws=None)


def _describe(result) -> str:
    if hasattr(result, "describe"):  # a LOO refit
        return result.describe()
    if isinstance(result, tuple):
        fit, ev = result
        text = (f"MCMC {fit.run.wall_time_s:.0f} s ({fit.run.n_steps} steps, "
                + ("converged" if fit.run.converged else "NOT converged") + ")")
        return text + (f", evidence {ev.wall_time_s:.0f} s (ln Z = {ev.ln_evidence:.2f} "
                       f"+- {ev.ln_evidence_err:.2f})" if ev is not None else "")
    return f"ln Z = {result.ln_evidence:.2f} +- {result.ln_evidence_err:.2f}"


def _narrow_evidence(run, evid, built, narrow) -> dict:
    """Narrower ring priors: reweight the default run; fresh runs where that is too thin."""
    scaled, fresh = {}, []
    for (name, scale), (model, notes) in narrow.items():
        rw = None
        if _support_inside(model, built[name]) and evid[name].draws is not None:
            rw = reweighted_evidence(evid[name], built[name].log_prior, model.log_prior)
        if rw is not None and rw.ess >= MIN_REWEIGHT_ESS:
            scaled[(name, scale)] = (rw, notes, "reweighted default run", rw.ess)
            run.say(f"[{time.perf_counter() - run.t0:5.0f} s] {name} evidence, ring priors "
                    f"x{scale:g}: reweighted default run, ESS {rw.ess:.0f}, "
                    f"ln Z = {rw.ln_evidence:.2f} +- {rw.ln_evidence_err:.2f}")
        else:
            fresh.append(((name, scale), model, notes, rw.ess if rw is not None else None))
    if fresh:
        results = run.run([(f"{k[0]} evidence, ring priors x{k[1]:g}",
                            lambda k=k, m=m: run._evidence(m, k)) for k, m, _, _ in fresh])
        for (key, _, notes, ess), ev in zip(fresh, results):
            why = ("nested sampling (reweighting ESS "
                   + (f"{ess:.0f} < {MIN_REWEIGHT_ESS:g})" if ess is not None
                      else "not applicable)"))
            scaled[key] = (ev, notes, why, ess)
    return scaled


def _support_inside(new_model, old_model) -> bool:
    """Every parameter's prior support under ``new_model`` lies inside ``old_model``'s."""
    if new_model.parameter_names != old_model.parameter_names:
        return False
    return all(o.support[0] <= n.support[0] and n.support[1] <= o.support[1]
               for n, o in zip(new_model.priors, old_model.priors))


def _builder(comp, envelope, spin, priors):
    from .likelihood import build_model

    user = [] if priors is None else ([priors] if isinstance(priors, (str, Path)) else
                                      list(priors))

    def build(name, extra):
        files = user + list(extra)
        return build_model(comp, profile=name, envelope=envelope, spin=spin,
                           priors=files or None)
    return build


def _savage_dickey(fits, seed) -> dict:
    out = {}
    for name, (nested, param) in NESTING.items():
        if name not in fits or nested not in fits:
            continue
        f = fits[name]
        names = list(f.model.parameter_names)
        if param not in names:
            continue
        i = names.index(param)
        out[name] = (nested, _savage_dickey_one(f, i, param, seed))
    return out


def _savage_dickey_one(fit, i, param, seed):
    """Savage–Dickey at ``param = 0``; under a label ordering the exchangeable copies of
    ``param`` are pooled (the unordered model's symmetrised posterior, :mod:`.evidence`)."""
    ordering = getattr(fit.model, "ordering", None)
    cols = ordering.copies(i) if ordering is not None else (i,)
    draws = fit.run.draws()[..., list(cols)] if len(cols) > 1 else fit.run.draws()[..., i]
    return savage_dickey(draws, fit.model.priors[i], parameter=param, value=0.0, seed=seed,
                         exchangeable=len(cols) > 1)


def comparison_rows(fits, evid, sds, reference) -> list:
    """The rows of ``comparison.csv`` (DESIGN §6 columns first, then extras)."""
    ref = fits[reference]
    rows = []
    for name, f in fits.items():
        c = f.criteria
        diff, diff_se = ((0.0, 0.0) if name == reference else
                         elpd_difference(c.elpd_loo_i, ref.criteria.elpd_loo_i))
        z, z_ref = evid.get(name), evid.get(reference)
        ln_b = z.ln_evidence - z_ref.ln_evidence if z and z_ref else np.nan
        ln_b_err = (0.0 if name == reference else np.hypot(z.ln_evidence_err,
                                                           z_ref.ln_evidence_err)
                    ) if z and z_ref else np.nan
        nested, sd = sds.get(name, ("", None))
        rows.append({
            "model": name, "n_params": c.n_params, "max_log_likelihood": c.max_log_likelihood,
            "aic": c.aic, "bic": c.bic, "waic": c.waic, "elpd_loo": c.elpd_loo,
            "elpd_loo_se": c.elpd_loo_se, "p_loo": c.p_loo, "pareto_k_max": c.pareto_k_max,
            "ln_evidence": z.ln_evidence if z else np.nan,
            "ln_evidence_err": z.ln_evidence_err if z else np.nan, "ln_bayes_factor": ln_b,
            "converged": bool(f.run.converged), "rhat_max": c.rhat_max, "ess_min": c.ess_min,
            "reference_model": reference, "ln_bayes_factor_err": ln_b_err,
            "two_ln_bayes_factor": 2 * ln_b, "kass_raftery": kass_raftery(2 * ln_b),
            "elpd_diff": diff, "elpd_diff_se": diff_se, "waic_se": c.waic_se,
            "p_waic": c.p_waic, "n_bad_pareto_k": c.n_bad_k,
            "pareto_k_threshold": c.pareto_k_threshold, "bic_n_records": c.n_records,
            "chain_over_tau": f.run.chain_over_tau, "savage_dickey_vs": nested,
            "savage_dickey_ln_bf": sd.ln_bayes_factor if sd else np.nan,
            "savage_dickey_ln_bf_err": sd.ln_bayes_factor_err if sd else np.nan,
            "note": _row_note(f, sd)})
    return rows


def _row_note(f, sd) -> str:
    notes = [] if f.run.converged else ["NOT CONVERGED: " + "; ".join(f.run.flags)]
    refit = getattr(f.criteria, "loo_refit", None)
    if refit:  # --loo-refit: which bodies were refitted (or that none needed it)
        notes.append(refit["note"])
    elif f.criteria.n_bad_k:
        notes.append(f"Pareto k > 0.7 for {', '.join(f.criteria.bad_k_bodies)}")
    if sd is not None and not sd.applicable:
        notes.append(f"Savage-Dickey not applicable: {sd.reason}")
    return " | ".join(notes)


def _sensitivity(fits, evid, scaled, reference) -> list:
    rows = []
    z_ref = evid[reference]
    for name, f in fits.items():
        if not _is_ringed(f.model):
            continue
        for scale in PRIOR_SCALES:
            if scale == 1.0:
                z, notes, method, ess = evid[name], ["default ring priors"], "default run", None
            else:
                z, notes, method, ess = scaled[(name, scale)]
            how = _method_note(method, ess)
            rows.append({"model": name, "ring_prior_scale": scale,
                         "ln_bayes_factor": z.ln_evidence - z_ref.ln_evidence,
                         "ln_bayes_factor_err": float(np.hypot(z.ln_evidence_err,
                                                               z_ref.ln_evidence_err)),
                         "method": method,
                         "reweight_ess": float(ess) if ess is not None else np.nan,
                         "note": "; ".join([how] * bool(how) + list(notes))})
    return rows


def _method_note(method, ess) -> str:
    if method == "default run":
        return ""
    if method == "reweighted default run":
        return ("importance reweighting of the default run's posterior points "
                f"(ESS {ess:.0f} >= {MIN_REWEIGHT_ESS:g})")
    return "fresh nested sampling run" if method == "nested sampling" else method


def _no_sensitivity(fits, reference, evidence) -> list:
    why = ("evidence not computed (--no-evidence)" if not evidence
           else "prior sensitivity not requested")
    return [{"model": name, "ring_prior_scale": s, "ln_bayes_factor": np.nan,
             "ln_bayes_factor_err": np.nan, "method": "", "reweight_ess": np.nan, "note": why}
            for name, f in fits.items()
            if _is_ringed(f.model) for s in PRIOR_SCALES]


# ---------------------------------------------------------------- verdict

def _preference(value, err, threshold, model, reference):
    """Which model a difference (model − reference) points to, or None when undecided."""
    if not np.isfinite(value) or abs(value) <= threshold * (err if np.isfinite(err) else 0):
        return None
    return model if value > 0 else reference


def _model_verdict(row, sens_rows, reference, loo_label="PSIS-LOO") -> dict:
    name, ln_b = row["model"], row["ln_bayes_factor"]
    two, two_err = 2 * ln_b, 2 * row["ln_bayes_factor_err"]
    ev_pref = None
    if np.isfinite(two) and abs(two) >= 2.0:
        ev_pref = name if two > 0 else reference
    loo_pref = _preference(row["elpd_diff"], row["elpd_diff_se"], 2.0, name, reference)
    scaled = [2 * s["ln_bayes_factor"] for s in sens_rows
              if s["model"] == name and np.isfinite(s["ln_bayes_factor"])]
    robust = bool(scaled) and all(np.sign(x) == np.sign(two) and abs(x) > 6 for x in scaled)
    decisive = bool(np.isfinite(two) and abs(two) - 2 * two_err > 6.0 and robust
                    and row["converged"])
    return {"two_ln_bayes_factor": two, "two_ln_bayes_factor_err": two_err,
            "category": kass_raftery(two), "evidence_favours": ev_pref,
            "delta_elpd": row["elpd_diff"], "delta_elpd_se": row["elpd_diff_se"],
            "loo_favours": loo_pref, "agree": ev_pref == loo_pref,
            "robust_to_prior_scale": robust, "decisive": decisive,
            "converged": bool(row["converged"]),
            "sentence": _model_sentence(name, reference, two, two_err, ev_pref, loo_pref,
                                        row, decisive, loo_label)}


def _model_sentence(name, reference, two, two_err, ev_pref, loo_pref, row, decisive,
                    loo_label="PSIS-LOO") -> str:
    if not np.isfinite(two):
        ev = "the evidence was not computed"
    elif ev_pref is None:
        ev = (f"the evidence cannot decide between {name} and {reference} "
              f"(2 ln B = {two:.1f} ± {two_err:.1f}, not worth more than a bare mention)")
    else:
        ev = (f"the evidence favours {ev_pref} (2 ln B = {two:.1f} ± {two_err:.1f}, "
              f"{kass_raftery(two)} on the Kass & Raftery scale)")
    loo = (f"{loo_label} cannot tell them apart (ΔELPD = {row['elpd_diff']:.1f} ± "
           f"{row['elpd_diff_se']:.1f})" if loo_pref is None else
           f"{loo_label} prefers {loo_pref} (ΔELPD = {row['elpd_diff']:.1f} ± "
           f"{row['elpd_diff_se']:.1f})")
    both = "they agree" if ev_pref == loo_pref else "they DISAGREE"
    tail = "" if row["converged"] else f"; the {name} fit did NOT converge, so this is provisional"
    strength = " This is decisive." if decisive else ""
    return f"{name} vs {reference}: {ev}; {loo}; {both}{tail}.{strength}"


def verdict(rows, sens, reference) -> dict:
    """Machine-readable verdict (``verdict.json``) from the comparison rows.

    Returns
    -------
    dict
        ``reference_model``, ``models`` (per model: ``two_ln_bayes_factor`` and its error,
        ``category``, ``evidence_favours``, ``delta_elpd`` ± ``delta_elpd_se``,
        ``loo_favours``, ``agree``, ``robust_to_prior_scale``, ``decisive``, ``sentence``),
        ``ring_demanded`` (bool), ``unconverged`` (list) and the headline ``sentence``.
    """
    # with --loo-refit, flagged bodies' elpd_i are exact refits, not PSIS estimates
    refitted = any(str(r.get("note", "")).find("exact refit for bodies") >= 0 for r in rows)
    label = "LOO (PSIS, exact refits for the flagged bodies)" if refitted else "PSIS-LOO"
    per = {r["model"]: _model_verdict(r, sens, reference, label) for r in rows
           if r["model"] != reference}
    unconverged = [r["model"] for r in rows if not r["converged"]]
    ringed = {m: v for m, v in per.items() if m.startswith("ring") or m in NESTING}
    demanded = any(v["decisive"] and v["evidence_favours"] == m for m, v in ringed.items())
    return {"reference_model": reference, "models": per, "ring_demanded": demanded,
            "unconverged": unconverged, "sentence": _headline(per, ringed, demanded,
                                                              reference, unconverged)}


def _headline(per, ringed, demanded, reference, unconverged) -> str:
    pool = ringed or per
    best = max(pool, key=lambda m: np.nan_to_num(pool[m]["two_ln_bayes_factor"], nan=-np.inf))
    v = pool[best]
    if demanded:
        text = (f"The data demand a ring: {best} is favoured over {reference} with "
                f"2 ln B = {v['two_ln_bayes_factor']:.1f} ± {v['two_ln_bayes_factor_err']:.1f} "
                f"({v['category']}), robust to halving and doubling the ring priors.")
    elif v["evidence_favours"] == best:
        text = (f"The data lean towards {best} over {reference} "
                f"(2 ln B = {v['two_ln_bayes_factor']:.1f}, {v['category']}), but not "
                "decisively: they do not demand a ring.")
    elif v["evidence_favours"] == reference:
        text = (f"The data favour the {reference} disk over every ringed model; they do not "
                "demand a ring.")
    elif not np.isfinite(v["two_ln_bayes_factor"]):
        text = ("No evidence was computed; the information criteria alone cannot say whether "
                "the data demand a ring.")
    else:
        text = (f"The data cannot decide between a {reference} disk and a ring "
                f"(2 ln B = {v['two_ln_bayes_factor']:.1f} for {best}): they do not demand "
                "a ring, nor rule one out.")
    if any(not x["agree"] for x in per.values()):
        text += " Evidence and PSIS-LOO disagree for " + ", ".join(
            m for m, x in per.items() if not x["agree"]) + "."
    if unconverged:
        text += f" Unconverged fits (provisional): {', '.join(unconverged)}."
    return text


def verdict_markdown(result_verdict, rows, sens, sds) -> str:
    """``verdict.md``: the verdict in plain words, with the sensitivity table."""
    v = result_verdict
    lines = ["# Does the compilation demand a ring?", "", v["sentence"], "",
             "## Model by model", ""]
    lines += [f"- {m['sentence']}" for m in v["models"].values()]
    lines += ["", "## Cross-check: Savage–Dickey density ratio", ""]
    for name, (nested, sd) in sds.items():
        ln_b = next(r["ln_bayes_factor"] for r in rows if r["model"] == name)
        ref_ln_b = next((r["ln_bayes_factor"] for r in rows if r["model"] == nested), np.nan)
        lines.append(f"- {name} vs {nested} at {sd.parameter} = 0: " + (
            f"ln B = {sd.ln_bayes_factor:.2f} ± {sd.ln_bayes_factor_err:.2f} "
            f"(nested sampling: {ln_b - ref_ln_b:.2f})" if sd.applicable
            else f"not applicable — {sd.reason}"))
    lines += ["", "## Prior sensitivity (ln B against the reference model)", "",
              "| model | ring prior width × | ln B | ± | note |", "|---|---|---|---|---|"]
    lines += [f"| {s['model']} | {s['ring_prior_scale']:g} | {s['ln_bayes_factor']:.2f} | "
              f"{s['ln_bayes_factor_err']:.2f} | {s['note']} |" for s in sens]
    lines += ["", "## How to read this", "",
              "2 ln B on the Kass & Raftery (1995, JASA 90, 773) scale: below 2 not worth more "
              "than a bare mention, 2–6 positive, 6–10 strong, above 10 very strong. "
              "ΔELPD is the PSIS-LOO difference leaving out one parent body at a time "
              "(Vehtari, Gelman & Gabry 2017); |ΔELPD| below twice its SE means LOO cannot "
              "tell the models apart. A ring is called demanded only when 2 ln B exceeds 6 "
              "beyond twice its error, for every ring-prior width tried, and the fit converged. "
              "With wide distance priors and an unknown spin per body an undecided answer is "
              "the expected, honest outcome.", ""]
    return "\n".join(lines)


def _write_comparison(result, comp, seed, argv) -> None:
    out = result.out
    cols = COMPARISON_COLUMNS + _EXTRA_COLUMNS
    write_atomic(out / "comparison.csv", format_rows(result.rows, cols))
    table = tables.comparison_table(result.rows, reference=result.verdict["reference_model"])
    write_atomic(out / "comparison.md", tables.to_markdown(table))
    write_atomic(out / "comparison.tex", tables.to_latex(table, "tabular"))
    for name, f in result.fits.items():
        for stem in ("posterior_summary", "field_profile"):
            src = out / name / f"{stem}_{name}.csv"
            write_atomic(out / src.name, src.read_bytes())
    write_atomic(out / "prior_sensitivity.csv", format_rows(result.sensitivity,
                                                            SENSITIVITY_COLUMNS))
    write_atomic(out / "verdict.json", json.dumps(_jsonable(result.verdict), indent=2) + "\n")
    write_atomic(out / "verdict.md", verdict_markdown(result.verdict, result.rows,
                                                      result.sensitivity, result.savage_dickey))
    first = next(iter(result.fits.values())).model
    write_inputs(out, comp, first.config.get("prior_files", ()))
    write_manifest(out, data_hash=getattr(comp, "data_hash", ""),
                   prior_files=first.config.get("prior_files", ()), seed=seed, argv=argv)


def _jsonable(obj):
    if isinstance(obj, dict):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj
