"""``diskfield compare``: fit several models and say whether the data demand a ring.

Examples::

    diskfield compare compilation.ecsv --models smooth,ring,two-ring
    diskfield compare compilation.ecsv --models smooth,ring --no-evidence --max-steps 5000
    diskfield compare compilation.ecsv --resume                   # continue after a kill
    diskfield compare compilation.ecsv --loo-refit                # exact LOO for high-k bodies

Writes ``--out`` (default ``diskfield-compare``): one fit folder per model (with
``evidence.json``), ``comparison.csv/.md/.tex``, per-model posterior summaries and
field profiles, ``verdict.md`` and ``verdict.json``, ``prior_sensitivity.csv``,
``compilation.ecsv``, ``priors_used/`` and ``manifest.json``.

Default budget (chosen for a likelihood of ~1 ms per 64-walker call, where the demo's
three-model comparison with evidence takes about two minutes on 2 cores): 32 walkers,
convergence checks every 500 steps up to 10 000 steps, nested sampling with 100 live
points to a remaining Δln Z < 0.5; the prior-sensitivity check adds one nested-sampling
run per ringed model (one run under the doubled priors; the halved priors by reweighting
the default run). Raise ``--max-steps`` and ``--nlive`` for a final answer. ``--jobs N``
runs the models' fits and evidence runs on N worker processes (default: the usable cores).
``--loo-refit`` (off by default) adds one MCMC refit per model and body with Pareto k > 0.7
(same settings, a per-body seed) and puts the exact LOO values in the existing columns;
the row's note names the refitted bodies.
"""
from __future__ import annotations

from pathlib import Path

from ..comparison import compare
from ..errors import OptionError
from ..evidence import DEFAULT_DLOGZ, DEFAULT_NLIVE
from ..records import read_compilation
from ..runs import DEFAULT_SEED
from .fit import add_model_options, sampler_settings

__all__ = ["NAME", "HELP", "add_arguments", "add_jobs_option", "run"]

NAME = "compare"
HELP = "fit several models, compare them (criteria, evidence) and write a verdict"


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    add_model_options(parser)
    parser.add_argument("--models", default="smooth,ring,two-ring", metavar="A,B,...",
                        help="comma-separated profiles (default: smooth,ring,two-ring)")
    parser.add_argument("--reference", default="smooth",
                        help="model the Bayes factors refer to (default: smooth)")
    parser.add_argument("--no-evidence", action="store_true",
                        help="skip nested sampling (no ln Z, Bayes factors or sensitivity)")
    parser.add_argument("--nlive", type=int, default=DEFAULT_NLIVE, metavar="N",
                        help=f"nested-sampling live points (default: {DEFAULT_NLIVE})")
    add_jobs_option(parser)
    parser.add_argument("--dlogz", type=float, default=DEFAULT_DLOGZ, metavar="X",
                        help=f"nested-sampling stopping tolerance in ln Z (default: {DEFAULT_DLOGZ})")


def add_jobs_option(parser) -> None:
    """``--jobs N``: worker processes for the independent fits and evidence runs."""
    parser.add_argument("--jobs", type=int, default=None, metavar="N",
                        help="worker processes for the independent fits and evidence runs "
                             "(default: the usable cores, at most one per task; 1: none); "
                             "results do not depend on it")


def progress_printer():
    """``log`` for :func:`diskfield.comparison.compare`: print each line at once."""
    return lambda line: print("   " + line, flush=True)


def run(args) -> int:
    """Run the comparison; print the verdict; return 0."""
    settings = sampler_settings(args)
    if args.nlive < 10:
        raise OptionError("--nlive", args.nlive, "an integer >= 10")
    if not args.dlogz > 0:
        raise OptionError("--dlogz", args.dlogz, "a positive number")
    comp = read_compilation(args.file)
    out = Path(args.out or "diskfield-compare")
    result = compare(comp, args.models.split(","), envelope=args.envelope, spin=args.spin,
                     priors=args.priors or None, reference=args.reference,
                     evidence=not args.no_evidence,
                     seed=DEFAULT_SEED if args.seed is None else args.seed, out=out,
                     settings=settings, nlive=args.nlive, dlogz=args.dlogz,
                     resume=args.resume, strict=args.strict, jobs=args.jobs,
                     loo_refit=args.loo_refit, log=progress_printer())
    print(result.verdict["sentence"])
    print(f"written to {out} (verdict.md, comparison.csv)")
    return 0
