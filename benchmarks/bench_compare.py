"""Benchmarks of sampling and comparison on the shipped (invented) demo compilation.

Run from the repository top::

    python benchmarks/bench_compare.py            # both benchmarks
    python benchmarks/bench_compare.py --only ess # just the sampling-efficiency comparison

1. Wall time of ``diskfield compare`` on the demo for smooth, ring and two-ring including
   nested-sampling evidence and the prior-sensitivity runs (target ≤ 120 s on 2 cores),
   with the time of each phase; ``--jobs`` worker processes as the CLI (default: the usable
   cores; the benchmark ran them one after another before).
2. Effective samples per second (ESS/s) of ``field_1au`` for the marginalised likelihood
   (only the global parameters are sampled; distances by quadrature, spin projections in
   closed form) against the latent formulation of the same smooth model, in which every
   body's distance r_g and spin log-projection X_g = −ln u_g are explicit emcee parameters
   (the Gaussian log-terms — measurement, calibration, recording fraction, intrinsic
   scatter — stay analytic in both, so the comparison isolates the latents). Target ≥ 50×.
   Both chains: emcee with diskfield's move mixture, the same seed; burn-in the first
   quarter of each chain; τ of ``field_1au`` from ``emcee.autocorr.integrated_time``
   (c=5, tol=0) on the part after burn-in; ESS = steps after burn-in × walkers / τ. Each
   chain runs a first stretch (marginalised ``--steps``, latent 10 × ``--steps``) and is
   extended by max(first stretch, a quarter of its length) at a time, τ re-estimated after
   each, until the part after burn-in is longer than 50 τ and τ changed by less than 5 %
   since the previous check (diskfield's own convergence gate) or the cap (marginalised
   20 × ``--steps``, latent ``--latent-max-steps``) is hit; a chain that stops short of that
   has a lower-bound τ (upper-bound ESS) and the output says so, and says which way the
   ratios are then bounded; the τ estimate at each check is printed. The latent ESS is
   turned into ESS/s two ways:
   (a) the issue's formulation, ``_hand_written`` of ``bench_likelihood.py`` (c) (a Python
       loop over records, one walker per call) plus the latent priors as a per-walker loop:
       its time per walker evaluation is measured on the latent chain's final positions
       (best-of-3 mean), and ESS/s = ESS / (walker evaluations after burn-in × that time),
       the evaluations the chain made outside the prior support charged the prior's time
       only and emcee's own overhead not charged. τ in steps belongs to the model and the
       sampler, not to the code evaluating it, so the chain is the same; a check prints the
       largest difference of ``_hand_written`` from the vectorised code at a few points.
   (b) the vectorised latent code (``_LatentSmooth``, numpy over walkers, no Python loop):
       the wall time of the actual run — the stricter comparison.
   The marginalised ESS/s uses the wall time of its run; all wall times are sampling only
   (τ estimation excluded) and scaled to the part after burn-in. With the defaults the run
   took 3-4 min on the shared 2-core machine (the latent chain settled after 195,000 and
   244,140 steps, seeds 2 and 1); the default cap of 800,000 latent steps bounds it at
   about 13 min (within it up to a minute of τ estimates, not counted in the ESS/s).

3. Nested sampling of each demo model with dynesty's one-point-at-a-time likelihood calls
   against the batched proposals of ``diskfield.nsbatch`` (same seed and settings):
   wall time, likelihood points per second and the speed-up (``--only evidence``).

Prints figures; asserts nothing.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import emcee
import numpy as np
from scipy import special

import diskfield
from diskfield.resources import demo_dir
from diskfield.optimize import maximize_likelihood
from diskfield.sampling import SamplerSettings, log_probability
from diskfield.workers import usable_cores


def bench_compare(seed: int, max_steps: int | None, jobs: int) -> None:
    comp = diskfield.read_compilation(demo_dir() / "demo_compilation.ecsv")
    settings = SamplerSettings() if max_steps is None else SamplerSettings(max_steps=max_steps)
    with tempfile.TemporaryDirectory() as out:
        t0 = time.perf_counter()
        result = diskfield.compare(comp, ["smooth", "ring", "two-ring"], seed=seed, out=out,
                                   settings=settings, jobs=jobs)
        wall = time.perf_counter() - t0
    capped = "" if max_steps is None else f" with --max-steps {max_steps} (NOT the defaults)"
    print(f"compare smooth,ring,two-ring on the demo{capped}, {jobs} worker process(es): "
          f"{wall:.1f} s (target <= 120 s on 2 cores)")
    for name, f in result.fits.items():
        ev = result.evidence.get(name)
        print(f"  {name:9s} MCMC {f.run.wall_time_s:6.1f} s, {f.run.n_steps} steps, "
              f"converged={f.run.converged}, chain/tau={f.run.chain_over_tau:.0f}; "
              f"nested sampling {ev.wall_time_s:6.1f} s, {ev.n_calls} calls")
    print("  verdict:", result.verdict["sentence"])


class _LatentSmooth:
    """Smooth disk with explicit latents: theta = (field_1au, power_index, sigma_int, r_g..., X_g...).

    Vectorised over walkers (numpy, no Python loop). Counts the walker evaluations and how
    many of them had a finite prior (only those reach the likelihood).
    """

    def __init__(self, model):
        self.m = model
        rec = model.compilation.records
        self.y, self.lim = np.asarray(rec.ln_value), np.asarray(rec.is_limit, bool)
        self.g = np.asarray(rec.body_index)
        self.var0, self.offset = model._terms.var_fixed, model._terms.offset
        self.dist = [model._bodies.priors[k] for k in range(model.n_bodies)]
        self.nb = model.n_bodies
        self.n_eval = self.n_in_support = 0

    def __call__(self, theta):
        nb, k = self.nb, len(self.m.parameter_names)
        glob, r, x = theta[:, :k], theta[:, k:k + nb], theta[:, k + nb:]
        lp = self.m.log_prior(glob) + sum(d.log_prob(r[:, i]) for i, d in enumerate(self.dist))
        lp = lp + np.where(np.all(x >= 0, axis=1), -x.sum(axis=1), -np.inf)  # X ~ Exp(1)
        ok = np.isfinite(lp)
        self.n_eval += len(theta)
        self.n_in_support += int(ok.sum())
        out = np.full(len(theta), -np.inf)
        if np.any(ok):
            out[ok] = lp[ok] + self._loglike(glob[ok], r[ok], x[ok])
        return out

    def _loglike(self, glob, r, x):
        p = self.m.params(glob)
        ln_b = np.log(p["field_1au"])[:, None] - p["power_index"][:, None] * np.log(r)
        mu = ln_b[:, self.g] - x[:, self.g] + self.offset[None, :]
        var = self.var0[None, :] + p["intrinsic_scatter"][:, None] ** 2
        z = (self.y[None, :] - mu) / np.sqrt(var)
        dens = -0.5 * z ** 2 - 0.5 * np.log(2 * np.pi * var)
        return np.where(self.lim[None, :], special.log_ndtr(z), dens).sum(axis=1)


def _hand_written_likelihood():
    """``_hand_written`` of bench_likelihood (c): the issue's formulation (loop over records)."""
    try:
        from bench_likelihood import _hand_written
    except ImportError:
        sys.path.insert(0, str(Path(__file__).resolve().parent))
        from bench_likelihood import _hand_written
    return _hand_written


def _hand_written_prior(model, dist, theta):
    """Log prior of one walker of the latent formulation, written the same way (a Python loop)."""
    k, nb = len(model.parameter_names), len(dist)
    lp = model.log_prior(theta[:k])
    for g in range(nb):
        lp += dist[g].log_prob(theta[k + g])
        x = theta[k + nb + g]
        lp += -x if x >= 0 else -np.inf  # X_g ~ Exp(1)
    return lp


def _hand_written_posterior(model, dist, hand_written, theta):
    """One walker: the prior loop, then (inside the support) bench_likelihood's (c)."""
    k, nb = len(model.parameter_names), len(dist)
    lp = _hand_written_prior(model, dist, theta)
    if not np.isfinite(lp):
        return -np.inf
    return lp + hand_written(model, theta[:k], (theta[k:k + nb], theta[k + nb:]))


def _per_call(func, points, rounds=3):
    """Best-of-``rounds`` mean wall time [s] of one call of ``func`` over ``points``."""
    func(points[0])
    best = np.inf
    for _ in range(rounds):
        t0 = time.perf_counter()
        for t in points:
            func(t)
        best = min(best, (time.perf_counter() - t0) / len(points))
    return best


def _tau(column):
    """Integrated autocorrelation time [steps] of one parameter; column (steps, walkers)."""
    return emcee.autocorr.integrated_time(column[:, :, None], c=5, tol=0, quiet=True)[0]


_TAU_RTOL = 0.05  # tau must have changed by less than this since the previous check (as
#                   diskfield's own convergence gate, SamplerSettings.tau_rtol)


def _settled(taus, n):
    """The chain after burn-in is longer than 50 tau and tau moved < _TAU_RTOL at the last check."""
    tau = taus[-1][1]
    return (n - n // 4 > 50 * tau and len(taus) > 1
            and abs(tau - taus[-2][1]) / tau < _TAU_RTOL)


def _run_until(logp, p0, first, cap, seed, index=0):
    """emcee with diskfield's move mixture until tau has settled (``_settled``), or ``cap`` steps.

    The chain runs ``first`` steps, then is extended by max(``first``, a quarter of its length)
    steps at a time; after each stretch tau of parameter ``index`` is re-estimated on the chain
    after burn-in (its first quarter) and the run stops once that part is longer than 50 tau
    and tau changed by less than 5 % since the previous check, or the chain has ``cap`` steps.
    Only parameter ``index`` is kept. Returns its chain (steps, walkers), the sampling wall
    time (tau estimation excluded), the (steps, tau) of each check and the final positions.
    """
    sampler = emcee.EnsembleSampler(p0.shape[0], p0.shape[1], logp, vectorize=True,
                                    moves=[(emcee.moves.DEMove(), 0.7),
                                           (emcee.moves.DEMove(gamma0=1.0), 0.1),
                                           (emcee.moves.StretchMove(), 0.2)])
    state = emcee.State(p0, random_state=np.random.RandomState(seed).get_state())
    cap = max(cap, first)
    col = np.empty((cap, p0.shape[0]))
    n, target, wall, taus = 0, first, 0.0, []
    while True:
        t0 = time.perf_counter()
        for i, state in enumerate(sampler.sample(state, iterations=target - n, store=False)):
            col[n + i] = state.coords[:, index]
        wall += time.perf_counter() - t0
        n = target
        taus.append((n, _tau(col[n // 4:n])))
        if _settled(taus, n) or n >= cap:
            return col[:n], wall, taus, state.coords
        target = min(cap, n + max(first, n // 4))


def bench_ess(seed: int, steps: int, latent_cap: int) -> None:
    comp = diskfield.read_compilation(demo_dir() / "demo_compilation.ecsv")
    model = diskfield.build_model(comp, profile="smooth")
    rng = np.random.default_rng(seed)
    best = maximize_likelihood(model, rng).theta
    k = len(model.parameter_names)
    jitter = lambda n: best * (1 + 1e-3 * rng.standard_normal((n, k)))  # noqa: E731

    def rates(col, wall, taus):
        """ESS after burn-in (first quarter), the share of the run it took, tau, reliable."""
        n, tau = col.shape[0], taus[-1][1]
        post = n - n // 4
        return post * col.shape[1] / tau, post / n, tau, _settled(taus, n)

    # marginalised: `steps` first, extended until tau settles (_settled) or 20 x `steps`
    col_m, wall_m, taus_m, _ = _run_until(log_probability(model), jitter(32), steps,
                                          20 * steps, seed)
    ess_m, frac_m, tau_m, ok_m = rates(col_m, wall_m, taus_m)
    rate_m = ess_m / (frac_m * wall_m)

    # latent: the same sampler, moves, seed, burn-in and stopping rule; 10 x `steps` first
    latent = _LatentSmooth(model)
    ndim = k + 2 * model.n_bodies
    walkers = 2 * ndim + 2
    p0 = np.column_stack([jitter(walkers),
                          np.column_stack([d.sample(rng, walkers) for d in latent.dist]),
                          rng.exponential(1.0, (walkers, model.n_bodies))])
    col_l, wall_l, taus_l, last = _run_until(latent, p0, 10 * steps, latent_cap, seed)
    ess_l, frac_l, tau_l, ok_l = rates(col_l, wall_l, taus_l)
    rate_vec = ess_l / (frac_l * wall_l)

    # the formulation: same chain (same tau in steps), cost of its per-walker code
    n_eval, n_in = latent.n_eval, latent.n_in_support
    n_out = n_eval - n_in
    hand = _hand_written_likelihood()
    dist = latent.dist
    diff_like = max(abs(hand(model, t[:k], (t[k:k + latent.nb], t[k + latent.nb:]))
                        - latent._loglike(t[None, :k], t[None, k:k + latent.nb],
                                          t[None, k + latent.nb:])[0]) for t in last[:8])
    diff_post = np.max(np.abs([_hand_written_posterior(model, dist, hand, t) for t in last[:8]]
                              - latent(last[:8])))
    t_full = _per_call(lambda t: _hand_written_posterior(model, dist, hand, t), last)
    t_prior = _per_call(lambda t: _hand_written_prior(model, dist, t), last)
    cost_hand = n_in * t_full + n_out * t_prior
    rate_hand = ess_l / (frac_l * cost_hand)

    def reach(n, tau, ok):
        return (f"{n - n // 4} steps after burn-in = {(n - n // 4) / tau:.0f} tau: "
                + ("> 50 tau and tau settled" if ok else
                   "50 tau / settled tau NOT reached, tau is a lower bound, the ESS an upper "
                   "bound"))

    def trace(taus):
        return ", ".join(f"{n}:{t:.0f}" for n, t in taus)

    print(f"field_1au ESS/s; emcee, diskfield's move mixture, seed {seed}; burn-in the first "
          f"quarter of each chain; ESS = steps after burn-in x walkers / tau, tau from "
          f"emcee.autocorr.integrated_time (c=5); each chain extended until the part after "
          f"burn-in is longer than 50 tau and tau changed < {100 * _TAU_RTOL:.0f} % since the "
          f"previous check, or it hits its cap")
    print(f"  marginalised ({k} dims, 32 walkers, {col_m.shape[0]} steps, {wall_m:.1f} s): "
          f"tau = {tau_m:.1f} steps, {reach(col_m.shape[0], tau_m, ok_m)}; "
          f"ESS {ess_m:.0f}, {rate_m:.2f} ESS/s")
    print(f"    tau estimate at each check (steps:tau): {trace(taus_m)}")
    print(f"  latent chain ({ndim} dims, {walkers} walkers, {col_l.shape[0]} steps, cap "
          f"{max(latent_cap, 10 * steps)}): tau = {tau_l:.0f} steps, "
          f"{reach(col_l.shape[0], tau_l, ok_l)}; ESS {ess_l:.0f}")
    print(f"    tau estimate at each check (steps:tau): {trace(taus_l)}")
    print(f"  same model: hand-written (bench_likelihood (c)) minus vectorised latent code at 8 "
          f"walker positions: max |d log-likelihood| = {diff_like:.1e}, "
          f"max |d log-posterior| = {diff_post:.1e}")
    print(f"  (a) the issue's formulation, bench_likelihood's _hand_written (Python loop over "
          f"records, one walker per call) plus the latent priors as a per-walker loop: "
          f"{1e3 * t_full:.2f} ms per walker evaluation ({1e3 * t_prior:.3f} ms for the prior "
          f"alone, charged to the {n_out} of {n_eval} evaluations outside the support); "
          f"best-of-3 mean over the chain's {last.shape[0]} final positions")
    print(f"      ESS/s = ESS / (walker evaluations after burn-in x time per evaluation), the "
          f"latent chain's ESS (tau in steps belongs to model and sampler, not to the code) "
          f"with its {n_eval} walker evaluations costed at the above, emcee's own "
          f"overhead not counted: {rate_hand:.4f} ESS/s "
          f"({frac_l * cost_hand:.0f} s of evaluations)")
    print(f"  (b) vectorised latent code (_LatentSmooth, numpy over walkers), wall time of the "
          f"actual run: {rate_vec:.2f} ESS/s ({frac_l * wall_l:.1f} s after burn-in)")
    bound = {(True, True): "", (True, False): " (lower bounds: the latent tau is a lower bound)",
             (False, True): " (upper bounds: the marginalised tau is a lower bound)",
             (False, False): " (NOT bounded: both tau estimates are lower bounds)"}[ok_m, ok_l]
    print(f"  ratio marginalised / latent{bound}: (a) vs the issue's hand-written formulation "
          f"{rate_m / rate_hand:.0f}x; (b) vs the vectorised latent code "
          f"{rate_m / rate_vec:.1f}x (target >= 50x)")


def bench_evidence(seed: int, models) -> None:
    from diskfield.evidence import nested_evidence

    comp = diskfield.read_compilation(demo_dir() / "demo_compilation.ecsv")
    print("nested sampling (nlive 100, dlogz 0.5), plain one-point calls vs batched proposals")
    for name in models:
        model = diskfield.build_model(comp, profile=name)
        line = []
        runs = {}
        for batch in (False, True):
            ev = nested_evidence(model, seed=seed, batch=batch)
            runs[batch] = ev
            line.append(f"{'batched' if batch else 'plain'} {ev.wall_time_s:6.1f} s, "
                        f"ln Z {ev.ln_evidence:.2f} +- {ev.ln_evidence_err:.2f}, "
                        f"{ev.n_calls} calls ({ev.n_evaluated} points evaluated, "
                        f"{ev.n_evaluated / ev.wall_time_s:.0f} points/s)")
        print(f"  {name:9s} " + "; ".join(line))
        print(f"  {name:9s} speed-up {runs[False].wall_time_s / runs[True].wall_time_s:.1f}x")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", choices=("compare", "ess", "evidence"), default=None)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--steps", type=int, default=2000,
                        help="ess: first stretch of the marginalised chain (extended up to 20x "
                             "until 50 tau); the latent chain starts with 10x as many")
    parser.add_argument("--latent-max-steps", type=int, default=800_000,
                        help="ess: cap on the latent chain's steps (it runs until 50 tau or this)")
    parser.add_argument("--max-steps", type=int, default=None,
                        help="cap the compare's MCMC steps (default: the shipped defaults)")
    parser.add_argument("--jobs", type=int, default=None,
                        help="worker processes for compare (default: the usable cores, as the CLI)")
    args = parser.parse_args()
    jobs = args.jobs or usable_cores()
    if args.only in (None, "ess"):
        bench_ess(args.seed, args.steps, args.latent_max_steps)
    if args.only in (None, "evidence"):
        bench_evidence(args.seed, ("smooth", "ring", "two-ring"))
    if args.only in (None, "compare"):
        bench_compare(args.seed, args.max_steps, jobs)


if __name__ == "__main__":
    main()
