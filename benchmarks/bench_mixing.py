"""Mixing diagnostics of the emcee driver on the demo compilation, measured in steps.

Run from the repository top::

    python benchmarks/bench_mixing.py                       # smooth, ring, two-ring
    python benchmarks/bench_mixing.py --models ring --max-steps 3000

For every model it runs :func:`diskfield.sampling.run_sampler` (steady envelope, body spin,
the default settings unless overridden) and prints, in steps and likelihood calls rather
than seconds (the machine is shared and the likelihood changes):

* steps to convergence (or the step limit), the burn-in and the chain/τ figure the driver
  used, the mean acceptance fraction;
* τ per parameter estimated three ways — on the whole chain (burn-in included), on the
  part after the driver's burn-in, and on the second half only — so that a τ inflated by
  the start-up transient shows as a large first column;
* per-block medians and 5–95 % ranges of the ring parameters and ``field_1au`` (trace
  summary: a drifting median is a transient, a bimodal range a multimodal posterior);
* how many walkers sit on each side of the largest gap in ``ring_radius`` at the start and
  in the last block (modes occupied);
* ESS of ``field_1au`` per likelihood call (walker evaluation), counting the optimiser's
  calls too: ESS = kept steps × walkers / τ (post-burn-in τ).

Prints figures; asserts nothing.
"""
from __future__ import annotations

import argparse
import time

import emcee
import numpy as np

import diskfield
from diskfield.resources import demo_dir
from diskfield import sampling
from diskfield.sampling import SamplerSettings, run_sampler

#: Alternative move mixtures to compare with the driver's (``--moves NAME``).
MOVES = {
    "driver": None,
    "de+stretch": lambda: [(emcee.moves.DEMove(), 0.8), (emcee.moves.StretchMove(), 0.2)],
    "de-small+de1+stretch": lambda: [(emcee.moves.DEMove(gamma0=0.5 * 2.38 / np.sqrt(12)), 0.7),
                                     (emcee.moves.DEMove(gamma0=1.0), 0.1),
                                     (emcee.moves.StretchMove(), 0.2)],
    "stretch": lambda: [(emcee.moves.StretchMove(), 1.0)],
    "de+kde": lambda: [(emcee.moves.DEMove(), 0.7), (emcee.moves.DEMove(gamma0=1.0), 0.1),
                       (emcee.moves.KDEMove(), 0.2)],
}


def _tau(chain):
    return emcee.autocorr.integrated_time(chain, c=5, tol=0, quiet=True)


def _modes(x):
    """Walkers on each side of the largest gap of the sorted values (1 entry if no gap)."""
    s = np.sort(x)
    gaps = np.diff(s)
    spread = np.subtract(*np.percentile(s, [90, 10])) or 1.0
    k = int(np.argmax(gaps))
    if gaps[k] > 0.5 * spread:
        return [k + 1, len(s) - k - 1], float(0.5 * (s[k] + s[k + 1]))
    return [len(s)], None


def diagnose(comp, profile, seed, settings, blocks):
    model = diskfield.build_model(comp, profile=profile, envelope="steady", spin="body")
    names = model.parameter_names
    t0 = time.perf_counter()
    run = run_sampler(model, seed=seed, settings=settings)
    wall = time.perf_counter() - t0
    chain = run.chain
    S, W, P = chain.shape
    acc = run.acceptance_fraction
    print(f"\n=== {profile}: {S} steps x {W} walkers, converged={run.converged}, "
          f"burn-in {run.burn_in}, thin {run.thin}, chain/tau {run.chain_over_tau:.1f}, "
          f"acceptance mean {acc.mean():.3f} (min {acc.min():.3f}, max {acc.max():.3f}), "
          f"wall {wall:.0f} s (shared machine, for orientation only)")
    for f in run.flags:
        print("   flag:", f)
    if model.config.get("label_ordering"):
        print("   label ordering:", model.config["label_ordering"])
        print("   walkers under the ordering:", settings.ordered_region)
    full, post, half = _tau(chain), _tau(chain[run.burn_in:]), _tau(chain[S // 2:])
    print(f"   {'parameter':18s} {'tau(all)':>9s} {'tau(post-burn)':>14s} {'tau(2nd half)':>13s}"
          f" {'driver tau':>10s}")
    for i, n in enumerate(names):
        print(f"   {n:18s} {full[i]:9.1f} {post[i]:14.1f} {half[i]:13.1f} {run.tau[i]:10.1f}")
    show = [i for i, n in enumerate(names) if n.startswith("ring") or n == "field_1au"]
    edges = np.linspace(0, S, blocks + 1).astype(int)
    print("   trace: block median [5%, 95%] over walkers x steps")
    for i in show:
        cells = []
        for a, b in zip(edges[:-1], edges[1:]):
            q = np.percentile(chain[a:b, :, i], [5, 50, 95])
            cells.append(f"{q[1]:.3g}[{q[0]:.3g},{q[2]:.3g}]")
        print(f"   {names[i]:16s} " + " ".join(cells))
    for n in ("ring_radius", "ring2_radius"):
        if n in names:
            i = names.index(n)
            print(f"   {n} walkers per mode: start {_modes(chain[0, :, i])}, "
                  f"last block {_modes(chain[edges[-2]:, :, i].ravel())}")
    kept = S - run.burn_in
    i = names.index("field_1au")
    ess = kept * W / post[i]
    calls = S * W
    print(f"   field_1au: ESS {ess:.0f} from {calls} sampler calls -> {ess / calls:.4f} "
          f"ESS per likelihood call (post-burn-in tau {post[i]:.1f})")
    return run


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", default="smooth,ring,two-ring")
    ap.add_argument("--seed", type=int, default=20240101)
    ap.add_argument("--max-steps", type=int, default=None)
    ap.add_argument("--walkers", type=int, default=None)
    ap.add_argument("--blocks", type=int, default=6)
    ap.add_argument("--ball", type=float, default=None)
    ap.add_argument("--moves", choices=sorted(MOVES), default="driver")
    ap.add_argument("--ordered-region", choices=("fold", "wall"), default=None,
                    help="walkers under a label ordering (default: the driver's, fold)")
    args = ap.parse_args(argv)
    kw = {}
    if args.max_steps:
        kw["max_steps"] = args.max_steps
    if args.walkers:
        kw["n_walkers"] = args.walkers
    if args.ball:
        kw["ball"] = args.ball
    if args.ordered_region:
        kw["ordered_region"] = args.ordered_region
    if MOVES[args.moves] is not None:
        sampling._moves = MOVES[args.moves]
        print(f"moves overridden (NOT the driver's): {args.moves}")
    settings = SamplerSettings(**kw)
    if kw:
        print(f"settings overridden (NOT the defaults): {kw}")
    comp = diskfield.read_compilation(demo_dir() / "demo_compilation.ecsv")
    for profile in args.models.split(","):
        diagnose(comp, profile, args.seed, settings, args.blocks)


if __name__ == "__main__":
    main()
