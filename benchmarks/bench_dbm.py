"""Dielectric breakdown model: wall time of the current solver beside the previous one.

For each eta, prints the current solver at the goal size (10,000 sites by default)
against the goal of issue 11 (eta 2: 30 s; eta 3 and 4: 60 s), and both solvers side by
side at a size the previous solver can afford (``--old-sizes``, one per eta: it cost
159 s for 10,000 sites at eta 2, and far more at eta 3 and 4, since each of its steps
sweeps the whole electrode disc). Same seed, same run, one core.

    .venv/bin/python -m benchmarks.bench_dbm [--etas 1 2 3 4] [--sites 10000]
        [--old-sizes 3000 3000 1000 1000] [--repeats 1]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from service.simulate.dbm import _grow_sites, dbm

try:  # run as a module from the repository root (python -m benchmarks.bench_dbm)
    from benchmarks import _dbm_baseline as baseline
except ModuleNotFoundError:  # run as a script (make benchmark)
    import _dbm_baseline as baseline

GOALS_S = {2.0: 30.0, 3.0: 60.0, 4.0: 60.0}


def _time_new(n: int, eta: float, seed: int) -> tuple[float, float, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    sites_i, sites_j, grid = _grow_sites(n, eta, seed)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    return wall, cpu, float(np.hypot(sites_i - grid.centre, sites_j - grid.centre).max())


def _time_old(n: int, eta: float, seed: int) -> tuple[float, float, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    order, _, _ = baseline._grow(n, eta, seed)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    rows, cols = np.nonzero(order)
    centre = order.shape[0] // 2
    return wall, cpu, float(np.hypot(rows - centre, cols - centre).max())


def _median(fn, n, eta, seed, repeats):
    """Median wall and CPU seconds of ``repeats`` runs, and the cluster radius."""
    runs = [fn(n, eta, seed) for _ in range(repeats)]
    return (statistics.median(r[0] for r in runs), statistics.median(r[1] for r in runs),
            runs[0][2])


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
    print("side by side (same size, same seed; wall and CPU seconds: on a shared machine the")
    print("CPU time is the figure to compare with the goal)")
    print(f"{'eta':>5} {'sites':>7} {'old_wall':>9} {'old_cpu':>8} {'new_wall':>9} {'new_cpu':>8} "
          f"{'speedup':>8} {'old_r':>6} {'new_r':>6}")
    for eta, n_old in zip(args.etas, args.old_sizes):
        if n_old <= 0:
            continue
        old_w, old_c, old_r = _median(_time_old, n_old, eta, args.seed, args.repeats)
        new_w, new_c, new_r = _median(_time_new, n_old, eta, args.seed, args.repeats)
        print(f"{eta:5.1f} {n_old:7d} {old_w:9.2f} {old_c:8.2f} {new_w:9.2f} {new_c:8.2f} "
              f"{old_c / new_c:7.1f}x {old_r:6.0f} {new_r:6.0f}", flush=True)
    print(f"\ncurrent solver at {args.sites} sites against the goal (issue 11):")
    print(f"{'eta':>5} {'sites':>7} {'wall_s':>8} {'cpu_s':>8} {'goal_s':>7} {'radius':>7}")
    for eta in args.etas:
        new_w, new_c, new_r = _median(_time_new, args.sites, eta, args.seed, args.repeats)
        goal = GOALS_S.get(eta)
        goal_text = f"{goal:7.0f}" if goal else f"{'-':>7}"
        verdict = "" if goal is None else ("  met" if new_c <= goal else "  NOT met")
        print(f"{eta:5.1f} {args.sites:7d} {new_w:8.2f} {new_c:8.2f} {goal_text} {new_r:7.0f}"
              f"{verdict}", flush=True)


if __name__ == "__main__":
    main()
