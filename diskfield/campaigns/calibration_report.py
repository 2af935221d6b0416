"""Tables, figures and a short report from a calibration campaign's stored results.

Files written into the campaign folder:
``calibration.csv`` (one row per simulation), ``sbc_summary.csv`` (per parameter: rank
uniformity tests and coverage), ``verdict_rates.csv``, ``rank_histograms.{pdf,png}``,
``coverage.{pdf,png}``, ``calibration.md``, ``failures.csv`` (only when tasks failed).
"""
from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import stats

from ..manifest import write_atomic
from .calibration import coverage_summary, rank_uniformity, verdict_rates

__all__ = ["CalibrationSummary", "summarise_calibration", "write_calibration_outputs",
           "write_csv"]


@dataclass
class CalibrationSummary:
    """Everything the calibration outputs are built from.

    Attributes
    ----------
    parameter_names : tuple of str
    n_draws : int
        L, posterior draws per rank.
    ranks : ndarray, shape (N, P)
    sbc_rows : list of dict
        Per parameter: uniformity tests and coverage (the rows of ``sbc_summary.csv``).
    verdict_rows : list of dict
        Rows of ``verdict_rates.csv`` (empty when no verdict simulations ran).
    sim_rows : list of dict
        Rows of ``calibration.csv``.
    failures : list of dict
    n_unconverged : int
        SBC fits flagged unconverged (kept; their effect shows in the ranks).
    """

    parameter_names: tuple
    n_draws: int
    ranks: np.ndarray
    sbc_rows: list
    verdict_rows: list
    sim_rows: list
    failures: list = field(default_factory=list)
    n_unconverged: int = 0


def write_csv(path, rows: list[dict]) -> Path:
    """Write dict rows as CSV (union of keys, first-seen order), atomically."""
    keys = list(dict.fromkeys(k for row in rows for k in row))
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=keys, lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: _cell(row.get(k)) for k in keys})
    return write_atomic(path, buf.getvalue())


def _cell(value):
    if value is None:
        return ""
    if isinstance(value, (float, np.floating)):
        return "" if not np.isfinite(value) else repr(float(value))
    return value


def _sim_row(record: dict) -> dict:
    res, meta = record["result"], record["meta"]
    row = {"task_id": record["task_id"], "task": meta["task"], "sim": meta["sim"]}
    names = res.get("parameter_names", [])
    truth = res.get("truth") or []
    if meta["task"] == "sbc":
        for name, t, r, sd in zip(names, truth, res["rank"], res["posterior_sd"]):
            row.update({f"true_{name}": t, f"rank_{name}": r, f"posterior_sd_{name}": sd})
        row["converged"] = bool(res["diagnostics"].get("converged", True))
    else:
        row.update({"generating_model": res["generating_model"],
                    "two_ln_bayes_factor": res["two_ln_bayes_factor"],
                    "two_ln_bayes_factor_err": res["two_ln_bayes_factor_err"]})
        for name, t in zip(res.get("truth_names", []), truth):
            row[f"true_{name}"] = t
    row["wall_time_s"] = record["wall_time_s"]
    return row


def summarise_calibration(results: list[dict], failures: list[dict], n_draws: int,
                          threshold: float, model_names: tuple[str, str] | None,
                          seed: int) -> CalibrationSummary:
    """Reduce stored task results to the calibration tables.

    Parameters
    ----------
    results, failures : list of dict
        From :class:`~diskfield.campaigns.store.ResultStore`.
    n_draws : int
        L used by the SBC tasks.
    threshold : float
        2 ln B threshold of a decisive verdict.
    model_names : (null, alternative) or None
    seed : int
        Seeds the randomised ranks of the KS test.
    """
    sbc = [r for r in results if r["meta"]["task"] == "sbc"]
    names = tuple(sbc[0]["result"]["parameter_names"]) if sbc else ()
    ranks = np.array([r["result"]["rank"] for r in sbc], dtype=int).reshape(len(sbc), len(names))
    sbc_rows = _sbc_rows(sbc, names, ranks, n_draws, seed)
    verdict_rows = []
    if model_names is not None:
        null = [r["result"]["two_ln_bayes_factor"] for r in results
                if r["meta"]["task"] == "verdict_null"]
        alt = [r["result"]["two_ln_bayes_factor"] for r in results
               if r["meta"]["task"] == "verdict_alternative"]
        if null or alt:
            verdict_rows = verdict_rates(null, alt, threshold, *model_names)
    unconverged = sum(not r["result"]["diagnostics"].get("converged", True) for r in sbc)
    return CalibrationSummary(names, n_draws, ranks, sbc_rows, verdict_rows,
                              [_sim_row(r) for r in results], failures, unconverged)


def _sbc_rows(sbc, names, ranks, n_draws, seed) -> list[dict]:
    if not sbc:
        return []
    tests = rank_uniformity(ranks, n_draws, np.random.default_rng(seed))
    levels = sbc[0]["result"]["covered"].keys()
    covered = {lv: np.array([r["result"]["covered"][lv] for r in sbc]) for lv in levels}
    cover = coverage_summary(covered)
    rows = []
    for j, name in enumerate(names):
        t = tests[j]
        row = {"parameter": name, "n_sims": len(sbc), "n_draws": n_draws, "n_bins": t["n_bins"],
               "chi2": t["chi2"], "chi2_dof": t["chi2_dof"], "chi2_p": t["chi2_p"],
               "ks_stat": t["ks_stat"], "ks_p": t["ks_p"], "uniform": t["uniform"]}
        for lv, per_param in cover.items():
            tag = f"{round(float(lv) * 100):d}"
            row.update({f"coverage_{tag}": per_param[j]["coverage"],
                        f"coverage_{tag}_lo": per_param[j]["lo"],
                        f"coverage_{tag}_hi": per_param[j]["hi"]})
        rows.append(row)
    return rows


def _rank_figure(summary: CalibrationSummary, stem: Path) -> list[Path]:
    from ..plotstyle import new_figure, save_figure

    names = summary.parameter_names
    ncol = min(3, len(names))
    nrow = -(-len(names) // ncol)
    fig, axes = new_figure(2.4 * ncol, 2.0 * nrow, nrows=nrow, ncols=ncol, squeeze=False)
    n_sims = summary.ranks.shape[0]
    for j, ax in enumerate(axes.ravel()):
        if j >= len(names):
            ax.set_visible(False)
            continue
        n_bins = summary.sbc_rows[j]["n_bins"]
        counts = np.bincount(summary.ranks[:, j] * n_bins // (summary.n_draws + 1),
                             minlength=n_bins)
        # 99 % band of a bin count under uniform ranks: Binomial(N, 1/B) (Talts et al. 2018).
        lo, hi = stats.binom.ppf([0.005, 0.995], n_sims, 1.0 / n_bins)
        ax.axhspan(lo, hi, color="0.85", lw=0)
        ax.axhline(n_sims / n_bins, color="0.5", lw=0.6)
        ax.bar(np.arange(n_bins), counts, width=1.0, color="#0072B2", edgecolor="white", lw=0.3)
        ax.set_title(f"{names[j]}\nchi-square p = {summary.sbc_rows[j]['chi2_p']:.2g}")
        ax.set_xlabel(f"rank bin (L = {summary.n_draws})")
        ax.set_ylabel("simulations")
    return save_figure(fig, stem, dpi=150)


def _coverage_figure(summary: CalibrationSummary, stem: Path) -> list[Path]:
    from ..plotstyle import OKABE_ITO, new_figure, save_figure

    fig, ax = new_figure(3.4, 2.8)
    levels = sorted({k for row in summary.sbc_rows for k in row
                     if k.startswith("coverage_") and k.count("_") == 1})
    nominal = np.array([int(k.split("_")[1]) / 100 for k in levels])
    ax.plot([0, 1], [0, 1], color="0.5", lw=0.6, ls=":")
    for j, row in enumerate(summary.sbc_rows):
        y = np.array([row[k] for k in levels])
        err = np.array([[row[k] - row[f"{k}_lo"] for k in levels],
                        [row[f"{k}_hi"] - row[k] for k in levels]])
        ax.errorbar(nominal + 0.006 * (j - len(summary.sbc_rows) / 2), y, yerr=err, marker="o",
                    lw=0.8, capsize=1.5, color=OKABE_ITO[(j + 1) % len(OKABE_ITO)],
                    label=row["parameter"])
    ax.set_xlabel("nominal credible level")
    ax.set_ylabel("empirical coverage (Wilson 95 %)")
    ax.set_xlim(0.4, 1.0)
    ax.set_ylim(0.0, 1.02)
    ax.legend(loc="lower right")
    return save_figure(fig, stem, dpi=150)


def write_calibration_outputs(summary: CalibrationSummary, out_dir, *, model: str,
                              threshold: float, n_sims_requested: int) -> list[Path]:
    """Write the CSV tables, figures and ``calibration.md``; returns the paths written."""
    out = Path(out_dir)
    paths = [write_csv(out / "calibration.csv", summary.sim_rows)]
    if summary.sbc_rows:
        paths.append(write_csv(out / "sbc_summary.csv", summary.sbc_rows))
        paths += _rank_figure(summary, out / "rank_histograms")
        paths += _coverage_figure(summary, out / "coverage")
    if summary.verdict_rows:
        paths.append(write_csv(out / "verdict_rates.csv", summary.verdict_rows))
    failure_file = out / "failures.csv"
    if summary.failures:
        paths.append(write_csv(failure_file, [_failure_row(f) for f in summary.failures]))
    else:
        failure_file.unlink(missing_ok=True)
    text = _markdown(summary, model, threshold, n_sims_requested)
    paths.append(write_atomic(out / "calibration.md", text))
    return paths


def _failure_row(f: dict) -> dict:
    return {"task_id": f["task_id"], "attempts": f.get("attempts"),
            "error_type": f.get("error_type"), "message": f.get("message")}


def _markdown(s: CalibrationSummary, model: str, threshold: float, n_req: int) -> str:
    lines = [f"# Simulation-based calibration: model `{model}`", "",
             f"{s.ranks.shape[0]} of {n_req} SBC simulations finished; "
             f"{len(s.failures)} task(s) failed after retries"
             + (" (listed in failures.csv)." if s.failures else "."),
             f"Unconverged SBC fits (kept, they show in the ranks): {s.n_unconverged}.", "",
             "Ranks of the true value among L posterior draws are uniform for a calibrated "
             "fit (Talts et al. 2018, arXiv:1804.06788). Test: Pearson chi-square on binned "
             "ranks (B bins dividing L + 1), non-uniform when p < 0.01; KS on randomised "
             "normalised ranks alongside.", "",
             "| parameter | bins | chi2 p | KS p | uniform | cov. 50 % | cov. 68 % | cov. 90 % | "
             "cov. 95 % |", "|---|---|---|---|---|---|---|---|---|"]
    for r in s.sbc_rows:
        cov = " | ".join(f"{r.get(f'coverage_{t}', np.nan):.2f}" for t in (50, 68, 90, 95))
        lines.append(f"| {r['parameter']} | {r['n_bins']} | {r['chi2_p']:.3g} | {r['ks_p']:.3g} "
                     f"| {'yes' if r['uniform'] else '**no**'} | {cov} |")
    if s.verdict_rows:
        lines += ["", f"## Verdict rates at 2 ln B > {threshold:g}", "",
                  "| rate | generating model | events / sims | value | Wilson 95 % |",
                  "|---|---|---|---|---|"]
        for r in s.verdict_rows:
            lines.append(f"| {r['rate']} | {r['generating_model']} | {r['n_events']} / "
                         f"{r['n_sims']} | {r['value']:.3f} | {r['wilson95_lo']:.3f}–"
                         f"{r['wilson95_hi']:.3f} |")
        lines += ["", "Alternative-model parameters are drawn from its prior, so the detection "
                  "rate is averaged over the prior (weak rings included)."]
    return "\n".join(lines) + "\n"
