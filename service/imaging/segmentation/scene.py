"""Parts of a bench scene that are not the specimen: the rim and what lies along it (a wall
highlight or shadow, copper tape), the centre electrode, glare, and areas the user excludes."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import ndimage

from service.imaging.segmentation._common import Field, field_mask


def exclusion_mask(exclude, shape: tuple[int, int]) -> np.ndarray | None:
    """Areas the user excludes: boxes ``(x0, y0, x1, y1)`` in px (x1, y1 exclusive) or a mask."""
    if exclude is None:
        return None
    if isinstance(exclude, np.ndarray) and exclude.ndim == 2:
        if exclude.shape != shape:
            raise ValueError(f"an exclusion mask must have the image's shape {shape}, got {exclude.shape}")
        return exclude.astype(bool)
    h, w = shape
    out = np.zeros(shape, dtype=bool)
    for box in exclude:
        try:
            x0, y0, x1, y1 = (float(v) for v in box)
        except (TypeError, ValueError):
            raise ValueError(f"an excluded area must be a box (x0, y0, x1, y1) in px, got {box!r}") from None
        if not all(math.isfinite(v) for v in (x0, y0, x1, y1)) or x1 <= x0 or y1 <= y0:
            raise ValueError(f"an excluded box needs x0 < x1 and y0 < y1, got {box!r}")
        if x1 <= 0 or y1 <= 0 or x0 >= w or y0 >= h:
            raise ValueError(f"the excluded box {tuple(box)} lies outside the {w} x {h} px image")
        out[max(0, int(math.floor(y0))): min(h, int(math.ceil(y1))),
            max(0, int(math.floor(x0))): min(w, int(math.ceil(x1)))] = True
    return out


def rim_structures(mask: np.ndarray, fov: Field, width_px: float) -> tuple[np.ndarray, dict[str, Any]]:
    """Pieces of ``mask`` that run along the field's edge: a lighter ring, a wall highlight or
    shadow, tape on the rim. Returns a mask of them and a summary.

    Strategy: in polar cells (elliptical radius rho x angle) over the outer part of the field,
    the outermost occupied run of each angle is a candidate when it is thin in rho and
    solution separates it from anything further in. Candidates are rim structures where
    they continue over a long arc (15 degrees and 8 branch widths at least) at a steady
    rho: a ring or tape does, the tips of a deposit reaching towards the rim do not.
    """
    h, w = mask.shape
    r_px = fov.r
    rho_lo = 0.6
    bin_r = max(1.0, 0.5 * width_px) / r_px  # rho per radial cell
    n_r = max(8, int(math.ceil((1.0 - rho_lo) / bin_r)) + 1)
    n_t = int(min(4096, max(90, 2.0 * math.pi * r_px / max(2.0, width_px))))
    # Only pixels in the outer part matter: cut a bounding box of the field.
    reach = max(fov.a, fov.b) + 2
    r0, r1 = max(0, int(fov.cy - reach)), min(h, int(fov.cy + reach) + 1)
    c0, c1 = max(0, int(fov.cx - reach)), min(w, int(fov.cx + reach) + 1)
    crop = mask[r0:r1, c0:c1].copy()
    # Only the outer part: clear the inside of the ellipse at rho_lo (in place, row by row).
    inner = field_mask(crop.shape, Field(fov.cy - r0, fov.cx - c0, fov.a * rho_lo, fov.b * rho_lo, fov.theta, ""))
    crop &= ~inner
    del inner
    rows, cols = np.nonzero(crop)
    del crop
    rows = rows.astype(np.float64) + r0
    cols = cols.astype(np.float64) + c0
    rho = fov.rho(rows, cols)
    outer = (rho >= rho_lo) & (rho < 1.0 + 2 * bin_r)
    empty = np.zeros(mask.shape, dtype=bool), {"removed_px": 0, "arcs": 0}
    if not outer.any():
        return empty
    rows, cols, rho = rows[outer], cols[outer], rho[outer]
    angle = np.arctan2(rows - fov.cy, cols - fov.cx)
    ir = np.minimum(((rho - rho_lo) / bin_r).astype(np.int64), n_r - 1)
    it = ((angle + math.pi) / (2 * math.pi) * n_t).astype(np.int64) % n_t
    counts = np.zeros((n_r, n_t), dtype=np.float64)
    np.add.at(counts, (ir, it), 1.0)
    cell_area = (bin_r * r_px) * (2.0 * math.pi * r_px / n_t) * (rho_lo + (np.arange(n_r) + 0.5) * bin_r)[:, None]
    occupied = counts / np.maximum(cell_area, 1e-9) > 0.3
    # Outermost run per angle, and whether a gap of solution lies inside it.
    thick_max = max(2, int(0.1 / bin_r))
    gap_min = max(2, int(math.ceil(1.0 * width_px / (bin_r * r_px))))
    cand = np.zeros(n_t, dtype=bool)
    lo_idx = np.zeros(n_t, dtype=np.int64)
    hi_idx = np.zeros(n_t, dtype=np.int64)
    any_occ = occupied.any(axis=0)
    top = n_r - 1 - np.argmax(occupied[::-1], axis=0)
    for t in np.flatnonzero(any_occ):
        col = occupied[:, t]
        i = top[t]
        j = i
        while j > 0 and col[j - 1]:
            j -= 1
        if i - j + 1 > thick_max or j - gap_min < 0:
            continue
        if col[max(0, j - gap_min): j].any():
            continue
        cand[t], lo_idx[t], hi_idx[t] = True, j, i
    # Long arcs of candidates at a steady rho (circular runs).
    min_run = max(int(math.ceil(n_t * 15.0 / 360.0)), int(math.ceil(8.0 * width_px / (2.0 * math.pi * r_px / n_t))))
    confirmed = np.zeros(n_t, dtype=bool)
    arcs = 0
    if cand.all():
        runs = [(0, n_t)]
    else:
        start = int(np.argmin(cand))  # a non-candidate angle: runs do not wrap past it
        order = np.roll(np.arange(n_t), -start)
        runs, run_start = [], None
        for k, t in enumerate(order):
            if cand[t] and run_start is None:
                run_start = k
            if not cand[t] and run_start is not None:
                runs.append((run_start, k))
                run_start = None
        if run_start is not None:
            runs.append((run_start, n_t))
        runs = [(order[a], b - a) for a, b in runs]
    for a, n in runs:
        if n < min_run:
            continue
        idx = (np.arange(n) + a) % n_t
        mid = 0.5 * (lo_idx[idx] + hi_idx[idx])
        if float(np.std(mid)) * bin_r > 0.03:
            continue
        confirmed[idx] = True
        arcs += 1
    if not confirmed.any():
        return empty
    # Cells to clear: the confirmed runs, one cell more on each side in rho.
    clear = np.zeros((n_r, n_t), dtype=bool)
    for t in np.flatnonzero(confirmed):
        clear[max(0, lo_idx[t] - 1): min(n_r, hi_idx[t] + 2), t] = True
    hit = clear[ir, it]
    out = np.zeros(mask.shape, dtype=bool)
    out[rows[hit].astype(np.int64), cols[hit].astype(np.int64)] = True
    return out, {"removed_px": int(hit.sum()), "arcs": arcs}


def glare_mask(rgb: np.ndarray, width_px: float) -> np.ndarray | None:
    """Specular glare: near-white, colourless blobs much wider than a branch."""
    bright = (rgb.min(axis=2) >= 235) & ((rgb.max(axis=2).astype(np.int16) - rgb.min(axis=2)) <= 24)
    if not bright.any():
        return None
    core = ndimage.binary_erosion(bright, iterations=max(1, int(round(1.5 * width_px))))
    if not core.any():
        return None
    # The blobs back to their size, and the soft halo around them.
    grown = ndimage.binary_dilation(core, iterations=max(1, int(round(1.5 * width_px))) + 2)
    return grown & ndimage.binary_dilation(bright, iterations=2)


def find_electrode(mask: np.ndarray, seed_rc: tuple[float, float], width_px: float) -> dict[str, Any] | None:
    """A compact disc much thicker than the branches near the seed: the centre electrode."""
    h, w = mask.shape
    half = int(max(16, 0.06 * min(h, w)))
    r0, c0 = max(0, int(seed_rc[0]) - half), max(0, int(seed_rc[1]) - half)
    crop = mask[r0: int(seed_rc[0]) + half, c0: int(seed_rc[1]) + half]
    if not crop.any():
        return None
    # Padding with background makes the crop's edge count as an edge: a blob cut by the
    # window is not mistaken for a wider one.
    dist = ndimage.distance_transform_edt(np.pad(crop, 1))[1:-1, 1:-1]
    peak = float(dist.max())
    if peak < max(4.0, 1.6 * width_px) or peak > 0.06 * min(h, w):
        return None  # as thin as the branches, or so wide that the specimen itself is compact
    core = dist >= 0.7 * peak
    labels, _ = ndimage.label(core)
    pr, pc = np.unravel_index(int(np.argmax(dist)), dist.shape)
    rows, cols = np.nonzero(labels == labels[pr, pc])
    return {"center_rc": [round(float(rows.mean()) + r0, 1), round(float(cols.mean()) + c0, 1)],
            "radius_px": round(peak, 1)}
