"""Dielectric breakdown model: wall time of the current solver beside the previous one.

For each eta, prints the current solver at the goal size (10,000 sites by default)
against the goal of issue 11 (eta 2: 30 s; eta 3 and 4: 60 s), and both solvers side by
side at a size the previous solver can afford (``--old-sizes``, one per eta: it cost
159 s for 10,000 sites at eta 2, and far more at eta 3 and 4, since each of its steps
sweeps the whole electrode disc). Same seed, same run, one core.

    .venv/bin/python benchmarks/bench_dbm.py [--etas 1 2 3 4] [--sites 10000]
        [--old-sizes 3000 3000 1000 1000] [--repeats 1]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from benchmarks import _dbm_baseline as baseline
from service.simulate.dbm import _grow_sites, dbm

GOALS_S = {2.0: 30.0, 3.0: 60.0, 4.0: 60.0}


def _time_new(n: int, eta: float, seed: int) -> tuple[float, float]:
    start = time.perf_counter()
    sites_i, sites_j, grid = _grow_sites(n, eta, seed)
    seconds = time.perf_counter() - start
    return seconds, float(np.hypot(sites_i - grid.centre, sites_j - grid.centre).max())


def _time_old(n: int, eta: float, seed: int) -> tuple[float, float]:
    start = time.perf_counter()
    order, _, _ = baseline._grow(n, eta, seed)
    seconds = time.perf_counter() - start
    rows, cols = np.nonzero(order)
    centre = order.shape[0] // 2
    return seconds, float(np.hypot(rows - centre, cols - centre).max())


def _median(fn, n, eta, seed, repeats):
    runs = [fn(n, eta, seed) for _ in range(repeats)]
    return statistics.median(r[0] for r in runs), runs[0][1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--etas", type=float, nargs="+", default=[1.0, 2.0, 3.0, 4.0])
    parser.add_argument("--sites", type=int, default=10_000)
    parser.add_argument("--old-sizes", type=int, nargs="+", default=[3000, 3000, 1000, 1000],
                        help="sizes at which both solvers run, one per eta (0 skips)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeats", type=int, default=1)
    args = parser.parse_args()
    if len(args.old_sizes) != len(args.etas):
        parser.error("give one --old-sizes entry per eta")

    dbm(20, eta=1.0, seed=0)  # compile (or load the cached kernels) outside the timings
    baseline._grow(20, 1.0, 0)
    print("side by side (same size, same seed):")
    print(f"{'eta':>5} {'sites':>7} {'old_s':>8} {'new_s':>8} {'speedup':>8} {'old_r':>6} {'new_r':>6}")
    for eta, n_old in zip(args.etas, args.old_sizes):
        if n_old <= 0:
            continue
        old_s, old_r = _median(_time_old, n_old, eta, args.seed, args.repeats)
        new_s, new_r = _median(_time_new, n_old, eta, args.seed, args.repeats)
        print(f"{eta:5.1f} {n_old:7d} {old_s:8.2f} {new_s:8.2f} {old_s / new_s:7.1f}x "
              f"{old_r:6.0f} {new_r:6.0f}", flush=True)
    print(f"\ncurrent solver at {args.sites} sites against the goal:")
    print(f"{'eta':>5} {'sites':>7} {'new_s':>8} {'goal_s':>7} {'radius':>7}")
    for eta in args.etas:
        new_s, new_r = _median(_time_new, args.sites, eta, args.seed, args.repeats)
        goal = GOALS_S.get(eta)
        goal_text = f"{goal:7.0f}" if goal else f"{'-':>7}"
        verdict = "" if goal is None else ("  met" if new_s <= goal else "  NOT met")
        print(f"{eta:5.1f} {args.sites:7d} {new_s:8.2f} {goal_text} {new_r:7.0f}{verdict}", flush=True)


if __name__ == "__main__":
    main()
