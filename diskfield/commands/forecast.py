"""``diskfield forecast``: which candidate measurement would most change the ring verdict.

Examples::

    diskfield forecast data_demo/demo_compilation.ecsv --candidates data_demo/candidates_demo.ecsv
    diskfield forecast comp.ecsv --candidates next.ecsv --draws 50 --scheduler tcp://head:8786

The current compilation is fitted with ``--compare-to`` (default smooth) and ``--model``
(default ring); for each candidate, ``--draws`` new data sets are simulated from the current
posterior predictive, appended and refitted, giving the distribution of 2 ln B and of the ring
parameters' widths after the measurement. Candidates are ranked by the probability of a
decisive verdict, P(|2 ln B| > --threshold), ties broken by the expected reduction of the ring
widths (the question is whether a measurement can settle the verdict). Writes
``forecast.csv``, ``forecast_draws.csv``, ``forecast.pdf/png``, ``forecast.md`` and
``manifest.json``; ``--resume`` continues an interrupted forecast.
"""
from __future__ import annotations

from pathlib import Path

from .calibrate import (_positive, add_campaign_options, campaign_run_kwargs, evidence_from_args,
                        sampler_from_args, write_campaign_manifest)

__all__ = ["NAME", "HELP", "add_arguments", "run"]

NAME = "forecast"
HELP = "rank candidate new measurements by how likely they are to settle the ring verdict"


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    add_campaign_options(parser)
    parser.add_argument("--candidates", required=True, metavar="FILE",
                        help="candidate measurements (.ecsv or .csv; columns: candidate, body "
                        "or reservoir, age/age_err, method, remanence, ln_err or relative_err, "
                        "n_records)")
    parser.add_argument("--draws", type=int, default=20, metavar="N",
                        help="simulated outcomes (each a refit and two evidences) per candidate "
                        "(default: 20)")
    parser.add_argument("--model", default="ring", metavar="NAME",
                        help="alternative model (default: ring)")
    parser.add_argument("--compare-to", default="smooth", metavar="NAME",
                        help="null model (default: smooth)")


def run(args) -> int:
    """Run the forecast campaign; print the ranking; return 0."""
    from ..campaigns.candidates import read_candidates
    from ..campaigns.disk import make_spec, spec_model
    from ..campaigns.orchestrate import run_forecast
    from ..errors import OptionError
    from ..runs import DEFAULT_SEED

    _positive("--draws", args.draws)
    if args.model == args.compare_to:
        raise OptionError("--compare-to", args.compare_to, f"a model other than --model "
                          f"({args.model!r})")
    alt = make_spec(args.file, args.model, args.envelope, args.spin, args.priors or None)
    make_spec(args.file, args.compare_to, args.envelope, args.spin, args.priors or None)
    comp, priorset, _ = spec_model(alt)
    candidates = read_candidates(args.candidates, comp, tuple(priorset.reservoirs))
    seed = DEFAULT_SEED if args.seed is None else args.seed
    out = Path(args.out or "diskfield-forecast")
    reports, summary, _ = run_forecast(
        alt.with_profile(args.compare_to), alt, candidates, out, n_draws=args.draws, seed=seed,
        sampler=sampler_from_args(args), evidence=evidence_from_args(args),
        threshold=args.threshold, resume=args.resume, **campaign_run_kwargs(args))
    _copy_candidates(args.candidates, out)
    write_campaign_manifest(out, alt, seed, _merged(reports), NAME)
    _print(summary, args.threshold, reports, out)
    return 0


def _copy_candidates(path, out: Path) -> None:
    from ..manifest import write_atomic

    src = Path(path)
    write_atomic(out / f"candidates{src.suffix.lower()}", src.read_bytes())


def _merged(reports):
    from ..campaigns.runner import RunReport

    return RunReport(n_total=sum(r.n_total for r in reports),
                     n_skipped=sum(r.n_skipped for r in reports),
                     n_run=sum(r.n_run for r in reports),
                     failed=[f for r in reports for f in r.failed],
                     wall_time_s=sum(r.wall_time_s for r in reports),
                     n_workers=max(r.n_workers for r in reports))


def _print(summary, threshold, reports, out) -> None:
    null, alt = summary["models"]
    print(f"current data: 2 ln B ({alt} vs {null}) = {summary['current_two_ln_b']:.2f}")
    print(f"ranked by P(|2 ln B| > {threshold:g}) after the measurement:")
    for r in summary["rows"]:
        change = r["mean_width_reduction"]
        widths = (f"ring widths {abs(change):.0%} {'narrower' if change >= 0 else 'wider'}"
                  if change == change else "ring widths n/a")
        print(f"  {r['rank']}. {r['candidate']}: P(decisive) = {r['p_decisive']:.2f} "
              f"[{r['p_decisive_lo']:.2f}, {r['p_decisive_hi']:.2f}], median 2 ln B = "
              f"{r['two_ln_b_median']:.2f}, {widths}")
    failed = sum(len(r.failed) for r in reports)
    if failed:
        print(f"  {failed} task(s) failed after retries: see {out / 'failures.csv'}")
    print(f"written to {out}")
