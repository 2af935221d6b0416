"""``diskfield calibrate``: simulation-based calibration of a model on your own data design.

Examples::

    diskfield calibrate compilation.ecsv --model ring --sims 200
    diskfield calibrate compilation.ecsv --model ring --sims 1000 --scheduler tcp://head:8786
    diskfield calibrate compilation.ecsv --model ring --sims 200 --resume     # after a kill

Parameters are drawn from the prior, data are simulated through the full recording model on
the compilation's own design (bodies, reservoirs, ages, methods, uncertainties) and each
simulated compilation is fitted; ranks of the true values give rank histograms, a uniformity
test per parameter and credible-interval coverage. When ``--model`` differs from
``--compare-to`` (default ``smooth``), data simulated from each of the two models are compared
by 2 ln B, giving the false-positive rate on smooth disks and the detection rate on ringed
ones at ``--threshold``. Tasks run on Dask (a local cluster by default); results stream into
``--out`` so ``--resume`` redoes only unfinished simulations.
"""
from __future__ import annotations

from pathlib import Path

from ..errors import OptionError

__all__ = ["NAME", "HELP", "add_arguments", "run", "add_campaign_options", "campaign_run_kwargs",
           "sampler_from_args", "evidence_from_args", "write_campaign_manifest"]

NAME = "calibrate"
HELP = "simulation-based calibration and verdict rates of a model on the compilation's design"

#: Kass & Raftery (1995, JASA 90, 773): 2 ln B > 6 is "strong" evidence.
DEFAULT_THRESHOLD = 6.0


def add_campaign_options(parser) -> None:
    """Options shared by the campaign commands (model set-up, fit cost, Dask execution)."""
    parser.add_argument("file", metavar="FILE", help="compilation file (.ecsv or .csv)")
    parser.add_argument("--envelope", default="steady", help="temporal envelope (default: steady)")
    parser.add_argument("--spin", default="body",
                        help="spin projection: body (default), record, none")
    parser.add_argument("--priors", action="append", default=[], metavar="FILE",
                        help="prior TOML file read after the shipped ones (repeatable)")
    parser.add_argument("--threshold", type=float, default=DEFAULT_THRESHOLD,
                        help="2 ln B above which a verdict is decisive (default: 6, 'strong' on "
                        "the Kass & Raftery 1995 scale)")
    parser.add_argument("--max-steps", type=int, default=2000, metavar="N",
                        help="MCMC step limit of each campaign fit (default: 2000)")
    parser.add_argument("--walkers", type=int, default=32, metavar="N",
                        help="emcee walkers per fit (default: 32)")
    parser.add_argument("--starts", type=int, default=2, metavar="N",
                        help="local optimisations that place the walkers of each fit "
                        "(default: 2; the serial optimiser dominates a short fit's cost)")
    parser.add_argument("--nlive", type=int, default=100, metavar="N",
                        help="live points of each nested-sampling evidence (default: 100)")
    parser.add_argument("--dlogz", type=float, default=0.5,
                        help="nested-sampling stopping remainder in ln Z (default: 0.5)")
    parser.add_argument("--workers", type=int, default=None, metavar="N",
                        help="worker processes of the local Dask cluster (default: CPU count)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="use an existing Dask scheduler (e.g. tcp://host:8786); default: "
                        "$DASK_SCHEDULER_ADDRESS, else a local cluster")
    parser.add_argument("--retries", type=int, default=2, metavar="N",
                        help="extra attempts of a failing task before it is reported (default: 2)")
    parser.add_argument("--resume", action="store_true",
                        help="continue the campaign in --out, skipping finished tasks")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    add_campaign_options(parser)
    parser.add_argument("--model", required=True, metavar="NAME",
                        help="radial profile to calibrate ('diskfield profiles' lists them)")
    parser.add_argument("--sims", type=int, required=True, metavar="N",
                        help="SBC simulations (each one simulated compilation and one fit)")
    parser.add_argument("--compare-to", default="smooth", metavar="NAME",
                        help="null model of the verdict rates (default: smooth; verdict rates "
                        "are skipped when it equals --model)")
    parser.add_argument("--verdict-sims", type=int, default=None, metavar="N",
                        help="simulations from each of the two models for the verdict rates "
                        "(default: --sims; 0 skips them)")
    parser.add_argument("--draws", type=int, default=99, metavar="L",
                        help="posterior draws the true value is ranked among (default: 99)")


def _positive(option: str, value, minimum: int = 1) -> None:
    if value is None or value < minimum:
        raise OptionError(option, value, f"an integer >= {minimum}")


def sampler_from_args(args):
    """SamplerSettings of campaign fits (single-threaded, no progress bars inside tasks)."""
    from ..sampling import SamplerSettings

    _positive("--max-steps", args.max_steps)
    _positive("--walkers", args.walkers, 4)
    _positive("--starts", args.starts)
    chunk = min(SamplerSettings.chunk, args.max_steps)
    return SamplerSettings(n_walkers=args.walkers, max_steps=args.max_steps, chunk=chunk,
                           n_starts=args.starts, progress=False)


def evidence_from_args(args):
    """EvidenceSettings of campaign evidences (validated)."""
    from ..campaigns.disk import EvidenceSettings

    _positive("--nlive", args.nlive, 10)
    if not args.dlogz > 0:
        raise OptionError("--dlogz", args.dlogz, "a positive number")
    return EvidenceSettings(nlive=args.nlive, dlogz=args.dlogz)


def campaign_run_kwargs(args) -> dict:
    """Dask execution options for :func:`~diskfield.campaigns.orchestrate.run_campaign`."""
    if args.workers is not None:
        _positive("--workers", args.workers)
    _positive("--retries", args.retries, 0)
    return {"scheduler": args.scheduler, "workers": args.workers, "retries": args.retries,
            "progress": not args.quiet}


def run(args) -> int:
    """Run the calibration campaign; print where the outputs are; return 0."""
    from ..campaigns.calibration import SBCSettings
    from ..campaigns.disk import DiskSBCProblem, DiskVerdictProblem, make_spec
    from ..campaigns.orchestrate import run_calibration
    from ..runs import DEFAULT_SEED

    _positive("--sims", args.sims, 0)
    _positive("--draws", args.draws, 4)
    n_verdict = args.sims if args.verdict_sims is None else args.verdict_sims
    _positive("--verdict-sims", n_verdict, 0)
    seed = DEFAULT_SEED if args.seed is None else args.seed
    out = Path(args.out or f"diskfield-calibrate-{args.model}")
    spec = make_spec(args.file, args.model, args.envelope, args.spin, args.priors or None)
    problem = DiskSBCProblem(spec, sampler_from_args(args))
    verdict = None
    if args.compare_to != args.model and n_verdict > 0:
        make_spec(args.file, args.compare_to, args.envelope, args.spin, args.priors or None)
        verdict = DiskVerdictProblem(spec.with_profile(args.compare_to), spec,
                                     evidence_from_args(args))
    report, summary, _ = run_calibration(
        problem, out, n_sims=args.sims, seed=seed, settings=SBCSettings(n_draws=args.draws),
        verdict_problem=verdict, n_verdict=n_verdict if verdict else 0,
        threshold=args.threshold, model_label=args.model, resume=args.resume,
        **campaign_run_kwargs(args))
    _finish(out, spec, seed, report, summary)
    return 0


def write_campaign_manifest(out: Path, spec, seed: int, report, command: str) -> None:
    """Copy the prior files used into ``out/priors_used/`` and write ``manifest.json``."""
    import hashlib

    from ..manifest import write_atomic, write_manifest

    priors = [write_atomic(out / "priors_used" / f"{k:02d}_{name}", text)
              for k, (name, text) in enumerate(spec.prior_files)]
    campaign = {"tasks": report.n_total, "skipped_finished": report.n_skipped,
                "run_now": report.n_run, "failed": len(report.failed),
                "workers": report.n_workers, "wall_time_s": round(report.wall_time_s, 3)}
    data_hash = hashlib.sha256(spec.compilation_text.encode("utf-8")).hexdigest()
    write_manifest(out, data_hash=data_hash, prior_files=priors, seed=seed,
                   extra={"command": command, "campaign": campaign})


def _finish(out: Path, spec, seed: int, report, summary) -> None:
    write_campaign_manifest(out, spec, seed, report, NAME)
    print(f"calibration: {summary.ranks.shape[0]} SBC simulations; {report.n_run} task(s) run "
          f"now, {report.n_skipped} already finished, {len(report.failed)} failed")
    for row in summary.sbc_rows:
        state = "uniform" if row["uniform"] else "NOT uniform"
        print(f"  {row['parameter']}: ranks {state} (chi2 p = {row['chi2_p']:.3g}), "
              f"90 % coverage {row.get('coverage_90', float('nan')):.2f}")
    for row in summary.verdict_rows:
        if row["rate"] in ("false_positive", "detection"):
            print(f"  {row['rate']} rate: {row['value']:.3f} "
                  f"[{row['wilson95_lo']:.3f}, {row['wilson95_hi']:.3f}] "
                  f"({row['n_events']}/{row['n_sims']})")
    if report.failed:
        print(f"  failed tasks are listed in {out / 'failures.csv'}")
    print(f"written to {out}")
