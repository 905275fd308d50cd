"""DLA speed: the safe-jump simulator against the plain walk, compiled alike, side by side.

The plain algorithm launches each walker on a circle just outside the cluster (the same gap
as the fast one), takes unit steps until contact, and relaunches a walker that crosses a
circle three times the launch radius (Witten & Sander 1981; Meakin 1983). Both kernels are
numba-compiled with the same options and warmed up before timing.

Run: ``.venv/bin/python benchmarks/bench_dla.py``
"""

from __future__ import annotations

import time

import numba
import numpy as np

from service.simulate.dla import _LAUNCH_GAP, dla, lattice_from_sites


@numba.njit(cache=True)
def _plain_dla(n, seed, launch_gap):
    """Sites of an ``n``-site von Neumann DLA grown with unit steps only. ``n >= 1``."""
    np.random.seed(seed)
    rows = np.zeros(n, dtype=np.int32)
    cols = np.zeros(n, dtype=np.int32)
    half = 64
    occupied = np.zeros((2 * half, 2 * half), dtype=np.uint8)
    occupied[half, half] = 1
    r_max = 0.0
    count = 1
    dr = (-1, 1, 0, 0)
    dc = (0, 0, -1, 1)
    while count < n:
        r_launch = r_max + launch_gap
        r_kill = 3.0 * r_launch
        if r_kill + 3.0 >= half:
            half *= 2
            occupied = np.zeros((2 * half, 2 * half), dtype=np.uint8)
            for k in range(count):
                occupied[rows[k] + half, cols[k] + half] = 1
        angle = 2.0 * np.pi * np.random.random()
        y = int(np.floor(r_launch * np.sin(angle) + 0.5))
        x = int(np.floor(r_launch * np.cos(angle) + 0.5))
        while True:
            if x * x + y * y > r_kill * r_kill:
                angle = 2.0 * np.pi * np.random.random()
                y = int(np.floor(r_launch * np.sin(angle) + 0.5))
                x = int(np.floor(r_launch * np.cos(angle) + 0.5))
                continue
            gr = y + half
            gc = x + half
            if occupied[gr - 1, gc] or occupied[gr + 1, gc] or occupied[gr, gc - 1] or occupied[gr, gc + 1]:
                occupied[gr, gc] = 1
                rows[count] = y
                cols[count] = x
                count += 1
                r_max = max(r_max, np.sqrt(float(x * x + y * y)))
                break
            d = np.random.randint(0, 4)
            y += dr[d]
            x += dc[d]
    return rows, cols


def plain_dla(n_particles: int, *, seed: int) -> np.ndarray:
    """Arrival-order lattice of the plain algorithm (von Neumann contact, sticking 1)."""
    return lattice_from_sites(*_plain_dla(n_particles, seed, _LAUNCH_GAP))


def best_time_s(function, n: int, repeats: int, seed0: int = 0) -> float:
    """Median wall time of ``repeats`` growths of ``n`` sites with seeds seed0, seed0 + 1, ..."""
    times = []
    for k in range(repeats):
        start = time.perf_counter()
        function(n, seed=seed0 + k)
        times.append(time.perf_counter() - start)
    return float(np.median(times))


def main() -> None:
    plain_dla(200, seed=0)  # compile both before timing
    dla(200, seed=0)
    plain_5k = best_time_s(plain_dla, 5000, 3)
    fast_5k = best_time_s(dla, 5000, 5)
    fast_40k = best_time_s(dla, 40000, 3)
    fast_100k = best_time_s(dla, 100000, 3)
    print(f"plain DLA, 5,000 sites:        {plain_5k:8.3f} s")
    print(f"fast DLA, 5,000 sites:         {fast_5k:8.3f} s")
    print(f"fast DLA, 40,000 sites:        {fast_40k:8.3f} s")
    print(f"fast DLA, 100,000 sites:       {fast_100k:8.3f} s")
    print(f"speed-up plain/fast at 5,000:  {plain_5k / fast_5k:8.1f} x   (goal >= 30)")
    print(f"fast time(40,000)/time(5,000): {fast_40k / fast_5k:8.1f}     (goal <= 12)")
    print(f"fast time(100,000):            {fast_100k:8.3f} s (goal: a few seconds)")


if __name__ == "__main__":
    main()
