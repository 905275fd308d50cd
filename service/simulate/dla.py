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
#: Finest level of the occupancy hierarchy used for jumps (blocks of 2**level sites a side).
_FIRST_LEVEL = 2
#: A jump is taken when its safe radius is at least this many lattice units.
_MIN_JUMP = 2.0
#: Flags of a block in the occupancy hierarchy.
_HAS_SITE = 1
_NEAR_SITE = 2


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
def _layout(side: int):
    """Levels of the bit-packed occupancy hierarchy of a square grid of ``side`` sites.

    Level ``l`` maps blocks of ``2**l`` sites a side, ``side >> l`` blocks a side, stored as
    8 x 8 tiles of blocks, one ``int64`` word per tile, tiles in row-major order. Returns the
    coarsest level ``top`` (one tile), the word offset of each level (index ``l``, plus the
    total at ``top + 1``) and each level's tiles per row. Caller guarantees ``side`` is a power
    of two >= 8.
    """
    top = int(np.log2(side)) - 3
    offsets = np.zeros(top + 2, dtype=np.int64)
    tiles_per_row = np.zeros(top + 1, dtype=np.int64)
    for level in range(top + 1):
        tiles_per_row[level] = (side >> level) >> 3
        offsets[level + 1] = offsets[level] + tiles_per_row[level] * tiles_per_row[level]
    return top, offsets, tiles_per_row


@numba.njit(cache=True)
def _bit(bits, offsets, tiles_per_row, level, r, c):
    """Bit of block ``(r, c)`` (block coordinates) of ``level``. Caller guarantees it is inside."""
    word = bits[offsets[level] + (r >> 3) * tiles_per_row[level] + (c >> 3)]
    return (word >> (((r & 7) << 3) | (c & 7))) & 1


@numba.njit(cache=True)
def _set_bit(bits, offsets, tiles_per_row, level, r, c):
    """Set the bit of block ``(r, c)`` of ``level``. Caller guarantees it is inside."""
    index = offsets[level] + (r >> 3) * tiles_per_row[level] + (c >> 3)
    bits[index] |= np.int64(1) << (((r & 7) << 3) | (c & 7))


@numba.njit(cache=True)
def _occupy(has_site, near_site, offsets, tiles_per_row, top, r, c):
    """Occupy grid site ``(r, c)`` and flag the blocks that hold it or border its block.

    ``has_site`` marks, at every level, the blocks holding an occupied site (level 0: the
    sites themselves); ``near_site`` marks, at levels >= 1, the blocks that hold one or have a
    neighbour (of 8) that does. Once a block already holds a site so do all coarser blocks
    above it, and the update stops there. Caller guarantees ``(r, c)`` lies inside the grid
    laid out by ``_layout``.
    """
    _set_bit(has_site, offsets, tiles_per_row, 0, r, c)
    for level in range(1, top + 1):
        br = r >> level
        bc = c >> level
        if _bit(has_site, offsets, tiles_per_row, level, br, bc):
            break
        _set_bit(has_site, offsets, tiles_per_row, level, br, bc)
        blocks = tiles_per_row[level] << 3
        for i in range(max(0, br - 1), min(blocks, br + 2)):
            for j in range(max(0, bc - 1), min(blocks, bc + 2)):
                _set_bit(near_site, offsets, tiles_per_row, level, i, j)


@numba.njit(cache=True)
def _build_grid(rows, cols, count, half):
    """Bit-packed occupancy hierarchy of a grid of side ``2 * half`` (seed at ``(half, half)``).

    Returns ``has_site, near_site, offsets, tiles_per_row, top`` (see ``_layout`` and
    ``_occupy``). Caller guarantees ``half`` is a power of two >= 8 and every site lies at
    least two sites inside the grid.
    """
    top, offsets, tiles_per_row = _layout(2 * half)
    has_site = np.zeros(offsets[top + 1], dtype=np.int64)
    near_site = np.zeros(offsets[top + 1], dtype=np.int64)
    for k in range(count):
        _occupy(has_site, near_site, offsets, tiles_per_row, top, rows[k] + half, cols[k] + half)
    return has_site, near_site, offsets, tiles_per_row, top


@numba.njit(cache=True)
def _touches(has_site, offsets, tiles_per_row, r, c, moore):
    """Whether grid site ``(r, c)`` has an occupied neighbour (4, or 8 when ``moore``).

    Caller guarantees ``(r, c)`` is at least one site inside the grid.
    """
    if (
        _bit(has_site, offsets, tiles_per_row, 0, r - 1, c)
        or _bit(has_site, offsets, tiles_per_row, 0, r + 1, c)
        or _bit(has_site, offsets, tiles_per_row, 0, r, c - 1)
        or _bit(has_site, offsets, tiles_per_row, 0, r, c + 1)
    ):
        return True
    if moore:
        return bool(
            _bit(has_site, offsets, tiles_per_row, 0, r - 1, c - 1)
            or _bit(has_site, offsets, tiles_per_row, 0, r - 1, c + 1)
            or _bit(has_site, offsets, tiles_per_row, 0, r + 1, c - 1)
            or _bit(has_site, offsets, tiles_per_row, 0, r + 1, c + 1)
        )
    return False


@numba.njit(cache=True)
def _disc_point():
    """A point drawn uniformly from the unit disc less its centre (rejection from the square).

    Used instead of trigonometry: its angle is uniform, so ``(u*u - v*v) / s, 2*u*v / s`` is a
    uniform direction and ``v / u`` a standard Cauchy variate. Caller guarantees numba's
    generator is seeded.
    """
    while True:
        u = 2.0 * np.random.random() - 1.0
        v = 2.0 * np.random.random() - 1.0
        s = u * u + v * v
        if 0.0 < s <= 1.0:
            return u, v, s


@numba.njit(cache=True)
def _grow_dla(n, seed, moore, sticking, launch_gap, first_level, min_jump):
    """Row and column offsets (from the seed) of ``n`` DLA sites in order of arrival.

    Caller guarantees ``n >= 1``, ``0 < sticking <= 1``, ``first_level >= 2`` and
    ``min_jump >= 1``. Seeds numba's generator with ``seed``; same inputs, same output.
    """
    np.random.seed(seed)
    rows = np.zeros(n, dtype=np.int32)
    cols = np.zeros(n, dtype=np.int32)
    half = 64
    has_site, near_site, offsets, tiles_per_row, top = _build_grid(rows, cols, 1, half)
    r_max = 0.0
    count = 1
    dr = (-1, 1, 0, 0)
    dc = (0, 0, -1, 1)
    while count < n:
        r_launch = r_max + launch_gap
        r_far = r_launch + 2.0
        if r_far + 3.0 >= half:
            # Re-centre on a grid twice as wide; walkers never index beyond r_far.
            half *= 2
            has_site, near_site, offsets, tiles_per_row, top = _build_grid(rows, cols, count, half)
        u, v, s = _disc_point()
        y = int(np.floor(r_launch * 2.0 * u * v / s + 0.5))
        x = int(np.floor(r_launch * (u * u - v * v) / s + 0.5))
        level = top
        while True:
            dist = np.sqrt(float(x * x + y * y))
            if dist > r_far:
                # Return to the launch circle with the exact first-hit law of a Brownian walker
                # started outside a disc: a wrapped Cauchy angle theta about the walker's own,
                # tan(theta / 2) = k C with k = (1 - rho) / (1 + rho), rho = r_launch / dist,
                # and C = v / u standard Cauchy; cos and sin of theta follow from k v / u.
                k = (dist - r_launch) / (dist + r_launch)
                u, v, s = _disc_point()
                norm = u * u + k * k * v * v
                cos_t = (u * u - k * k * v * v) / norm
                sin_t = 2.0 * k * u * v / norm
                scale = r_launch / dist
                y_new = scale * (y * cos_t + x * sin_t)
                x_new = scale * (x * cos_t - y * sin_t)
                y = int(np.floor(y_new + 0.5))
                x = int(np.floor(x_new + 0.5))
                continue
            gr = y + half
            gc = x + half
            # Coarsest clear level, searched from the last one (a walker's level changes slowly).
            if not _bit(near_site, offsets, tiles_per_row, level, gr >> level, gc >> level):
                while level < top and not _bit(
                    near_site, offsets, tiles_per_row, level + 1, gr >> (level + 1), gc >> (level + 1)
                ):
                    level += 1
            else:
                level -= 1
                while level >= first_level and _bit(
                    near_site, offsets, tiles_per_row, level, gr >> level, gc >> level
                ):
                    level -= 1
            # Safe radius: every site within jump + 0.5 (rounding, Chebyshev) keeps Chebyshev
            # distance >= 2 from every occupied site, so no contact can happen on the way.
            jump = dist - r_max - 2.5
            if level >= first_level:
                size = 1 << level
                r0 = (gr >> level) << level
                c0 = (gc >> level) << level
                # Sites outside the clear 3 x 3 blocks are at least this far (Chebyshev).
                clear = min(gr - r0, r0 + size - 1 - gr, gc - c0, c0 + size - 1 - gc) + size + 1
                jump = max(jump, clear - 2.5)
            else:
                level = first_level
            if jump >= min_jump:
                u, v, s = _disc_point()
                y = int(np.floor(y + jump * 2.0 * u * v / s + 0.5))
                x = int(np.floor(x + jump * (u * u - v * v) / s + 0.5))
                continue
            if _touches(has_site, offsets, tiles_per_row, gr, gc, moore):
                if sticking >= 1.0 or np.random.random() < sticking:
                    _occupy(has_site, near_site, offsets, tiles_per_row, top, gr, gc)
                    rows[count] = y
                    cols[count] = x
                    count += 1
                    r_max = max(r_max, dist)
                    break
            d = np.random.randint(0, 4)
            if not _bit(has_site, offsets, tiles_per_row, 0, gr + dr[d], gc + dc[d]):
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
        n, seed, neighborhood == "moore", sticking, _LAUNCH_GAP, _FIRST_LEVEL, _MIN_JUMP
    )
    return lattice_from_sites(rows, cols)
