"""``diskfield profiles``: list the radial profiles and envelopes, their parameters and priors.

Examples::

    diskfield profiles
    diskfield profiles --format json
    diskfield profiles --priors my_priors.toml      # show the priors after your overrides

Lists every registered component (built-ins and plug-ins) with its formula, and each parameter
with its unit, description, default prior and the prior's source, then the likelihood's own
parameters. ``profiles`` reads only; it writes no files (``--out`` is ignored).
"""
from __future__ import annotations

import json

from ..ordering import label_ordering
from ..priorset import LIKELIHOOD_PARAMETERS, PriorSet, load_priors
from ..profiles.base import Envelope, RadialProfile
from ..profiles.registry import all_components

__all__ = ["NAME", "HELP", "add_arguments", "run", "describe_components", "format_text"]

NAME = "profiles"
HELP = "list field profiles and envelopes with their parameters, units and default priors"


def add_arguments(parser) -> None:
    """Add the command's options to ``parser`` (an :class:`argparse.ArgumentParser`)."""
    parser.add_argument("--format", choices=("text", "json"), default="text",
                        help="output format (default: text)")
    parser.add_argument("--priors", action="append", default=[], metavar="FILE",
                        help="prior TOML file read after the shipped ones (repeatable)")


def run(args) -> int:
    """Print the listing to standard output; returns 0."""
    info = describe_components(load_priors(args.priors or None))
    print(json.dumps(info, indent=2) if args.format == "json" else format_text(info))
    return 0


def _parameter_info(par, priors: PriorSet) -> dict:
    prior = priors.parameters.get(par.name, par.default_prior)
    return {
        "name": par.name,
        "unit": par.unit,
        "description": par.description,
        "prior": prior.describe() if prior is not None else None,
        "prior_spec": prior.as_dict() if prior is not None else None,
        "source": priors.sources.get(f"parameters.{par.name}", "") if prior is not None else "",
    }


def _component_info(comp, priors: PriorSet) -> dict:
    info = {
        "name": comp.name,
        "kind": comp.kind,
        "description": comp.description,
        "formula": comp.formula,
        "parameters": [_parameter_info(p, priors) for p in comp.parameters],
    }
    if getattr(comp, "exchangeable", ()):  # whether these priors order its groups
        table = {p.name: priors.parameters.get(p.name, p.default_prior) for p in comp.parameters}
        free = [n for n, p in table.items() if p is not None and not p.is_fixed]
        info["label_ordering"] = label_ordering(comp, table, free).describe()
    return info


def describe_components(priors: PriorSet) -> dict:
    """Every registered component and the likelihood's parameters, as JSON-ready data.

    Parameters
    ----------
    priors : PriorSet
        Priors whose defaults are shown.

    Returns
    -------
    dict
        ``profiles`` and ``envelopes`` (lists of components: ``name``, ``kind``,
        ``description``, ``formula``, ``parameters``), ``likelihood`` (parameters) and
        ``prior_files``.
    """
    comps = all_components()
    return {
        "profiles": [_component_info(c, priors) for c in comps if isinstance(c, RadialProfile)],
        "envelopes": [_component_info(c, priors) for c in comps if isinstance(c, Envelope)],
        "likelihood": [_parameter_info(p, priors) for p in LIKELIHOOD_PARAMETERS],
        "prior_files": list(priors.files),
    }


def _parameter_lines(params: list[dict]) -> list[str]:
    if not params:
        return ["    (no parameters)"]
    lines = []
    for p in params:
        unit = f" [{p['unit']}]" if p["unit"] else " [dimensionless]"
        lines.append(f"    {p['name']}{unit}: {p['description']}")
        lines.append(f"        prior: {p['prior'] or 'NONE (add one to a prior file)'}")
        if p["source"]:
            lines.append(f"        source: {p['source']}")
    return lines


def format_text(info: dict) -> str:
    """Plain-text form of :func:`describe_components`' output."""
    lines = []
    for title, key in (("Radial profiles", "profiles"), ("Temporal envelopes", "envelopes")):
        lines.append(f"{title}:")
        for comp in info[key]:
            lines.append(f"  {comp['name']}: {comp['description']}")
            lines.append(f"    {comp['formula']}")
            if comp.get("label_ordering"):
                lines.append(f"    labels: {comp['label_ordering']}")
            lines += _parameter_lines(comp["parameters"])
        lines.append("")
    lines.append("Likelihood:")
    lines += _parameter_lines(info["likelihood"])
    lines.append("")
    lines.append("Prior files read: " + ", ".join(info["prior_files"]))
    return "\n".join(lines)
