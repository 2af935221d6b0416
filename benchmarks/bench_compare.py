"""Benchmarks of sampling and comparison on the shipped (invented) demo compilation.

Run from the repository top::

    python benchmarks/bench_compare.py            # both benchmarks
    python benchmarks/bench_compare.py --only ess # just the sampling-efficiency comparison

1. Wall time of ``diskfield compare`` on the demo for smooth, ring and two-ring including
   nested-sampling evidence and the prior-sensitivity runs (target ≤ 120 s on 2 cores),
   with the time of each phase; ``--jobs`` worker processes as the CLI (default: the usable
   cores; the benchmark ran them one after another before).
2. Effective samples per second of ``field_1au`` for the marginalised likelihood (only the
   global parameters are sampled; distances by quadrature, spin projections in closed form)
   against a hand-written latent formulation of the same smooth model in which every body's
   distance r_g and spin log-projection X_g = −ln u_g are explicit emcee parameters (the
   Gaussian log-terms — measurement, calibration, recording fraction, intrinsic scatter —
   stay analytic in both, so the comparison isolates the latents). Target ratio ≥ 50×.
   ESS = (steps × walkers) / τ with τ from ``emcee.autocorr.integrated_time``; when a chain
   is shorter than 50 τ the τ estimate is a lower bound and the latent ESS/s an upper bound
   (flagged in the output).

3. Nested sampling of each demo model with dynesty's one-point-at-a-time likelihood calls
   against the batched proposals of ``diskfield.nsbatch`` (same seed and settings):
   wall time, likelihood points per second and the speed-up (``--only evidence``).

Prints figures; asserts nothing.
"""
from __future__ import annotations

import argparse
import tempfile
import time

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
    """Smooth disk with explicit latents: theta = (field_1au, power_index, sigma_int, r_g..., X_g...)."""

    def __init__(self, model):
        self.m = model
        rec = model.compilation.records
        self.y, self.lim = np.asarray(rec.ln_value), np.asarray(rec.is_limit, bool)
        self.g = np.asarray(rec.body_index)
        self.var0, self.offset = model._terms.var_fixed, model._terms.offset
        self.dist = [model._bodies.priors[k] for k in range(model.n_bodies)]
        self.nb = model.n_bodies

    def __call__(self, theta):
        nb, k = self.nb, len(self.m.parameter_names)
        glob, r, x = theta[:, :k], theta[:, k:k + nb], theta[:, k + nb:]
        lp = self.m.log_prior(glob) + sum(d.log_prob(r[:, i]) for i, d in enumerate(self.dist))
        lp = lp + np.where(np.all(x >= 0, axis=1), -x.sum(axis=1), -np.inf)  # X ~ Exp(1)
        ok = np.isfinite(lp)
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


def _ess_per_s(chain, wall, index=0):
    tau = emcee.autocorr.integrated_time(chain[..., index:index + 1], c=5, tol=0, quiet=True)[0]
    reliable = chain.shape[0] > 50 * tau
    return chain.shape[0] * chain.shape[1] / tau / wall, tau, reliable


def _run_emcee(logp, p0, steps, seed):
    """emcee with diskfield's move mixture; returns the chain and the sampling wall time."""
    sampler = emcee.EnsembleSampler(p0.shape[0], p0.shape[1], logp, vectorize=True,
                                    moves=[(emcee.moves.DEMove(), 0.7),
                                           (emcee.moves.DEMove(gamma0=1.0), 0.1),
                                           (emcee.moves.StretchMove(), 0.2)])
    t0 = time.perf_counter()
    sampler.run_mcmc(emcee.State(p0, random_state=np.random.RandomState(seed).get_state()),
                     steps)
    return sampler.get_chain(), time.perf_counter() - t0


def bench_ess(seed: int, steps: int) -> None:
    comp = diskfield.read_compilation(demo_dir() / "demo_compilation.ecsv")
    model = diskfield.build_model(comp, profile="smooth")
    rng = np.random.default_rng(seed)
    best = maximize_likelihood(model, rng).theta
    k = len(model.parameter_names)
    jitter = lambda n: best * (1 + 1e-3 * rng.standard_normal((n, k)))  # noqa: E731
    chain, wall_m = _run_emcee(log_probability(model), jitter(32), steps, seed)
    # burn-in: first quarter of each run, the same rule for both formulations
    ess_m, tau_m, ok_m = _ess_per_s(chain[steps // 4:], 0.75 * wall_m)
    latent = _LatentSmooth(model)
    ndim = k + 2 * model.n_bodies
    walkers = 2 * ndim + 2
    p0 = np.column_stack([jitter(walkers),
                          np.column_stack([d.sample(rng, walkers) for d in latent.dist]),
                          rng.exponential(1.0, (walkers, model.n_bodies))])
    latent_steps = 10 * steps
    chain_l, wall_l = _run_emcee(latent, p0, latent_steps, seed)
    ess_l, tau_l, ok_l = _ess_per_s(chain_l[latent_steps // 4:], 0.75 * wall_l)
    print(f"field_1au ESS/s, marginalised ({k} dims, 32 walkers, {steps} steps, "
          f"{wall_m:.1f} s): {ess_m:.2f} "
          f"(tau = {tau_m:.0f}{'' if ok_m else ', chain < 50 tau: tau is a lower bound'})")
    print(f"field_1au ESS/s, latent ({ndim} dims, {walkers} walkers, {latent_steps} steps, "
          f"{wall_l:.1f} s): {ess_l:.2f} (tau = {tau_l:.0f}"
          f"{'' if ok_l else ', chain < 50 tau: tau is a lower bound, ESS/s an upper bound'})")
    print(f"ratio marginalised / latent: {ess_m / ess_l:.1f}x (target >= 50x)")


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
                        help="marginalised-model steps (the latent model runs 10x as many)")
    parser.add_argument("--max-steps", type=int, default=None,
                        help="cap the compare's MCMC steps (default: the shipped defaults)")
    parser.add_argument("--jobs", type=int, default=None,
                        help="worker processes for compare (default: the usable cores, as the CLI)")
    args = parser.parse_args()
    jobs = args.jobs or usable_cores()
    if args.only in (None, "ess"):
        bench_ess(args.seed, args.steps)
    if args.only in (None, "evidence"):
        bench_evidence(args.seed, ("smooth", "ring", "two-ring"))
    if args.only in (None, "compare"):
        bench_compare(args.seed, args.max_steps, jobs)


if __name__ == "__main__":
    main()
