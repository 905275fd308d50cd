"""Eden growth (Eden 1961): a uniformly random perimeter site joins the cluster each step."""

from __future__ import annotations

import numba
import numpy as np

from service.simulate.dla import check_particles, check_seed, lattice_from_sites


@numba.njit(cache=True)
def _grow_eden(n, seed, half):
    """Row and column offsets (from the seed) of ``n`` Eden sites, and whether they fit.

    Caller guarantees ``n >= 1`` and ``half >= 2``. Returns ``ok = False`` as soon as a site
    lands on the edge of the ``(2 * half + 1)``-wide lattice; the caller then retries with a
    wider one, which replays the same growth (the choices never depend on ``half``).
    """
    np.random.seed(seed)
    side = 2 * half + 1
    occupied = np.zeros((side, side), dtype=np.uint8)
    # Perimeter as a list of sites plus the position of each site in that list (-1: absent),
    # so a random member is drawn and removed in O(1) by swapping it with the last one.
    slot = np.full((side, side), -1, dtype=np.int32)
    perimeter_r = np.empty(2 * n + 4, dtype=np.int32)
    perimeter_c = np.empty(2 * n + 4, dtype=np.int32)
    size = 0
    rows = np.zeros(n, dtype=np.int32)
    cols = np.zeros(n, dtype=np.int32)
    dr = (-1, 1, 0, 0)
    dc = (0, 0, -1, 1)
    r, c = half, half
    for k in range(n):
        if k > 0:
            i = np.random.randint(0, size)
            r, c = perimeter_r[i], perimeter_c[i]
            size -= 1
            perimeter_r[i], perimeter_c[i] = perimeter_r[size], perimeter_c[size]
            slot[perimeter_r[i], perimeter_c[i]] = i
            slot[r, c] = -1
        if r == 0 or c == 0 or r == side - 1 or c == side - 1:
            return rows, cols, False
        occupied[r, c] = 1
        rows[k] = r - half
        cols[k] = c - half
        for d in range(4):
            rn, cn = r + dr[d], c + dc[d]
            if not occupied[rn, cn] and slot[rn, cn] < 0:
                slot[rn, cn] = size
                perimeter_r[size] = rn
                perimeter_c[size] = cn
                size += 1
    return rows, cols, True


def eden(n_particles: int, *, seed: int) -> np.ndarray:
    """Grow an Eden cluster on the square lattice.

    Each step occupies one site drawn uniformly from the perimeter: the empty sites with an
    occupied edge (von Neumann) neighbour. The cluster is compact (D = 2) with a rough
    boundary.

    Parameters
    ----------
    n_particles : int
        Number of occupied sites, the seed included (>= 1).
    seed : int
        Seed of the growth; the same seed gives the same array, bit for bit.

    Returns
    -------
    numpy.ndarray
        2-D ``int32`` lattice: 0 empty, k > 0 the k-th site to join (1 = seed, at
        ``(h // 2, w // 2)``), cropped two sites beyond the cluster about the seed.

    Notes
    -----
    O(1) work per site: the perimeter is kept as a list with an index map, so drawing,
    removing and adding perimeter sites needs no search.

    References
    ----------
    .. [1] M. Eden, "A two-dimensional growth process", Proc. Fourth Berkeley Symp. Math.
       Statist. Prob. 4, 223 (1961).
    """
    n = check_particles(n_particles)
    seed = check_seed(seed)
    # The cluster is a rough disc of radius about sqrt(n / pi); start with room to spare.
    half = int(1.3 * np.sqrt(n / np.pi)) + 8
    while True:
        rows, cols, ok = _grow_eden(n, seed, half)
        if ok:
            return lattice_from_sites(rows, cols)
        half *= 2
