"""``diskfield check``: validate a compilation file and summarise what would be fitted.

Examples::

    diskfield check compilation.ecsv
    diskfield check compilation.csv --format json
    diskfield check compilation.csv --priors my_reservoirs.toml

Exit status 0 with a summary (records per reservoir and kind, bodies, unit conversions,
corrections divided out, exclusions with their notes); exit status 2 with every problem of
the file, one line each. ``check`` reads only; it writes no files (``--out`` is ignored).
"""
from __future__ import annotations

import json
from collections import Counter

from ..errors import CompilationError, Problem
from ..records import KINDS, Compilation, known_reservoir_names, read_compilation

__all__ = ["NAME", "HELP", "add_arguments", "run", "summarize", "format_summary"]

NAME = "check"
HELP = "validate a compilation file (ECSV or CSV) and summarise it"


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    parser.add_argument("file", metavar="FILE", help="compilation file (.ecsv, or .csv with "
                        "'name [unit]' headers)")
    parser.add_argument("--format", choices=("text", "json"), default="text",
                        help="output format (default: text)")
    parser.add_argument("--priors", action="append", default=[], metavar="FILE",
                        help="prior TOML file whose [reservoirs.<NAME>] tables add valid "
                        "reservoir names (repeatable)")


def run(args) -> int:
    """Validate ``args.file``; print the summary (exit 0) or the problems (exit 2)."""
    reservoirs = known_reservoir_names(args.priors)
    if args.format == "text":
        print(format_summary(summarize(read_compilation(args.file,
                                                        known_reservoirs=reservoirs))))
        return 0
    try:
        comp = read_compilation(args.file, known_reservoirs=reservoirs)
    except CompilationError as err:
        print(json.dumps(_json_report(err.problems, None, args.file), indent=2))
        return 2
    print(json.dumps(_json_report([], summarize(comp), args.file), indent=2))
    return 0


def summarize(comp: Compilation) -> dict:
    """What ``check`` reports about a valid compilation, as plain JSON-ready data.

    Parameters
    ----------
    comp : Compilation
        A compilation returned by :func:`~diskfield.records.read_compilation`.

    Returns
    -------
    dict
        ``source``, ``data_hash``, ``n_rows``, ``n_included``, ``n_excluded``,
        ``by_reservoir`` (reservoir -> kind -> count of included records), ``bodies``
        (name, reservoir, estimates, upper_limits, distance override in AU or None),
        ``conversions`` (unit conversions and corrections) and ``exclusions``
        (row, record, body, note).
    """
    recs = comp.records
    by_reservoir: dict[str, dict[str, int]] = {}
    for body in comp.bodies:
        counts = by_reservoir.setdefault(body.reservoir, dict.fromkeys(KINDS, 0))
        for i in body.record_indices:
            counts["upper_limit" if recs.is_limit[i] else "estimate"] += 1
    return {
        "source": comp.source,
        "data_hash": comp.data_hash,
        "n_rows": len(comp.table),
        "n_included": len(recs),
        "n_excluded": len(comp.excluded),
        "by_reservoir": by_reservoir,
        "bodies": [_body_summary(comp, b) for b in comp.bodies],
        "conversions": list(comp.conversions),
        "exclusions": [{"row": e.row, "record": e.record, "body": e.body, "note": e.note}
                       for e in comp.excluded],
    }


def _body_summary(comp: Compilation, body) -> dict:
    kinds = Counter(bool(comp.records.is_limit[i]) for i in body.record_indices)
    override = None
    if body.distance_min == body.distance_min:  # not NaN: a per-body override
        override = [float(body.distance_min), float(body.distance_max)]
    return {"name": body.name, "reservoir": body.reservoir, "estimates": kinds[False],
            "upper_limits": kinds[True], "distance_au": override}


def format_summary(summary: dict) -> str:
    """The text report of :func:`summarize` (one block per topic, plain ASCII)."""
    lines = [f"{summary['source']}: valid",
             f"  sha256 {summary['data_hash']}",
             f"records: {summary['n_rows']} rows, {summary['n_included']} to fit, "
             f"{summary['n_excluded']} excluded; {len(summary['bodies'])} bodies",
             "by reservoir (estimates / upper limits):"]
    for name, counts in summary["by_reservoir"].items():
        lines.append(f"  {name:<12} {counts['estimate']:>4} / {counts['upper_limit']}")
    lines.append("bodies (reservoir, estimates / upper limits, distance override):")
    width = max(len(b["name"]) for b in summary["bodies"])
    for b in summary["bodies"]:
        dist = ("-" if b["distance_au"] is None
                else f"{b['distance_au'][0]:g}-{b['distance_au'][1]:g} AU")
        lines.append(f"  {b['name']:<{width}}  {b['reservoir']:<10} "
                     f"{b['estimates']:>3} / {b['upper_limits']:<3} {dist}")
    lines += _listed("conversions and corrections", summary["conversions"])
    lines += _listed("excluded (include = false)",
                     [f"row {e['row']}, record {e['record']!r} ({e['body']}): "
                      f"{e['note'] or '(no note)'}" for e in summary["exclusions"]])
    return "\n".join(lines)


def _listed(title: str, items: list[str]) -> list[str]:
    return [f"{title}: none"] if not items else [f"{title}:"] + [f"  {s}" for s in items]


def _problem_dict(problem: Problem) -> dict:
    return {"source": problem.source, "row": problem.row, "line": problem.line,
            "record": problem.record, "column": problem.column, "message": problem.message,
            "text": str(problem)}


def _json_report(problems: list[Problem], summary: dict | None, source: str) -> dict:
    return {"source": source, "valid": not problems,
            "problems": [_problem_dict(p) for p in problems], "summary": summary}
