"""Campaigns of many fits on Dask: simulation-based calibration and forecasts.

Python API (the ``calibrate`` and ``forecast`` commands are built on it)::

    from diskfield.campaigns import (make_spec, DiskSBCProblem, DiskVerdictProblem,
                                     run_calibration)
    spec = make_spec("compilation.ecsv", "ring")
    report, summary, paths = run_calibration(
        DiskSBCProblem(spec), "calib-ring", n_sims=200, seed=1,
        verdict_problem=DiskVerdictProblem(spec.with_profile("smooth"), spec), n_verdict=200,
        workers=2)                      # or scheduler="tcp://host:8786", or client=...

Modules: ``store`` (per-task result files, resume), ``runner`` (Dask execution, seeds,
retries), ``calibration`` (SBC tasks and statistics), ``calibration_report``, ``disk``
(problems over the disk-field model), ``candidates`` and ``forecast`` (+ ``forecast_report``),
``orchestrate`` (whole campaigns), ``toy`` (an analytic reference problem).
"""
from .calibration import SBCSettings
from .candidates import Candidate, read_candidates
from .disk import DiskSBCProblem, DiskSpec, DiskVerdictProblem, EvidenceSettings, make_spec
from .orchestrate import CampaignError, run_calibration, run_forecast
from .runner import open_client, task_seed
from .store import ResultStore
from .toy import ConjugateGaussian

__all__ = [
    "SBCSettings",
    "Candidate",
    "read_candidates",
    "DiskSpec",
    "DiskSBCProblem",
    "DiskVerdictProblem",
    "EvidenceSettings",
    "make_spec",
    "CampaignError",
    "run_calibration",
    "run_forecast",
    "open_client",
    "task_seed",
    "ResultStore",
    "ConjugateGaussian",
]
