"""Run a whole campaign: open the store, run the missing tasks on Dask, summarise, write files.

The two entry points here are what ``diskfield calibrate`` and ``diskfield forecast`` (and
notebook users) call; problems are plain picklable objects (see
:mod:`diskfield.campaigns.calibration` for the protocol, :mod:`diskfield.campaigns.toy` for an
analytic example, :mod:`diskfield.campaigns.disk` for the disk-field model).
"""
from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json

from ..errors import DiskfieldError

from .calibration import SBCSettings, calibration_tasks
from .calibration_report import summarise_calibration, write_calibration_outputs
from .runner import RunReport, open_client, run_tasks
from .store import ResultStore, to_jsonable

__all__ = ["fingerprint", "run_campaign", "run_calibration", "run_forecast", "CampaignError"]


class CampaignError(DiskfieldError, RuntimeError):
    """A campaign stage that cannot continue (e.g. every fit of the current data failed)."""


def _describe(obj):
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {"type": type(obj).__name__, **{f.name: _describe(getattr(obj, f.name))
                                               for f in dataclasses.fields(obj)}}
    if isinstance(obj, (list, tuple)):
        return [_describe(v) for v in obj]
    if isinstance(obj, dict):
        return {str(k): _describe(v) for k, v in obj.items()}
    return to_jsonable(obj) if isinstance(obj, (int, float, str, bool, type(None))) else repr(obj)


def fingerprint(*parts) -> str:
    """SHA-256 of a canonical JSON description of dataclasses and plain values.

    Two campaigns with the same fingerprint run the same tasks with the same results.
    """
    text = json.dumps(_describe(parts), sort_keys=True, default=repr)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def run_campaign(tasks, store: ResultStore, *, client=None, scheduler=None, workers=None,
                 retries: int = 2, progress: bool = True, desc: str = "campaign") -> RunReport:
    """Run ``tasks`` into ``store`` on ``client`` or on a cluster opened for the purpose.

    Parameters
    ----------
    tasks : list of Task
    store : ResultStore
    client : distributed.Client, optional
        Use this client (and leave it open). Otherwise one is opened with
        :func:`~diskfield.campaigns.runner.open_client` (``scheduler``, ``workers``).
    retries : int
        Extra attempts per failing task.
    progress : bool
        tqdm progress bar on stderr.
    """
    if client is not None:
        return run_tasks(tasks, store, client, retries=retries, progress=progress, desc=desc)
    if not [t for t in tasks if t.task_id not in store.finished_ids()]:
        return RunReport(n_total=len(tasks), n_skipped=len(tasks))
    with open_client(scheduler, workers) as own:
        return run_tasks(tasks, store, own, retries=retries, progress=progress, desc=desc)


def run_calibration(problem, out_dir, *, n_sims: int, seed: int,
                    settings: SBCSettings = SBCSettings(), verdict_problem=None,
                    n_verdict: int = 0, threshold: float = 6.0, model_label: str = "",
                    resume: bool = False, **run_kwargs):
    """Simulation-based calibration (and verdict rates) of ``problem``; writes its outputs.

    Parameters
    ----------
    problem : SBC problem
        See :func:`~diskfield.campaigns.calibration.sbc_task`.
    out_dir : path
        Campaign folder (results stream into ``tasks/``; tables and figures at top level).
    n_sims : int
        SBC simulations.
    seed : int
        Campaign seed.
    settings : SBCSettings
    verdict_problem : verdict problem, optional
        See :func:`~diskfield.campaigns.calibration.verdict_task`.
    n_verdict : int
        Simulations from each of the null and the alternative model.
    threshold : float
        2 ln B above which the alternative is decisively preferred.
    model_label : str
        Model name shown in the report.
    resume : bool
        Continue an interrupted campaign in ``out_dir``.
    **run_kwargs
        ``client``, ``scheduler``, ``workers``, ``retries``, ``progress`` (see
        :func:`run_campaign`).

    Returns
    -------
    (RunReport, CalibrationSummary, list of Path)
    """
    fp = fingerprint(problem, settings, verdict_problem)
    store = ResultStore(out_dir, "calibration", fp, seed, resume=resume)
    tasks = calibration_tasks(problem, n_sims, seed, settings, verdict_problem, n_verdict)
    report = run_campaign(tasks, store, desc="calibrate", **run_kwargs)
    wanted = {t.task_id for t in tasks}
    results = [r for r in store.results() if r["task_id"] in wanted]
    failures = [f for f in store.failures() if f["task_id"] in wanted]
    names = tuple(verdict_problem.model_names) if verdict_problem is not None else None
    summary = summarise_calibration(results, failures, settings.n_draws, threshold, names, seed)
    paths = write_calibration_outputs(summary, out_dir, model=model_label or "model",
                                      threshold=threshold, n_sims_requested=n_sims)
    return report, summary, paths


def run_forecast(null, alternative, candidates, out_dir, *, n_draws: int, seed: int,
                 sampler, evidence, n_keep: int = 200, threshold: float = 6.0,
                 resume: bool = False, client=None, scheduler=None, workers=None,
                 retries: int = 2, progress: bool = True):
    """Forecast the verdict after each candidate measurement; writes the forecast outputs.

    Parameters
    ----------
    null, alternative : DiskSpec
        The compared models (e.g. smooth and ring) on the current compilation.
    candidates : sequence of Candidate
    out_dir : path
    n_draws : int
        Preposterior draws (simulate + refit) per candidate.
    seed : int
    sampler : SamplerSettings
        emcee settings of every fit.
    evidence : EvidenceSettings
        Nested-sampling settings of every evidence.
    n_keep : int
        Posterior draws of the current fits kept as the predictive bank.
    threshold : float
        |2 ln B| of a decisive verdict.
    resume : bool
    client, scheduler, workers, retries, progress
        Dask execution (see :func:`run_campaign`).

    Returns
    -------
    (list of RunReport, summary dict, list of Path)
    """
    from .forecast import context_from_results, stage_one_tasks, stage_two_tasks
    from .forecast_report import summarise_forecast, write_forecast_outputs

    fp = fingerprint(null, alternative, tuple(candidates), sampler, evidence, n_keep)
    store = ResultStore(out_dir, "forecast", fp, seed, resume=resume)
    stage1 = stage_one_tasks(null, alternative, sampler, evidence, n_keep, seed)
    with contextlib.ExitStack() as stack:
        if client is None:
            client = stack.enter_context(open_client(scheduler, workers))
        kw = {"client": client, "retries": retries, "progress": progress}
        reports = [run_campaign(stage1, store, desc="forecast-current", **kw)]
        by_id = {r["task_id"]: r["result"] for r in store.results()}
        missing = [t.task_id for t in stage1 if t.task_id not in by_id]
        if missing:
            raise CampaignError(f"{out_dir}: fits of the current data failed "
                                f"({', '.join(missing)}); see failed/ for the errors")
        ctx = context_from_results(null, alternative, by_id, sampler, evidence)
        stage2 = stage_two_tasks(ctx, candidates, n_draws, seed)
        reports.append(run_campaign(stage2, store, desc="forecast", **kw))
    wanted = {t.task_id for t in stage1 + stage2}
    results = [r for r in store.results() if r["task_id"] in wanted]
    failures = [f for f in store.failures() if f["task_id"] in wanted]
    summary = summarise_forecast(results, candidates, threshold, ctx)
    paths = write_forecast_outputs(summary, out_dir, threshold=threshold, failures=failures)
    return reports, summary, paths
