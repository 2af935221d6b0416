"""``diskfield report``: (re)build the report folder of a saved fit or comparison.

Examples::

    diskfield report runs/compare-2026            # writes runs/compare-2026/report/
    diskfield report runs/fit-ring --out paper/report --dpi 150

Nothing is refitted: figures, tables, report.html and report.md are built from the saved files
(posterior.nc, fit.json, comparison.csv, ...). Rebuilding from the same run gives identical
files.
"""
from __future__ import annotations

from ..errors import OptionError

__all__ = ["NAME", "HELP", "add_arguments", "run"]

NAME = "report"
HELP = "build figures, tables and an HTML/Markdown report from a saved fit or comparison"


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    parser.add_argument("dir", metavar="DIR",
                        help="folder written by 'diskfield fit' or 'diskfield compare'")
    parser.add_argument("--dpi", type=int, default=300,
                        help="PNG resolution in dots per inch (default: 300)")
    parser.add_argument("--draws", type=int, default=200,
                        help="posterior draws used for recomputed bands, distances and "
                        "predictive intervals (default: 200)")
    parser.add_argument("--no-model", action="store_true",
                        help="do not rebuild the model (no posterior distances or predictive "
                        "check; faster)")


def run(args) -> int:
    """Build the report; prints the path of report.html. Exit status 0."""
    from ..report import build_report

    if not 20 <= args.dpi <= 1200:
        raise OptionError("--dpi", args.dpi, "an integer from 20 to 1200")
    if args.draws < 10:
        raise OptionError("--draws", args.draws, "an integer >= 10")
    html = build_report(args.dir, args.out, dpi=args.dpi, n_draws=args.draws,
                        rebuild_model=not args.no_model)
    print(f"report: {html}")
    print(f"markdown: {html.with_suffix('.md')}")
    return 0
