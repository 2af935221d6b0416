"""Manuscript tables: LaTeX (AASTeX ``deluxetable`` and plain ``tabular``), Markdown, CSV.

A :class:`TextTable` holds already-rounded cells: plain text (escaped for LaTeX here — astropy's
LaTeX writer escapes nothing) or a :class:`Measure` (value with symmetric or asymmetric
uncertainties, rounded by :mod:`diskfield.sigfig`). Builders turn saved-run data into tables:
:func:`comparison_table`, :func:`summary_table`, :func:`compilation_table`.
"""
from __future__ import annotations

import csv
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .sigfig import format_significant, round_asymmetric, round_to_decimals, round_with_uncertainty

__all__ = [
    "Column",
    "Measure",
    "TextTable",
    "latex_escape",
    "markdown_escape",
    "plain_cell",
    "to_latex",
    "to_markdown",
    "to_csv",
    "write_table",
    "measure",
    "measure_asymmetric",
    "comparison_table",
    "summary_table",
    "compilation_table",
    "PARAMETER_UNITS",
]

_LATEX_SPECIALS = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
    "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
}
_LATEX_RE = re.compile("|".join(re.escape(k) for k in _LATEX_SPECIALS))
# Non-ASCII symbols our own texts use: pdfLaTeX stops on Greek letters without extra packages,
# so every table file is plain ASCII LaTeX (convention).
_LATEX_UNICODE = {
    "Δ": r"$\Delta$", "τ": r"$\tau$", "θ": r"$\theta$", "σ": r"$\sigma$", "µ": r"$\mu$",
    "μ": r"$\mu$", "±": r"$\pm$", "×": r"$\times$", "≤": r"$\leq$", "≥": r"$\geq$",
    "−": "$-$", "–": "--", "—": "---", "→": r"$\to$", "≈": r"$\approx$", "…": r"\ldots{}",
}
_UNICODE_RE = re.compile("|".join(re.escape(k) for k in _LATEX_UNICODE))

#: LaTeX for units written in headers; other units are escaped text (convention).
_LATEX_UNITS = {"uT": r"$\mu$T", "Msun/yr": r"$M_\odot$\,yr$^{-1}$",
                "solMass / yr": r"$M_\odot$\,yr$^{-1}$"}

#: Units of the team's shared parameter names (used when a profile registry is not at hand).
PARAMETER_UNITS = {
    "field_1au": "uT", "power_index": "", "ring_amplitude": "", "ring_radius": "AU",
    "ring_width": "AU", "ring2_amplitude": "", "ring2_radius": "AU", "ring2_width": "AU",
    "break_radius": "AU", "power_index_outer": "", "accretion_rate": "Msun/yr",
    "stress_efficiency": "", "geometry_factor": "", "dissipation_time": "Myr",
    "dissipation_edge": "Myr", "residual_fraction": "", "viscous_time": "Myr",
    "viscous_eta": "", "intrinsic_scatter": "",
}


@dataclass(frozen=True)
class Column:
    """A table column.

    Attributes
    ----------
    key : str
        Machine name (CSV header).
    label : str
        Plain-text header (escaped for LaTeX unless ``latex`` is given).
    unit : str
        Unit shown under the header in parentheses (``"uT"``, ``"AU"``; ``""`` for none).
    latex : str or None
        Ready-made LaTeX header (not escaped), e.g. ``r"$\\ln Z$"``.
    align : str
        LaTeX alignment letter (``"l"``, ``"c"``, ``"r"``).
    """

    key: str
    label: str
    unit: str = ""
    latex: str | None = None
    align: str = "c"


@dataclass(frozen=True)
class Measure:
    """A rounded value with its uncertainty (strings from :mod:`diskfield.sigfig`).

    ``minus == plus`` (or ``plus == ""``) prints as ``value ± err``; otherwise as
    ``value +plus/-minus``; empty uncertainties print the value alone.
    """

    value: str
    minus: str = ""
    plus: str = ""

    @property
    def symmetric(self) -> bool:
        return self.plus == self.minus or not self.plus


@dataclass(frozen=True)
class TextTable:
    """A rounded table ready for writing.

    Attributes
    ----------
    columns : tuple of Column
    rows : tuple of tuple
        Cells: ``str`` (plain text) or :class:`Measure`.
    caption : str
        Plain text (escaped for LaTeX).
    label : str
        LaTeX label, e.g. ``"tab:comparison"``.
    notes : tuple of str
        Plain-text notes printed below the table.
    """

    columns: tuple[Column, ...]
    rows: tuple[tuple, ...]
    caption: str = ""
    label: str = ""
    notes: tuple[str, ...] = field(default=())


def latex_escape(text) -> str:
    """Escape LaTeX's special characters ``\\ & % $ # _ { } ~ ^`` in plain text.

    Newlines become spaces (a table cell is one line); the Greek letters and symbols of
    diskfield's own texts (Δ, τ, ±, en dash, ...) become their LaTeX commands.
    """
    text = " ".join(str(text).splitlines())
    text = _LATEX_RE.sub(lambda m: _LATEX_SPECIALS[m.group(0)], text)
    return _UNICODE_RE.sub(lambda m: _LATEX_UNICODE[m.group(0)], text)


def markdown_escape(text) -> str:
    """Escape a Markdown table cell (pipes, backslashes, newlines)."""
    text = " ".join(str(text).splitlines())
    return text.replace("\\", "\\\\").replace("|", "\\|")


def measure(value, err) -> Measure:
    """A :class:`Measure` rounded from a value and its 1-sigma uncertainty."""
    v, e = round_with_uncertainty(_float(value), _float(err))
    return Measure(v, e, e)


def measure_asymmetric(value, minus, plus) -> Measure:
    """A :class:`Measure` rounded from a value and its down/up uncertainties."""
    v, m, p = round_asymmetric(_float(value), _float(minus), _float(plus))
    return Measure(v, m, p)


def _float(x) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


# --- writers -----------------------------------------------------------------------------

def _latex_cell(cell) -> str:
    if not isinstance(cell, Measure):
        return latex_escape(cell)
    if not cell.minus and not cell.plus:
        return f"${cell.value}$"
    if cell.symmetric:
        return f"${cell.value} \\pm {cell.minus}$"
    return f"${cell.value}^{{+{cell.plus}}}_{{-{cell.minus}}}$"


def _label(label: str) -> str:
    """A LaTeX label key: characters other than letters, digits and ``:_-.`` become ``-``."""
    return re.sub(r"[^A-Za-z0-9:_.\-]", "-", label)


def _latex_header(col: Column) -> tuple[str, str]:
    head = col.latex if col.latex is not None else latex_escape(col.label)
    unit = f"({_LATEX_UNITS.get(col.unit, latex_escape(col.unit))})" if col.unit else ""
    return head, unit


def to_latex(table: TextTable, style: str = "aastex") -> str:
    """The table as LaTeX.

    Parameters
    ----------
    table : TextTable
    style : {"aastex", "tabular"}
        ``aastex``: an AASTeX ``deluxetable``; ``tabular``: a ``table`` float with a plain
        ``tabular`` (needs no package beyond LaTeX itself).

    Returns
    -------
    str
    """
    if style not in ("aastex", "tabular"):
        raise ValueError(f"LaTeX style {style!r} unknown; valid: aastex, tabular")
    heads = [_latex_header(c) for c in table.columns]
    body = [" & ".join(_latex_cell(c) for c in row) + r" \\" for row in table.rows]
    align = "".join(c.align for c in table.columns)
    writer = _aastex if style == "aastex" else _tabular
    return writer(table, heads, body, align)


def _aastex(table, heads, body, align) -> str:
    label = f"\\label{{{_label(table.label)}}}" if table.label else ""
    lines = [f"\\begin{{deluxetable*}}{{{align}}}",
             f"\\tablecaption{{{latex_escape(table.caption)}{label}}}",
             "\\tablehead{" + " & ".join(f"\\colhead{{{h}}}" for h, _ in heads)
             + " \\\\ " + " & ".join(f"\\colhead{{{u}}}" for _, u in heads) + "}",
             "\\startdata", *body, "\\enddata"]
    if table.notes:
        lines.append(f"\\tablecomments{{{latex_escape(' '.join(table.notes))}}}")
    lines.append("\\end{deluxetable*}")
    return "\n".join(lines) + "\n"


def _tabular(table, heads, body, align) -> str:
    lines = ["\\begin{table*}", "\\centering"]
    if table.caption:
        lines.append(f"\\caption{{{latex_escape(table.caption)}}}")
    if table.label:
        lines.append(f"\\label{{{_label(table.label)}}}")
    lines += [f"\\begin{{tabular}}{{{align}}}", "\\hline",
              " & ".join(h for h, _ in heads) + r" \\"]
    if any(u for _, u in heads):
        lines.append(" & ".join(u for _, u in heads) + r" \\")
    lines += ["\\hline", *body, "\\hline", "\\end{tabular}"]
    lines += [f"\\par\\smallskip{{\\footnotesize {latex_escape(n)}}}" for n in table.notes]
    lines.append("\\end{table*}")
    return "\n".join(lines) + "\n"


def plain_cell(cell, minus: str = "-") -> str:
    """A cell as plain text: ``value ± err`` or ``value +plus/-minus`` (``minus``: the sign)."""
    if not isinstance(cell, Measure):
        return str(cell)
    if not cell.minus and not cell.plus:
        return cell.value
    if cell.symmetric:
        return f"{cell.value} ± {cell.minus}"
    return f"{cell.value} +{cell.plus}/{minus}{cell.minus}"


def to_markdown(table: TextTable) -> str:
    """The table as GitHub-flavoured Markdown (caption above, notes below)."""
    heads = [c.label + (f" ({c.unit})" if c.unit else "") for c in table.columns]
    lines = []
    if table.caption:
        lines += [f"**{markdown_escape(table.caption)}**", ""]
    lines.append("| " + " | ".join(markdown_escape(h) for h in heads) + " |")
    lines.append("|" + "|".join("---" for _ in heads) + "|")
    for row in table.rows:
        lines.append("| " + " | ".join(markdown_escape(plain_cell(c)) for c in row) + " |")
    if table.notes:
        lines += [""] + [markdown_escape(n) for n in table.notes]
    return "\n".join(lines) + "\n"


def to_csv(table: TextTable) -> str:
    """The rounded table as CSV; a :class:`Measure` column ``k`` gives ``k``, ``k_minus``, ``k_plus``."""
    is_measure = [any(isinstance(r[i], Measure) for r in table.rows)
                  for i in range(len(table.columns))]
    header = []
    for col, m in zip(table.columns, is_measure):
        header += [col.key, f"{col.key}_minus", f"{col.key}_plus"] if m else [col.key]
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    for row in table.rows:
        cells = []
        for cell, m in zip(row, is_measure):
            if isinstance(cell, Measure):
                cells += [cell.value, cell.minus, cell.plus or cell.minus]
            else:
                cells += [str(cell), "", ""] if m else [str(cell)]
        writer.writerow(cells)
    return out.getvalue()


def write_table(table: TextTable, stem) -> list[Path]:
    """Write ``stem.tex`` (tabular), ``stem_aastex.tex``, ``stem.md`` and ``stem.csv``.

    Parameters
    ----------
    table : TextTable
    stem : str or Path
        Output path without extension.

    Returns
    -------
    list of Path
    """
    stem = Path(stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    outputs = {stem.with_suffix(".tex"): to_latex(table, "tabular"),
               stem.parent / f"{stem.name}_aastex.tex": to_latex(table, "aastex"),
               stem.with_suffix(".md"): to_markdown(table),
               stem.with_suffix(".csv"): to_csv(table)}
    for path, text in outputs.items():
        path.write_text(text, encoding="utf-8")
    return list(outputs)


# --- builders ----------------------------------------------------------------------------

def _fixed(x, decimals: int = 1) -> str:
    x = _float(x)
    return "" if math.isnan(x) else round_to_decimals(x, decimals)


def _yes_no(x) -> str:
    return "yes" if str(x).strip().lower() in ("1", "true", "yes", "1.0") else "no"


def comparison_table(rows: list[dict], reference: str = "smooth") -> TextTable:
    """Model-comparison table from ``comparison.csv`` rows.

    Parameters
    ----------
    rows : list of dict
        One dict per model with the DESIGN §6 columns (strings or numbers); optional
        ``elpd_diff``/``elpd_diff_se`` (ΔELPD against the reference, with its SE) and
        ``ln_bayes_factor_err``.
    reference : str
        Reference model of the Bayes factors and ΔELPD.

    Returns
    -------
    TextTable
        Unconverged models are marked ``*`` in the model column and in a note.
    """
    cols = (Column("model", "Model", align="l"), Column("n_params", "k"),
            Column("max_log_likelihood", "max ln L", latex=r"$\max\ln L$"),
            Column("aic", "AIC"), Column("bic", "BIC"),
            Column("elpd_loo", "ELPD(LOO)", latex=r"ELPD$_{\rm LOO}$"),
            Column("elpd_diff", "ΔELPD", latex=r"$\Delta$ELPD"),
            Column("pareto_k_max", "max Pareto k", latex=r"$\max k$"),
            Column("ln_evidence", "ln Z", latex=r"$\ln Z$"),
            Column("ln_bayes_factor", f"ln B vs {reference}",
                   latex=rf"$\ln B$ vs {latex_escape(reference)}"),
            Column("converged", "Converged"), Column("rhat_max", "max R-hat",
                                                      latex=r"$\max\hat R$"),
            Column("ess_min", "min ESS"))
    body, unconverged = [], []
    for r in rows:
        name = str(r["model"])
        if _yes_no(r.get("converged")) == "no":
            unconverged.append(name)
            name += "*"
        body.append((name, str(r.get("n_params", "")), _fixed(r.get("max_log_likelihood")),
                     _fixed(r.get("aic")), _fixed(r.get("bic")),
                     measure(r.get("elpd_loo"), r.get("elpd_loo_se")),
                     measure(r.get("elpd_diff"), r.get("elpd_diff_se")),
                     _fixed(r.get("pareto_k_max"), 2),
                     measure(r.get("ln_evidence"), r.get("ln_evidence_err")),
                     measure(r.get("ln_bayes_factor"), r.get("ln_bayes_factor_err")),
                     _yes_no(r.get("converged")), _fixed(r.get("rhat_max"), 3),
                     _fixed(r.get("ess_min"), 0)))
    notes = ["AIC, BIC: lower is better; ELPD(LOO), ln Z: higher is better; ΔELPD and ln B "
             f"are against {reference} (positive favours the model).",
             "ELPD leaves out one parent body at a time.",
             "The verdict quotes 2 ln B, the Kass & Raftery (1995) scale: twice the ln B "
             "column."]
    if unconverged:
        notes.append(f"* not converged: {', '.join(unconverged)} (treat with caution).")
    return TextTable(cols, tuple(body), caption="Model comparison", label="tab:comparison",
                     notes=tuple(notes))


def summary_table(rows: list[dict], model: str, units: dict | None = None) -> TextTable:
    """Posterior-summary table from ``posterior_summary_<model>.csv`` rows.

    Parameters
    ----------
    rows : list of dict
        Columns ``parameter, median, q05, q16, q84, q95, rhat, ess_bulk``.
    model : str
        Model name (caption and label).
    units : dict, optional
        Parameter name -> unit string; default :data:`PARAMETER_UNITS`.

    Returns
    -------
    TextTable
        Median with 16–84 % offsets, the 5–95 % interval, R-hat and bulk ESS.
    """
    units = PARAMETER_UNITS if units is None else units
    cols = (Column("parameter", "Parameter", align="l"), Column("unit", "Unit"),
            Column("median", "Median and 68% interval"), Column("interval_90", "90% interval"),
            Column("rhat", "R-hat", latex=r"$\hat R$"), Column("ess_bulk", "ESS (bulk)"))
    body = []
    for r in rows:
        med, q16, q84 = (_float(r.get(k)) for k in ("median", "q16", "q84"))
        m = measure_asymmetric(med, med - q16, q84 - med)
        d = _decimals_of(m)
        interval = f"{_round(r.get('q05'), d)} to {_round(r.get('q95'), d)}"
        body.append((str(r["parameter"]), units.get(str(r["parameter"]), ""), m, interval,
                     _fixed(r.get("rhat"), 3), _fixed(r.get("ess_bulk"), 0)))
    return TextTable(cols, tuple(body), caption=f"Posterior summary, model {model}",
                     label=f"tab:posterior_{model}",
                     notes=("Median with the 16th–84th percentile range; 90% interval is "
                            "the 5th–95th percentiles.",))


def _decimals_of(m: Measure):
    text = m.minus or m.value
    return len(text.split(".")[1]) if "." in text else None


def _round(x, decimals) -> str:
    x = _float(x)
    return format_significant(x, 3) if decimals is None else round_to_decimals(x, decimals)


def compilation_table(table) -> TextTable:
    """The compilation as fitted, with exclusions marked and their notes.

    Parameters
    ----------
    table : astropy.table.Table
        The compilation as read (``compilation.ecsv``): columns ``record, body, reservoir,
        kind, paleointensity`` [uT] and optionally ``paleointensity_err``, ``age``,
        ``age_err``, ``age_min``, ``age_max``, ``method``, ``remanence``, ``include``,
        ``note``.

    Returns
    -------
    TextTable
    """
    cols = (Column("record", "Record", align="l"), Column("body", "Body", align="l"),
            Column("reservoir", "Reservoir"), Column("kind", "Kind"),
            Column("paleointensity", "Paleointensity", unit="uT"),
            Column("age", "Age", unit="Myr"), Column("method", "Method"),
            Column("remanence", "Remanence"), Column("fitted", "Fitted"),
            Column("note", "Note", align="l"))
    body, n_excluded = [], 0
    for row in table:
        fitted = _row_get(row, "include", True) not in (False, "false", "False", 0)
        n_excluded += not fitted
        body.append((str(row["record"]), str(row["body"]), str(row["reservoir"]),
                     str(row["kind"]), _intensity_cell(row), _age_cell(row),
                     str(_row_get(row, "method", "")), str(_row_get(row, "remanence", "")),
                     "yes" if fitted else "no (excluded)", str(_row_get(row, "note", ""))))
    notes = (f"{len(body) - n_excluded} records fitted, {n_excluded} excluded "
             "(kept in the file; the note gives the reason).",
             "Upper limits: the value is the limit.")
    return TextTable(cols, tuple(body), caption="Compilation as fitted",
                     label="tab:compilation", notes=notes)


def _row_get(row, name, default):
    if name not in row.colnames:
        return default
    value = row[name]
    if value is None or np.ma.is_masked(value):
        return default
    if isinstance(value, float) and math.isnan(value):
        return default
    return value.item() if hasattr(value, "item") else value


def _intensity_cell(row):
    value = _float(_row_get(row, "paleointensity", math.nan))
    err = _float(_row_get(row, "paleointensity_err", math.nan))
    if str(row["kind"]) == "upper_limit":
        return f"< {format_significant(value, 2)}"
    return measure(value, err)


def _age_cell(row):
    age = _float(_row_get(row, "age", math.nan))
    if not math.isnan(age):
        return measure(age, _float(_row_get(row, "age_err", math.nan)))
    lo, hi = (_float(_row_get(row, k, math.nan)) for k in ("age_min", "age_max"))
    if not (math.isnan(lo) or math.isnan(hi)):
        return f"{format_significant(lo, 2)} to {format_significant(hi, 2)}"
    return "reservoir default"
