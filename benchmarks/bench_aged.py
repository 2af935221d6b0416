"""Timing of the ages-by-quadrature path (a script: prints figures and ratios, asserts nothing).

Run:  python benchmarks/bench_aged.py [--walkers 32] [--repeat 3] [--no-before]

For each profile x {dissipating, viscous} envelope on the demo compilation (spin = body):
per-call ``log_likelihood`` time at 1 and at W walkers with the current aged integrand
("after"), and with the one-array formula it replaced ("before", written out below: every
(walker, body, distance node, spin node, record, age node) element materialised at once),
timed in the same run; the element counts of both; the largest |after - before| difference
of the per-body log-likelihoods. Machines here are shared: compare the ratios, not the
absolute figures.
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from diskfield import aged
from diskfield import likelihood as lk
from diskfield import quadrature as quad
from diskfield._lkcommon import _detection_stats, _expand
from diskfield.likelihood import build_model
from diskfield.priorset import load_priors
from diskfield.records import read_compilation
from diskfield.resources import demo_dir
from scipy import special


def _timed(func, repeat):
    """Best of ``repeat`` single calls [s] (after one warm-up call)."""
    func()
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


def _before_body_spin(phi, b, var, ages, s):
    """The one-array formula of the previous version (kept here as the timing reference)."""
    veff = var + ages.var_log_factor
    zbar, v, _ = _detection_stats(b.z - ages.mean_log_factor, veff, b.det)
    has = np.isfinite(v)[..., None]
    vq = np.where(has, v[..., None], 1.0)
    sd = np.sqrt(vq)
    mu_q = phi - zbar[..., None] - vq
    u, w = quad.gauss_legendre_unit(s.spin_nodes)
    log_tail = special.log_ndtr(mu_q / sd)
    xq = mu_q[..., None] - sd[..., None] * special.ndtri_exp(log_tail[..., None] + np.log1p(-u))
    x = np.where(has[..., None], xq, -np.log1p(-u))
    log_q = np.where(has[..., None], -0.5 * ((x - mu_q[..., None]) / sd[..., None]) ** 2
                     - np.log(sd[..., None]) - aged.LN_SQRT_2PI - log_tail[..., None], -x)
    rec = aged._aged_records(b, var, ages, aged._compact(b.det), aged._compact(b.lim))
    log_f = -x + aged._aged_records_log_prob(phi[..., None] - x, rec, spin="none")
    return quad.log_sum_exp(log_f - log_q + np.log(w), axis=-1)


def _before(phi, b, var, ages, spin, s):
    if spin == "body":
        return _before_body_spin(phi, b, var, ages, s)
    return aged._integrand_aged(phi, b, var, ages, spin, s)


def _elements(model, theta):
    """Elements of the largest array before, and summed over the chunks after."""
    p = model.params(theta)
    b = model._bodies
    r, _ = model.body_distance_posterior(theta)
    rule = aged._age_rule(model._ages, model.envelope, p, model.settings)
    phi = model.profile.log_field(r, _expand(p, 2))
    q_x = model.settings.spin_nodes
    before = phi.size * q_x * b.z.shape[1] * rule.logw.shape[-1]
    distinct = np.ones(phi.shape, bool)
    distinct[..., 1:] = phi[..., 1:] != phi[..., :-1]
    after = 0
    for g in range(phi.shape[1]):
        n_pts = int(distinct[:, g].sum())
        for mask in (b.det[g], b.lim[g]):
            if mask.any():
                lw = rule.logw[:, g][:, mask]
                after += n_pts * q_x * int(mask.sum()) * int(np.isfinite(lw).sum(-1).max())
    return before, after


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--walkers", type=int, default=32)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-before", action="store_true", help="skip the (slow) old formula")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(20261202)
    pset = load_priors()
    comp = read_compilation(demo_dir() / "demo_compilation.ecsv")
    w = args.walkers
    print(f"demo: {len(comp.records)} records, {len(comp.bodies)} bodies; spin = body; "
          f"best of {args.repeat} calls; walkers drawn from the priors")
    print(f"{'profile':10s} {'envelope':12s} {'1w ms':>8s} {f'{w}w ms':>9s} {'before':>9s} "
          f"{'ratio':>6s} {'elems before':>13s} {'elems after':>12s} {'max |diff|':>11s}")
    current = lk._integrand_aged
    for env in ("dissipating", "viscous"):
        for prof in ("smooth", "ring", "two-ring"):
            model = build_model(comp, profile=prof, envelope=env, spin="body", priors=pset)
            theta = np.column_stack([p.sample(rng, w) for p in model.priors])
            t_1 = _timed(lambda: model.log_likelihood(theta[0]), args.repeat)
            t_w = _timed(lambda: model.log_likelihood(theta), args.repeat)
            after_ll = model.log_likelihood_pointwise(theta)
            t_b, diff = np.nan, np.nan
            if not args.no_before:
                lk._integrand_aged = _before
                try:
                    t_b = _timed(lambda: model.log_likelihood(theta), 1)
                    before_ll = model.log_likelihood_pointwise(theta)
                finally:
                    lk._integrand_aged = current
                ok = np.isfinite(before_ll)
                diff = float(np.max(np.abs(np.where(ok, after_ll - before_ll, 0.0))))
            e_b, e_a = _elements(model, theta)
            print(f"{prof:10s} {env:12s} {1e3 * t_1:8.1f} {1e3 * t_w:9.1f} {1e3 * t_b:9.0f} "
                  f"{t_b / t_w:6.1f} {e_b:13.3g} {e_a:12.3g} {diff:11.2e}", flush=True)


if __name__ == "__main__":
    main()
