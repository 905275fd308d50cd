"""Off-lattice diffusion-limited aggregation of unit-diameter discs (Meakin's algorithm).

Strategy: a walker (a disc of diameter 1) moves by jumps as long as the free distance to the
nearest disc of the cluster, to a uniformly random point of the circle of that radius, which
is where an unbroken Brownian path would first leave the free disc. Far from the cluster the
free distance is bounded from below by the block hierarchy of the lattice simulator
(``service.simulate.dla``) built over a grid of unit cells holding the disc centres; within
two cells of a disc it is computed exactly from the centres in the 5 x 5 cells around the
walker. When it falls below a quarter diameter, the walker takes straight steps of a quarter
diameter and sticks where such a step first brings it into contact (centre distance 1).
Walkers start on a circle beyond the cluster and return to it exactly (Poisson kernel) when
they stray, so none is killed.
"""

from __future__ import annotations

import numba
import numpy as np

from service.simulate.dla import (
    _bit,
    _disc_point,
    _layout,
    _mark_blocks,
    check_particles,
    check_seed,
    lattice_from_sites,
)

#: Launch circle radius minus the farthest centre's distance from the seed, in diameters.
_LAUNCH_GAP = 2.0
#: Below this free distance the walker takes straight steps of this length, in diameters.
_STEP = 0.25
#: Finest level of the block hierarchy used for jumps (blocks of 2**level cells a side).
_FIRST_LEVEL = 2
#: Room for centres in one unit cell (three discs of diameter 1 fit at most).
_CELL_CAPACITY = 4


@numba.njit(cache=True)
def _build_cells(ys, xs, count, half, first_level, capacity):
    """Unit-cell grid of side ``2 * half`` (seed centre at ``(half, half)``) and its hierarchy.

    Returns ``items`` (disc indices per cell, ``-1`` empty), ``filled`` (discs per cell),
    ``has_site, near_site, wide_site, offsets, tiles_per_row, top`` (see ``dla._layout``
    and ``dla._mark_blocks``). Caller
    guarantees ``half`` is a power of two >= 16 and every centre lies at least three cells
    inside the grid.
    """
    side = 2 * half
    top, offsets, tiles_per_row = _layout(side)
    items = np.full((side, side, capacity), -1, dtype=np.int32)
    filled = np.zeros((side, side), dtype=np.uint8)
    has_site = np.zeros(offsets[top + 1], dtype=np.int64)
    near_site = np.zeros(offsets[top + 1], dtype=np.int64)
    wide_site = np.zeros(offsets[top + 1], dtype=np.int64)
    for k in range(count):
        r = int(np.floor(ys[k])) + half
        c = int(np.floor(xs[k])) + half
        if filled[r, c] >= capacity:
            raise ValueError("more disc centres in one unit cell than discs of diameter 1 allow")
        items[r, c, filled[r, c]] = k
        filled[r, c] += 1
        _mark_blocks(has_site, near_site, wide_site, offsets, tiles_per_row, top, first_level, r, c)
    return items, filled, has_site, near_site, wide_site, offsets, tiles_per_row, top


@numba.njit(cache=True)
def _build_raster(cell_rows, cell_cols, count, half):
    """Which raster cells (side ``2 * half``, seed at ``(half, half)``) hold a disc already.

    Caller guarantees every cell lies inside the raster.
    """
    taken = np.zeros((2 * half, 2 * half), dtype=np.uint8)
    for k in range(count):
        taken[cell_rows[k] + half, cell_cols[k] + half] = 1
    return taken


@numba.njit(cache=True)
def _grow_discs(n_cells, seed, launch_gap, step, first_level, capacity):
    """Grow discs until their centres, rounded to the nearest integers, fill ``n_cells`` cells.

    Returns ``ys, xs`` (centres of every disc, in order of arrival, seed at the origin),
    ``n_discs``, and ``cell_rows, cell_cols``: the raster cells in order of first arrival.
    Caller guarantees ``n_cells >= 1``, ``0 < step <= 1``, ``launch_gap >= 1``,
    ``first_level >= 2``. Draws every random number from one SplitMix64 stream seeded with
    ``seed``; same inputs, same output.
    """
    state = np.uint64(seed)
    room = n_cells + n_cells // 4 + 16
    ys = np.zeros(room, dtype=np.float64)
    xs = np.zeros(room, dtype=np.float64)
    cell_rows = np.zeros(n_cells, dtype=np.int32)
    cell_cols = np.zeros(n_cells, dtype=np.int32)
    n_discs = 1
    n_filled = 1
    half = 64
    items, filled, has_site, near_site, wide_site, offsets, tiles_per_row, top = _build_cells(
        ys, xs, 1, half, first_level, capacity
    )
    taken = _build_raster(cell_rows, cell_cols, 1, half)
    r_max = 0.0
    while n_filled < n_cells:
        r_launch = r_max + launch_gap
        r_far = r_launch + 2.0
        if r_far + 4.0 >= half:
            half *= 2
            items, filled, has_site, near_site, wide_site, offsets, tiles_per_row, top = _build_cells(
                ys, xs, n_discs, half, first_level, capacity
            )
            taken = _build_raster(cell_rows, cell_cols, n_filled, half)
        if n_discs == room:
            room *= 2
            ys_grown = np.zeros(room, dtype=np.float64)
            xs_grown = np.zeros(room, dtype=np.float64)
            ys_grown[:n_discs] = ys[:n_discs]
            xs_grown[:n_discs] = xs[:n_discs]
            ys, xs = ys_grown, xs_grown
        state, u, v, s = _disc_point(state)
        y = r_launch * 2.0 * u * v / s
        x = r_launch * (u * u - v * v) / s
        level = top
        while True:
            dist = np.sqrt(x * x + y * y)
            if dist > r_far:
                # Exact return to the launch circle (first-hit law of a Brownian walker from
                # outside a disc; see dla._grow_dla for the wrapped Cauchy angle).
                k = (dist - r_launch) / (dist + r_launch)
                state, u, v, s = _disc_point(state)
                norm = u * u + k * k * v * v
                cos_t = (u * u - k * k * v * v) / norm
                sin_t = 2.0 * k * u * v / norm
                scale = r_launch / dist
                y, x = scale * (y * cos_t + x * sin_t), scale * (x * cos_t - y * sin_t)
                continue
            state, u, v, s = _disc_point(state)
            uy = 2.0 * u * v / s
            ux = (u * u - v * v) / s
            gr = int(np.floor(y)) + half
            gc = int(np.floor(x)) + half
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
            # Free distance: centre-to-centre distance to the nearest disc, minus 1.
            free = dist - r_max - 1.0
            hit = np.inf
            if level >= first_level:
                size = 1 << level
                fy = y + half - ((gr >> level) << level)
                fx = x + half - ((gc >> level) << level)
                # Centres outside the clear 3 x 3 (or 5 x 5) blocks are at least this far.
                rings = 2 - _bit(wide_site, offsets, tiles_per_row, level, gr >> level, gc >> level)
                clear = min(min(fy, size - fy), min(fx, size - fx)) + rings * size
                free = max(free, clear - 1.0)
            else:
                level = first_level
                # Centres outside the 5 x 5 cells around the walker are at least 2 away.
                nearest2 = 4.0
                for i in range(gr - 2, gr + 3):
                    for j in range(gc - 2, gc + 3):
                        for m in range(filled[i, j]):
                            disc = items[i, j, m]
                            dy = ys[disc] - y
                            dx = xs[disc] - x
                            d2 = dy * dy + dx * dx
                            nearest2 = min(nearest2, d2)
                            # First contact (centre distance 1) along the step direction.
                            b = uy * dy + ux * dx
                            if b <= 0.0:
                                continue
                            q = d2 - 1.0
                            if q <= 0.0:
                                hit = 0.0
                            elif b * b >= q:
                                hit = min(hit, b - np.sqrt(b * b - q))
                free = max(free, np.sqrt(nearest2) - 1.0)
            if free >= step:
                y += free * uy
                x += free * ux
                continue
            if hit > step:
                y += step * uy
                x += step * ux
                continue
            # Contact: the disc joins the cluster where the step first touches it.
            y += hit * uy
            x += hit * ux
            ys[n_discs] = y
            xs[n_discs] = x
            r = int(np.floor(y)) + half
            c = int(np.floor(x)) + half
            if filled[r, c] >= capacity:
                raise ValueError("more disc centres in one unit cell than discs of diameter 1 allow")
            items[r, c, filled[r, c]] = n_discs
            filled[r, c] += 1
            _mark_blocks(has_site, near_site, wide_site, offsets, tiles_per_row, top, first_level, r, c)
            n_discs += 1
            r_max = max(r_max, np.sqrt(x * x + y * y))
            cell_r = int(np.floor(y + 0.5))
            cell_c = int(np.floor(x + 0.5))
            if not taken[cell_r + half, cell_c + half]:
                taken[cell_r + half, cell_c + half] = 1
                cell_rows[n_filled] = cell_r
                cell_cols[n_filled] = cell_c
                n_filled += 1
            break
    return ys[:n_discs].copy(), xs[:n_discs].copy(), n_discs, cell_rows, cell_cols


def offlattice_discs(n_particles: int, *, seed: int) -> np.ndarray:
    """Centres of the discs grown by ``dla_offlattice(n_particles, seed=seed)``.

    Returns
    -------
    numpy.ndarray
        ``float64`` array of shape ``(n_discs, 2)``: (row, column) of each disc's centre from
        the seed disc's, in diameters, in order of arrival; ``n_discs >= n_particles`` (see
        ``dla_offlattice`` for why it can exceed it).
    """
    n = check_particles(n_particles)
    seed = check_seed(seed)
    ys, xs, _, _, _ = _grow_discs(n, seed, _LAUNCH_GAP, _STEP, _FIRST_LEVEL, _CELL_CAPACITY)
    return np.column_stack([ys, xs])


def dla_offlattice(n_particles: int, *, seed: int) -> np.ndarray:
    """Grow an off-lattice diffusion-limited aggregate of discs and draw it on a lattice.

    Discs of unit diameter perform Brownian walks (Meakin's algorithm; see Notes) and stick
    on first contact with the cluster. The aggregate is drawn one lattice cell per diameter:
    each disc's centre goes to the nearest lattice point. Two touching discs have centres one
    diameter apart, so their cells are the same or 8-neighbours; when a disc's cell already
    holds an earlier disc it adds nothing to the raster. Discs are grown until the raster
    has ``n_particles`` occupied cells.

    Parameters
    ----------
    n_particles : int
        Number of occupied raster cells, the seed's included (>= 1).
    seed : int
        Seed of the walks; the same seed gives the same array, bit for bit.

    Returns
    -------
    numpy.ndarray
        2-D ``int32`` lattice: 0 empty, k > 0 the k-th cell to be reached by a disc centre
        (1 = the seed disc, at ``(h // 2, w // 2)``), cropped two cells beyond the cluster
        about the seed. Every cell touches an earlier one among its 8 neighbours, so the
        raster is one 8-connected component grown in that order, and it can be stored and
        reloaded as sites in arrival order like the lattice simulators' output.

    Notes
    -----
    A walker starts on a circle 2 diameters beyond the farthest centre. Each move takes it
    to a uniformly random point of the circle whose radius is its free distance (distance to
    the nearest centre minus one diameter): read from the bit-map block hierarchy of
    ``dla`` far from the cluster, exactly from the centres in nearby unit cells within two
    diameters. Below a quarter diameter of free distance it moves in straight steps of a
    quarter diameter; the first step that would bring it within one diameter of a centre
    ends at the contact point and the disc joins there, so no two discs overlap. A walker
    that strays beyond 2 diameters outside the launch circle returns to it in one move drawn
    from the exact harmonic measure (a wrapped Cauchy angle), so none is killed.

    References
    ----------
    .. [1] P. Meakin, "Diffusion-controlled cluster formation in 2-6-dimensional space",
       Phys. Rev. A 27, 1495 (1983).
    .. [2] S. Tolman and P. Meakin, "Off-lattice and hypercubic-lattice models for
       diffusion-limited aggregation in dimensionalities 2-8", Phys. Rev. A 40, 428 (1989).
    """
    n = check_particles(n_particles)
    seed = check_seed(seed)
    _, _, _, cell_rows, cell_cols = _grow_discs(n, seed, _LAUNCH_GAP, _STEP, _FIRST_LEVEL, _CELL_CAPACITY)
    return lattice_from_sites(cell_rows, cell_cols)
