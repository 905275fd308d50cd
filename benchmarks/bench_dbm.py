"""Dielectric breakdown model: wall time per cluster size and eta, one core.

Prints one line per (eta, n): seconds, cluster radius and grid side. Once a run of some
eta exceeds ``--budget`` seconds, larger sizes of that eta are skipped (and said so),
since the cost per site grows with the area of the electrode disc.

    .venv/bin/python benchmarks/bench_dbm.py [--sizes 1000 3000 10000] [--etas 0.5 1 2 4]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from service.simulate.dbm import _grow, dbm


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 3000, 10000])
    parser.add_argument("--etas", type=float, nargs="+", default=[0.5, 1.0, 2.0, 4.0])
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--budget", type=float, default=120.0,
                        help="skip larger sizes of an eta once one run takes longer (s)")
    args = parser.parse_args()

    dbm(20, eta=1.0, seed=0)  # compile (or load the cached kernels) outside the timings
    print(f"{'eta':>5} {'sites':>7} {'seconds':>9} {'s/1k sites':>10} {'radius_px':>9} {'grid_side':>9}")
    for eta in args.etas:
        over_budget = False
        for n in sorted(args.sizes):
            if over_budget:
                print(f"{eta:5.1f} {n:7d}   skipped (previous size over {args.budget:.0f} s)")
                continue
            start = time.perf_counter()
            order, _, _ = _grow(n, eta, args.seed)
            seconds = time.perf_counter() - start
            rows, cols = np.nonzero(order)
            centre = order.shape[0] // 2
            radius = np.hypot(rows - centre, cols - centre).max()
            print(f"{eta:5.1f} {n:7d} {seconds:9.2f} {1000 * seconds / n:10.2f} {radius:9.0f} "
                  f"{order.shape[0]:9d}", flush=True)
            over_budget = seconds > args.budget


if __name__ == "__main__":
    main()
