"""Parts of a bench scene that are not the specimen: the rim and what lies along it (a wall
highlight or shadow, copper tape), the centre electrode, glare, and areas the user excludes."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import ndimage

from service.distance import distance_to_background
from service.imaging.segmentation._common import Field, block_mean, field_mask, robust_sigma


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


def stroke_mask(strokes, shape: tuple[int, int]) -> np.ndarray | None:
    """Areas the user paints out: brush strokes ``(points, radius_px)`` as a bool mask of ``shape``.

    Parameters
    ----------
    strokes : sequence of (points, radius_px)
        ``points`` a sequence of ``(x, y)`` in px (x from the left edge, y down from the top;
        pixel ``(row i, column j)`` spans ``[j, j + 1) x [i, i + 1)``, as the boxes of
        :func:`exclusion_mask` do); ``radius_px`` the brush radius, > 0.
    shape : (rows, columns)

    Returns
    -------
    ndarray of bool or None
        A pixel is painted when its centre ``(j + 0.5, i + 0.5)`` lies closer than
        ``radius_px`` to the polyline through the points (one point: a disc, the digital disc
        :func:`skimage.draw.disk` draws). None when there are no strokes.

    Raises
    ------
    ValueError
        A stroke without points, with a non-finite coordinate or a radius <= 0, or one that
        covers no pixel of the image.
    """
    if strokes is None or len(strokes) == 0:
        return None
    h, w = shape
    out = np.zeros(shape, dtype=bool)
    for k, stroke in enumerate(strokes):
        try:
            points, radius = stroke
            xy = np.asarray(points, dtype=float).reshape(-1, 2)
            radius = float(radius)
        except (TypeError, ValueError):
            raise ValueError(f"a painted stroke must be (points [(x, y), ...], radius_px), got {stroke!r}"[:200]) from None
        if len(xy) == 0 or not np.isfinite(xy).all() or not (math.isfinite(radius) and radius > 0):
            raise ValueError(f"painted stroke {k} needs at least one finite point and a radius > 0")
        # Strategy: each segment (a single point is a segment of length 0) paints the pixels of
        # its bounding box, grown by the radius, whose centre lies within the radius of it.
        starts, ends = (xy, xy) if len(xy) == 1 else (xy[:-1], xy[1:])
        covered = False
        for (ax, ay), (bx, by) in zip(starts, ends):
            c0, c1 = max(0, math.floor(min(ax, bx) - radius)), min(w, math.ceil(max(ax, bx) + radius) + 1)
            r0, r1 = max(0, math.floor(min(ay, by) - radius)), min(h, math.ceil(max(ay, by) + radius) + 1)
            if c0 >= c1 or r0 >= r1:
                continue
            px = np.arange(c0, c1, dtype=float)[None, :] + 0.5 - ax
            py = np.arange(r0, r1, dtype=float)[:, None] + 0.5 - ay
            dx, dy = bx - ax, by - ay
            length2 = dx * dx + dy * dy
            t = np.clip((px * dx + py * dy) / length2, 0.0, 1.0) if length2 > 0 else 0.0
            inside = (px - t * dx) ** 2 + (py - t * dy) ** 2 < radius * radius
            if inside.any():
                out[r0:r1, c0:c1] |= inside
                covered = True
        if not covered:
            raise ValueError(f"painted stroke {k} (starting at x={xy[0, 0]:g}, y={xy[0, 1]:g}) lies wholly "
                             f"outside the {w} x {h} px image")
    return out


def rim_structures(mask: np.ndarray, fov: Field, width_px: float) -> tuple[np.ndarray, dict[str, Any]]:
    """Pieces of ``mask`` that run along the field's edge: a lighter ring, a wall highlight or
    shadow, tape on the rim. Returns a mask of them and a summary.

    Strategy: in polar cells (elliptical radius rho x angle) over the outer part of the field,
    the outermost occupied run of each angle is a candidate when it is thin in rho and
    solution separates it from anything further in. Candidates are rim structures where
    they continue over a long arc (15 degrees and 8 branch widths at least) at a steady
    rho beyond 0.88: a ring or tape does, the tips of a deposit reaching towards the rim
    and the edge of a dense deposit do not.
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
        if float(np.std(mid)) * bin_r > 0.03 or rho_lo + (float(np.median(mid)) + 0.5) * bin_r < 0.88:
            continue  # wandering, or well inside: the edge of a dense deposit, not the rim's
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


def glare_mask(rgb: np.ndarray, width_px: float | None = None) -> np.ndarray | None:
    """Specular glare: clipped white, colourless blobs, each round (at most three times the
    area of the largest disc inside it, while a branch is many times longer than wide) or,
    given the branch width, much wider than a branch. Roundness needs no branch width, so
    glare can be set aside before a threshold is chosen (the width is measured on a reading,
    which may itself be the glare)."""
    # Every channel clipped (so colourless too). Channel by channel: numpy's reductions along
    # a last axis of three are slow on a photograph.
    bright = np.minimum(np.minimum(rgb[..., 0], rgb[..., 1]), rgb[..., 2]) >= 247
    if not bright.any():
        return None
    labels, n = ndimage.label(bright)
    area = np.bincount(labels.ravel(), minlength=n + 1)
    spot = np.zeros(n + 1, dtype=bool)
    for i, box in enumerate(ndimage.find_objects(labels), start=1):
        if area[i] < 8:
            continue
        inscribed = float(distance_to_background(np.pad(labels[box] == i, 1)).max())
        spot[i] = ((inscribed >= 2.5 and area[i] <= 3.0 * math.pi * inscribed**2)
                   or (width_px is not None and inscribed >= 1.5 * width_px))
    if not spot.any():
        return None
    # The blobs and the rim of their soft edge.
    return ndimage.binary_dilation(spot[labels], iterations=2)


def glare_halo(glare: np.ndarray) -> np.ndarray:
    """Within one spot radius of each glare spot (the radius of a disc of the spot's area):
    a glare spot fades over about its own radius, so a threshold leaves a ring of it behind."""
    labels, n = ndimage.label(glare)
    halo = np.zeros(glare.shape, dtype=bool)
    area = np.bincount(labels.ravel(), minlength=n + 1)
    for i, box in enumerate(ndimage.find_objects(labels), start=1):
        reach = int(math.ceil(math.sqrt(area[i] / math.pi)))
        rows = slice(max(0, box[0].start - reach), min(glare.shape[0], box[0].stop + reach))
        cols = slice(max(0, box[1].start - reach), min(glare.shape[1], box[1].stop + reach))
        halo[rows, cols] |= distance_to_background(labels[rows, cols] != i) <= reach
    return halo


def glare_halo_pieces(mask: np.ndarray, halo: np.ndarray) -> np.ndarray:
    """Pieces of ``mask`` lying (nine tenths of them or more) within ``halo``
    (:func:`glare_halo`); a branch that passes by lies mostly outside."""
    pieces, m = ndimage.label(mask, structure=np.ones((3, 3), dtype=bool))
    if m == 0:
        return np.zeros(mask.shape, dtype=bool)
    size = np.bincount(pieces.ravel(), minlength=m + 1)
    inside = np.bincount(pieces[halo].ravel(), minlength=m + 1)
    drop = inside >= 0.9 * size
    drop[0] = False
    return drop[pieces]


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
    dist = distance_to_background(np.pad(crop, 1))[1:-1, 1:-1]
    peak = float(dist.max())
    if peak < max(4.0, 1.6 * width_px) or peak > 0.06 * min(h, w):
        return None  # as thin as the branches, or so wide that the specimen itself is compact
    core = dist >= 0.7 * peak
    labels, _ = ndimage.label(core)
    pr, pc = np.unravel_index(int(np.argmax(dist)), dist.shape)
    rows, cols = np.nonzero(labels == labels[pr, pc])
    return {"center_rc": [round(float(rows.mean()) + r0, 1), round(float(cols.mean()) + c0, 1)],
            "radius_px": round(peak, 1)}


def electrode_outline(levels: np.ndarray, mask: np.ndarray, electrode: dict[str, Any],
                      background: float) -> np.ndarray | None:
    """The electrode's own pixels, where its grey sets it apart from the deposit round it.

    :func:`find_electrode` places a disc by thickness alone, and in a dense core that disc
    holds deposit as well. A rod or wire end is most often lighter or darker than the metal
    grown on it: then its pixels are those of the mask nearer its grey than the deposit's,
    joined to its centre (the midpoint between two greys is where a blurred edge between
    them lies). When the two greys do not differ by more than the deposit's own spread, the
    electrode cannot be told apart and None is returned. ``background`` is the solution's
    grey on the scale of ``levels``.
    """
    h, w = mask.shape
    cy, cx = (float(v) for v in electrode["center_rc"])
    r = float(electrode["radius_px"])
    reach = int(math.ceil(3.0 * r)) + 3
    r0, r1 = max(0, int(cy) - reach), min(h, int(cy) + reach + 1)
    c0, c1 = max(0, int(cx) - reach), min(w, int(cx) + reach + 1)
    inside = mask[r0:r1, c0:c1]
    grey = ndimage.uniform_filter(levels[r0:r1, c0:c1].astype(np.float32), 3)
    yy, xx = np.ogrid[r0:r1, c0:c1]
    d2 = (yy - cy) ** 2 + (xx - cx) ** 2
    core = inside & (d2 <= (0.5 * r) ** 2)
    # The deposit just beyond the disc, away from its blurred edges.
    interior = ndimage.binary_erosion(inside, iterations=1) & (d2 > (1.6 * r) ** 2)
    if np.count_nonzero(core) < 5 or np.count_nonzero(interior) < 20:
        return None
    e = float(np.median(grey[core]))
    deposit = grey[interior]
    d = float(np.median(deposit))
    spread = robust_sigma(deposit)
    if abs(e - d) < max(2.5 * spread, 12.0):
        return None
    # A core further from the background than the branches may be deposit too, thicker than
    # blurred thin branches: it must lie beyond nearly all the deposit's pixels.
    if (e - d) * (d - background) > 0 and (e - np.quantile(deposit, 0.98 if e > d else 0.02)) * (e - d) <= 0:
        return None
    near = inside & (np.abs(grey - e) < np.abs(grey - d)) & (d2 <= (1.5 * r + 2.0) ** 2)
    labels, _ = ndimage.label(near)
    counts = np.bincount(labels[core], minlength=labels.max() + 1)
    counts[0] = 0
    own = ndimage.binary_fill_holes(labels == int(np.argmax(counts)))
    if np.count_nonzero(own) < 20:
        return None
    out = np.zeros_like(mask)
    out[r0:r1, c0:c1] = own & inside
    return out


def wire_paths(mask: np.ndarray, rgb: np.ndarray, fov: Field, seed_rc: tuple[float, float],
               factor: int) -> tuple[np.ndarray, dict[str, Any]]:
    """A lead running from outside the field to the centre electrode, across the deposit.

    Returns a mask of the lead's pixels (full resolution) and a summary.

    Strategy: where the mask meets the field's edge in a narrow arc, a lead may enter; in a
    dish the frame cuts, also where the mask meets the frame in a narrow run inside the dish.
    Its path to the seed is the cheapest route through the mask (on a copy reduced by
    ``factor``). It is a lead when the route is long (a third of the radius at least), smooth
    (a cubic in arc length follows it to within a third of its width, which no branch
    wandering round its side branches does), and the photograph shows it continuing beyond
    the field, on the rim and the bench, along the same line: a deposit stops at the rim.
    Beyond the frame nothing shows, so a route from the frame must instead differ in colour
    from the rest of the mask (:func:`_unlike_the_rest`): a lead of the deposit's own colour
    entering from the frame is kept, as a deposit's straight arm cut by the frame would be.
    The lead's pixels are those of the mask within half its width (and a pixel) of the route.
    """
    from skimage.graph import route_through_array

    empty = np.zeros(mask.shape, dtype=bool), {"leads": 0}
    h, w = mask.shape
    small = block_mean(mask, factor) > 0.25
    sh, sw = small.shape
    fs = fov.reduced(factor)
    rows, cols = np.nonzero(small)
    if rows.size == 0:
        return empty
    rho = fs.rho(rows.astype(np.float64), cols.astype(np.float64))
    edge = rho > 0.92
    n_bins = 360
    ang = np.arctan2(rows[edge] - fs.cy, cols[edge] - fs.cx)
    bins = ((ang + math.pi) / (2 * math.pi) * n_bins).astype(int) % n_bins
    hit = np.zeros(n_bins, dtype=bool)
    hit[bins] = True
    # Narrow arcs of contact: runs of hit bins at most 8 degrees wide.
    starts: list[tuple[tuple[int, int], bool]] = []  # (start, whether it entered across the rim)
    labels, n = ndimage.label(np.concatenate([hit, hit]))
    seen = set()
    for lab in range(1, n + 1):
        idx = np.flatnonzero(labels == lab)
        if idx.size > 8 or idx[0] >= n_bins or (idx[0] % n_bins) in seen:
            continue
        seen.update(int(i) % n_bins for i in idx)
        in_bin = bins == int(float(np.mean(idx)) % n_bins)
        if in_bin.any():
            k = int(np.argmax(np.where(in_bin, rho[edge], -1.0)))
            starts.append(((int(rows[edge][k]), int(cols[edge][k])), True))
    if fov.source == "dish rim":
        # The same narrowness, 8 degrees of the field's circumference, along the frame.
        starts += [(start, False) for start in _frame_entries(small, fs, 8.0 / 360.0 * 2.0 * math.pi * fs.r)]
    if not starts:
        return empty
    # Off the mask costs a thousand steps: a route may bridge a pixel or two where the lead
    # breaks at this resolution (it is thin, or crosses the rim's cut), no more.
    cost = np.where(small, 1.0, 1e3)
    dist_small = distance_to_background(small)
    seed_s = (int(np.clip(round((seed_rc[0] - (factor - 1) / 2.0) / factor), 0, sh - 1)),
              int(np.clip(round((seed_rc[1] - (factor - 1) / 2.0) / factor), 0, sw - 1)))
    if not small[seed_s]:
        # The seed (the field's centre) may fall a pixel or two beside the electrode the lead
        # ends on: route to the mask's nearest pixel, when it is near.
        gap = np.hypot(rows - seed_s[0], cols - seed_s[1])
        nearest = int(np.argmin(gap))
        if gap[nearest] > 0.1 * fs.r:
            return empty
        seed_s = (int(rows[nearest]), int(cols[nearest]))
    out = np.zeros(mask.shape, dtype=bool)
    leads = 0
    for start, across_rim in starts:
        if out[min(start[0] * factor + factor // 2, h - 1), min(start[1] * factor + factor // 2, w - 1)]:
            continue  # an entry on a lead already found
        path, total = route_through_array(cost, start, seed_s, fully_connected=True, geometric=True)
        if total >= 3e3:
            continue  # not joined to the seed through the mask
        path = np.asarray(path, dtype=np.float64)
        widths = 2.0 * dist_small[path[:, 0].astype(int), path[:, 1].astype(int)]
        # A lead ends on the electrode, the last place along the route wider than twice the
        # lead (where it crosses branches earlier it widens too); past the electrode the
        # route to the field's centre runs on through the deposit, which is not lead.
        wide = widths > 2.0 * float(np.median(widths[: max(1, len(widths) // 2)]))
        wide[: len(widths) // 3] = False
        if wide.any():
            last = int(np.flatnonzero(wide)[-1])
            narrow = np.flatnonzero(~wide[:last])
            first = int(narrow[-1]) + 1 if narrow.size else 0  # where that last wide run begins
            path, widths = path[: first + 1], widths[: first + 1]
        length = float(np.sum(np.hypot(*np.diff(path, axis=0).T)))
        if length < 0.33 * fs.r:
            continue
        width = float(np.median(widths))
        s = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(path, axis=0).T))]) / max(length, 1e-9)
        resid = 0.0
        for coord in (path[:, 0], path[:, 1]):
            fit = np.polyval(np.polyfit(s, coord, 3), s)
            resid = max(resid, float(np.sqrt(np.mean((coord - fit) ** 2))))
        if resid > max(0.34 * width, 1.0):
            continue
        if across_rim and not _continues_beyond(rgb, path, factor, fov, width * factor):
            continue
        if not across_rim and not _unlike_the_rest(rgb, mask, path, factor, width * factor):
            continue
        # The lead's pixels: the mask within half its width and a pixel of the route.
        tube = np.zeros((sh, sw), dtype=bool)
        tube[path[:, 0].astype(int), path[:, 1].astype(int)] = True
        near = distance_to_background(~tube) <= 0.5 * width + 1.0
        big = np.repeat(np.repeat(near, factor, axis=0), factor, axis=1)
        pad_h, pad_w = h - big.shape[0], w - big.shape[1]
        big = np.pad(big, ((0, max(0, pad_h)), (0, max(0, pad_w))), mode="edge")[:h, :w]
        out |= big & mask
        leads += 1
    return out, {"leads": leads}


def _frame_entries(small: np.ndarray, fs: Field, longest: float) -> list[tuple[int, int]]:
    """Middles of the runs where the (reduced) mask meets the frame well inside the field,
    each at most ``longest`` pixels long."""
    sh, sw = small.shape
    out = []
    for rr, cc in ((np.zeros(sw, int), np.arange(sw)), (np.full(sw, sh - 1), np.arange(sw)),
                   (np.arange(sh), np.zeros(sh, int)), (np.arange(sh), np.full(sh, sw - 1))):
        on = small[rr, cc] & (fs.rho(rr.astype(np.float64), cc.astype(np.float64)) <= 0.92)
        runs, n = ndimage.label(on)
        for lab in range(1, n + 1):
            idx = np.flatnonzero(runs == lab)
            if idx.size <= longest:
                middle = idx[idx.size // 2]
                out.append((int(rr[middle]), int(cc[middle])))
    return out


def _unlike_the_rest(rgb: np.ndarray, mask: np.ndarray, path: np.ndarray, factor: int, width_px: float) -> bool:
    """Whether the route's pixels differ in colour from the rest of the mask: the medians
    differ by 12 levels and by three robust spreads of the rest in some channel."""
    full = np.rint(path * factor + (factor - 1) / 2.0).astype(np.intp)
    full[:, 0] = np.clip(full[:, 0], 0, mask.shape[0] - 1)
    full[:, 1] = np.clip(full[:, 1], 0, mask.shape[1] - 1)
    on = full[mask[full[:, 0], full[:, 1]]]
    tube = np.zeros(mask.shape, dtype=bool)
    tube[full[:, 0], full[:, 1]] = True
    rest = mask & ~(distance_to_background(~tube) <= 2.0 * width_px + 2.0)
    if on.shape[0] < 8 or np.count_nonzero(rest) < 50:
        return False
    lead = np.median(rgb[on[:, 0], on[:, 1]].astype(np.float64), axis=0)
    others = rgb[rest].astype(np.float64)
    gap = np.abs(lead - np.median(others, axis=0))
    spread = np.array([robust_sigma(others[:, channel]) for channel in range(others.shape[1])])
    return bool(np.any((gap > 12.0) & (gap > 3.0 * spread)))


def _continues_beyond(rgb: np.ndarray, path: np.ndarray, factor: int, fov: Field, width_px: float) -> bool:
    """Whether the photograph shows the route's line going on past the field's edge.

    The line is extended from the route's outer part, straight and, since a lead bends
    under its own weight, along the parabola through that part (either will do); along it,
    beyond the edge (rho 1.04 to 1.25), its colour must differ (by 12 levels in some
    channel) from the colour at the same rho a few widths to either side, on most samples,
    as a lead lying on the rim and the bench does (a red lead on a green rim differs in
    colour, hardly in grey).
    """
    full = path * factor + (factor - 1) / 2.0
    outer = full[: max(4, len(full) // 4)]
    direction = outer[0] - outer[-1]
    norm = float(np.hypot(*direction))
    if norm < 1e-6:
        return False
    direction /= norm
    steps = np.linspace(0.0, 0.3 * fov.r, 40)
    straight = outer[0][None, :] + steps[:, None] * direction[None, :]
    if _shows_line(rgb, straight, np.broadcast_to(direction, straight.shape), fov, width_px):
        return True
    outer = full[: max(8, len(full) // 3)]
    if len(outer) < 8:
        return False
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(outer, axis=0).T))])
    fits = [np.polyfit(arc, outer[:, axis], 2) for axis in (0, 1)]
    points = np.stack([np.polyval(fit, -steps) for fit in fits], axis=1)
    tangents = -np.stack([np.polyval(np.polyder(fit), -steps) for fit in fits], axis=1)
    lengths = np.hypot(tangents[:, 0], tangents[:, 1])
    if np.any(lengths < 1e-6):
        return False
    return _shows_line(rgb, points, tangents / lengths[:, None], fov, width_px)


def _shows_line(rgb: np.ndarray, points: np.ndarray, directions: np.ndarray, fov: Field, width_px: float) -> bool:
    """Whether a line of ``width_px`` lies along ``points`` (heading ``directions``) beyond
    the field: see :func:`_continues_beyond`."""
    h, w = rgb.shape[:2]
    # The extension drifts off a thin lead, so the line is looked for within a few pixels
    # (or a width) either side of it.
    reach = max(3, int(round(width_px)))
    offset = max(3.0 * width_px, 6.0) + reach
    differs = []
    for p, direction in zip(points, directions):
        normal = np.array([-direction[1], direction[0]])
        rho = float(fov.rho(np.array([p[0]]), np.array([p[1]]))[0])
        if not 1.04 <= rho <= 1.25:
            continue
        sides = [p + normal * offset, p - normal * offset]
        if any(not (0 <= q[0] < h and 0 <= q[1] < w) for q in sides):
            continue
        off = [rgb[int(q[0]), int(q[1])].astype(np.float32) for q in sides]
        best = 0.0
        for t in range(-reach, reach + 1):
            q = p + normal * t
            if 0 <= q[0] < h and 0 <= q[1] < w:
                on = rgb[int(q[0]), int(q[1])].astype(np.float32)
                best = max(best, min(float(np.abs(on - off[0]).max()), float(np.abs(on - off[1]).max())))
        differs.append(best > 12.0)
    return len(differs) >= 4 and float(np.mean(differs)) >= 0.6
