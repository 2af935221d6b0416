"""``diskfield demo``: the whole job on the shipped, invented demo compilation.

Examples::

    diskfield demo                         # writes ./diskfield-demo/
    diskfield demo --out /tmp/demo --seed 7

Steps: check the compilation, fit and compare ``smooth``, ``ring`` and ``two-ring`` with
evidence and the prior-sensitivity check, compare the posterior with the declared truth of the
scenario (``data_demo/truth.toml``), and build the report. Prints the verdict and the path of
the report. The data are invented (fictional parent bodies); see ``data_demo/README.md``.
"""
from __future__ import annotations

import time
import tomllib
from pathlib import Path

from ..comparison import compare
from ..records import read_compilation
from ..resources import demo_dir
from ..runs import DEFAULT_SEED
from ..sampling import SamplerSettings
from ..truth import truth_recovery, write_truth_recovery
from .check import format_summary, summarize
from .compare import add_jobs_option, progress_printer

__all__ = ["NAME", "HELP", "add_arguments", "run", "DEMO_MODELS"]

NAME = "demo"
HELP = "run check, fit, compare (with evidence) and report on the shipped invented demo data"

#: Models the demo compares (DESIGN: smooth, ring and two-ring with evidence).
DEMO_MODELS = ("smooth", "ring", "two-ring")


def add_arguments(parser) -> None:
    """Add the command's options to ``parser``."""
    parser.add_argument("--quiet", action="store_true", help="no progress bars")
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted demo in the same --out folder")
    add_jobs_option(parser)


def run(args) -> int:
    """Run the demo; print the verdict and where the report is; return 0."""
    from ..report import build_report

    start = time.perf_counter()
    data = demo_dir()
    out = Path(args.out or "diskfield-demo")
    seed = DEFAULT_SEED if args.seed is None else args.seed
    comp = read_compilation(data / "demo_compilation.ecsv")
    print("== 1/4 check: the invented demo compilation")
    print(format_summary(summarize(comp)))
    print(f"== 2/4 fit and compare {', '.join(DEMO_MODELS)} with evidence (seed {seed}); "
          "the longest step, several minutes")
    result = compare(comp, DEMO_MODELS, seed=seed, out=out, resume=args.resume,
                     settings=SamplerSettings(progress=not args.quiet),
                     argv=["diskfield", "demo", *_argv(args)],
                     build=_announcing_builder(comp, start), jobs=args.jobs,
                     log=progress_printer())
    print("== 3/4 compare with the declared truth of the scenario")
    truth = tomllib.loads((data / "truth.toml").read_text())
    recovery = truth_recovery(out, truth)
    write_truth_recovery(out, recovery)
    print(recovery["sentence"])
    print("== 4/4 report")
    html = build_report(out)
    print()
    print("verdict: " + result.verdict["sentence"])
    print(f"report:  {html}")
    print(f"demo finished in {time.perf_counter() - start:.0f} s; outputs in {out}/")
    return 0


def _announcing_builder(comp, start: float):
    """The models ``compare`` would build (shipped priors, steady envelope, body spin), each
    announced with the step it starts and the time elapsed [s] since ``start``, so that a user
    watching a long run without progress bars sees where it is."""
    from ..likelihood import build_model

    def build(name, extra):
        scale = Path(extra[-1]).stem.rsplit("_x", 1)[-1] if extra else ""
        step = (f"evidence with the ring priors scaled by {scale} (prior sensitivity)" if extra
                else "MCMC, criteria, evidence")
        print(f"   [{time.perf_counter() - start:4.0f} s] {name}: {step}", flush=True)
        return build_model(comp, profile=name, envelope="steady", spin="body",
                           priors=[str(f) for f in extra] or None)
    return build


def _argv(args) -> list[str]:
    extra = []
    if args.out:
        extra += ["--out", str(args.out)]
    if args.seed is not None:
        extra += ["--seed", str(args.seed)]
    return extra
