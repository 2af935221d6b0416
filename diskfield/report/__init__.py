"""The report: a self-contained folder rebuilt from saved runs without refitting.

``build_report(run_dir, out_dir=None)`` writes ``report.html`` (inline style, images and
tables referenced as files inside the folder), ``report.md``, ``figures/`` (PDF and PNG) and
``tables/`` (LaTeX tabular and AASTeX deluxetable, Markdown, CSV). The output depends only on
the saved run: figures are written without creation dates and the page carries no timestamp
other than those read from the manifest, so rebuilding gives identical files.
"""
from __future__ import annotations

import shutil
from pathlib import Path

from ..errors import DiskfieldError
from .assets import (ReportContext, body_points, comparison_blocks, compilation_blocks,
                     elpd_differences, pair_blocks, predictive_blocks, profile_blocks,
                     record_points, reference_model, summary_blocks, time_blocks)
from .loading import SavedRunData, load_run
from .render import Items, Para, Section, to_html_page, to_markdown_page
from .sections import (assumption_blocks, convergence_blocks, exclusion_blocks,
                       loo_refit_blocks, manifest_blocks, sensitivity_blocks, truth_blocks,
                       verdict_blocks)

__all__ = ["build_report", "attach_models", "report_sections"]


def _rebuild(run: SavedRunData, fit) -> tuple[object, str]:
    """Rebuild one fit's Model through :meth:`diskfield.runs.SavedFit.model` (or say why not)."""
    try:
        from ..runs import SavedFit
    except ImportError as err:
        return None, f"the fitting modules are not available: {err}"
    try:
        model = SavedFit(fit.path, fit.idata, fit.fit).model()
    except (DiskfieldError, ValueError, KeyError, NotImplementedError, OSError) as err:
        return None, f"{type(err).__name__}: {str(err).splitlines()[0]}"
    saved = list(fit.fit.get("parameter_names", []))
    if saved and list(model.parameter_names) != saved:
        return None, (f"rebuilt parameters {list(model.parameter_names)} differ from the "
                      f"saved {saved}")
    return model, ""


def attach_models(run: SavedRunData) -> None:
    """Rebuild each fit's Model in place (``fit.model``; ``fit.model_note`` when it fails)."""
    for fit in run.fits.values():
        fit.model, fit.model_note = _rebuild(run, fit)


def _load_priors(run: SavedRunData):
    from ..priorset import load_priors

    return load_priors(run.prior_files or None)


def _figure_sections(ctx, run, priors) -> list:
    first = next(iter(run.fits.values()))
    spin = str(first.fit.get("spin", "body"))
    records = record_points(run, priors, spin)
    bodies, source = body_points(run, first, priors)
    return [Section("Field profile", tuple(profile_blocks(ctx, run, records, bodies, source)
                                           + time_blocks(ctx, run, records, bodies, source))),
            Section("Ring parameters", tuple(pair_blocks(ctx, run))),
            Section("Posterior predictive check", tuple(predictive_blocks(ctx, run)))]


def report_sections(ctx: ReportContext, run: SavedRunData) -> list:
    """Build every figure and table file and return the report's sections in order."""
    priors = _load_priors(run)
    ref = reference_model(run)
    diffs = elpd_differences(run, ref)
    sections = []
    if run.kind == "comparison":
        sections.append(Section("Verdict", tuple(verdict_blocks(ctx, run, ref, diffs)
                                                 + comparison_blocks(ctx, run, diffs, ref))))
    else:
        sections.append(Section("Fit", (Para(f"A single fit of model {ref}; no model "
                                             "comparison in this run."),)))
    if run.truth:
        sections.append(Section("Declared truth", tuple(truth_blocks(ctx, run))))
    sections.append(Section("Posterior summaries", tuple(summary_blocks(ctx, run))))
    sections += _figure_sections(ctx, run, priors)
    if run.kind == "comparison":
        sections.append(Section("Prior sensitivity", tuple(sensitivity_blocks(ctx, run))))
    sections.append(Section("Convergence diagnostics", tuple(convergence_blocks(ctx, run, diffs)
                                                             + loo_refit_blocks(ctx, run))))
    sections.append(Section("Assumptions and cautions", tuple(assumption_blocks(run, priors))))
    sections.append(Section("Compilation as fitted", tuple(exclusion_blocks(run)
                                                           + compilation_blocks(ctx, run))))
    sections.append(Section("Provenance", tuple(_notes(run) + manifest_blocks(run))))
    return sections


def _notes(run: SavedRunData) -> list:
    notes = [f"Model {n} not rebuilt: {f.model_note}" for n, f in run.fits.items() if f.model_note]
    notes += [f"Missing from the run folder: {_relative(m, run.path)}" for m in run.missing]
    return [Items(tuple(notes))] if notes else []


def _relative(path, root: Path) -> str:
    """``path`` relative to ``root`` when inside it (reports do not depend on where runs live)."""
    try:
        return str(Path(path).relative_to(root))
    except ValueError:
        return str(path)


def build_report(run_dir, out_dir=None, *, dpi: int = 300, n_draws: int = 200,
                 rebuild_model: bool = True) -> Path:
    """Build the report folder of a saved fit or comparison, without refitting.

    Parameters
    ----------
    run_dir : str or Path
        Folder written by ``diskfield fit`` or ``diskfield compare``.
    out_dir : str or Path, optional
        Report folder (default ``run_dir/report``); its ``figures/`` and ``tables/`` are
        replaced.
    dpi : int
        PNG resolution [dots per inch] (300 for print; lower for quick looks and tests).
    n_draws : int
        Posterior draws used for recomputed bands, distances and predictive intervals.
    rebuild_model : bool
        Rebuild the Model (posterior distances, predictive check); False skips it.

    Returns
    -------
    Path
        The written ``report.html``.
    """
    run = load_run(run_dir)
    if rebuild_model:
        attach_models(run)
    else:
        for fit in run.fits.values():
            fit.model_note = "model rebuilding switched off"
    out = Path(out_dir) if out_dir is not None else run.path / "report"
    for sub in ("figures", "tables"):
        shutil.rmtree(out / sub, ignore_errors=True)
    out.mkdir(parents=True, exist_ok=True)
    ctx = ReportContext(out, dpi=dpi, n_draws=n_draws)
    sections = report_sections(ctx, run)
    title = f"diskfield report: {run.path.name}"
    (out / "report.md").write_text(to_markdown_page(title, sections), encoding="utf-8")
    html_path = out / "report.html"
    html_path.write_text(to_html_page(title, sections), encoding="utf-8")
    return html_path
