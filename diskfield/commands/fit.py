"""``diskfield fit``: sample one model's posterior and write a fit folder.

Examples::

    diskfield fit compilation.ecsv --model ring
    diskfield fit compilation.ecsv --model smooth --envelope dissipating --priors mine.toml
    diskfield fit compilation.ecsv --model ring --resume          # continue after a kill
    diskfield fit compilation.ecsv --model ring --loo-refit       # exact LOO for high-k bodies

Writes ``--out`` (default ``diskfield-fit-<model>``): ``posterior.nc``, ``fit.json``,
``posterior_summary_<model>.csv``, ``field_profile_<model>.csv``, ``compilation.ecsv``,
``priors_used/``, ``checkpoint.h5`` and ``manifest.json``. The chain runs until the
autocorrelation time is stable and the chain exceeds 50 τ, or ``--max-steps``; an
unconverged fit is flagged in ``fit.json`` and on screen, and ``--strict`` makes it an
error (exit status 2). ``--loo-refit`` refits the model once without each body whose
Pareto k exceeds 0.7 (checkpoints in ``loo_refit/``) and puts the exact values into
``fit.json``'s criteria (the PSIS ones are kept under ``criteria.loo_refit``).
"""
from __future__ import annotations

from pathlib import Path

from ..errors import OptionError
from ..records import read_compilation
from ..runs import DEFAULT_SEED, fit
from ..sampling import SamplerSettings

__all__ = ["NAME", "HELP", "add_arguments", "run", "add_model_options", "sampler_settings"]

NAME = "fit"
HELP = "fit one field model to a compilation by MCMC (emcee) and write a fit folder"


def add_model_options(parser) -> None:
    """Options shared by ``fit`` and ``compare`` (model set-up and sampling)."""
    parser.add_argument("file", metavar="FILE", help="compilation file (.ecsv or .csv)")
    parser.add_argument("--envelope", default="steady",
                        help="temporal envelope (default: steady; 'diskfield profiles' lists them)")
    parser.add_argument("--spin", default="body",
                        help="spin projection: body (default), record or none")
    parser.add_argument("--priors", action="append", default=[], metavar="FILE",
                        help="prior TOML file read after the shipped ones (repeatable)")
    parser.add_argument("--max-steps", type=int, default=SamplerSettings.max_steps,
                        metavar="N", help="MCMC step limit; an unconverged chain is flagged "
                        f"(default: {SamplerSettings.max_steps})")
    parser.add_argument("--starts", type=int, default=SamplerSettings.n_starts, metavar="N",
                        help="local optimisations that place the walkers (default: "
                        f"{SamplerSettings.n_starts})")
    parser.add_argument("--resume", action="store_true",
                        help="continue the run checkpointed in the output folder")
    parser.add_argument("--strict", action="store_true",
                        help="exit with status 2 if a fit did not converge")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--loo-refit", action="store_true",
                        help="replace the PSIS-LOO estimate of each body with Pareto k > 0.7 "
                        "by an exact refit without that body (one extra MCMC run per body)")


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    add_model_options(parser)
    parser.add_argument("--model", required=True, metavar="NAME",
                        help="radial profile: smooth, ring, two-ring, broken, accretion, ... "
                        "('diskfield profiles' lists them)")


def sampler_settings(args) -> SamplerSettings:
    """SamplerSettings from the command-line options (validated)."""
    if args.max_steps is None or args.max_steps < 1:
        raise OptionError("--max-steps", args.max_steps, "a positive integer")
    if args.starts is None or args.starts < 1:
        raise OptionError("--starts", args.starts, "a positive integer")
    return SamplerSettings(max_steps=args.max_steps, n_starts=args.starts,
                           progress=not args.quiet)


def run(args) -> int:
    """Fit ``args.model`` to ``args.file``; print a short summary; return 0."""
    settings = sampler_settings(args)
    comp = read_compilation(args.file)
    out = Path(args.out or f"diskfield-fit-{args.model}")
    seed = DEFAULT_SEED if args.seed is None else args.seed
    result = fit(comp, args.model, envelope=args.envelope, spin=args.spin,
                 priors=args.priors or None, seed=seed, out=out, settings=settings,
                 resume=args.resume, strict=args.strict, loo_refit=args.loo_refit,
                 log=lambda line: print("   " + line, flush=True))
    print(summary_text(result))
    return 0


def summary_text(result) -> str:
    """A few plain lines describing a finished fit."""
    f, c = result.fit_json, result.criteria
    state = "converged" if f["converged"] else "NOT CONVERGED (results provisional)"
    lines = [f"{f['model']} fit: {state}; {f['n_steps']} steps x {f['n_walkers']} walkers, "
             f"chain = {f['chain_over_tau']:.0f} tau",
             f"max ln L = {c.max_log_likelihood:.2f}, elpd_loo = {c.elpd_loo:.2f} "
             f"+/- {c.elpd_loo_se:.2f}, max Pareto k = {c.pareto_k_max:.2f}"]
    refit = getattr(c, "loo_refit", None) or {}
    if refit.get("note"):
        lines.append(f"LOO: {refit['note']}")
    lines += [f"flag: {flag}" for flag in f["flags"]]
    if result.out is not None:
        lines.append(f"written to {result.out}")
    return "\n".join(lines)
