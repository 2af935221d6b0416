"""Fit folders: run one fit and write it in the saved-run schema; load saved fits and comparisons.

A fit folder (schema version "1") holds ``posterior.nc`` (ArviZ InferenceData, see
:mod:`diskfield.azadapter`), ``fit.json``, ``posterior_summary_<model>.csv``,
``field_profile_<model>.csv``, ``compilation.ecsv`` (the input as read),
``priors_used/NN_<name>.toml`` (every prior file read, in order), ``checkpoint.h5``
(resumable sampler state) and ``manifest.json``; a comparison's model folders also hold
``evidence.json``. Every file is written atomically.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__, azadapter
from .criteria import compute_criteria
from .errors import CheckpointError, ConvergenceError
from .manifest import atomic_path, sha256_file, utc_now, write_atomic, write_manifest
from .sampling import SamplerSettings, run_sampler
from .summaries import (PROFILE_COLUMNS, SUMMARY_COLUMNS, field_profile, posterior_summary,
                        write_csv)

__all__ = ["SCHEMA_VERSION", "DEFAULT_SEED", "FitOutcome", "fit", "fit_model", "SavedFit",
           "SavedComparison", "load_fit", "load_comparison"]

SCHEMA_VERSION = "1"
#: Seed used when none is given (a convention; it is recorded in every output).
DEFAULT_SEED = 20240101


@dataclass
class FitOutcome:
    """What :func:`fit_model` produced (also written to the fit folder).

    Attributes
    ----------
    model : Model
    run : diskfield.sampling.SamplerRun
    idata : arviz.InferenceData
    criteria : diskfield.criteria.Criteria
    fit_json : dict
        The content of ``fit.json``.
    out : pathlib.Path or None
    """

    model: object
    run: object
    idata: object
    criteria: object
    fit_json: dict
    out: Path | None = None


def fit(comp, profile: str = "ring", *, envelope: str = "steady", spin: str = "body",
        priors=None, seed: int = DEFAULT_SEED, out=None,
        settings: SamplerSettings = SamplerSettings(), resume: bool = False,
        strict: bool = False, argv=None, loo_refit: bool = False, log=None) -> FitOutcome:
    """Build the model of ``comp`` and fit it (see :func:`fit_model`).

    Parameters
    ----------
    comp : diskfield.records.Compilation
    profile, envelope, spin : str
        As for :func:`diskfield.build_model`.
    priors : path, list of paths, PriorSet or None
        User prior files read on top of the shipped ones.
    seed, out, settings, resume, strict, argv
        As for :func:`fit_model`.
    loo_refit : bool
        Replace the PSIS-LOO estimate of every body with Pareto k > 0.7 by an exact
        leave-one-body-out refit (:mod:`diskfield.loorefit`); ``fit.json`` is rewritten.
    log : callable, optional
        ``log(str)`` receives one line per refit.
    """
    from .likelihood import build_model

    model = build_model(comp, profile=profile, envelope=envelope, spin=spin, priors=priors)
    outcome = fit_model(model, comp=comp, seed=seed, out=out, settings=settings,
                        resume=resume, strict=strict and not loo_refit, argv=argv)
    if loo_refit:
        from .loorefit import loo_refit as refit

        outcome = refit(outcome, seed=seed, settings=settings, resume=resume, log=log)
        if strict and not outcome.run.converged:
            raise ConvergenceError(f"model {profile!r} did not converge: "
                                   + "; ".join(outcome.run.flags)
                                   + " (raise --max-steps or drop --strict)")
    return outcome


def fit_model(model, *, comp=None, seed: int = DEFAULT_SEED, out=None,
              settings: SamplerSettings = SamplerSettings(), resume: bool = False,
              strict: bool = False, argv=None) -> FitOutcome:
    """Sample a model's posterior, compute its criteria and write a fit folder.

    Parameters
    ----------
    model : Model
        From :func:`diskfield.build_model` (or any object with the same protocol).
    comp : Compilation, optional
        The data (for ``observed_data``, ``compilation.ecsv`` and the data hash).
    seed : int
    out : path, optional
        Fit folder; nothing is written when None (and no checkpoint is kept).
    settings : SamplerSettings
    resume : bool
        Continue from ``out/checkpoint.h5``.
    strict : bool
        Raise :class:`ConvergenceError` (after writing the folder) when unconverged.
    argv : list of str, optional
        Command line for the manifest.
    """
    out = Path(out) if out is not None else None
    if resume and out is None:
        raise CheckpointError("resume needs an output folder holding checkpoint.h5")
    run = run_sampler(model, seed=seed, settings=settings,
                      checkpoint=out / "checkpoint.h5" if out else None, resume=resume,
                      fingerprint=_fingerprint(model, comp))
    idata = azadapter.make_inference_data(
        run.draws(), model.parameter_names, run.draws_pointwise(), lp=run.draws_log_prob(),
        body_names=model.body_names, observed=_observed(comp),
        attrs=_attrs(model, comp, run, seed))
    crit = compute_criteria(idata, max_log_likelihood=run.optimum_log_likelihood,
                            n_params=len(model.parameter_names), n_records=model.n_records,
                            body_names=model.body_names)
    fit_json = _fit_json(model, run, crit, seed)
    outcome = FitOutcome(model, run, idata, crit, fit_json, out)
    if out is not None:
        _write_fit_folder(outcome, comp, seed, argv)
    if strict and not run.converged:
        raise ConvergenceError(f"model {model.config['profile']!r} did not converge: "
                               + "; ".join(run.flags) + " (raise --max-steps or drop --strict)")
    return outcome


def _fingerprint(model, comp) -> dict:
    cfg = model.config
    digest = hashlib.sha256()
    for path in cfg.get("prior_files", ()):
        digest.update(Path(path).read_bytes() if Path(path).is_file() else str(path).encode())
    fp = {"data_hash": getattr(comp, "data_hash", ""), "profile": cfg.get("profile", ""),
          "envelope": cfg.get("envelope", ""), "spin": cfg.get("spin", ""),
          "priors_hash": digest.hexdigest()}
    if cfg.get("label_ordering"):  # a checkpoint sampled without the ordering is refused
        fp["label_ordering"] = cfg["label_ordering"]
    return fp


def _observed(comp):
    if comp is None:
        return None
    rec = comp.records
    return {"record": rec.record, "ln_value": rec.ln_value, "ln_err": rec.ln_err,
            "is_limit": rec.is_limit, "body_index": rec.body_index}


def _attrs(model, comp, run, seed) -> dict:
    cfg = model.config
    return {"schema_version": SCHEMA_VERSION, "diskfield_version": __version__,
            "profile": cfg.get("profile", ""), "envelope": cfg.get("envelope", ""),
            "spin": cfg.get("spin", ""), "seed": int(seed),
            "label_ordering": cfg.get("label_ordering", ""),
            "label_ordering_applied": int(_ordering_applied(model)),
            "data_hash": getattr(comp, "data_hash", ""), "converged": int(run.converged),
            "n_steps": int(run.n_steps), "tau_max": float(np.max(run.tau)),
            "created": utc_now()}


def _ordering_applied(model) -> bool:
    ordering = getattr(model, "ordering", None)
    return bool(ordering is not None and ordering.applied)


def _fit_json(model, run, crit, seed) -> dict:
    cfg = model.config
    names = list(model.parameter_names)
    return {
        "schema_version": SCHEMA_VERSION, "model": cfg.get("profile", ""),
        "profile": cfg.get("profile", ""), "envelope": cfg.get("envelope", ""),
        "spin": cfg.get("spin", ""), "parameter_names": names,
        "label_ordering": {"applied": _ordering_applied(model),
                           "note": cfg.get("label_ordering", "")},
        "fixed": {k: float(v) for k, v in getattr(model, "fixed", {}).items()},
        "converged": bool(run.converged), "flags": list(run.flags) + _k_flags(crit),
        "n_walkers": int(run.n_walkers), "n_steps": int(run.n_steps),
        "burn_in": int(run.burn_in), "thin": int(run.thin),
        "tau": {n: float(t) for n, t in zip(names, run.tau)},
        "chain_over_tau": run.chain_over_tau,
        "acceptance_fraction": float(np.mean(run.acceptance_fraction)),
        "max_log_likelihood": float(run.optimum_log_likelihood),
        "theta_max_log_likelihood": [float(x) for x in run.optimum_theta],
        "rhat_max": crit.rhat_max, "ess_min": crit.ess_min, "seed": int(seed),
        "wall_time_s": float(run.wall_time_s), "criteria": _criteria_json(crit, model),
    }


def _k_flags(crit) -> list:
    if not crit.n_bad_k:
        return []
    return [f"PSIS-LOO unreliable for {crit.n_bad_k} bod{'y' if crit.n_bad_k == 1 else 'ies'} "
            f"(Pareto k > 0.7): {', '.join(crit.bad_k_bodies)}"]


def _criteria_json(crit, model) -> dict:
    d = crit.as_dict()
    d["pareto_k"] = dict(zip(model.body_names, d["pareto_k"]))
    d["elpd_loo_i"] = dict(zip(model.body_names, d["elpd_loo_i"]))
    d["n_definition"] = "BIC's n is the number of included records"
    return d


def _write_fit_folder(outcome, comp, seed, argv) -> None:
    out, model, name = outcome.out, outcome.model, outcome.fit_json["model"]
    azadapter.save_netcdf(outcome.idata, out / "posterior.nc")
    write_atomic(out / "fit.json", json.dumps(outcome.fit_json, indent=2) + "\n")
    rhat_ess = {n: (outcome.criteria.rhat[n], outcome.criteria.ess_bulk[n])
                for n in model.parameter_names}
    write_csv(out / f"posterior_summary_{name}.csv",
              posterior_summary(outcome.run.draws(), model.parameter_names, rhat_ess,
                                converged=outcome.run.converged),
              SUMMARY_COLUMNS + ("converged",))
    write_csv(out / f"field_profile_{name}.csv", field_profile(model, outcome.run.draws(),
                                                               seed=seed), PROFILE_COLUMNS)
    write_inputs(out, comp, model.config.get("prior_files", ()))
    write_manifest(out, data_hash=getattr(comp, "data_hash", ""),
                   prior_files=model.config.get("prior_files", ()), seed=seed, argv=argv)


def write_inputs(out, comp, prior_files) -> None:
    """Copy the compilation (as ECSV) and every prior file read into ``out``."""
    out = Path(out)
    if comp is not None:
        from .records import write_compilation
        with atomic_path(out / "compilation.ecsv") as tmp:
            write_compilation(comp, tmp, format="ecsv")
    for i, src in enumerate(prior_files):
        src = Path(src)
        if src.is_file():
            with atomic_path(out / "priors_used" / f"{i:02d}_{src.name}") as tmp:
                shutil.copyfile(src, tmp)


# ---------------------------------------------------------------- loaders

@dataclass
class SavedFit:
    """A fit folder read back (everything loaded eagerly; no open files).

    Attributes
    ----------
    path : pathlib.Path
    idata : arviz.InferenceData
    fit : dict
        ``fit.json``.
    evidence : dict or None
        ``evidence.json`` when present.
    manifest : dict or None
    """

    path: Path
    idata: object
    fit: dict
    evidence: dict | None = None
    manifest: dict | None = None

    @property
    def name(self) -> str:
        return self.fit.get("model", self.path.name)

    @property
    def prior_files(self) -> list:
        """Copies of the prior files used, in the order they were read."""
        return sorted((self.path / "priors_used").glob("*.toml"))

    def model(self):
        """Rebuild the Model from ``compilation.ecsv``, ``priors_used/`` and ``fit.json``."""
        from .likelihood import build_model
        from .priorset import load_priors
        from .records import read_compilation

        comp = read_compilation(self.path / "compilation.ecsv")
        priors = load_priors(self.prior_files)
        return build_model(comp, profile=self.fit["profile"], envelope=self.fit["envelope"],
                           spin=self.fit["spin"], priors=priors)


@dataclass
class SavedComparison:
    """A comparison folder read back.

    Attributes
    ----------
    path : pathlib.Path
    fits : dict
        Model name -> :class:`SavedFit`, in comparison-table order.
    table : list of dict
        ``comparison.csv`` rows (values as strings, as written).
    verdict : dict
        ``verdict.json``.
    prior_sensitivity : list of dict
    manifest : dict or None
    """

    path: Path
    fits: dict
    table: list
    verdict: dict
    prior_sensitivity: list = field(default_factory=list)
    manifest: dict | None = None


def _read_json(path):
    return json.loads(Path(path).read_text()) if Path(path).is_file() else None


def _read_csv(path) -> list:
    import csv
    if not Path(path).is_file():
        return []
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def load_fit(path) -> SavedFit:
    """Read a fit folder written by ``diskfield fit`` (or a model folder of ``compare``).

    Raises
    ------
    CheckpointError
        The folder lacks ``fit.json`` or ``posterior.nc`` (names what is missing).
    """
    path = Path(path)
    missing = [f for f in ("fit.json", "posterior.nc") if not (path / f).is_file()]
    if missing:
        raise CheckpointError(f"{path}: not a diskfield fit folder (missing "
                              f"{', '.join(missing)}); run 'diskfield fit' first")
    return SavedFit(path, azadapter.load_netcdf(path / "posterior.nc"),
                    _read_json(path / "fit.json"), _read_json(path / "evidence.json"),
                    _read_json(path / "manifest.json"))


def load_comparison(path) -> SavedComparison:
    """Read a comparison folder written by ``diskfield compare``.

    Raises
    ------
    CheckpointError
        The folder lacks ``comparison.csv`` or a model folder it lists.
    """
    path = Path(path)
    if not (path / "comparison.csv").is_file():
        raise CheckpointError(f"{path}: not a diskfield comparison folder (missing "
                              "comparison.csv); run 'diskfield compare' first")
    table = _read_csv(path / "comparison.csv")
    fits = {row["model"]: load_fit(path / row["model"]) for row in table}
    return SavedComparison(path, fits, table, _read_json(path / "verdict.json") or {},
                           _read_csv(path / "prior_sensitivity.csv"),
                           _read_json(path / "manifest.json"))


def file_sha256(path) -> str:
    """SHA-256 of a file (re-exported for reports)."""
    return sha256_file(path)
