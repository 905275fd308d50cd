"""Baseline for ``bench_dbm.py``: the DBM solver as it was before the speed work of issue 11.

A frozen copy of ``service/simulate/dbm.py`` at that point (multigrid hierarchy kept near
the cluster, kept tiles visited in the order they were kept). Kept only so the benchmark
can time it beside the current solver in the same run; not used by the product. Both
grow the same clusters bit for bit.

Dielectric breakdown model (DBM) on the square lattice.

The cluster is held at potential 0 and a circular outer electrode at potential 1; the
potential between them solves the discrete (5-point) Laplace equation. Each step one
von Neumann perimeter site is occupied with probability proportional to its potential
to the power ``eta`` (the lattice form of "local field to the power eta", since the
field between a perimeter site and its occupied neighbour is the potential difference
phi - 0 over one lattice unit).

Solver in one paragraph (details in ``dbm``): a multigrid hierarchy whose fine levels
exist only near the cluster. Level ``l`` has lattice spacing ``2 ** l`` and is kept only
on tiles near a cluster site (``FINE_REACH`` lattice units on level 0, about
``ACTIVE_REACH`` of its own cells above); the coarsest level
covers the whole electrode disc. Away from the cluster the potential is smooth, so the
coarse levels represent it there to far better than the accuracy growth needs, and a
full V-cycle costs a few passes over the cluster's neighbourhood instead of over the
whole disc (which, at eta >= 3, is hundreds of times larger than the cluster).
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba.typed import List

#: The electrode radius is kept at least ELECTRODE_RATIO times the cluster radius and at
#: least ELECTRODE_MARGIN lattice units beyond it (when no ``outer_radius`` is given).
ELECTRODE_RATIO = 2.0
ELECTRODE_MARGIN = 16
#: When the cluster outgrows the electrode, the new electrode is made this much larger
#: than the minimum, so the grid is re-made only O(log n) times.
REGRID_HEADROOM = 1.25
#: Side of the square tiles in which every level is kept or not.
TILE = 8
#: A tile of level l is kept while a cluster site lies within ACTIVE_REACH cells of that
#: level (ACTIVE_REACH * 2 ** l lattice units). Must exceed TILE (so levels nest with a
#: margin for interpolation) and the largest local window.
ACTIVE_REACH = 16
#: Level 0 keeps a wider band, so that the fine windows (up to half-width 32) fit in it;
#: each coarser level keeps at least what covers the finer one plus a margin.
FINE_REACH = 36


def _reaches(n_levels):
    out = [FINE_REACH]
    for _ in range(1, n_levels):
        out.append(max(ACTIVE_REACH, (out[-1] + TILE) // 2 + 4))
    return np.array(out, dtype=np.int64)
#: The coarsest level has at most this half-width (in its own cells).
COARSEST_HALF = 16
#: Half-widths of the fine windows relaxed around each new site, innermost first, and
#: the sweeps per window at most. Stop once a sweep corrects less than RELATIVE_TOLERANCE
#: times the largest perimeter potential.
LOCAL_WINDOWS = (4, 12, 32)
MAX_LOCAL_SWEEPS = 20
RELATIVE_TOLERANCE = 1e-4
#: One V-cycle over the whole hierarchy every CYCLE_EVERY sites, with SWEEPS Gauss-Seidel
#: sweeps before and after the coarse correction on each level.
CYCLE_EVERY = 8
#: From eta = HIGH_ETA on, every CYCLE_EVERY_HIGH_ETA sites: growth probabilities go as
#: phi ** eta, so the far-field lag between cycles weighs eta-fold.
HIGH_ETA = 2.5
CYCLE_EVERY_HIGH_ETA = 2
SWEEPS = (1, 1)
#: SOR sweeps of the coarsest level per V-cycle at most (it is warm-started).
COARSE_SWEEPS = 30
#: After a (re-)grid, V-cycles until the largest fine correction is below this, at most
#: REGRID_CYCLES (growth goes on cycling, so the start need not be fully converged).
REGRID_TOLERANCE = 1e-6
REGRID_CYCLES = 12
#: Outer-electrode mode: growth stops once a site lies within STOP_GAP lattice units of
#: the electrode circle.
STOP_GAP = 2.0
#: Smallest outer electrode radius accepted (lattice units).
MIN_OUTER_RADIUS = 8

#: Cell kinds. _NEAR (coarse levels only) is a free cell beside the electrode, whose
#: operator places the electrode on the true circle (see ``_near_operator``).
_FREE, _CLUSTER, _ELECTRODE, _NEAR = 0, 1, 2, 3

#: Largest site distance from the seed of free-growing clusters (electrode far away),
#: R_max(n) ~ R_1000 * (n / 1000) ** b, measured with this module: mean of 3 seeds
#: (100-102) at n = 300 and 1,000, b the slope between them. Used only to choose an
#: outer electrode radius (``outer_radius_for``); extrapolation beyond a few thousand
#: sites is rough, which is why the reach actually attained is measured afterwards.
RADIUS_TABLE_ETA = (0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0)
RADIUS_TABLE_R1000 = (25.3, 32.8, 40.7, 64.9, 82.2, 155.1, 264.4)
RADIUS_TABLE_EXPONENT = (0.40, 0.49, 0.55, 0.70, 0.73, 0.83, 0.94)
#: Default ratio of the estimated free-growth radius to the outer radius chosen by
#: ``outer_radius_for``. Above 1 the electrode sits inside the estimate, so that
#: nearly every deposit stops at it (the estimate scatters by ~20 % between seeds).
DEFAULT_REACH = 1.2


# ------------------------------------------------------------------ fine-level windows


@numba.njit(cache=True)
def _sor_window(phi, kind, i0, i1, j0, j1, omega, tol, max_sweeps):
    """Red-black SOR sweeps of the 5-point Laplace equation over rows i0..i1-1, cols j0..j1-1.

    Caller guarantees the window's cells and their 4-neighbours hold valid values (kept
    or ghost cells of level 0) and ``kind`` is valid on the window. Only ``_FREE`` cells
    are updated. Sweeps stop once the largest Gauss-Seidel correction of a sweep is
    below ``tol`` or after ``max_sweeps``. Returns the number of sweeps done.
    """
    for sweep in range(max_sweeps):
        biggest = 0.0
        for colour in range(2):
            for i in range(i0, i1):
                start = j0 + ((i + j0 + colour) & 1)
                for j in range(start, j1, 2):
                    if kind[i, j] == _FREE:
                        new = 0.25 * (phi[i - 1, j] + phi[i + 1, j] + phi[i, j - 1] + phi[i, j + 1])
                        delta = new - phi[i, j]
                        phi[i, j] += omega * delta
                        if abs(delta) > biggest:
                            biggest = abs(delta)
        if biggest < tol:
            return sweep + 1
    return max_sweeps


# ------------------------------------------------------------------ hierarchy kernels
#
# Layout shared by every kernel below. Level l is a square array of side 2 * H[l] + 1,
# its centre cell at (H[l], H[l]) over the seed; cell (i, j) of level l lies at
# ((i - H[l]) * 2 ** l, (j - H[l]) * 2 ** l) lattice units from the seed, so cell
# (2 X + H[l], ...) of level l coincides with cell (X + H[l+1], ...) of level l + 1.
# H[0] is a multiple of 2 ** L and exceeds the electrode radius by 2 ** L + 1, so every
# border cell of every level is electrode. Per level: phi (potential), rhs (FAS right
# side, 0 on level 0), old (phi before the coarse solve), res (residual), kind, act
# (tile kept?) and tiles[:n_tiles[l]] (kept tiles, in activation order).


@numba.njit(cache=True)
def _outside(x, y, scale, r_out):
    """Is the level cell at offset (x, y) (cells of spacing ``scale``) on the electrode?"""
    return (x * scale) ** 2 + (y * scale) ** 2 >= r_out * r_out


@numba.njit(cache=True)
def _near_operator(phi, i, j, h, scale, r_out):
    """(diag, off) of the 5-point operator at a free cell beside the electrode, such that
    A u = diag * u - off, with each electrode neighbour replaced by the point where its
    axis crosses the circle (Shortley-Weller). A staircase electrode of coarse cells
    would misplace the circle by up to half a coarse cell; this keeps it where the fine
    lattice has it, to within a lattice unit.
    """
    x, y = i - h, j - h
    diag, off = 0.0, 0.0
    r = r_out / scale  # radius in cells of this level
    for axis in range(2):
        u, v = (x, y) if axis == 0 else (y, x)
        reach = math.sqrt(max(r * r - v * v, 0.0))
        t_lo, t_hi = 1.0, 1.0
        if axis == 0:
            val_lo, val_hi = phi[i - 1, j], phi[i + 1, j]
        else:
            val_lo, val_hi = phi[i, j - 1], phi[i, j + 1]
        if (u + 1) * (u + 1) + v * v >= r * r:
            t_hi, val_hi = max(reach - u, 0.05), 1.0
        if (u - 1) * (u - 1) + v * v >= r * r:
            t_lo, val_lo = max(u + reach, 0.05), 1.0
        c_lo = 2.0 / (t_lo * (t_lo + t_hi))
        c_hi = 2.0 / (t_hi * (t_lo + t_hi))
        diag += c_lo + c_hi
        off += c_lo * val_lo + c_hi * val_hi
    return diag, off


@numba.njit(cache=True)
def _interp(phi_c, i, j, h_f, h_c):
    """Bilinear value of the next coarser level at cell (i, j) of a level of half-width h_f."""
    x, y = i - h_f, j - h_f
    a, b = (x >> 1) + h_c, (y >> 1) + h_c
    if x & 1:
        if y & 1:
            return 0.25 * (phi_c[a, b] + phi_c[a + 1, b] + phi_c[a, b + 1] + phi_c[a + 1, b + 1])
        return 0.5 * (phi_c[a, b] + phi_c[a + 1, b])
    if y & 1:
        return 0.5 * (phi_c[a, b] + phi_c[a, b + 1])
    return phi_c[a, b]


@numba.njit(cache=True)
def _activate(level, ti, tj, phis, kinds, acts, tiles, n_tiles, halves, r_out, profile_r0):
    """Keep tile (ti, tj) of ``level``: mark it, set its kinds and a first potential.

    The potential comes from the next coarser level (which, by the nesting of kept
    regions, is kept there), or on the coarsest level from the profile
    log(r / r0) / log(R / r0) of a small cluster of radius r0 = ``profile_r0``.
    """
    if acts[level][ti, tj]:
        return
    acts[level][ti, tj] = 1
    tiles[level][n_tiles[level], 0] = ti
    tiles[level][n_tiles[level], 1] = tj
    n_tiles[level] += 1
    phi, kind = phis[level], kinds[level]
    side = phi.shape[0]
    h = halves[level]
    scale = 1 << level
    coarsest = level == len(phis) - 1
    for i in range(ti * TILE, min(ti * TILE + TILE, side)):
        for j in range(tj * TILE, min(tj * TILE + TILE, side)):
            if _outside(i - h, j - h, scale, r_out):
                kind[i, j] = _ELECTRODE
                phi[i, j] = 1.0
            elif coarsest:
                kind[i, j] = _FREE
                r = max(math.hypot((i - h) * scale, (j - h) * scale), profile_r0)
                phi[i, j] = math.log(r / profile_r0) / math.log(r_out / profile_r0)
            else:
                kind[i, j] = _FREE
                phi[i, j] = _interp(phis[level + 1], i, j, h, halves[level + 1])
            if kind[i, j] == _FREE and level > 0 and (
                    _outside(i - h + 1, j - h, scale, r_out) or _outside(i - h - 1, j - h, scale, r_out)
                    or _outside(i - h, j - h + 1, scale, r_out)
                    or _outside(i - h, j - h - 1, scale, r_out)):
                kind[i, j] = _NEAR


@numba.njit(cache=True)
def _add_site(i, j, phis, kinds, acts, tiles, n_tiles, halves, r_out, reaches):
    """Make fine cell (i, j) a cluster site on every level; keep the tiles it needs.

    Tiles are kept coarsest first, so each new tile is initialised from a kept coarser
    one. On level l >= 1 every cell whose restriction stencil (3 x 3 cells of level
    l - 1) holds a fixed cluster cell is fixed too (its value is injected from the finer
    level each cycle): coarse corrections then act only where the error is smooth.
    """
    n_levels = len(phis)
    x, y = i - halves[0], j - halves[0]
    for level in range(n_levels - 2, -1, -1):
        h = halves[level]
        n_t = acts[level].shape[0]
        cx, cy = (x >> level) + h, (y >> level) + h
        reach = reaches[level]
        t0 = max((cx - reach) // TILE, 0)
        t1 = min((cx + reach) // TILE, n_t - 1)
        s0 = max((cy - reach) // TILE, 0)
        s1 = min((cy + reach) // TILE, n_t - 1)
        for ti in range(t0, t1 + 1):
            for tj in range(s0, s1 + 1):
                _activate(level, ti, tj, phis, kinds, acts, tiles, n_tiles, halves, r_out, 0.5)
    kinds[0][i, j] = _CLUSTER
    phis[0][i, j] = 0.0
    for level in range(1, n_levels):
        half_step = 1 << (level - 1)
        step = 2 * half_step
        a0, a1 = -((half_step - x) // step), (x + half_step) // step
        b0, b1 = -((half_step - y) // step), (y + half_step) // step
        h = halves[level]
        kind = kinds[level]
        for a in range(a0, a1 + 1):
            for b in range(b0, b1 + 1):
                if kind[a + h, b + h] != _ELECTRODE:
                    kind[a + h, b + h] = _CLUSTER


@numba.njit(cache=True)
def _smooth(phi, rhs, kind, tiles, n_tile, sweeps, omega, h, scale, r_out):
    """Red-black SOR sweeps (Gauss-Seidel for omega = 1) of A phi = rhs over kept tiles.

    A is 4 phi - sum(neighbours), or ``_near_operator`` on ``_NEAR`` cells. Returns the
    largest correction of the last sweep.
    """
    side = phi.shape[0]
    biggest = 0.0
    for _ in range(sweeps):
        biggest = 0.0
        for colour in range(2):
            for t in range(n_tile):
                ti, tj = tiles[t, 0], tiles[t, 1]
                i0, i1 = max(ti * TILE, 1), min(ti * TILE + TILE, side - 1)
                j0, j1 = max(tj * TILE, 1), min(tj * TILE + TILE, side - 1)
                for i in range(i0, i1):
                    for j in range(j0 + ((i + j0 + colour) & 1), j1, 2):
                        k = kind[i, j]
                        if k == _FREE:
                            new = 0.25 * (phi[i - 1, j] + phi[i + 1, j] + phi[i, j - 1]
                                          + phi[i, j + 1] + rhs[i, j])
                        elif k == _NEAR:
                            diag, off = _near_operator(phi, i, j, h, scale, r_out)
                            new = (off + rhs[i, j]) / diag
                        else:
                            continue
                        delta = new - phi[i, j]
                        phi[i, j] += omega * delta
                        if abs(delta) > biggest:
                            biggest = abs(delta)
    return biggest


@numba.njit(cache=True)
def _fill_ghosts(level, phis, acts, tiles, n_tiles, halves, r_out):
    """Set the cells just outside the kept tiles of ``level`` from the coarser level."""
    phi, act = phis[level], acts[level]
    side = phi.shape[0]
    n_t = act.shape[0]
    h, h_c = halves[level], halves[level + 1]
    phi_c = phis[level + 1]
    scale = 1 << level
    for t in range(n_tiles[level]):
        ti, tj = tiles[level][t, 0], tiles[level][t, 1]
        for side_k in range(4):
            ni, nj = ti, tj
            if side_k == 0:
                ni += 1
            elif side_k == 1:
                ni -= 1
            elif side_k == 2:
                nj += 1
            else:
                nj -= 1
            if ni < 0 or nj < 0 or ni >= n_t or nj >= n_t or act[ni, nj]:
                continue
            if side_k < 2:
                i = ti * TILE + TILE if side_k == 0 else ti * TILE - 1
                if i < 0 or i >= side:
                    continue
                for j in range(tj * TILE, min(tj * TILE + TILE, side)):
                    if _outside(i - h, j - h, scale, r_out):
                        phi[i, j] = 1.0
                    else:
                        phi[i, j] = _interp(phi_c, i, j, h, h_c)
            else:
                j = tj * TILE + TILE if side_k == 2 else tj * TILE - 1
                if j < 0 or j >= side:
                    continue
                for i in range(ti * TILE, min(ti * TILE + TILE, side)):
                    if _outside(i - h, j - h, scale, r_out):
                        phi[i, j] = 1.0
                    else:
                        phi[i, j] = _interp(phi_c, i, j, h, h_c)


@numba.njit(cache=True)
def _restrict(level, phis, rhss, olds, ress, kinds, acts, tiles, n_tiles, halves, r_out):
    """FAS restriction from ``level`` to ``level + 1``.

    Coarse cells whose 3 x 3 fine stencil lies in kept fine tiles ("covered") take the
    fine potential by injection and the right side rhs = A(injected) + 4 * FW(residual)
    (A the unscaled 5-point operator, FW full weighting; the factor 4 is the ratio of
    squared spacings). Elsewhere the coarse level solves Laplace's equation itself.
    """
    phi_f, rhs_f, kind_f, res = phis[level], rhss[level], kinds[level], ress[level]
    act_f = acts[level]
    side_f = phi_f.shape[0]
    h_f = halves[level]
    for t in range(n_tiles[level]):
        ti, tj = tiles[level][t, 0], tiles[level][t, 1]
        for i in range(ti * TILE, min(ti * TILE + TILE, side_f)):
            for j in range(tj * TILE, min(tj * TILE + TILE, side_f)):
                k = kind_f[i, j]
                if k == _FREE and 0 < i < side_f - 1 and 0 < j < side_f - 1:
                    res[i, j] = rhs_f[i, j] - (4.0 * phi_f[i, j] - phi_f[i - 1, j] - phi_f[i + 1, j]
                                               - phi_f[i, j - 1] - phi_f[i, j + 1])
                elif k == _NEAR:
                    diag, off = _near_operator(phi_f, i, j, h_f, 1 << level, r_out)
                    res[i, j] = rhs_f[i, j] - (diag * phi_f[i, j] - off)
                else:
                    res[i, j] = 0.0
    c = level + 1
    phi, rhs, old, kind = phis[c], rhss[c], olds[c], kinds[c]
    side = phi.shape[0]
    h = halves[c]
    n_tf = act_f.shape[0]
    tiles_c = tiles[c]
    for t in range(n_tiles[c]):
        ti, tj = tiles_c[t, 0], tiles_c[t, 1]
        a0, a1 = ti * TILE, min(ti * TILE + TILE, side)
        b0, b1 = tj * TILE, min(tj * TILE + TILE, side)
        # the whole tile is covered when every fine tile under its stencils is kept
        r0, r1 = 2 * (a0 - h) + h_f - 1, 2 * (a1 - 1 - h) + h_f + 1
        q0, q1 = 2 * (b0 - h) + h_f - 1, 2 * (b1 - 1 - h) + h_f + 1
        whole = r0 >= 0 and q0 >= 0 and r1 < side_f and q1 < side_f
        if whole:
            for u in range(r0 // TILE, r1 // TILE + 1):
                for v in range(q0 // TILE, q1 // TILE + 1):
                    if u >= n_tf or v >= n_tf or not act_f[u, v]:
                        whole = False
        for a in range(a0, a1):
            for b in range(b0, b1):
                fi, fj = 2 * (a - h) + h_f, 2 * (b - h) + h_f
                covered = whole or (0 < fi < side_f - 1 and 0 < fj < side_f - 1
                                    and act_f[(fi - 1) // TILE, (fj - 1) // TILE]
                                    and act_f[(fi - 1) // TILE, (fj + 1) // TILE]
                                    and act_f[(fi + 1) // TILE, (fj - 1) // TILE]
                                    and act_f[(fi + 1) // TILE, (fj + 1) // TILE])
                if covered and kind[a, b] != _ELECTRODE:
                    phi[a, b] = phi_f[fi, fj]
                    rhs[a, b] = 4.0 * (0.25 * res[fi, fj] + 0.125 * (
                        res[fi - 1, fj] + res[fi + 1, fj] + res[fi, fj - 1] + res[fi, fj + 1])
                        + 0.0625 * (res[fi - 1, fj - 1] + res[fi - 1, fj + 1]
                                    + res[fi + 1, fj - 1] + res[fi + 1, fj + 1]))
                    old[a, b] = 1.0  # marks "covered" until the second pass
                else:
                    rhs[a, b] = 0.0
                    old[a, b] = 0.0
    # second pass: add A(injected) to covered free cells (needs all injections done),
    # and remember the coarse potential before the coarse solve
    for t in range(n_tiles[c]):
        ti, tj = tiles_c[t, 0], tiles_c[t, 1]
        for a in range(ti * TILE, min(ti * TILE + TILE, side)):
            for b in range(tj * TILE, min(tj * TILE + TILE, side)):
                if old[a, b] == 1.0 and 0 < a < side - 1 and 0 < b < side - 1:
                    if kind[a, b] == _FREE:
                        rhs[a, b] += (4.0 * phi[a, b] - phi[a - 1, b] - phi[a + 1, b]
                                      - phi[a, b - 1] - phi[a, b + 1])
                    elif kind[a, b] == _NEAR:
                        diag, off = _near_operator(phi, a, b, h, 1 << c, r_out)
                        rhs[a, b] += diag * phi[a, b] - off
                old[a, b] = phi[a, b]


@numba.njit(cache=True)
def _prolong(level, phis, olds, kinds, tiles, n_tiles, halves):
    """Add the bilinear interpolation of the coarse change (phi - old) to free cells.

    Turns ``olds[level + 1]`` into that change on the kept coarse tiles first."""
    phi, kind = phis[level], kinds[level]
    side = phi.shape[0]
    phi_c, old_c = phis[level + 1], olds[level + 1]
    h, h_c = halves[level], halves[level + 1]
    side_c = phi_c.shape[0]
    for t in range(n_tiles[level + 1]):
        ti, tj = tiles[level + 1][t, 0], tiles[level + 1][t, 1]
        for a in range(ti * TILE, min(ti * TILE + TILE, side_c)):
            for b in range(tj * TILE, min(tj * TILE + TILE, side_c)):
                old_c[a, b] = phi_c[a, b] - old_c[a, b]
    for t in range(n_tiles[level]):
        ti, tj = tiles[level][t, 0], tiles[level][t, 1]
        for i in range(max(ti * TILE, 1), min(ti * TILE + TILE, side - 1)):
            x = i - h
            a = (x >> 1) + h_c
            for j in range(max(tj * TILE, 1), min(tj * TILE + TILE, side - 1)):
                if kind[i, j] != _FREE and kind[i, j] != _NEAR:
                    continue
                y = j - h
                b = (y >> 1) + h_c
                if x & 1:
                    if y & 1:
                        d = 0.25 * (old_c[a, b] + old_c[a + 1, b] + old_c[a, b + 1] + old_c[a + 1, b + 1])
                    else:
                        d = 0.5 * (old_c[a, b] + old_c[a + 1, b])
                elif y & 1:
                    d = 0.5 * (old_c[a, b] + old_c[a, b + 1])
                else:
                    d = old_c[a, b]
                phi[i, j] += d


@numba.njit(cache=True)
def _v_cycle(phis, rhss, olds, ress, kinds, acts, tiles, n_tiles, halves, r_out,
             coarse_sweeps, coarse_tol, pre, post):
    """One FAS V(pre, post) cycle over the kept tiles of every level; returns the largest
    correction of the final fine sweep."""
    top = len(phis) - 1
    for level in range(top):
        _fill_ghosts(level, phis, acts, tiles, n_tiles, halves, r_out)
        _smooth(phis[level], rhss[level], kinds[level], tiles[level], n_tiles[level], pre, 1.0,
                halves[level], 1 << level, r_out)
        _restrict(level, phis, rhss, olds, ress, kinds, acts, tiles, n_tiles, halves, r_out)
    omega = 2.0 / (1.0 + math.sin(math.pi / (2.0 * halves[top] + 2.0)))
    for _ in range(coarse_sweeps):
        if _smooth(phis[top], rhss[top], kinds[top], tiles[top], n_tiles[top], 1, omega,
                   halves[top], 1 << top, r_out) < coarse_tol:
            break
    biggest = 0.0
    for level in range(top - 1, -1, -1):
        _prolong(level, phis, olds, kinds, tiles, n_tiles, halves)
        _fill_ghosts(level, phis, acts, tiles, n_tiles, halves, r_out)
        biggest = _smooth(phis[level], rhss[level], kinds[level], tiles[level], n_tiles[level],
                          post, 1.0, halves[level], 1 << level, r_out)
    return biggest


@numba.njit(cache=True)
def _perimeter_weight(value, eta):
    """phi ** eta for phi >= 0, cheap for the common integer exponents.

    Caller guarantees ``eta >= 0``. Tiny negative potentials left by relaxation are
    clipped to 0 (0 ** 0 = 1, so eta = 0 still weights every perimeter site equally).
    """
    if value < 0.0:
        value = 0.0
    if eta == 0.0:
        return 1.0
    if eta == 1.0:
        return value
    if eta == 2.0:
        return value * value
    if eta == 3.0:
        return value * value * value
    if eta == 4.0:
        sq = value * value
        return sq * sq
    return value**eta


@numba.njit(cache=True)
def _grow_on_grid(sites_i, sites_j, k_done, n_total, uniforms, eta, r_limit,
                  phis, rhss, olds, ress, kinds, acts, tiles, n_tiles, halves, r_out,
                  windows, max_local, rel_tol, cycle_every, coarse_sweeps, pre, post, reaches):
    """Add sites ``k_done + 1 .. n_total`` until done or the cluster radius exceeds ``r_limit``.

    Caller guarantees: the hierarchy holds the first ``k_done`` sites (fine cells
    ``sites_i/j[:k_done]``) and a potential converged for them; ``sites_i/j`` have room
    for ``n_total`` sites; ``uniforms`` has ``n_total`` draws in [0, 1); the fine disc of
    radius ``r_limit`` + 2 lies inside the electrode. Returns the number of sites now in
    the cluster and the cluster radius.

    Strategy: the perimeter is a dense list with a position map (stored + 1, 0 = absent)
    for O(1) insert and swap-remove. Each step draws a perimeter site by a linear scan of
    phi ** eta, adds it on every level, relaxes fine windows around it (the change is
    largest there), and every ``cycle_every`` sites runs one V-cycle, which carries the
    change out to the far field.
    """
    phi, kind = phis[0], kinds[0]
    side = phi.shape[0]
    centre = halves[0]
    pos = np.zeros((side, side), dtype=np.int32)
    cap = 4 * n_total + 8
    per_i = np.empty(cap, dtype=np.int64)
    per_j = np.empty(cap, dtype=np.int64)
    weights = np.empty(cap, dtype=np.float64)
    n_per = 0
    r2_max = 0
    di = (-1, 1, 0, 0)
    dj = (0, 0, -1, 1)
    for s in range(k_done):
        i, j = sites_i[s], sites_j[s]
        r2 = (i - centre) ** 2 + (j - centre) ** 2
        if r2 > r2_max:
            r2_max = r2
        for d in range(4):
            a, b = i + di[d], j + dj[d]
            if kind[a, b] == _FREE and pos[a, b] == 0:
                per_i[n_per] = a
                per_j[n_per] = b
                n_per += 1
                pos[a, b] = n_per
    r_cluster = math.sqrt(r2_max)
    k = k_done
    while k < n_total and r_cluster <= r_limit:
        total = 0.0
        phi_top = 0.0
        for p in range(n_per):
            value = phi[per_i[p], per_j[p]]
            if value > phi_top:
                phi_top = value
            weights[p] = _perimeter_weight(value, eta)
            total += weights[p]
        target = uniforms[k] * total
        pick = n_per - 1
        acc = 0.0
        for p in range(n_per):
            acc += weights[p]
            if acc > target:
                pick = p
                break
        i, j = per_i[pick], per_j[pick]
        last = n_per - 1
        per_i[pick], per_j[pick] = per_i[last], per_j[last]
        pos[per_i[pick], per_j[pick]] = pick + 1
        pos[i, j] = 0
        n_per -= 1
        sites_i[k] = i
        sites_j[k] = j
        k += 1
        _add_site(i, j, phis, kinds, acts, tiles, n_tiles, halves, r_out, reaches)
        r_cluster = max(r_cluster, math.sqrt((i - centre) ** 2 + (j - centre) ** 2))
        for d in range(4):
            a, b = i + di[d], j + dj[d]
            if kind[a, b] == _FREE and pos[a, b] == 0:
                per_i[n_per] = a
                per_j[n_per] = b
                n_per += 1
                pos[a, b] = n_per
        if eta == 0.0:
            continue  # every perimeter site weighs 1: the potential is never read
        tol = rel_tol * max(phi_top, 1e-12)
        for half in windows:
            _sor_window(phi, kind, max(1, i - half), min(side - 1, i + half + 1),
                        max(1, j - half), min(side - 1, j + half + 1),
                        2.0 / (1.0 + math.sin(math.pi / (2.0 * half + 2.0))), tol, max_local)
        if k % cycle_every == 0:
            _v_cycle(phis, rhss, olds, ress, kinds, acts, tiles, n_tiles, halves, r_out,
                     coarse_sweeps, 0.1 * tol, pre, post)
    return k, r_cluster


# ------------------------------------------------------------------ grids


class _Hierarchy:
    """The per-level arrays for one electrode radius (see the layout notes above)."""

    def __init__(self, r_out: int):
        self.r_out = int(r_out)
        n_levels = 1
        while (r_out + 2) / 2 ** (n_levels - 1) > COARSEST_HALF:
            n_levels += 1
        top = n_levels - 1
        step = 2**top
        h0 = -(-(r_out + step + 1) // step) * step
        self.halves = np.array([h0 >> level for level in range(n_levels)], dtype=np.int64)
        self.phis, self.rhss, self.olds, self.ress = List(), List(), List(), List()
        self.kinds, self.acts, self.tiles = List(), List(), List()
        for h in self.halves:
            side = 2 * int(h) + 1
            n_t = -(-side // TILE)
            # np.zeros maps pages lazily: only the kept tiles' rows are ever touched
            self.phis.append(np.zeros((side, side)))
            self.rhss.append(np.zeros((side, side)))
            self.olds.append(np.zeros((side, side)))
            self.ress.append(np.zeros((side, side)))
            self.kinds.append(np.zeros((side, side), dtype=np.int8))
            self.acts.append(np.zeros((n_t, n_t), dtype=np.uint8))
            self.tiles.append(np.zeros((n_t * n_t, 2), dtype=np.int64))
        self.n_tiles = np.zeros(n_levels, dtype=np.int64)
        self.reaches = _reaches(n_levels)

    @property
    def centre(self) -> int:
        return int(self.halves[0])

    def args(self):
        return (self.phis, self.rhss, self.olds, self.ress, self.kinds, self.acts,
                self.tiles, self.n_tiles, self.halves, self.r_out)


@numba.njit(cache=True)
def _init_coarsest(phis, kinds, acts, tiles, n_tiles, halves, r_out, r0):
    top = len(phis) - 1
    n_t = acts[top].shape[0]
    for ti in range(n_t):
        for tj in range(n_t):
            _activate(top, ti, tj, phis, kinds, acts, tiles, n_tiles, halves, r_out, r0)


@numba.njit(cache=True)
def _warm_start(new_phis, new_kinds, new_acts, new_tiles, new_n_tiles, new_halves,
                old_phis, old_acts, old_halves, old_r_out, scale):
    """Copy the old potential, times ``scale``, into every kept new cell the old grid kept
    on the same level inside its electrode (levels of equal index have equal spacing)."""
    for level in range(min(len(new_phis), len(old_phis))):
        phi, kind = new_phis[level], new_kinds[level]
        o_phi, o_act = old_phis[level], old_acts[level]
        h, oh = new_halves[level], old_halves[level]
        o_side = o_phi.shape[0]
        step = 1 << level
        for t in range(new_n_tiles[level]):
            ti, tj = new_tiles[level][t, 0], new_tiles[level][t, 1]
            for i in range(ti * TILE, min(ti * TILE + TILE, phi.shape[0])):
                for j in range(tj * TILE, min(tj * TILE + TILE, phi.shape[0])):
                    if kind[i, j] != _FREE and kind[i, j] != _NEAR:
                        continue
                    oi, oj = i - h + oh, j - h + oh
                    if not (0 <= oi < o_side and 0 <= oj < o_side):
                        continue
                    if _outside(oi - oh, oj - oh, step, old_r_out):
                        continue
                    if o_act[oi // TILE, oj // TILE]:
                        phi[i, j] = scale * o_phi[oi, oj]


def _electrode_radius(r_cluster: float) -> int:
    """Electrode radius for a grid that lets the cluster grow by REGRID_HEADROOM."""
    r = REGRID_HEADROOM * r_cluster + 2.0
    return int(math.ceil(max(ELECTRODE_RATIO * r, r + ELECTRODE_MARGIN)))


def _radius_limit(r_out: int) -> float:
    """Largest cluster radius that electrode radius ``r_out`` still serves."""
    return min(r_out / ELECTRODE_RATIO, r_out - ELECTRODE_MARGIN)


def _make_grid(r_out: int, sites_i, sites_j, k: int, old: _Hierarchy | None,
               r_cluster: float) -> _Hierarchy:
    """A hierarchy for an electrode of radius ``r_out`` holding the first ``k`` sites.

    Warm start: on the coarsest level the profile log(r / r0) / log(R / r0) of a cluster
    of effective radius r0 = 0.6 x its radius; every finer kept tile is interpolated from
    the level above, then, where the old grid kept the same level, overwritten by the old
    potential times log(R_old / r0) / log(R_new / r0) (what the far field of such a
    cluster does when the electrode moves out).
    """
    grid = _Hierarchy(r_out)
    r0 = max(0.6 * r_cluster, 0.5)
    _init_coarsest(grid.phis, grid.kinds, grid.acts, grid.tiles, grid.n_tiles, grid.halves,
                   grid.r_out, r0)
    shift = grid.centre - (old.centre if old is not None else 0)
    for s in range(k):
        _add_site(int(sites_i[s]) + shift, int(sites_j[s]) + shift, grid.phis, grid.kinds,
                  grid.acts, grid.tiles, grid.n_tiles, grid.halves, grid.r_out, grid.reaches)
        sites_i[s] += shift
        sites_j[s] += shift
    if old is not None:
        scale = math.log(old.r_out / r0) / math.log(r_out / r0)
        _warm_start(grid.phis, grid.kinds, grid.acts, grid.tiles, grid.n_tiles, grid.halves,
                    old.phis, old.acts, old.halves, old.r_out, scale)
    for _ in range(REGRID_CYCLES):
        if _v_cycle(*grid.args(), 200, 0.1 * REGRID_TOLERANCE, 2, 2) < REGRID_TOLERANCE:
            break
    return grid


def _grow_sites(n_particles: int, eta: float, seed: int, *, outer_radius: int | None = None,
                windows=LOCAL_WINDOWS, rel_tol: float = RELATIVE_TOLERANCE,
                cycle_every: int | None = None, sweeps=SWEEPS):
    """Grow the cluster; return the fine cells of its sites in arrival order and the grid.

    The solver settings are exposed for the accuracy tests and the benchmark.
    """
    if cycle_every is None:
        cycle_every = CYCLE_EVERY_HIGH_ETA if eta >= HIGH_ETA else CYCLE_EVERY
    uniforms = np.random.default_rng(seed).random(n_particles)
    sites_i = np.zeros(n_particles, dtype=np.int64)
    sites_j = np.zeros(n_particles, dtype=np.int64)
    windows = np.array(windows, dtype=np.int64)
    fixed = outer_radius is not None
    r_out = int(outer_radius) if fixed else _electrode_radius(1.0)
    grid = _make_grid(r_out, sites_i, sites_j, 0, None, 0.0)
    sites_i[0] = sites_j[0] = grid.centre
    _add_site(grid.centre, grid.centre, grid.phis, grid.kinds, grid.acts, grid.tiles,
              grid.n_tiles, grid.halves, grid.r_out, grid.reaches)
    for _ in range(REGRID_CYCLES):
        if _v_cycle(*grid.args(), 200, 0.1 * REGRID_TOLERANCE, 2, 2) < REGRID_TOLERANCE:
            break
    k = 1
    while True:
        r_limit = r_out - STOP_GAP - 1e-9 if fixed else _radius_limit(r_out)
        k, r_cluster = _grow_on_grid(sites_i, sites_j, k, n_particles, uniforms, float(eta),
                                     r_limit, *grid.args(), windows, MAX_LOCAL_SWEEPS,
                                     rel_tol, max(int(cycle_every), 1), COARSE_SWEEPS, *sweeps,
                                     grid.reaches)
        if k >= n_particles or fixed:
            break
        r_out = _electrode_radius(r_cluster)
        grid = _make_grid(r_out, sites_i, sites_j, k, grid, r_cluster)
    return sites_i[:k], sites_j[:k], grid


def _grow(n_particles: int, eta: float, seed: int, **settings):
    """Grow the cluster; return ``(order, kind, phi)`` on the whole fine lattice.

    ``kind`` and ``phi`` are the fine level as the solver left it on the kept tiles
    (which hold the cluster and its perimeter); elsewhere the cells get their kind (free
    or electrode) and the coarse potential interpolated, so that a direct solve of the
    same lattice problem can be compared with it. For tests and benchmarks (it builds
    full arrays of the electrode disc).
    """
    sites_i, sites_j, grid = _grow_sites(n_particles, eta, seed, **settings)
    return _full_fine(grid, sites_i, sites_j)


def _full_fine(grid: _Hierarchy, sites_i, sites_j):
    """Order, kind and potential of the whole fine lattice (for tests and cropping)."""
    side = grid.phis[0].shape[0]
    order = np.zeros((side, side), dtype=np.int32)
    order[sites_i, sites_j] = np.arange(1, sites_i.size + 1, dtype=np.int32)
    ii, jj = np.indices((side, side))
    c = grid.centre
    kind = np.where((ii - c) ** 2 + (jj - c) ** 2 >= grid.r_out**2, _ELECTRODE, _FREE).astype(np.int8)
    kind[order > 0] = _CLUSTER
    # coarse potential interpolated up level by level, then the kept tiles of each level
    phi = grid.phis[-1].copy()
    for level in range(len(grid.phis) - 2, -1, -1):
        h, h_c = int(grid.halves[level]), int(grid.halves[level + 1])
        s = 2 * h + 1
        x = np.arange(s) - h
        a = (x >> 1) + h_c
        odd = (x & 1).astype(bool)
        rows = np.where(odd[:, None], 0.5 * (phi[a] + phi[np.minimum(a + 1, phi.shape[0] - 1)]),
                        phi[a])
        fine = np.where(odd[None, :], 0.5 * (rows[:, a] + rows[:, np.minimum(a + 1, phi.shape[0] - 1)]),
                        rows[:, a])
        kept = np.repeat(np.repeat(grid.acts[level].astype(bool), TILE, 0), TILE, 1)[:s, :s]
        phi = np.where(kept, grid.phis[level], fine)
    phi = np.where(kind == _ELECTRODE, 1.0, np.where(kind == _CLUSTER, 0.0, phi))
    return order, kind, phi


def _check_arguments(n_particles, eta, seed, outer_radius) -> None:
    if isinstance(n_particles, bool) or not isinstance(n_particles, (int, np.integer)):
        raise ValueError(f"n_particles must be an integer, got {n_particles!r}")
    if n_particles < 1:
        raise ValueError(f"n_particles must be at least 1, got {n_particles}")
    if isinstance(eta, bool) or not isinstance(eta, (int, float, np.integer, np.floating)):
        raise ValueError(f"eta must be a number, got {eta!r}")
    if not math.isfinite(eta) or eta < 0:
        raise ValueError(f"eta must be finite and >= 0, got {eta}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise ValueError(f"seed must be an integer, got {seed!r}")
    if outer_radius is not None:
        if isinstance(outer_radius, bool) or not isinstance(outer_radius, (int, np.integer)):
            raise ValueError(f"outer_radius must be an integer number of sites or None, "
                             f"got {outer_radius!r}")
        if outer_radius < MIN_OUTER_RADIUS:
            raise ValueError(f"outer_radius must be at least {MIN_OUTER_RADIUS} sites, "
                             f"got {outer_radius}")


def dbm(n_particles: int, *, eta: float, seed: int, outer_radius: int | None = None) -> np.ndarray:
    """Grow a dielectric breakdown cluster of ``n_particles`` sites.

    Parameters
    ----------
    n_particles : int
        Number of occupied sites, at least 1 (fewer when ``outer_radius`` stops growth).
    eta : float
        Exponent of the growth law, ``eta >= 0``: 0 gives Eden-like compact growth,
        1 the DLA class, large values nearly linear growth.
    seed : int
        Seed of ``numpy.random.default_rng``; same seed, same cluster, bit for bit.
    outer_radius : int or None
        Radius (lattice units) of a fixed outer electrode about the seed. Growth then
        stops at ``n_particles`` sites or as soon as a site lies within 2 lattice units
        of the electrode circle, whichever comes first (a deposit grown until it nearly
        reaches the rim electrode). ``None`` (default): the electrode stays far away,
        2 to 2.5 cluster radii, moving out as the cluster grows. ``outer_radius_for``
        picks a radius that a deposit of a given size nearly reaches.

    Returns
    -------
    numpy.ndarray of int32, 2-D
        Arrival order 1..n of each occupied site, 0 elsewhere. The seed (order 1) sits at
        ``(h // 2, w // 2)``; the array is square, cropped symmetrically about the seed
        with a margin of 2 empty cells.

    Raises
    ------
    ValueError
        If ``n_particles`` is not a positive integer, ``eta`` is not a finite number
        >= 0, ``seed`` is not an integer, or ``outer_radius`` is not None or an integer
        of at least ``MIN_OUTER_RADIUS`` (8).

    Notes
    -----
    Electrode (``outer_radius=None``): a circle about the seed of radius at least
    ``ELECTRODE_RATIO`` (2) times the cluster radius and ``ELECTRODE_MARGIN`` (16) beyond
    it. When the cluster outgrows it, the grid is re-made with the radius grown by a
    factor ``REGRID_HEADROOM`` (1.25), so the electrode sits between 2 and 2.5 cluster
    radii away; the old potential, rescaled for the moved electrode, is the warm start
    of the new grid, which is relaxed by V-cycles until one corrects less than 1e-6 (12 at most).

    Solver: multigrid on a hierarchy of lattices of spacing 1, 2, 4, ... whose finer
    levels exist only on tiles of ``TILE`` (8) x 8 cells near the cluster (level 0
    within ``FINE_REACH`` = 36 lattice units of a site, coarser levels within about 16
    of their own cells; see the module notes); the coarsest level, of at most 33 x 33
    cells, covers the whole electrode disc. The levels are coupled by the full
    approximation scheme: where a coarse cell lies under kept finer tiles it carries
    the fine potential and the restricted fine residual; elsewhere it solves Laplace's
    equation itself, and the cells bordering the kept tiles of a level take their
    values from the coarser one. A coarse cell is held (its value injected from the
    finer level) when a cluster site lies within half its spacing, so coarse
    corrections act where the error is smooth; coarse cells beside the electrode place
    it on the true circle (Shortley-Weller), as the fine lattice does to within a
    lattice unit. After each new site (set to 0) fine windows of half-width 4, 12 and
    32 about it are relaxed by SOR (the correction is largest there) until a sweep
    corrects less than ``RELATIVE_TOLERANCE`` (1e-4) times the largest perimeter
    potential, at most 20 sweeps each; every ``CYCLE_EVERY`` (8) sites, or every 2 from
    eta = 2.5 on, one FAS V(1, 1) cycle over the kept tiles of every level carries the
    change to the far field.

    Why this solver (measured on the 2-core machine, under load, same run): an
    algebraic multigrid library (pyamg 5.4.1, smoothed aggregation) would need a new
    hierarchy or a stale preconditioner every step, since each new site changes the
    matrix. On the full electrode disc of a 3,000-site cluster at eta = 2 (5.4 x 10^5
    unknowns) its setup took 14 s, one V-cycle 0.36 s and a warm-started CG solve to
    1e-6 2.9 s, against 19 ms for one V-cycle of this hierarchy on the same cluster;
    at eta = 4 the disc holds tens of millions of unknowns. The previous solver here
    (windowed SOR with two-grid cycles over the whole disc, kept as the baseline in
    ``benchmarks/_dbm_baseline.py``) swept the whole disc every step, 2 to 2.5 cluster
    radii across, which at eta >= 3 is hundreds of times the cluster's neighbourhood.
    Figures: ``benchmarks/bench_dbm.py``.

    Accuracy: against a direct sparse solve of the same lattice problem (cluster at 0,
    the fine electrode circle at 1), the growth probabilities of the 10 most probable
    perimeter sites agree to about 0.1-0.8 % at eta = 1 and 2 and 2-3 % at eta = 4
    (clusters of 250-1,000 sites; probabilities go as phi ** eta, so relative errors of
    phi grow eta-fold); tested in ``tests/simulate/test_dbm.py``, with the electrode
    far and close.

    References
    ----------
    .. [1] L. Niemeyer, L. Pietronero and H. J. Wiesmann, "Fractal dimension of
       dielectric breakdown", Phys. Rev. Lett. 52, 1033 (1984).
    .. [2] J. Mathiesen and M. H. Jensen, "Tip splittings and phase transitions in the
       dielectric breakdown model", Phys. Rev. Lett. 88, 235505 (2002).
    """
    _check_arguments(n_particles, eta, seed, outer_radius)
    sites_i, sites_j, grid = _grow_sites(
        int(n_particles), float(eta), int(seed),
        outer_radius=None if outer_radius is None else int(outer_radius))
    return _crop(sites_i - grid.centre, sites_j - grid.centre)


def _crop(rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Arrival-order array of sites at offsets (rows, cols) from the seed, seed centred."""
    half = int(max(np.abs(rows).max(), np.abs(cols).max())) + 2
    order = np.zeros((2 * half + 1, 2 * half + 1), dtype=np.int32)
    order[rows + half, cols + half] = np.arange(1, rows.size + 1, dtype=np.int32)
    return order


def outer_radius_for(n_particles: int, *, eta: float, reach: float = DEFAULT_REACH) -> int:
    """Outer electrode radius that a DBM deposit of ``n_particles`` sites nearly reaches.

    The free-growth radius is estimated from a power law measured with this module
    (``RADIUS_TABLE_*``: R_max(n) = R_1000 (n / 1000) ** b, R_1000 and b interpolated
    linearly in eta, held at the eta = 4 values beyond), and divided by ``reach``
    (0 < reach <= 2; above 1 the electrode lies inside the estimate).
    Grown with ``dbm(n, eta=eta, seed=s, outer_radius=outer_radius_for(n, eta=eta))``,
    a deposit either stops when it comes within 2 lattice units of the electrode (the
    close electrode pulls its tips, so this is the usual case) or uses all n sites
    short of it; record ``reach(cluster, radius)`` as the family parameter, not the
    target.

    Raises ValueError unless ``n_particles`` is a positive integer, ``eta`` a finite
    number >= 0 and ``0 < reach <= 2``.
    """
    if isinstance(n_particles, bool) or not isinstance(n_particles, (int, np.integer)) or n_particles < 1:
        raise ValueError(f"n_particles must be a positive integer, got {n_particles!r}")
    if isinstance(eta, bool) or not isinstance(eta, (int, float, np.integer, np.floating)) or not (
            math.isfinite(eta) and eta >= 0):
        raise ValueError(f"eta must be a finite number >= 0, got {eta!r}")
    if isinstance(reach, bool) or not isinstance(reach, (int, float, np.floating)) or not 0 < reach <= 2:
        raise ValueError(f"reach must lie in (0, 2], got {reach!r}")
    r1000 = math.exp(np.interp(eta, RADIUS_TABLE_ETA, np.log(RADIUS_TABLE_R1000)))
    exponent = float(np.interp(eta, RADIUS_TABLE_ETA, RADIUS_TABLE_EXPONENT))
    estimate = r1000 * (n_particles / 1000.0) ** exponent
    return max(MIN_OUTER_RADIUS, int(math.ceil(estimate / reach)))


def reach(cluster: np.ndarray, outer_radius: int) -> float:
    """Largest distance of an occupied site from the seed, over ``outer_radius``.

    ``cluster`` is a ``dbm`` result (seed at ``(h // 2, w // 2)``). A deposit grown with
    ``outer_radius`` until it stopped at the electrode has a reach of at least
    (outer_radius - 2) / outer_radius; one far from its electrode, much less.
    """
    if outer_radius is None or outer_radius <= 0:
        raise ValueError(f"outer_radius must be positive, got {outer_radius!r}")
    rows, cols = np.nonzero(cluster)
    if rows.size == 0:
        raise ValueError("the cluster has no occupied site")
    centre = np.array(cluster.shape) // 2
    return float(np.hypot(rows - centre[0], cols - centre[1]).max() / outer_radius)
