"""Recovery of a declared truth by a saved comparison (for the demo and simulation studies).

Given the folder written by ``compare`` and a truth mapping (``data_demo/truth.toml``: a
``[meta]`` table naming the generating ``profile`` and a ``[parameters]`` table of true
values), reports for each true parameter where it falls in the posterior of the generating
model, and whether the comparison's verdict picked that model. It says what was recovered and
what was not; it does not grade the data design.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from . import azadapter
from .manifest import write_atomic
from .runs import load_comparison

__all__ = ["truth_recovery", "write_truth_recovery", "ordered_truth", "RECOVERY_COLUMNS"]

RECOVERY_COLUMNS = ("parameter", "true_value", "median", "q05", "q95", "posterior_quantile",
                    "inside_90")


def _parameter_row(name: str, true_value: float, draws: np.ndarray) -> dict:
    q05, med, q95 = np.quantile(draws, [0.05, 0.5, 0.95])
    return {"parameter": name, "true_value": float(true_value), "median": float(med),
            "q05": float(q05), "q95": float(q95),
            # Fraction of posterior draws below the truth: uniform over repeated experiments
            # when the model is calibrated (Talts et al. 2018, arXiv:1804.06788).
            "posterior_quantile": float(np.mean(draws < true_value)),
            "inside_90": bool(q05 <= true_value <= q95)}


def truth_recovery(comparison_dir, truth: dict) -> dict:
    """Compare a saved comparison with a declared truth.

    Parameters
    ----------
    comparison_dir : path
        Folder written by :func:`diskfield.compare`.
    truth : dict
        ``{"meta": {"profile": name, ...}, "parameters": {name: value, ...}}``; values in
        diskfield's internal units (uT, AU, Myr).

    Returns
    -------
    dict
        ``true_model``, ``ring_demanded`` (the comparison's verdict), ``rows`` (one per true
        parameter that the generating model samples; columns :data:`RECOVERY_COLUMNS`),
        ``not_sampled`` (true parameters the fitted model does not have), and a plain
        ``sentence`` (parameter coverage, and whether the comparison's ring/no-ring answer
        matches the generating model), ``relabelled`` (True when the fit ordered its
        exchangeable groups and the truth's labels were sorted the same way:
        :func:`ordered_truth`).
    """
    saved = load_comparison(comparison_dir)
    true_model = truth.get("meta", {}).get("profile", "")
    rows, not_sampled, relabelled = [], [], False
    if true_model in saved.fits:
        fit = saved.fits[true_model]
        draws = azadapter.posterior_arrays(fit.idata)
        values = truth.get("parameters", {})
        if (fit.fit.get("label_ordering") or {}).get("applied"):
            values = ordered_truth(true_model, values)
            relabelled = values != truth.get("parameters", {})
        for name, value in values.items():
            if name in draws:
                rows.append(_parameter_row(name, value, np.ravel(draws[name])))
            else:
                not_sampled.append(name)
    return {"true_model": true_model, "ring_demanded": bool(saved.verdict.get("ring_demanded")),
            "rows": rows,
            "not_sampled": not_sampled, "relabelled": relabelled,
            "sentence": _sentence(true_model, rows, saved.verdict, true_model in saved.fits)
            + (" The true exchangeable groups (rings) were relabelled in the fit's order "
               "(by radius: ring = inner) before the comparison." if relabelled else "")}


def ordered_truth(profile: str, values: dict) -> dict:
    """True values relabelled as a label-ordered fit labels them (:mod:`diskfield.ordering`).

    The fit's ``ring`` is the inner ring whatever the truth file calls it: the true groups are
    sorted by the profile's key (e.g. radius) when the truth gives every key; otherwise the
    truth is returned unchanged (a lone ``ring2_radius`` cannot be placed).
    """
    from .profiles import get_profile

    out = dict(values)
    for ex in get_profile(profile).exchangeable:
        if not all(k in values for k in ex.keys):
            continue
        order = sorted(range(len(ex.prefixes)), key=lambda g: values[ex.keys[g]])
        for g, src in enumerate(order):
            for name, src_name in zip(ex.groups[g], ex.groups[src]):
                if src_name in values:
                    out[name] = values[src_name]
                else:
                    out.pop(name, None)
    return out


def _sentence(true_model: str, rows: list, verdict: dict, fitted: bool) -> str:
    if not fitted:
        return (f"The generating model ({true_model or 'unnamed'}) was not among the fitted "
                "models, so its parameters cannot be checked.")
    inside = [r["parameter"] for r in rows if r["inside_90"]]
    outside = [r["parameter"] for r in rows if not r["inside_90"]]
    parts = [f"Truth ({true_model}): {len(inside)} of {len(rows)} true parameter values lie "
             f"inside the 90% posterior interval of model {true_model}"]
    if outside:
        parts.append(f"outside: {', '.join(outside)}")
    return "; ".join(parts) + ". " + _model_choice(true_model, verdict)


def _model_choice(true_model: str, verdict: dict) -> str:
    """Whether the comparison's ring/no-ring answer matches the generating model."""
    if not verdict:
        return "No verdict was saved, so the model choice cannot be checked."
    ringed = "ring" in true_model
    demanded = bool(verdict.get("ring_demanded"))
    truth = f"the generating model ({true_model}) {'has a' if ringed else 'has no'} ring"
    found = "demanded a ring" if demanded else "did not demand a ring"
    if ringed == demanded:
        return f"Model choice: {truth} and the comparison {found}, as it should."
    miss = ("a false positive" if demanded else
            "the evidence for the true ring was not decisive in this realisation")
    return f"Model choice: {truth} but the comparison {found} ({miss})."


def write_truth_recovery(out_dir, recovery: dict) -> list[Path]:
    """Write ``truth_recovery.csv``, ``.md`` and ``.json`` into ``out_dir`` (atomically)."""
    out_dir = Path(out_dir)
    lines = [",".join(RECOVERY_COLUMNS)]
    for r in recovery["rows"]:
        lines.append(",".join(_csv_cell(r[c]) for c in RECOVERY_COLUMNS))
    md = ["# Recovery of the declared truth", "", recovery["sentence"], "",
          "| parameter | true | median | 90% interval | quantile of truth | inside 90% |",
          "|---|---|---|---|---|---|"]
    for r in recovery["rows"]:
        md.append(f"| {r['parameter']} | {r['true_value']:.3g} | {r['median']:.3g} | "
                  f"{r['q05']:.3g} – {r['q95']:.3g} | {r['posterior_quantile']:.2f} | "
                  f"{'yes' if r['inside_90'] else 'no'} |")
    if recovery["not_sampled"]:
        md += ["", "Not sampled by the fitted model (fixed or absent): "
               + ", ".join(recovery["not_sampled"])]
    md += ["", "A single realisation: a true value outside its 90% interval is expected for "
           "about one parameter in ten. Use `diskfield calibrate` for the frequency properties "
           "of the design."]
    return [write_atomic(out_dir / "truth_recovery.csv", "\n".join(lines) + "\n"),
            write_atomic(out_dir / "truth_recovery.md", "\n".join(md) + "\n"),
            write_atomic(out_dir / "truth_recovery.json", json.dumps(recovery, indent=2))]


def _csv_cell(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    return str(value)
