"""Timing of the ages-by-quadrature path (a script: prints figures and ratios, asserts nothing).

Run:  python benchmarks/bench_aged.py [--walkers 32] [--repeat 3] [--spins body,none]

For each profile x {dissipating, viscous} envelope x spin mode on the demo compilation:
per-call ``log_likelihood`` time at 1 and at W walkers with the current age rule ("now"), and
at W walkers with the previous one ("prev", written out below: 6 Gauss nodes per panel in
each record's age-prior CDF, split only at a dissipating envelope's edge; the spin "none" and
"record" sums on one padded array), timed in the same run; the age nodes per record of both
(mean and largest over walkers and records); the largest |now - prev| difference of the
per-body log-likelihoods (the previous rule's error: tests/test_aged.py checks the current
one against an independent reference). Machines here are shared: compare the ratios, not the
absolute figures.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import special

from diskfield import aged
from diskfield import likelihood as lk
from diskfield import quadrature as quad
from diskfield._lkcommon import _expand
from diskfield.likelihood import build_model
from diskfield.priorset import load_priors
from diskfield.records import read_compilation
from diskfield.recording import LN_SQRT_2PI, emg_logpdf, emg_logsf
from diskfield.resources import demo_dir


def _timed(func, repeat):
    """Best of ``repeat`` single calls [s] (after one warm-up call)."""
    func()
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


# ------------------------------------------------------------------ the previous version
def _prev_cdf_ppf(ages):
    def cdf(t):
        out = np.where(ages.kind == 0, special.ndtr((t - ages.a) / ages.b),
                       np.clip((t - ages.a) / (ages.b - ages.a), 0.0, 1.0))
        for prior, mask in ages.window.values():
            out = np.where(mask, prior.cdf(t), out)
        return out

    def ppf(u):
        out = np.where(ages.kind[..., None] == 0,
                       ages.a[..., None] + ages.b[..., None] * special.ndtri(u),
                       ages.a[..., None] + (ages.b - ages.a)[..., None] * u)
        for prior, mask in ages.window.values():
            out = np.where(mask[..., None], prior.ppf(u), out)
        return out

    return cdf, ppf


def _prev_age_rule(ages, envelope, p, s, var=None):
    """Nodes in each record's age-prior CDF, split at the envelope's features (previous)."""
    cdf, ppf = _prev_cdf_ppf(ages)
    feats = aged._envelope_features(p)
    w = len(p["intrinsic_scatter"])
    breaks = [np.zeros((w,) + ages.a.shape + (1,)), np.ones((w,) + ages.a.shape + (1,))]
    if feats is not None:
        t = feats[:, None, None, :]
        breaks.append(np.clip(np.stack([cdf(t[..., k]) for k in range(feats.shape[1])],
                                       axis=-1), 0.0, 1.0))
    u, logw = quad.panel_rule(np.sort(np.concatenate(breaks, axis=-1), axis=-1), s.age_nodes)
    u = np.clip(u, 1e-15, 1 - 1e-15)
    flat = np.moveaxis(u, 0, 2).reshape(u.shape[1], u.shape[2], -1)
    t = np.moveaxis(ppf(flat).reshape(u.shape[1], u.shape[2], w, u.shape[3]), 2, 0)
    lf = envelope.log_factor(t, _expand(p, 3))
    wts = np.exp(logw)
    mean = (wts * lf).sum(-1)
    return aged._AgeRule(log_factor=lf, logw=logw, mean_log_factor=mean,
                         var_log_factor=(wts * (lf - mean[..., None]) ** 2).sum(-1))


def _prev_records(phi, b, var, ages, spin):
    """Spin "none"/"record" on one padded (W, G, K, M, Q) array per kind (previous)."""
    out = np.zeros(phi.shape)
    for mask in (b.det, b.lim):
        m = max(int(mask.sum(axis=1).max()), 1)
        order = np.argsort(~mask, axis=1, kind="stable")[:, :m]
        keep = np.take_along_axis(mask, order, axis=1)
        rows = np.flatnonzero(keep.any(axis=1))
        if not len(rows):
            continue
        pick = lambda a: np.take_along_axis(a, order[None, ..., None], axis=2)[:, rows]  # noqa
        z = np.take_along_axis(b.z, order, axis=1)[rows][None, :, None, :, None]
        vv = np.take_along_axis(var, order[None], axis=-1)[:, rows][:, :, None, :, None]
        lf, lw = pick(ages.log_factor)[:, :, None], pick(ages.logw)[:, :, None]
        d = phi[:, rows][..., None, None] + lf - z
        const = 0.0
        if spin == "record":
            term = emg_logpdf(d, vv) if mask is b.det else emg_logsf(d, vv)
        elif mask is b.det:
            term, const = d * d * (-0.5 / vv), -0.5 * np.log(vv[..., 0]) - LN_SQRT_2PI
        else:
            term = special.log_ndtr(d * (-1.0 / np.sqrt(vv)))
        lp = quad.log_sum_exp(lw + term, axis=-1) + const
        out[:, rows] += np.where(keep[rows][None, :, None, :], lp, 0.0).sum(-1)
    return out


def _prev_integrand(phi, b, var, ages, spin, s):
    if spin == "body":
        return aged._integrand_aged(phi, b, var, ages, spin, s)
    return _prev_records(phi, b, var, ages, spin)


def _node_counts(model, theta, rule):
    """Age nodes of positive weight per record: mean and largest over walkers and records."""
    p = model.params(theta)
    b = model._bodies
    var = np.maximum(b.var_fixed + p["intrinsic_scatter"][:, None, None] ** 2, lk._MIN_VAR)
    n = np.isfinite(rule(model._ages, model.envelope, p, model.settings, var).logw).sum(-1)
    n = n[:, b.det | b.lim]
    return n.mean(), n.max()


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--walkers", type=int, default=32)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--spins", default="body,none", help="comma-separated spin modes")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(20261202)
    pset = load_priors()
    comp = read_compilation(demo_dir() / "demo_compilation.ecsv")
    w = args.walkers
    print(f"demo: {len(comp.records)} records, {len(comp.bodies)} bodies; best of "
          f"{args.repeat} calls; walkers drawn from the priors")
    print(f"{'profile':9s} {'envelope':12s} {'spin':6s} {'1w ms':>7s} {f'{w}w ms':>8s} "
          f"{'prev ms':>8s} {'now/prev':>8s} {'nodes now':>10s} {'nodes prev':>10s} "
          f"{'max|now-prev|':>13s}")
    current = (lk._age_rule, lk._integrand_aged)
    for env in ("dissipating", "viscous"):
        for prof in ("smooth", "ring", "two-ring"):
            for spin in args.spins.split(","):
                model = build_model(comp, profile=prof, envelope=env, spin=spin, priors=pset)
                theta = np.column_stack([p.sample(rng, w) for p in model.priors])
                t_1 = _timed(lambda: model.log_likelihood(theta[0]), args.repeat)
                t_w = _timed(lambda: model.log_likelihood(theta), args.repeat)
                now = model.log_likelihood_pointwise(theta)
                lk._age_rule, lk._integrand_aged = _prev_age_rule, _prev_integrand
                try:
                    t_p = _timed(lambda: model.log_likelihood(theta), args.repeat)
                    prev = model.log_likelihood_pointwise(theta)
                finally:
                    lk._age_rule, lk._integrand_aged = current
                ok = np.isfinite(now) & np.isfinite(prev)
                diff = float(np.max(np.abs(np.where(ok, now - prev, 0.0))))
                n_now = _node_counts(model, theta, aged._age_rule)
                n_prev = _node_counts(model, theta, _prev_age_rule)
                print(f"{prof:9s} {env:12s} {spin:6s} {1e3 * t_1:7.1f} {1e3 * t_w:8.1f} "
                      f"{1e3 * t_p:8.1f} {t_w / t_p:8.2f} {n_now[0]:5.0f}/{n_now[1]:<4.0f} "
                      f"{n_prev[0]:5.0f}/{n_prev[1]:<4.0f} {diff:13.3g}", flush=True)


if __name__ == "__main__":
    main()
