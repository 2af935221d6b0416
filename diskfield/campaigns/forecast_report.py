"""Tables, figure and report of a forecast campaign.

Files: ``forecast.csv`` (one row per candidate, ranked), ``forecast_draws.csv`` (one row per
simulated draw), ``forecast.{pdf,png}`` (2 ln B distribution per candidate), ``forecast.md``,
``failures.csv`` (only when tasks failed).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..manifest import write_atomic
from .calibration import wilson_interval
from .calibration_report import write_csv
from .forecast import RANKING_CRITERION

__all__ = ["summarise_forecast", "write_forecast_outputs"]


def _candidate_row(name, rows, threshold, current_widths) -> dict:
    b = np.array([r["two_ln_bayes_factor"] for r in rows], dtype=float)
    n, k = b.size, int((np.abs(b) > threshold).sum())
    lo, hi = wilson_interval(k, n)
    out = {"candidate": name, "n_draws": n, "p_decisive": k / n if n else np.nan,
           "p_decisive_lo": lo, "p_decisive_hi": hi,
           "p_ring_decisive": float(np.mean(b > threshold)) if n else np.nan,
           "p_smooth_decisive": float(np.mean(b < -threshold)) if n else np.nan,
           "two_ln_b_median": float(np.median(b)) if n else np.nan,
           "two_ln_b_q16": float(np.quantile(b, 0.16)) if n else np.nan,
           "two_ln_b_q84": float(np.quantile(b, 0.84)) if n else np.nan}
    reductions = []
    for name_w, now in current_widths.items():
        w = np.array([r["widths"][name_w] for r in rows], dtype=float)
        out[f"width_{name_w}"] = float(np.mean(w)) if n else np.nan
        reductions.append(1.0 - np.mean(w) / now if n and now > 0 else np.nan)
        out[f"width_reduction_{name_w}"] = reductions[-1]
    out["mean_width_reduction"] = float(np.nanmean(reductions)) if reductions else np.nan
    out["n_unconverged_fits"] = int(sum(not r["converged"] for r in rows))
    return out


def summarise_forecast(results: list[dict], candidates, threshold: float, context) -> dict:
    """Per-candidate rows (ranked), per-draw rows and the current state of the verdict.

    Parameters
    ----------
    results : list of dict
        Stored task results (stage 1 and 2).
    candidates : sequence of Candidate
    threshold : float
        2 ln B of a decisive verdict.
    context : ForecastContext
    """
    by_id = {r["task_id"]: r["result"] for r in results}
    z0 = by_id["current_evidence_null"]["ln_evidence"]
    z1 = by_id["current_evidence_alternative"]["ln_evidence"]
    current_widths = by_id["current_fit_alternative"]["widths"]
    draws = [r for r in results if r["meta"]["task"] == "forecast"]
    rows = []
    for cand in candidates:
        mine = [r["result"] for r in draws if r["meta"]["candidate"] == cand.candidate]
        rows.append({**_candidate_row(cand.candidate, mine, threshold, current_widths),
                     "body": cand.body, "reservoir": cand.reservoir, "n_records": cand.n_records,
                     "method": cand.method, "ln_err": cand.ln_err})
    rows.sort(key=lambda r: (-_finite(r["p_decisive"]), -_finite(r["mean_width_reduction"])))
    for rank, row in enumerate(rows, 1):
        row["rank"] = rank
    draw_rows = [_draw_row(r) for r in draws]
    return {"rows": rows, "draw_rows": draw_rows, "current_two_ln_b": 2.0 * (z1 - z0),
            "current_widths": current_widths, "p_alternative": context.p_alternative,
            "models": (context.null.profile, context.alternative.profile)}


def _finite(x) -> float:
    return float(x) if np.isfinite(x) else -np.inf


def _draw_row(record: dict) -> dict:
    r = record["result"]
    row = {"task_id": record["task_id"], "candidate": r["candidate"],
           "draw": record["meta"]["draw"],
           "generating_model": r["generating_model"],
           "two_ln_bayes_factor": r["two_ln_bayes_factor"],
           "two_ln_bayes_factor_err": r["two_ln_bayes_factor_err"]}
    row.update({f"width_{k}": v for k, v in r["widths"].items()})
    row.update({f"true_{k}": v for k, v in zip(r["truth_names"], r["truth"])})
    row["converged"] = r["converged"]
    row["wall_time_s"] = record["wall_time_s"]
    return row


def _figure(summary: dict, threshold: float, stem: Path) -> list[Path]:
    from ..plotstyle import new_figure, save_figure

    rows = summary["rows"]
    fig, ax = new_figure(3.6, 0.5 + 0.45 * max(len(rows), 1))
    for i, row in enumerate(rows):
        b = [d["two_ln_bayes_factor"] for d in summary["draw_rows"]
             if d["candidate"] == row["candidate"]]
        jitter = np.linspace(-0.15, 0.15, len(b)) if b else []
        ax.plot(b, i + np.asarray(jitter), "o", ms=2.5, color="#0072B2", alpha=0.7)
        ax.plot([row["two_ln_b_q16"], row["two_ln_b_q84"]], [i, i], color="0.2", lw=1.2)
    for x in (-threshold, threshold):
        ax.axvline(x, color="#D55E00", lw=0.8, ls="--")
    ax.axvline(summary["current_two_ln_b"], color="0.5", lw=0.8, ls=":")
    ax.set_yticks(range(len(rows)), [f"{r['rank']}. {r['candidate']}" for r in rows])
    ax.invert_yaxis()
    ax.set_xlabel(f"2 ln B, {summary['models'][1]} vs {summary['models'][0]}")
    ax.set_title("after each candidate (dotted: now; dashed: decisive)")
    return save_figure(fig, stem, dpi=150)


def write_forecast_outputs(summary: dict, out_dir, *, threshold: float, failures) -> list[Path]:
    """Write forecast.csv, forecast_draws.csv, the figure and forecast.md."""
    out = Path(out_dir)
    paths = [write_csv(out / "forecast.csv", summary["rows"])]
    if summary["draw_rows"]:
        paths.append(write_csv(out / "forecast_draws.csv", summary["draw_rows"]))
        paths += _figure(summary, threshold, out / "forecast")
    if failures:
        paths.append(write_csv(out / "failures.csv", [
            {k: f.get(k) for k in ("task_id", "attempts", "error_type", "message")}
            for f in failures]))
    paths.append(write_atomic(out / "forecast.md", _markdown(summary, threshold, failures)))
    return paths


def _markdown(s: dict, threshold: float, failures) -> str:
    null, alt = s["models"]
    widths = ", ".join(f"{k} {v:.3g}" for k, v in s["current_widths"].items())
    lines = [f"# Forecast: which candidate settles `{alt}` vs `{null}`", "",
             f"Current data: 2 ln B = {s['current_two_ln_b']:.2f} ({alt} vs {null}); "
             f"P({alt}) = {s['p_alternative']:.3f} at equal prior odds; "
             f"ring 68 % half-widths now: {widths}.", "",
             f"Ranking criterion: {RANKING_CRITERION}. Decisive means |2 ln B| > {threshold:g}.",
             "", "| rank | candidate | draws | P(decisive) [Wilson 95 %] | P(ring) | P(smooth) | "
             "2 ln B median [q16, q84] | mean width reduction |",
             "|---|---|---|---|---|---|---|---|"]
    for r in s["rows"]:
        lines.append(
            f"| {r['rank']} | {r['candidate']} | {r['n_draws']} | {r['p_decisive']:.2f} "
            f"[{r['p_decisive_lo']:.2f}, {r['p_decisive_hi']:.2f}] | {r['p_ring_decisive']:.2f} | "
            f"{r['p_smooth_decisive']:.2f} | {r['two_ln_b_median']:.2f} [{r['two_ln_b_q16']:.2f}, "
            f"{r['two_ln_b_q84']:.2f}] | {r['mean_width_reduction']:.1%} |")
    lines += ["", "New records are simulated from the current posterior predictive (model chosen "
              "by its current probability, parameters from its posterior draws); latent "
              "distance, spin, calibration and age of the new records are drawn afresh given "
              "the parameters, also for an existing body (an approximation: its distance and "
              "spin are not conditioned on its existing records)."]
    if failures:
        lines += ["", f"{len(failures)} task(s) failed after retries; see failures.csv."]
    return "\n".join(lines) + "\n"
