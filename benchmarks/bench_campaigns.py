"""Campaign throughput on 1 and 2 Dask workers, and what a 1,000-simulation calibration costs.

Runs the same SBC tasks (prior draw, simulation through the recording model, emcee fit) on a
one-worker and on a two-worker loopback LocalCluster, in one run, and prints fits per minute,
the scaling ratio (target >= 1.8x on 2 workers), the per-fit cost, and the projected wall time
of a 1,000-simulation calibration on one machine and on clusters of N workers.

Usage::

    python benchmarks/bench_campaigns.py                       # demo compilation, smooth model
    python benchmarks/bench_campaigns.py --model ring --max-steps 1000 --sims 8
"""
from __future__ import annotations

import argparse
import json
import os
import tempfile
import time

from pathlib import Path

from diskfield.campaigns.calibration import SBCSettings
from diskfield.campaigns.disk import DiskSBCProblem, make_spec
from diskfield.campaigns.orchestrate import run_calibration
from diskfield.campaigns.runner import open_client
from diskfield.resources import demo_dir
from diskfield.sampling import SamplerSettings


def _parse():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--file", default=str(demo_dir() / "demo_compilation.ecsv"))
    p.add_argument("--model", default="smooth")
    p.add_argument("--sims", type=int, default=6, help="SBC fits per cluster size")
    p.add_argument("--max-steps", type=int, default=300)
    p.add_argument("--walkers", type=int, default=16)
    p.add_argument("--starts", type=int, default=2)
    p.add_argument("--seed", type=int, default=20261202)
    return p.parse_args()


def _timed_campaign(problem, n_sims, seed, workers):
    """Wall time [s] of ``n_sims`` SBC tasks on a fresh cluster (start-up excluded), and the
    CPU time the tasks received [s] (below workers x wall when other processes compete)."""
    with open_client(workers=workers) as client, tempfile.TemporaryDirectory() as out:
        client.run(lambda: None)  # workers are up before the clock starts
        start = time.perf_counter()
        report, _, _ = run_calibration(problem, out, n_sims=n_sims, seed=seed,
                                       settings=SBCSettings(n_draws=19), client=client,
                                       progress=False)
        wall = time.perf_counter() - start
        cpu = sum(json.loads(p.read_text())["cpu_time_s"]
                  for p in Path(out, "tasks").glob("*.json"))
    if report.failed:
        raise SystemExit(f"{len(report.failed)} benchmark task(s) failed: {report.failed[0]}")
    return wall, cpu


def main() -> None:
    args = _parse()
    spec = make_spec(args.file, args.model)
    sampler = SamplerSettings(n_walkers=args.walkers, chunk=min(500, args.max_steps),
                              max_steps=args.max_steps, n_starts=args.starts)
    problem = DiskSBCProblem(spec, sampler)
    load = os.getloadavg()[0]
    t1, cpu1 = _timed_campaign(problem, args.sims, args.seed, 1)
    t2, cpu2 = _timed_campaign(problem, args.sims, args.seed, 2)
    rate1, rate2 = 60 * args.sims / t1, 60 * args.sims / t2
    per_fit = t1 / args.sims
    print(f"setting: {args.file} model={args.model} walkers={args.walkers} "
          f"max_steps={args.max_steps} starts={args.starts} sims={args.sims}; "
          f"cpus={os.cpu_count()}, load average at start {load:.2f}")
    print(f"1 worker : {t1:8.1f} s  {rate1:7.2f} fits/min")
    print(f"2 workers: {t2:8.1f} s  {rate2:7.2f} fits/min")
    print(f"scaling ratio (2 vs 1 worker): {rate2 / rate1:.2f}x (target >= 1.8x)")
    print(f"per-fit cost on one worker: {per_fit:.1f} s wall, {cpu1 / args.sims:.1f} s CPU")
    print(f"CPU share the workers received (CPU time / (workers x wall)): 1 worker "
          f"{cpu1 / t1:.2f}, 2 workers {cpu2 / (2 * t2):.2f} (below 1: other processes "
          "competed for the cores, and the scaling ratio understates the idle-machine one)")
    print(f"CPU-time scaling (fits per CPU-second, 2 vs 1 worker): {cpu1 / cpu2:.2f} "
          "(1.0 = no per-fit overhead from running two at once)")
    # A fit is single-threaded and CPU-bound: its CPU time is its wall time on an idle core,
    # so projections use the CPU cost and are not distorted by other load on this machine.
    cpu_fit = cpu2 / args.sims
    print("projected 1,000-simulation calibration (SBC fits only; verdict simulations add "
          "two evidences each), from the measured per-fit CPU cost "
          f"{cpu_fit:.1f} s with 2 fits at once, at full use of each worker:")
    for n in (2, 8, 32, 128):
        where = "one laptop/this machine" if n == 2 else "cluster"
        print(f"  {where:>23s}, {n:3d} workers: {1000 * cpu_fit / n / 3600:7.2f} h")
    print(f"  measured here, 2 workers (contended)    : {1000 / rate2 / 60:7.2f} h")

if __name__ == "__main__":
    main()
