"""On-lattice diffusion-limited aggregation (Witten & Sander 1981), with safe long jumps.

A walker far from the cluster moves in one step to where an unbroken lattice walk could have
taken it without touching the cluster, so the cost per particle stays near the cost of the
last few unit steps beside the cluster, where the growth is actually decided.
"""

from __future__ import annotations

import numba
import numpy as np

NEIGHBORHOODS: tuple[str, ...] = ("von_neumann", "moore")

#: Launch circle radius minus the cluster radius, in lattice units.
_LAUNCH_GAP = 6.0
#: Side of the coarse blocks of the distance map, in lattice units.
_BLOCK = 4
#: Block distances are tracked up to this many blocks; farther blocks read as this value.
_MAX_BLOCKS = 12
#: A jump is taken when its safe radius is at least this many lattice units.
_MIN_JUMP = 2.0


def check_particles(n_particles: int) -> int:
    """Return ``n_particles`` as an ``int`` or raise ``ValueError`` if it is not an integer >= 1."""
    if isinstance(n_particles, bool) or not isinstance(n_particles, (int, np.integer)):
        raise ValueError(f"n_particles must be an integer, got {n_particles!r}")
    if n_particles < 1:
        raise ValueError(f"n_particles must be at least 1, got {n_particles}")
    return int(n_particles)


def check_seed(seed: int) -> int:
    """Return ``seed`` as an ``int`` or raise ``ValueError`` unless it is an integer in [0, 2**32)."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise ValueError(f"seed must be an integer, got {seed!r}")
    if not 0 <= seed < 2**32:
        raise ValueError(f"seed must lie in [0, 2**32), got {seed}")
    return int(seed)


def lattice_from_sites(rows: np.ndarray, cols: np.ndarray, margin: int = 2) -> np.ndarray:
    """Arrival-order lattice from site offsets relative to the seed (site 0 at offset 0, 0).

    The array is cropped symmetrically about the seed with ``margin`` empty sites beyond the
    farthest site on each axis, so the seed lands at ``(h // 2, w // 2)``.
    """
    half_r = int(np.abs(rows).max()) + margin
    half_c = int(np.abs(cols).max()) + margin
    lattice = np.zeros((2 * half_r + 1, 2 * half_c + 1), dtype=np.int32)
    lattice[rows + half_r, cols + half_c] = np.arange(1, rows.size + 1, dtype=np.int32)
    return lattice


@numba.njit(cache=True)
def _mark_block(dmap: np.ndarray, brow: int, bcol: int, max_blocks: int) -> None:
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


@numba.njit(cache=True)
def _build_maps(rows, cols, count, half, block, max_blocks):
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
            _mark_block(dmap, r // block, c // block, max_blocks)
    return occupied, dmap


@numba.njit(cache=True)
def _touches(occupied, r, c, moore):
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


@numba.njit(cache=True)
def _grow_dla(n, seed, moore, sticking, launch_gap, block, max_blocks, min_jump):
    """Row and column offsets (from the seed) of ``n`` DLA sites in order of arrival.

    Caller guarantees ``n >= 1``, ``0 < sticking <= 1``, ``block`` even, ``max_blocks >= 2``,
    and ``min_jump >= 1``. Seeds numba's generator with ``seed``; same inputs, same output.
    """
    np.random.seed(seed)
    rows = np.zeros(n, dtype=np.int32)
    cols = np.zeros(n, dtype=np.int32)
    half = 16 * block
    occupied, dmap = _build_maps(rows, cols, 1, half, block, max_blocks)
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
            occupied, dmap = _build_maps(rows, cols, count, half, block, max_blocks)
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
            if _touches(occupied, gr, gc, moore):
                if sticking >= 1.0 or np.random.random() < sticking:
                    occupied[gr, gc] = 1
                    if dmap[gr // block, gc // block] != 0:
                        _mark_block(dmap, gr // block, gc // block, max_blocks)
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


def dla(
    n_particles: int,
    *,
    seed: int,
    neighborhood: str = "von_neumann",
    sticking: float = 1.0,
) -> np.ndarray:
    """Grow an on-lattice diffusion-limited aggregate on the square lattice.

    Walkers perform nearest-neighbour random walks (four directions) and join the cluster
    at the empty site where they first make contact.

    Parameters
    ----------
    n_particles : int
        Number of occupied sites, the seed included (>= 1).
    seed : int
        Seed of the random walk; the same seed gives the same array, bit for bit.
    neighborhood : {"von_neumann", "moore"}
        Which sites count as contact: the four edge neighbours, or all eight neighbours
        (diagonal attachment allowed). Walkers always step in four directions.
    sticking : float
        Probability in (0, 1] that a walker sticks at a contact site; each time it stands on
        one and does not stick it keeps walking (moves onto occupied sites are refused).

    Returns
    -------
    numpy.ndarray
        2-D ``int32`` lattice: 0 empty, k > 0 the k-th site to join (1 = seed, at
        ``(h // 2, w // 2)``), cropped two sites beyond the cluster about the seed.

    Notes
    -----
    Walkers start on a circle ``6`` sites beyond the cluster radius. A walker that strays
    beyond that circle returns to it in one move drawn from the harmonic measure of the
    exterior of a disc (Poisson kernel; a wrapped Cauchy angle), so none is ever killed.
    Elsewhere it jumps to a uniformly random point of the largest circle that keeps every
    lattice point within it away from contact; the radius is the larger of the distance
    beyond the cluster radius and a lower bound read from a map of Chebyshev distances
    between 4 x 4 blocks (tracked up to 12 blocks). Unit steps are taken only within about
    two blocks of the cluster. The lattice doubles and re-centres as the cluster grows.

    References
    ----------
    .. [1] T. A. Witten and L. M. Sander, "Diffusion-limited aggregation, a kinetic critical
       phenomenon", Phys. Rev. Lett. 47, 1400 (1981).
    .. [2] P. Meakin, "Diffusion-controlled cluster formation in 2-6-dimensional space",
       Phys. Rev. A 27, 1495 (1983).
    """
    n = check_particles(n_particles)
    seed = check_seed(seed)
    if neighborhood not in NEIGHBORHOODS:
        raise ValueError(f"neighborhood must be one of {list(NEIGHBORHOODS)}, got {neighborhood!r}")
    sticking = float(sticking)
    if not 0.0 < sticking <= 1.0:
        raise ValueError(f"sticking must lie in (0, 1], got {sticking}")
    rows, cols = _grow_dla(
        n, seed, neighborhood == "moore", sticking, _LAUNCH_GAP, _BLOCK, _MAX_BLOCKS, _MIN_JUMP
    )
    return lattice_from_sites(rows, cols)
