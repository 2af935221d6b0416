"""Timing of the marginalised likelihood (a script: prints figures and ratios, asserts nothing).

Run:  python benchmarks/bench_likelihood.py [--walkers 64] [--repeat 10] [--aged-repeat 1]

(a) time per vectorised ``log_likelihood`` call on the demo compilation for each profile and
    envelope; (b) the floor of the direct scheme, a bare ``scipy.special.log_ndtr`` over
    walkers x records x distance nodes x age nodes elements (the nodes of positive weight the
    model used, summed per walker, body and record; K_r and K_t print the mean distance nodes
    per body and age nodes per record), timed in the same run; (c) the formulation written by hand (latents as explicit
    parameters, a Python loop over records) per call; (d) scaling over synthetic
    compilations of 30, 100, 300 and 1000 records; (e) the compiled kernels (distance rule,
    limits) against the same rules in array code, same walkers; (f) ln Phi per element: the
    compiled kernels' table against ``erfc`` and scipy; exp and ln per element: inlined
    (``exp_ftz``, ``log_vec``) against the C library and numpy.
"""
from __future__ import annotations

import argparse
import math
import time

import numpy as np
from scipy import special, stats

from diskfield.likelihood import build_model
from diskfield.priorset import load_priors
from diskfield.profiles import available_envelopes, available_profiles
from diskfield.resources import demo_dir
from diskfield.simulate import simulate_compilation, synthetic_compilation


def _timed(func, repeat, rounds=3):
    """Best-of-``rounds`` mean wall time [s] of ``repeat`` calls."""
    func()
    best = np.inf
    for _ in range(rounds):
        t0 = time.perf_counter()
        for _ in range(repeat):
            func()
        best = min(best, (time.perf_counter() - t0) / repeat)
    return best


def _demo():
    from diskfield.records import read_compilation

    path = demo_dir() / "demo_compilation.ecsv"
    if path.exists():
        return read_compilation(path), str(path)
    rng = np.random.default_rng(1)
    return synthetic_compilation(40, rng), "synthetic (demo file absent)"


def _walkers(model, n, rng):
    return np.column_stack([p.sample(rng, n) for p in model.priors])


def _nodes(model, theta):
    """Elements the direct scheme evaluates at theta: the sum over walkers, bodies and their
    records of (distance nodes of positive weight) x (age nodes of positive weight), and the
    mean node counts (distance nodes per body, age nodes per record).

    Only nodes of positive weight count: the dense rule's zero-width panels (unused slots,
    breaks clipped to a support) are padding that no direct scheme would evaluate.
    """
    from diskfield import quadrature

    _, _, ages, breaks = model._setup(model.params(theta))
    _, logw = quadrature.panel_rule(breaks, model.settings.panel_nodes)
    k_r = np.isfinite(logw).sum(axis=-1)                              # (W, G)
    valid = model._bodies.index >= 0                                  # (G, n)
    if ages is None:
        k_t = np.broadcast_to(valid, k_r.shape + valid.shape[1:]).astype(float)
    else:
        k_t = np.where(valid, np.isfinite(ages.logw).sum(axis=-1), 0)  # (W, G, n)
    elements = int((k_r * k_t.sum(axis=-1)).sum())
    return elements, k_r.mean(), k_t.sum() / (valid.sum() * len(k_r))


def _hand_written(model, theta_1d, latents):
    """The practitioner's formulation: every latent an explicit parameter, loop over records."""
    p = {k: v[0] for k, v in model.params(theta_1d).items()}
    recs, terms = model.compilation.records, model._terms
    r, x = latents
    total = 0.0
    for i in range(len(recs)):
        g = recs.body_index[i]
        mu = model.profile.log_field(np.array(r[g]), p) - x[g]
        sd = np.sqrt(terms.var_fixed[i] + p["intrinsic_scatter"] ** 2)
        total += (stats.norm.logcdf((terms.z[i] - mu) / sd) if recs.is_limit[i]
                  else stats.norm.logpdf(terms.z[i], mu, sd))
    return total


def _row(comp, pset, prof, env, spin, w, rng, args):
    """One line of table (a)/(b); time-dependent envelopes are timed on fewer calls."""
    model = build_model(comp, profile=prof, envelope=env, spin=spin, priors=pset)
    theta = _walkers(model, w, rng)
    aged = model.envelope.time_dependent
    # best of 3 rounds for both (a) and (b): one round of a ~60 ms call was at the mercy of a
    # single hiccup of the machine (seen: one row 1.65 against 1.0-1.26 in other runs)
    rep, rounds = (args.aged_repeat, 3) if aged else (args.repeat, 3)
    t_a = _timed(lambda: model.log_likelihood(theta), rep, rounds)
    t_1 = _timed(lambda: model.log_likelihood(theta[0]), rep, rounds)
    n_elem, k_r, k_t = _nodes(model, theta)
    elems = np.linspace(-5, 5, n_elem)
    t_b = _timed(lambda: special.log_ndtr(elems), 1, rounds)
    print(f"{prof:12s} {env:12s} {spin:6s} {1e3 * t_a:9.2f} {1e3 * t_1:9.2f} {k_r:5.1f} "
          f"{k_t:5.1f} {1e3 * t_b:9.2f} {t_a / t_b:8.2f}", flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--walkers", type=int, default=64)
    ap.add_argument("--repeat", type=int, default=10)
    ap.add_argument("--aged-repeat", type=int, default=1,
                    help="calls per timing for time-dependent envelopes (seconds per call)")
    ap.add_argument("--spins", default="body",
                    help="comma-separated spin modes timed in (a) (body, record, none)")
    ap.add_argument("--envelopes", default=",".join(available_envelopes()),
                    help="comma-separated envelopes timed in (a) (default: all)")
    ap.add_argument("--only-a", action="store_true", help="print table (a)/(b) only")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(20261202)
    pset = load_priors()
    comp, label = _demo()
    w = args.walkers
    print(f"demo: {label}: {len(comp.records)} records, {len(comp.bodies)} bodies; "
          f"{w} walkers; best-of-3 means of {args.repeat} calls")
    print(f"\n(a) log_likelihood per call (and per single-walker call) / (b) floor: log_ndtr "
          f"over W x records x r-nodes x age-nodes elements (time-dependent envelopes: "
          f"best of 3 rounds of {args.aged_repeat} call(s))")
    print(f"{'profile':12s} {'envelope':12s} {'spin':6s} {'(a) ms':>9s} {'1 walker':>9s} "
          f"{'K_r':>5s} {'K_t':>5s} {'(b) ms':>9s} {'(a)/(b)':>8s}")
    for env in args.envelopes.split(","):
        for spin in args.spins.split(","):
            for prof in available_profiles():
                _row(comp, pset, prof, env, spin, w, rng, args)
    if args.only_a:
        return
    model = build_model(comp, profile="ring", priors=pset)
    theta = _walkers(model, 1, rng)
    lat = ([b.sample(rng) for b in model._bodies.priors], rng.exponential(1.0, len(comp.bodies)))
    t_c = _timed(lambda: _hand_written(model, theta, lat), max(1, args.repeat // 2))
    t_1 = _timed(lambda: model.log_likelihood(theta), args.repeat)
    print(f"\n(c) hand-written (explicit latents, loop over records), ring, one walker: "
          f"{1e3 * t_c:.2f} ms per call; marginalised model, one walker: {1e3 * t_1:.2f} ms; "
          f"marginalised model per walker at {w} walkers: see (a) / {w}")
    print("\n(d) scaling (ring, steady, body spin): synthetic compilations")
    print(f"{'records':>8s} {'bodies':>7s} {'ms/call':>9s} {'us/record':>10s}")
    for n in (30, 100, 300, 1000):
        design = synthetic_compilation(n, rng)
        m0 = build_model(design, profile="ring", priors=pset)
        truth = np.array([p.sample(rng) for p in m0.priors])
        sim = simulate_compilation(design, m0, truth, rng)
        model = build_model(sim, profile="ring", priors=pset)
        theta = _walkers(model, w, rng)
        t = _timed(lambda: model.log_likelihood(theta), max(1, args.repeat // 4))
        print(f"{n:8d} {len(sim.bodies):7d} {1e3 * t:9.2f} {1e6 * t / n:10.1f}")
    _compiled_versus_array(comp, pset, w, rng, args)
    _special_function(rng)


def _special_function(rng):
    """(f) ln Phi per element (the kernels' table, the C library's erfc, scipy) and exp."""
    try:
        from numba import njit

        from diskfield import _special_jit
    except ImportError:
        print("\n(f) numba not importable")
        return

    def summed(f):
        @njit
        def run(x):
            s = 0.0
            for v in x:
                s += f(v)
            return s
        return run

    x = rng.normal(-2.0, 4.0, 200_000)
    out = np.empty_like(x)
    table, erfc = summed(_special_jit.log_ndtr), summed(_special_jit.log_ndtr_erfc)
    t_t = _timed(lambda: table(x), 5)
    t_e = _timed(lambda: erfc(x), 5)
    t_s = _timed(lambda: special.log_ndtr(x, out=out), 5)
    per = 1e9 / len(x)
    print(f"\n(f) ln Phi per element, x ~ N(-2, 4^2): table {per * t_t:.1f} ns, erfc "
          f"{per * t_e:.1f} ns, scipy.special.log_ndtr {per * t_s:.1f} ns (erfc / table "
          f"{t_e / t_t:.1f}x)")
    def mapped(f):
        @njit(error_model="numpy")     # no division-by-zero test: the loop can vectorise
        def run(x, out):
            for i in range(x.shape[0]):
                out[i] = f(x[i])
        return run

    for name, inlined, libm, ufunc, lo, hi in (
            ("exp", _special_jit.exp_ftz, math.exp, np.exp, -40.0, 0.0),
            ("ln", _special_jit.log_vec, math.log, np.log, 0.1, 100.0)):
        y = rng.uniform(lo, hi, len(x))
        run_i, run_m = mapped(inlined), mapped(libm)
        t_i = _timed(lambda: run_i(y, out), 5)
        t_m = _timed(lambda: run_m(y, out), 5)
        t_n = _timed(lambda: ufunc(y, out=out), 5)
        print(f"    {name} per element, x ~ U({lo:g}, {hi:g}): inlined {per * t_i:.1f} ns, "
              f"C library {per * t_m:.1f} ns, numpy.{ufunc.__name__} {per * t_n:.1f} ns "
              f"(C library / inlined {t_m / t_i:.1f}x)")


def _compiled_versus_array(comp, pset, w, rng, args):
    """(e) whole calls with both compiled kernels, with the distance rule in array code, and
    with both in array code (same walkers, same run)."""
    from diskfield import likelihood, steady

    if steady._kernel() is None or likelihood._rule_kernel() is None:
        print("\n(e) numba not importable: the array code is in use")
        return
    print(f"\n(e) {w} walkers, whole log_likelihood call: both compiled kernels (distance rule "
          "and limits) / rule in array code / both in array code")
    kernels = steady._kernel(), likelihood._rule_kernel()
    print(f"{'profile':12s} {'compiled':>10s} {'rule array':>11s} {'both array':>11s} "
          f"{'ratio':>6s}")
    for prof in ("smooth", "ring", "two-ring"):
        model = build_model(comp, profile=prof, priors=pset)
        theta = _walkers(model, w, rng)
        t_c = _timed(lambda: model.log_likelihood(theta), args.repeat)
        try:
            likelihood._rule_compiled = None
            t_r = _timed(lambda: model.log_likelihood(theta), args.repeat)
            steady._compiled = None
            t_a = _timed(lambda: model.log_likelihood(theta), args.repeat)
        finally:
            steady._compiled, likelihood._rule_compiled = kernels
        print(f"{prof:12s} {1e3 * t_c:8.2f} ms {1e3 * t_r:8.2f} ms {1e3 * t_a:8.2f} ms "
              f"{t_a / t_c:6.2f}")


if __name__ == "__main__":
    main()
