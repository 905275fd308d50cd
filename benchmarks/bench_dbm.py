"""Dielectric breakdown model: CPU time of the current solver beside the previous one.

For each eta, grows the same cluster (same size, same seed) with the solver as it was
before the speed work of issue 11 (``_dbm_baseline.py``, a frozen copy) and with the
current one, one after the other in the same run, and prints both CPU times, their
ratio, whether the clusters agree bit for bit, and the goal of issue 11 (10,000 sites:
eta 2 in 30 s, eta 3 and 4 in 60 s, one core). On a machine shared with other jobs the
CPU time is the figure to compare with the goal; pin the run to one core with
``taskset -c 0`` for steadier figures.

    .venv/bin/python -m benchmarks.bench_dbm [--etas 1 2 3 4] [--sites 10000]
        [--seeds 1] [--no-baseline]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from service.simulate.dbm import _grow_sites, dbm

try:  # run as a module from the repository root (python -m benchmarks.bench_dbm)
    from benchmarks import _dbm_baseline as baseline
except ModuleNotFoundError:  # run as a script (make benchmark)
    import _dbm_baseline as baseline

GOALS_S = {2.0: 30.0, 3.0: 60.0, 4.0: 60.0}
GOAL_SITES = 10_000  # the goals are for this size


def _time(grow, n: int, eta: float, seed: int):
    """Wall and CPU seconds of one growth, the sites in arrival order and the radius."""
    wall, cpu = time.perf_counter(), time.process_time()
    sites_i, sites_j, grid = grow(n, eta, seed)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    rows, cols = sites_i - grid.centre, sites_j - grid.centre
    return wall, cpu, np.stack([rows, cols]), float(np.hypot(rows, cols).max())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--etas", type=float, nargs="+", default=[1.0, 2.0, 3.0, 4.0])
    parser.add_argument("--sites", type=int, default=10_000)
    parser.add_argument("--seeds", type=int, nargs="+", default=[1])
    parser.add_argument("--no-baseline", action="store_true",
                        help="time only the current solver")
    args = parser.parse_args()

    dbm(20, eta=1.0, seed=0)  # compile (or load the cached kernels) outside the timings
    baseline._grow_sites(20, 1.0, 0)
    print(f"{args.sites} sites, CPU seconds (wall in brackets); previous = solver before "
          "issue 11, same size and seed, same run")
    print(f"{'eta':>5} {'seed':>5} {'previous_s':>16} {'current_s':>16} {'speedup':>8} "
          f"{'same':>5} {'radius':>7} {'goal_s':>7}")
    for eta in args.etas:
        for seed in args.seeds:
            if args.no_baseline:
                old_text, ratio, same = f"{'-':>16}", f"{'-':>8}", f"{'-':>5}"
                new_w, new_c, _, radius = _time(_grow_sites, args.sites, eta, seed)
            else:
                old_w, old_c, old_sites, _ = _time(baseline._grow_sites, args.sites, eta, seed)
                new_w, new_c, new_sites, radius = _time(_grow_sites, args.sites, eta, seed)
                old_text = f"{old_c:7.2f} ({old_w:6.1f})"
                ratio = f"{old_c / new_c:7.2f}x"
                same = f"{'yes' if np.array_equal(old_sites, new_sites) else 'no':>5}"
            goal = GOALS_S.get(eta) if args.sites == GOAL_SITES else None
            goal_text = f"{'-':>7}" if goal is None else (
                f"{goal:7.0f} " + ("met" if new_c <= goal else "NOT met"))
            print(f"{eta:5.1f} {seed:5d} {old_text} {new_c:7.2f} ({new_w:6.1f}) {ratio} {same} "
                  f"{radius:7.0f} {goal_text}", flush=True)


if __name__ == "__main__":
    main()
