"""DLA speed at scale: the simulator against its previous version and the plain walk, side by side.

Three compiled kernels, each warmed up before timing, all on one CPU (the first this process
may use) so the figures are one-core figures:

- ``current``: ``service.simulate.dla`` (hierarchy of tiled occupancy bit maps, near-field
  distance map, SplitMix64).
- ``previous``: the simulator as it stood before, kept here verbatim as the baseline: one
  byte per lattice site, jumps bounded by a map of Chebyshev distances between 4 x 4 blocks
  capped at 12 blocks (48 sites), numba's Mersenne Twister, trigonometric directions.
- ``plain``: the textbook algorithm (Witten & Sander 1981; Meakin 1983): launch just outside
  the cluster, unit steps until contact, relaunch beyond three times the launch radius. The
  tests also use it as the statistical reference of the fast kernels.

The figures: wall and CPU time of growths of 10^5, 3 x 10^5 and 10^6 particles (the median
of ``--repeats`` growths with seeds 0, 1, ... below 10^6, one growth at 10^6), microseconds per
particle, and the ratio time(10^6) / time(10^5), each beside its goal. The machine may be shared: CPU time is the
steadier figure, wall time the one a user waits for.

Run: ``.venv/bin/python benchmarks/bench_dla.py [--repeats N] [--skip-previous-million]``
"""

from __future__ import annotations

import argparse
import os
import time

import numba
import numpy as np

from service.simulate.dla import _LAUNCH_GAP, dla, lattice_from_sites

#: Goals: 10^6 particles in at most this many seconds on one core ...
GOAL_MILLION_S = 15.0
#: ... and time(10^6) / time(10^5) at most this.
GOAL_RATIO = 15.0

# The kernels below are compiled without numba's on-disk cache: the tests load this file by
# path, and a cached kernel of a module loaded that way cannot be found again.


@numba.njit
def _plain_dla(n, seed, launch_gap, moore):
    """Sites of an ``n``-site DLA (Moore contact when ``moore``) grown with unit steps only. ``n >= 1``."""
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
            contact = occupied[gr - 1, gc] or occupied[gr + 1, gc] or occupied[gr, gc - 1] or occupied[gr, gc + 1]
            if moore and not contact:
                contact = (
                    occupied[gr - 1, gc - 1] or occupied[gr - 1, gc + 1]
                    or occupied[gr + 1, gc - 1] or occupied[gr + 1, gc + 1]
                )
            if contact:
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


def plain_dla(n_particles: int, *, seed: int, neighborhood: str = "von_neumann") -> np.ndarray:
    """Arrival-order lattice of the plain algorithm (sticking 1)."""
    return lattice_from_sites(*_plain_dla(n_particles, seed, _LAUNCH_GAP, neighborhood == "moore"))


# The previous simulator, unchanged but for the names (baseline of the figures).
_PREVIOUS_BLOCK = 4
_PREVIOUS_MAX_BLOCKS = 12
_PREVIOUS_MIN_JUMP = 2.0


@numba.njit
def _previous_mark_block(dmap: np.ndarray, brow: int, bcol: int, max_blocks: int) -> None:
    """Lower the capped block-distance map around the newly occupied block ``(brow, bcol)``.

    Caller guarantees ``dmap`` is square and ``(brow, bcol)`` lies inside it.
    """
    nb = dmap.shape[0]
    for j in range(max(0, brow - max_blocks + 1), min(nb, brow + max_blocks)):
        dj = abs(j - brow)
        for i in range(max(0, bcol - max_blocks + 1), min(nb, bcol + max_blocks)):
            d = max(dj, abs(i - bcol))
            if d < dmap[j, i]:
                dmap[j, i] = d


@numba.njit
def _previous_build_maps(rows, cols, count, half, block, max_blocks):
    """Occupancy grid (side ``2 * half``, seed at ``(half, half)``) and capped block-distance map.

    Caller guarantees ``half`` is a multiple of ``block`` and every site lies at least two
    sites inside the grid.
    """
    side = 2 * half
    occupied = np.zeros((side, side), dtype=np.uint8)
    dmap = np.full((side // block, side // block), max_blocks, dtype=np.int16)
    for k in range(count):
        r = rows[k] + half
        c = cols[k] + half
        occupied[r, c] = 1
        if dmap[r // block, c // block] != 0:
            _previous_mark_block(dmap, r // block, c // block, max_blocks)
    return occupied, dmap


@numba.njit
def _previous_touches(occupied, r, c, moore):
    """Whether grid site ``(r, c)`` has an occupied neighbour (4, or 8 when ``moore``).

    Caller guarantees ``(r, c)`` is at least one site inside the grid.
    """
    if occupied[r - 1, c] or occupied[r + 1, c] or occupied[r, c - 1] or occupied[r, c + 1]:
        return True
    if moore:
        return bool(
            occupied[r - 1, c - 1] or occupied[r - 1, c + 1]
            or occupied[r + 1, c - 1] or occupied[r + 1, c + 1]
        )
    return False


@numba.njit
def _previous_grow_dla(n, seed, moore, sticking, launch_gap, block, max_blocks, min_jump):
    """Row and column offsets (from the seed) of ``n`` DLA sites in order of arrival.

    Caller guarantees ``n >= 1``, ``0 < sticking <= 1``, ``block`` even, ``max_blocks >= 2``,
    and ``min_jump >= 1``. Seeds numba's generator with ``seed``; same inputs, same output.
    """
    np.random.seed(seed)
    rows = np.zeros(n, dtype=np.int32)
    cols = np.zeros(n, dtype=np.int32)
    half = 16 * block
    occupied, dmap = _previous_build_maps(rows, cols, 1, half, block, max_blocks)
    r_max = 0.0
    count = 1
    dr = (-1, 1, 0, 0)
    dc = (0, 0, -1, 1)
    while count < n:
        r_launch = r_max + launch_gap
        r_far = r_launch + 2.0
        if r_far + block + 2.0 >= half:
            # Re-centre on a lattice twice as wide; walkers never index beyond r_far.
            half *= 2
            occupied, dmap = _previous_build_maps(rows, cols, count, half, block, max_blocks)
        angle = 2.0 * np.pi * np.random.random()
        y = int(np.floor(r_launch * np.sin(angle) + 0.5))
        x = int(np.floor(r_launch * np.cos(angle) + 0.5))
        while True:
            dist = np.sqrt(float(x * x + y * y))
            if dist > r_far:
                # Return to the launch circle with the exact first-hit law of a Brownian walker
                # started outside a disc: a wrapped Cauchy angle with rho = r_launch / dist.
                rho = r_launch / dist
                u = np.random.random()
                theta = 2.0 * np.arctan((1.0 - rho) / (1.0 + rho) * np.tan(np.pi * (u - 0.5)))
                angle = np.arctan2(float(y), float(x)) + theta
                y = int(np.floor(r_launch * np.sin(angle) + 0.5))
                x = int(np.floor(r_launch * np.cos(angle) + 0.5))
                continue
            gr = y + half
            gc = x + half
            # Safe radius: lattice points within jump + 0.71 (rounding) keep Chebyshev distance
            # >= 2 from every occupied site, so no contact can happen on the way.
            jump = dist - r_max - 2.5
            k = dmap[gr // block, gc // block]
            if k >= 2:
                jump = max(jump, (k - 1) * block + 1 - 2.5)
            if jump >= min_jump:
                angle = 2.0 * np.pi * np.random.random()
                y = int(np.floor(y + jump * np.sin(angle) + 0.5))
                x = int(np.floor(x + jump * np.cos(angle) + 0.5))
                continue
            if _previous_touches(occupied, gr, gc, moore):
                if sticking >= 1.0 or np.random.random() < sticking:
                    occupied[gr, gc] = 1
                    if dmap[gr // block, gc // block] != 0:
                        _previous_mark_block(dmap, gr // block, gc // block, max_blocks)
                    rows[count] = y
                    cols[count] = x
                    count += 1
                    r_max = max(r_max, dist)
                    break
            d = np.random.randint(0, 4)
            if not occupied[gr + dr[d], gc + dc[d]]:
                y += dr[d]
                x += dc[d]
    return rows, cols


def previous_dla(n_particles: int, *, seed: int, neighborhood: str = "von_neumann", sticking: float = 1.0):
    """Arrival-order lattice of the previous simulator (same contract as ``dla``)."""
    rows, cols = _previous_grow_dla(
        n_particles, seed, neighborhood == "moore", sticking, _LAUNCH_GAP,
        _PREVIOUS_BLOCK, _PREVIOUS_MAX_BLOCKS, _PREVIOUS_MIN_JUMP,
    )
    return lattice_from_sites(rows, cols)


def timed_s(function, n: int, repeats: int) -> tuple[float, float]:
    """Median wall and CPU seconds of ``repeats`` growths of ``n`` sites, seeds 0, 1, ..."""
    wall, cpu = [], []
    for seed in range(repeats):
        start_wall, start_cpu = time.perf_counter(), time.process_time()
        function(n, seed=seed)
        wall.append(time.perf_counter() - start_wall)
        cpu.append(time.process_time() - start_cpu)
    return float(np.median(wall)), float(np.median(cpu))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3, help="growths per figure below 10^6 (median)")
    parser.add_argument(
        "--skip-previous-million", action="store_true",
        help="leave out the previous simulator at 10^6 (about a minute)",
    )
    args = parser.parse_args()
    cpu = min(os.sched_getaffinity(0))
    os.sched_setaffinity(0, {cpu})
    print(f"one core (CPU {cpu}); median of {args.repeats} growth(s) below 10^6, one at 10^6; wall s / CPU s")

    for function in (plain_dla, previous_dla, dla):  # compile before timing
        function(200, seed=0)
    plain_5k = timed_s(plain_dla, 5000, 3)
    current_5k = timed_s(dla, 5000, 3)
    print(f"plain walk, 5,000 sites:    {plain_5k[0]:7.3f} / {plain_5k[1]:7.3f}")
    print(f"current, 5,000 sites:       {current_5k[0]:7.3f} / {current_5k[1]:7.3f}"
          f"   speed-up {plain_5k[1] / current_5k[1]:5.0f} x (CPU)")

    sizes = (100_000, 300_000, 1_000_000)
    results: dict[str, dict[int, tuple[float, float]]] = {"previous": {}, "current": {}}
    for n in sizes:
        repeats = args.repeats if n < 1_000_000 else 1
        if not (n == 1_000_000 and args.skip_previous_million):
            results["previous"][n] = timed_s(previous_dla, n, repeats)
        results["current"][n] = timed_s(dla, n, repeats)

    print()
    print(f"{'particles':>10} | {'previous: wall s':>16} {'CPU s':>7} {'us/p':>6} |"
          f" {'current: wall s':>15} {'CPU s':>7} {'us/p':>6} | CPU speed-up")
    for n in sizes:
        cells = []
        for name in ("previous", "current"):
            if n in results[name]:
                wall_s, cpu_s = results[name][n]
                cells.append(f"{wall_s:16.2f} {cpu_s:7.2f} {cpu_s / n * 1e6:6.2f}")
            else:
                cells.append(f"{'(skipped)':>16} {'':7} {'':6}")
        previous, current = results["previous"].get(n), results["current"][n]
        speed_up = f"{previous[1] / current[1]:8.1f} x" if previous else ""
        print(f"{n:>10,} | {cells[0]} | {cells[1][1:]} | {speed_up}")

    print()
    for name in ("previous", "current"):
        table = results[name]
        if 1_000_000 not in table:
            continue
        million_wall, million_cpu = table[1_000_000]
        ratio_wall = million_wall / table[100_000][0]
        ratio_cpu = million_cpu / table[100_000][1]
        print(f"{name:>8}: time(10^6) {million_wall:6.2f} s wall, {million_cpu:6.2f} s CPU"
              f" (goal <= {GOAL_MILLION_S:.0f} s);"
              f" time(10^6)/time(10^5) {ratio_wall:5.1f} wall, {ratio_cpu:5.1f} CPU (goal <= {GOAL_RATIO:.0f})")


if __name__ == "__main__":
    main()
