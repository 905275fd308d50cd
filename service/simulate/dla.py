"""On-lattice diffusion-limited aggregation (Witten & Sander 1981), with safe long jumps.

A walker far from the cluster moves in one step to where an unbroken lattice walk could have
taken it without touching the cluster, so the cost per particle stays near the cost of the
last few unit steps beside the cluster, where the growth is actually decided.

Strategy: the distance that makes a jump safe is read from a hierarchy of occupancy bit maps
(blocks of 4, 8, 16, ... sites), from the coarsest level whose blocks around the walker are
empty, so a walker in a wide empty region crosses it in a few jumps whatever the cluster's
size; beside the cluster an exact, capped, site-by-site distance map takes over. Maps are
tiled so that what a walker reads lies in one cache line. The cost per particle still grows
like the logarithm of the cluster's size (about 1.4x from 10^5 to 10^6 particles): walkers
cross ever wider fjords, each in a few jumps.
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
#: Chebyshev distances to the cluster are kept exactly, site by site, below this value
#: (larger caps measured slower: the map's upkeep costs more than the longer jumps save).
_NEAR_CAP = 6


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
    """Levels of the bit-packed block hierarchy of a square grid of ``side`` sites.

    Level ``l >= 1`` maps blocks of ``2**l`` sites a side, ``side >> l`` blocks a side, stored
    as 8 x 8 tiles of blocks, one ``int64`` word per tile, tiles in row-major order. Returns the
    coarsest level ``top`` (one tile), the word offset of each level (index ``l``, plus the
    total at ``top + 1``; level 0 is empty) and each level's tiles per row. Caller guarantees
    ``side`` is a power of two >= 16.
    """
    top = int(np.log2(side)) - 3
    offsets = np.zeros(top + 2, dtype=np.int64)
    tiles_per_row = np.zeros(top + 1, dtype=np.int64)
    for level in range(1, top + 1):
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
def _cell(tiles, r, c):
    """Index of site ``(r, c)`` in a byte grid stored as 8 x 8 tiles (one cache line each),
    ``tiles`` tiles per row. Caller guarantees the site is inside the grid."""
    return ((((r >> 3) * tiles + (c >> 3)) << 6) | ((r & 7) << 3)) | (c & 7)


@numba.njit(cache=True)
def _mark_blocks(has_site, near_site, wide_site, offsets, tiles_per_row, top, first_level, r, c):
    """Flag the blocks of the hierarchy that hold grid site ``(r, c)`` or lie near its block.

    ``has_site`` marks, at levels >= 1, the blocks holding an occupied site; ``near_site``
    marks, at levels >= ``first_level``, the blocks within Chebyshev distance 1 (in blocks)
    of one that holds a site, ``wide_site`` those within distance 2. Once a block already
    holds a site so do all coarser blocks above it, and the update stops there. Caller guarantees ``(r, c)`` lies inside the grid laid out by
    ``_layout`` and ``first_level >= 1``.
    """
    for level in range(1, top + 1):
        br = r >> level
        bc = c >> level
        if _bit(has_site, offsets, tiles_per_row, level, br, bc):
            break
        _set_bit(has_site, offsets, tiles_per_row, level, br, bc)
        if level < first_level:
            continue
        blocks = tiles_per_row[level] << 3
        for i in range(max(0, br - 2), min(blocks, br + 3)):
            for j in range(max(0, bc - 2), min(blocks, bc + 3)):
                _set_bit(wide_site, offsets, tiles_per_row, level, i, j)
                if abs(i - br) <= 1 and abs(j - bc) <= 1:
                    _set_bit(near_site, offsets, tiles_per_row, level, i, j)


@numba.njit(cache=True)
def _occupy(closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top, first_level, cap, r, c):
    """Occupy grid site ``(r, c)``: update the near-field map and the block hierarchy.

    ``closeness`` holds ``max(0, cap - d)`` for every site, ``d`` its Chebyshev distance to
    the nearest occupied site (``cap`` on occupied sites, 0 far away), as a tiled byte grid
    (see ``_cell``); the hierarchy is updated by ``_mark_blocks``. Caller guarantees
    ``(r, c)`` lies at least ``cap`` sites inside the grid laid out by ``_layout``.
    """
    tiles = tiles_per_row[1] << 1
    for i in range(r - cap + 1, r + cap):
        di = abs(i - r)
        for j in range(c - cap + 1, c + cap):
            value = cap - max(di, abs(j - c))
            index = _cell(tiles, i, j)
            if closeness[index] < value:
                closeness[index] = value
    _mark_blocks(has_site, near_site, wide_site, offsets, tiles_per_row, top, first_level, r, c)


@numba.njit(cache=True)
def _build_grid(rows, cols, count, half, first_level, cap):
    """Near-field map and block hierarchy of a grid of side ``2 * half`` (seed at ``(half, half)``).

    Returns ``closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top`` (see ``_layout``
    and ``_occupy``). Caller guarantees ``half`` is a power of two >= 16 and every site lies
    at least ``cap`` sites inside the grid.
    """
    top, offsets, tiles_per_row = _layout(2 * half)
    closeness = np.zeros(4 * half * half, dtype=np.uint8)
    has_site = np.zeros(offsets[top + 1], dtype=np.int64)
    near_site = np.zeros(offsets[top + 1], dtype=np.int64)
    wide_site = np.zeros(offsets[top + 1], dtype=np.int64)
    for k in range(count):
        _occupy(
            closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top, first_level, cap,
            rows[k] + half, cols[k] + half,
        )
    return closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top


@numba.njit(cache=True)
def _touches(closeness, tiles, r, c, moore, cap):
    """Whether grid site ``(r, c)``, one Chebyshev step from the cluster, has an occupied
    neighbour (4, or 8 when ``moore``). Caller guarantees ``closeness`` at ``(r, c)`` is
    ``cap - 1`` and the site is at least one site inside the grid.
    """
    if moore:
        return True
    return (
        closeness[_cell(tiles, r - 1, c)] == cap
        or closeness[_cell(tiles, r + 1, c)] == cap
        or closeness[_cell(tiles, r, c - 1)] == cap
        or closeness[_cell(tiles, r, c + 1)] == cap
    )


@numba.njit(cache=True)
def _next_random(state):
    """One step of the SplitMix64 generator: ``(new state, 64 random bits)``.

    SplitMix64 (Steele, Lea & Flood, OOPSLA 2014) passes the BigCrush battery; the kernel
    carries its state so that one seed fixes the whole run. Caller guarantees ``state`` is a
    ``uint64``.
    """
    state = state + np.uint64(0x9E3779B97F4A7C15)
    z = state
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return state, z ^ (z >> np.uint64(31))


@numba.njit(cache=True)
def _uniform(state):
    """``(new state, u)`` with ``u`` uniform in [0, 1) on 53 bits. Caller passes a ``uint64``."""
    state, bits = _next_random(state)
    return state, float(bits >> np.uint64(11)) * (1.0 / 9007199254740992.0)


@numba.njit(cache=True)
def _disc_point(state):
    """``(new state, u, v, s)``: a point drawn uniformly from the unit disc less its centre
    (rejection from the square, 32 bits a coordinate), ``s = u*u + v*v``.

    Used instead of trigonometry: its angle is uniform, so ``(u*u - v*v) / s, 2*u*v / s`` is a
    uniform direction and ``v / u`` a standard Cauchy variate. Caller passes a ``uint64``.
    """
    while True:
        state, bits = _next_random(state)
        u = float(bits >> np.uint64(32)) * (1.0 / 2147483648.0) - 1.0
        v = float(bits & np.uint64(0xFFFFFFFF)) * (1.0 / 2147483648.0) - 1.0
        s = u * u + v * v
        if 0.0 < s <= 1.0:
            return state, u, v, s


@numba.njit(cache=True)
def _grow_dla(n, seed, moore, sticking, launch_gap, first_level, min_jump, cap):
    """Row and column offsets (from the seed) of ``n`` DLA sites in order of arrival.

    Caller guarantees ``n >= 1``, ``0 < sticking <= 1``, ``first_level >= 2``,
    ``min_jump >= 1``, ``4 <= cap < 16`` and ``launch_gap >= 3``. Draws every random
    number from one SplitMix64 stream seeded with ``seed``; same inputs, same output.
    """
    state = np.uint64(seed)
    rows = np.zeros(n, dtype=np.int32)
    cols = np.zeros(n, dtype=np.int32)
    half = 64
    closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top = _build_grid(
        rows, cols, 1, half, first_level, cap
    )
    r_max = 0.0
    count = 1
    dr = (-1, 1, 0, 0)
    dc = (0, 0, -1, 1)
    while count < n:
        r_launch = r_max + launch_gap
        r_far = r_launch + 2.0
        if r_far + cap + 2.0 >= half:
            # Re-centre on a grid twice as wide; walkers never index beyond r_far.
            half *= 2
            closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top = _build_grid(
                rows, cols, count, half, first_level, cap
            )
        tiles = half >> 2
        state, u, v, s = _disc_point(state)
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
                state, u, v, s = _disc_point(state)
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
            near = 0
            if level >= first_level:
                size = 1 << level
                r0 = (gr >> level) << level
                c0 = (gc >> level) << level
                # Sites beyond the clear 3 x 3 (or 5 x 5) blocks are at least this far (Chebyshev).
                rings = 2 - _bit(wide_site, offsets, tiles_per_row, level, gr >> level, gc >> level)
                clear = min(gr - r0, r0 + size - 1 - gr, gc - c0, c0 + size - 1 - gc) + rings * size + 1
                jump = max(jump, clear - 2.5)
            else:
                # Beside the cluster: the exact distance from the near-field map.
                level = first_level
                near = int(closeness[_cell(tiles, gr, gc)])
                jump = max(jump, cap - near - 2.5)
            if jump >= min_jump:
                state, u, v, s = _disc_point(state)
                y = int(np.floor(y + jump * 2.0 * u * v / s + 0.5))
                x = int(np.floor(x + jump * (u * u - v * v) / s + 0.5))
                continue
            if near == cap - 1 and _touches(closeness, tiles, gr, gc, moore, cap):
                chance = 0.0
                if sticking < 1.0:
                    state, chance = _uniform(state)
                if chance < sticking:
                    _occupy(
                        closeness, has_site, near_site, wide_site, offsets, tiles_per_row, top,
                        first_level, cap, gr, gc,
                    )
                    rows[count] = y
                    cols[count] = x
                    count += 1
                    r_max = max(r_max, dist)
                    break
            state, bits = _next_random(state)
            d = int(bits >> np.uint64(62))
            if closeness[_cell(tiles, gr + dr[d], gc + dc[d])] != cap:
                y += dr[d]
                x += dc[d]
    return rows, cols


def dla(
    n_particles: int,
    *,
    seed: int,
    neighborhood: str = "von_neumann",
    sticking: float = 1.0,
    off_lattice: bool = False,
) -> np.ndarray:
    """Grow a diffusion-limited aggregate on the square lattice (or of discs off it).

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
    off_lattice : bool
        Grow discs of unit diameter off the lattice instead (Meakin's algorithm, see
        :func:`service.simulate.offlattice.dla_offlattice`; sticking 1, no neighbourhood),
        drawn one cell per diameter: the DLA class as real deposits grow it, with no lattice axes.

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
    lattice point within it away from contact. The radius comes from the larger of three
    lower bounds on the Chebyshev distance to the cluster: the distance beyond the cluster
    radius; a hierarchy of bit maps of blocks of 4, 8, 16, ... sites a side, where the
    coarsest level whose 3 x 3 blocks around the walker are empty gives a jump of the size
    of those blocks, or twice it when the 5 x 5 blocks are empty (so the number of jumps
    grows only like the logarithm of the distance); and, beside the cluster, an exact
    site-by-site distance map kept up to 6 sites. Unit steps are taken only within 4 sites
    of the cluster. All maps are stored as 8 x 8 tiles
    (bits, or bytes for the near map), so a walker's neighbourhood lies in one or a few
    cache lines; the grid doubles and re-centres as the cluster grows. Random numbers come
    from one SplitMix64 stream (Steele, Lea & Flood 2014) seeded with ``seed``.

    References
    ----------
    .. [1] T. A. Witten and L. M. Sander, "Diffusion-limited aggregation, a kinetic critical
       phenomenon", Phys. Rev. Lett. 47, 1400 (1981).
    .. [2] P. Meakin, "Diffusion-controlled cluster formation in 2-6-dimensional space",
       Phys. Rev. A 27, 1495 (1983).
    """
    if off_lattice:
        if sticking != 1.0 or neighborhood != "von_neumann":
            raise ValueError("off-lattice DLA sticks on first contact and has no lattice neighbourhood: "
                             "give neither sticking nor neighborhood with off_lattice=True")
        from service.simulate.offlattice import dla_offlattice

        return dla_offlattice(n_particles, seed=seed)
    n = check_particles(n_particles)
    seed = check_seed(seed)
    if neighborhood not in NEIGHBORHOODS:
        raise ValueError(f"neighborhood must be one of {list(NEIGHBORHOODS)}, got {neighborhood!r}")
    sticking = float(sticking)
    if not 0.0 < sticking <= 1.0:
        raise ValueError(f"sticking must lie in (0, 1], got {sticking}")
    rows, cols = _grow_dla(
        n, seed, neighborhood == "moore", sticking, _LAUNCH_GAP, _FIRST_LEVEL, _MIN_JUMP, _NEAR_CAP
    )
    return lattice_from_sites(rows, cols)
