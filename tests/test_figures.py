"""Figure inputs (record-implied fields, distances, bands, coverage) and the figures' files."""
from __future__ import annotations

import numpy as np
import pytest
from astropy.table import Table
from scipy import stats

from diskfield import figures as F
from diskfield.plotstyle import RESERVOIR_MARKERS, reservoir_marker, save_figure
from diskfield.priorspec import Fixed, LogNormal, Uniform

from _saved_run import make_saved_run
from conftest import seed_for

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
PDF_MAGIC = b"%PDF-"

_CAL = {"ARM": LogNormal(1.0, 0.8), "IRM": LogNormal(1.0, 0.6), "thermal": Fixed(1.0)}
_REM = {"TRM": Fixed(1.0), "CRM": LogNormal(0.5, 0.7), "unknown": LogNormal(0.8, 0.8)}
_AGES = {"NC": Uniform(1.0, 4.0), "CC": Uniform(2.0, 5.0)}
_DIST = {"NC": Uniform(1.0, 3.0), "CC": Uniform(3.0, 7.0)}


@pytest.fixture(scope="module")
def compilation(tmp_path_factory):
    run = make_saved_run(tmp_path_factory.mktemp("figs") / "run", kind="fit")
    return Table.read(run / "compilation.ecsv", format="ascii.ecsv")


def _assert_files(paths) -> None:
    by_suffix = {p.suffix: p for p in paths}
    assert by_suffix[".png"].read_bytes()[:8] == PNG_MAGIC
    assert by_suffix[".pdf"].read_bytes()[:5] == PDF_MAGIC
    assert all(p.stat().st_size > 1000 for p in paths)


def test_implied_field_matches_monte_carlo():
    # derived: ln B = ln P - ln c - ln u with -ln u ~ Exponential(1) for u ~ Uniform(0, 1)
    rng = np.random.default_rng(seed_for("implied-mc"))
    mu, sd = np.log(20.0), 0.4
    ln_b = rng.normal(mu, sd, 400_000) - np.log(rng.uniform(size=400_000))
    mc = np.exp(np.percentile(ln_b, [16, 50, 84]))
    np.testing.assert_allclose(F.implied_field_quantiles(mu, sd), mc, rtol=5e-3)


def test_implied_field_limits():
    # derived: with no Gaussian spread, the median of 1/u for u ~ Uniform(0, 1) is 2
    np.testing.assert_allclose(F.implied_field_quantiles(np.log(10.0), 0.0, pct=(50,)), [20.0])
    # spin "none": plain lognormal quantiles
    q = F.implied_field_quantiles(np.log(10.0), 0.5, spin="none")
    np.testing.assert_allclose(q, 10.0 * np.exp(0.5 * stats.norm.ppf([0.16, 0.5, 0.84])))


def test_record_points_from_compilation(compilation):
    points = F.record_points(compilation, _CAL, _REM, _AGES, spin="body")
    by_id = {p.record: p for p in points}
    assert "G-2" not in by_id  # excluded row
    assert by_id["B-1"].is_limit and not by_id["A-1"].is_limit
    # thermal/TRM fixed at 1 -> only measurement error (3/9 in ln) and the spin term
    expected = F.implied_field_quantiles(np.log(9.0), 3.0 / 9.0)
    np.testing.assert_allclose(by_id["A-1"].implied_ut, expected)
    # G-1: CRM median 0.5 doubles the implied field's Gaussian centre
    ln_sd = np.sqrt(0.8 ** 2 + 0.7 ** 2 + (4.0 / 14.0) ** 2)
    np.testing.assert_allclose(by_id["G-1"].implied_ut,
                               F.implied_field_quantiles(np.log(14.0 / 0.5), ln_sd))
    assert by_id["A-1"].age_myr == pytest.approx((1.7, 2.0, 2.3))


def test_body_points_from_prior_and_posterior(compilation):
    prior = {b.body: b for b in F.body_points_from_prior(compilation, _DIST)}
    assert prior["PB-Gamma"].distance_au == pytest.approx((3.64, 5.0, 6.36))
    assert prior["PB-Alpha"].source == "prior"
    # posterior pooled over draws: two draws with all weight on one node each -> 50/50 mixture
    r = np.array([[[1.0, 2.0, 3.0]], [[1.0, 2.0, 3.0]]])
    w = np.array([[[0.0, 1.0, 0.0]], [[0.0, 0.0, 1.0]]])
    post = F.body_points_from_posterior(r, w, ["PB-Alpha"], ["NC"])[0]
    assert post.distance_au == pytest.approx((2.0, 2.5, 3.0))
    assert post.source == "posterior"


def test_bands_from_draws_and_rows():
    theta = np.column_stack([np.linspace(10.0, 30.0, 101), np.full(101, 1.0)])
    log_field = lambda th, r, t: np.log(th[:, :1]) - th[:, 1:] * np.log(np.atleast_1d(r))  # noqa
    bands = F.bands_from_draws(log_field, theta, np.array([1.0, 2.0]), 0.0)
    np.testing.assert_allclose(bands.q[2], [20.0, 10.0])
    # percentiles are taken of ln B (then exponentiated)
    low = np.exp(np.percentile(np.log(theta[:, 0]), 2.5))
    np.testing.assert_allclose(bands.q[0], low * np.array([1.0, 0.5]))
    rows = {"r_au": np.array([2.0, 1.0, 1.0]), "t_myr": np.array([0.0, 0.0, 3.0]),
            "b_median_ut": np.array([5.0, 10.0, 7.0]), "b_q025_ut": np.ones(3),
            "b_q16_ut": np.ones(3), "b_q84_ut": np.ones(3), "b_q975_ut": np.ones(3)}
    b = F.bands_from_profile_rows(rows, 0.4)
    np.testing.assert_allclose(b.x, [1.0, 2.0])
    np.testing.assert_allclose(b.q[2], [10.0, 5.0])


def test_predictive_coverage_counts():
    # every record's predictive values spread evenly over 1..100 uT:
    # 68% interval ~ 16.8..84 uT, 95% ~ 3.5..97.5 uT
    sim = np.log(np.repeat(np.linspace(1.0, 100.0, 201)[:, None], 4, axis=1))
    iv = F.predictive_intervals(sim)
    cov = F.predictive_coverage(np.log([10.0, 50.0, 1000.0, 2.0]), [False, False, False, True],
                                iv)
    assert cov == {"n_estimates": 3, "in_68": 1, "in_95": 2, "n_limits": 1,
                   "limits_consistent": 0}


def test_reservoir_markers_distinct():
    known = ("NC", "CC", "X1", "X2")
    markers = [reservoir_marker(r, known) for r in known]
    assert len(set(markers)) == 4 and markers[0] == RESERVOIR_MARKERS["NC"]


def test_every_figure_writes_valid_deterministic_files(compilation, tmp_path):
    rng = np.random.default_rng(seed_for("figures"))
    records = F.record_points(compilation, _CAL, _REM, _AGES)
    bodies = F.body_points_from_prior(compilation, _DIST)
    r = np.geomspace(0.5, 10.0, 20)
    band = F.Bands(r, np.outer([0.5, 0.8, 1.0, 1.25, 2.0], 50.0 * r ** -1.0))
    tband = F.Bands(np.linspace(0, 6, 10), np.outer([0.5, 0.8, 1.0, 1.25, 2.0], np.ones(10)))
    sim = rng.normal(np.log([9, 12, 6, 14, 5]), 0.5, size=(100, 5))
    ring = {"ring_radius": rng.normal(4, 0.3, 300), "ring_width": rng.lognormal(0, 0.2, 300)}
    figs = lambda: {  # noqa: E731 - built twice: a rebuild must give identical bytes
        "profile": F.field_profile_figure({0.0: {"smooth": band}, 3.0: {"smooth": band}},
                                          bodies, records),
        "time": F.field_time_figure({2.0: {"smooth": tband}, 5.0: {"smooth": tband}}, bodies,
                                    records),
        "pairs": F.pair_figure(ring, bins=10),
        "predictive": F.predictive_figure(["A-1", "A-2", "B-1", "G-1", "D-1"],
                                          np.log([9, 12, 6, 14, 5]),
                                          np.array([0, 0, 1, 0, 0], bool),
                                          F.predictive_intervals(sim)),
        "comparison": F.comparison_figure(["smooth", "ring"], [-12.0, -9.5], [0.15, 0.15],
                                          [0.0, 1.0], [0.0, 0.8]),
    }
    rebuilt = {k: v for k, v in figs().items() if k in ("profile", "pairs")}
    for name, fig in figs().items():
        for ax in fig.axes:
            for label in (ax.get_xlabel(), ax.get_ylabel()):
                if ax.get_visible() and label:
                    assert "(" in label  # a unit (or "dimensionless", "id") on every axis
        first = save_figure(fig, tmp_path / "a" / name, dpi=40)
        _assert_files(first)
        if name not in rebuilt:
            continue
        again = save_figure(rebuilt[name], tmp_path / "b" / name, dpi=40)
        for p, q in zip(first, again):
            assert p.read_bytes() == q.read_bytes(), f"{p.name} not deterministic"


def test_comparison_figure_keeps_models_without_values():
    fig = F.comparison_figure(["smooth", "ring", "two-ring"], [np.nan] * 3, [np.nan] * 3,
                              [0.0, 2.0, np.nan], [0.0, 1.0, np.nan])
    ax_z, ax_e = fig.axes
    assert [t.get_text() for t in ax_z.get_yticklabels()] == ["smooth", "ring", "two-ring"]
    lo, hi = ax_z.get_ylim()
    assert lo < 0 and hi > 2  # every model's row is inside the axis, with or without a value
    assert [t.get_text() for t in ax_z.texts] == ["ln Z not computed"] * 3
    assert [t.get_text() for t in ax_e.texts] == ["ΔELPD not available"]


def test_log_axes_use_plain_numbers():
    from diskfield.plotstyle import new_figure, plain_log_labels, style

    with style():
        fig, ax = new_figure()
        ax.plot([1, 2], [2.0, 40.0])
        ax.set(yscale="log", ylim=(2.0, 40.0))
        plain_log_labels(ax, "y")
        fig.canvas.draw()
        labels = [t.get_text() for t in ax.get_yticklabels(minor=True) if t.get_text()]
        labels += [t.get_text() for t in ax.get_yticklabels() if t.get_text()]
    assert labels and all(float(lab) > 0 for lab in labels)  # "30", not "3×10¹"


def test_pair_figure_marks_declared_truth_and_keeps_it_in_view():
    from diskfield.figures.pairs import _TRUTH_COLOR

    rng = np.random.default_rng(seed_for("pairs-truth"))
    ring = {"ring_radius": rng.normal(4.0, 0.3, 400), "ring_width": rng.lognormal(0, 0.2, 400)}
    # a true radius far outside the draws must still be on the axis
    fig = F.pair_figure(ring, truth={"ring_radius": 8.0}, bins=10)
    diag, off = fig.axes[0], fig.axes[2]
    assert diag.get_xlim()[1] >= 8.0 and off.get_xlim()[1] >= 8.0
    truth_lines = [ln for ax in fig.axes for ln in ax.get_lines()
                   if ln.get_color() == _TRUTH_COLOR and ln.get_linestyle() == "--"]
    assert len(truth_lines) == 2  # diagonal of ring_radius + its column below; none for width
    assert [t.get_text() for t in fig.legends[0].get_texts()] == [
        "declared truth (simulated data)"]
    assert not F.pair_figure(ring, bins=10).legends


def test_pair_figure_names_ordered_rings_inner_and_outer():
    rng = np.random.default_rng(seed_for("pairs-ordered"))
    ring = {"ring_radius": rng.normal(3.0, 0.3, 300), "ring2_radius": rng.normal(9.0, 1.0, 300)}
    fig = F.pair_figure(ring, F.ORDERED_RING_LABELS, bins=10)
    texts = [ax.get_xlabel() for ax in fig.axes] + [ax.get_ylabel() for ax in fig.axes]
    assert "r0 of inner ring (AU)" in texts and "r0 of outer ring (AU)" in texts
    assert not any("ring 2" in t for t in texts)
