"""Helpers of the simulator tests: a per-session cache of grown clusters and estimators of
the fractal dimension that read the arrival-order lattice (growth history and final shape).
"""

from __future__ import annotations

import functools

import numpy as np

from service.simulate import grow


@functools.cache
def grown(regime: str, n: int, seed: int, **parameters) -> np.ndarray:
    """A cluster from ``service.simulate``, grown once per test session (read-only)."""
    lattice = grow(regime, n, seed=seed, **parameters)
    lattice.setflags(write=False)
    return lattice


def arrival_sites(lattice: np.ndarray) -> np.ndarray:
    """Offsets (row, col) from the seed of the occupied sites, in order of arrival."""
    order = lattice[lattice > 0]
    rows, cols = np.nonzero(lattice > 0)
    sort = np.argsort(order)
    seed_rc = np.array([lattice.shape[0] // 2, lattice.shape[1] // 2])
    return np.column_stack([rows[sort], cols[sort]]) - seed_rc


def gyration_dimension(lattice: np.ndarray, first_fraction: float = 1 / 50) -> float:
    """Slope of log N against log Rg(N) for the first N arrivals, N in [n * first_fraction, n].

    N ~ Rg(N)^D for a growing fractal (Witten & Sander 1981; Meakin 1983). The radius of
    gyration of the first N sites is taken at 20 sizes spaced evenly in log N.
    """
    sites = arrival_sites(lattice).astype(float)
    n = len(sites)
    counts = np.unique(np.geomspace(max(2, n * first_fraction), n, 20).astype(int))
    cumulative = np.cumsum(sites, axis=0)
    cumulative_sq = np.cumsum((sites**2).sum(axis=1))
    mean = cumulative[counts - 1] / counts[:, None]
    rg = np.sqrt(cumulative_sq[counts - 1] / counts - (mean**2).sum(axis=1))
    return float(np.polyfit(np.log(rg), np.log(counts), 1)[0])


def mass_radius_dimension(lattice: np.ndarray, r_min: float = 3.0, r_max_fraction: float = 0.5) -> float:
    """Slope of log M(r) against log r, M(r) = occupied sites within r of the seed.

    Fitted over r in [r_min, r_max_fraction * cluster radius] at 15 radii spaced evenly in
    log r; the outer part of the cluster is still growing and is left out.
    """
    sites = arrival_sites(lattice).astype(float)
    distance = np.sort(np.hypot(sites[:, 0], sites[:, 1]))
    radii = np.geomspace(r_min, r_max_fraction * distance[-1], 15)
    mass = np.searchsorted(distance, radii, side="right")
    return float(np.polyfit(np.log(radii), np.log(mass), 1)[0])


def is_connected_in_order(lattice: np.ndarray, moore: bool) -> bool:
    """Whether every site after the first touches an earlier site (4 or 8 neighbours)."""
    padded = np.pad(lattice, 1)
    order = padded.astype(np.int64)
    big = np.iinfo(np.int64).max
    order[order == 0] = big
    shifts = [(-1, 0), (1, 0), (0, -1), (0, 1)]
    if moore:
        shifts += [(-1, -1), (-1, 1), (1, -1), (1, 1)]
    earliest = np.full(order.shape, big)
    for dr, dc in shifts:
        earliest = np.minimum(earliest, np.roll(order, (dr, dc), axis=(0, 1)))
    occupied = (order != big) & (order > 1)
    return bool(np.all(earliest[occupied] < order[occupied]))


def disc_fill_fraction(lattice: np.ndarray, radius_fraction: float) -> float:
    """Occupied fraction of the lattice sites within ``radius_fraction`` x cluster radius of the seed."""
    sites = arrival_sites(lattice)
    radius = radius_fraction * np.hypot(sites[:, 0], sites[:, 1]).max()
    rows, cols = np.indices(lattice.shape)
    inside = np.hypot(rows - lattice.shape[0] // 2, cols - lattice.shape[1] // 2) <= radius
    return float(np.mean(lattice[inside] > 0))
