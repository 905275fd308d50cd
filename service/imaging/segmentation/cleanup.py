"""Cleanup in units of the specimen: specks, pinholes and the components kept, all scaled
by the measured branch width, so a pattern drawn with 1 px strokes keeps its holes and tips."""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import ndimage

from service.distance import distance_to_background
from service.imaging.segmentation._common import EIGHT


def branch_width_px(mask: np.ndarray) -> float:
    """Typical branch width: twice the median distance-to-background on the ridge of the mask,
    less one (a 1 px stroke is 1 px wide, a 3 px one 3 px).

    The ridge is where the Euclidean distance transform is a local maximum; its median is
    blind to the few wide blobs (an electrode) and to the many edge pixels. Large masks are
    measured in tiles with a margin, so memory stays that of one tile.
    """
    if not mask.any():
        return 1.0
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    crop = mask[rows[0]: rows[-1] + 1, cols[0]: cols[-1] + 1]
    tile, margin = 1024, 64
    values = []
    for r0 in range(0, crop.shape[0], tile):
        for c0 in range(0, crop.shape[1], tile):
            a0, b0 = max(0, r0 - margin), max(0, c0 - margin)
            piece = crop[a0: r0 + tile + margin, b0: c0 + tile + margin]
            if not piece.any():
                continue
            # Distances with the edge continued (as a 3 x 3 maximum filter reads past the edge),
            # compared with their 8 neighbours at the core's mask pixels only.
            dist = np.pad(distance_to_background(np.pad(piece, 1))[1:-1, 1:-1].astype(np.float32), 1, mode="edge")
            core = np.zeros(dist.shape, dtype=bool)
            core[1 + r0 - a0: 1 + r0 - a0 + tile, 1 + c0 - b0: 1 + c0 - b0 + tile] = True
            core[1:-1, 1:-1] &= piece
            core[0], core[-1], core[:, 0], core[:, -1] = False, False, False, False
            flat = dist.ravel()
            px = np.flatnonzero(core)
            here = flat[px]
            ridge = np.ones(px.size, dtype=bool)
            stride = dist.shape[1]
            for offset in (-stride - 1, -stride, -stride + 1, -1, 1, stride - 1, stride, stride + 1):
                ridge &= here >= flat[px + offset]
            values.append(here[ridge])
    found = np.concatenate(values) if values else np.zeros(0, dtype=np.float32)
    return float(max(1.0, 2.0 * float(np.median(found)) - 1.0)) if found.size else 1.0


#: Other objects at least a quarter of the specimen's area left out of the mask from which a
#: photograph is taken to show several separate objects, not one aggregate grown from a seed
#: (coins on a table, beads, a field of cells). On 300 randomized bench photographs at most one
#: such piece is left out (a lead, a label); coins on a table leave out a dozen or more.
SEVERAL_OBJECTS = 3


def cleanup_sizes(width_px: float) -> tuple[int, int]:
    """Smallest component kept and largest hole filled, in px, for branches ``width_px`` wide.

    A speck is anything under three branch-width squares (four pixels at the least); a pinhole
    is a hole under half a branch-width square, and none is filled below 2.5 px widths, where
    a one-pixel hole is as likely structure as noise.
    """
    min_object = max(4, int(round(3.0 * width_px * width_px)))
    max_hole = int(0.5 * width_px * width_px) if width_px >= 2.5 else 0
    return min_object, max_hole


def keep_specimen(mask: np.ndarray, seed_rc: tuple[float, float], width_px: float,
                  keep_all: bool, clear_background: np.ndarray | None = None) -> tuple[np.ndarray, dict[str, Any]]:
    """Remove specks and pinholes; keep the component at or nearest the seed and sizeable others nearby.

    ``clear_background`` marks pixels that lie well on the background's side of the threshold:
    a small hole holding one is a real gap of the pattern (a carpet's smallest hole), not a
    pinhole of noise, and stays open.
    """
    h, w = mask.shape
    min_object_px, max_hole_px = cleanup_sizes(width_px)
    labels, n = ndimage.label(mask, structure=EIGHT)
    info: dict[str, Any] = {"min_object_px": min_object_px, "holes_filled_up_to_px": max_hole_px,
                            "components_found": int(n)}
    if n == 0:
        info["components_kept"] = info["left_out_comparable"] = 0
        return mask, info
    # Counted over the mask's own pixels: the background is most of a photograph.
    flat = labels.ravel()
    idx = np.flatnonzero(flat)
    lab = flat[idx]
    sizes = np.bincount(lab, minlength=n + 1)
    big = sizes >= min_object_px
    if not big.any():
        info["components_kept"] = info["left_out_comparable"] = 0
        return np.zeros_like(mask), info
    if keep_all:
        keep = big
    else:
        rows_sum = np.bincount(lab, weights=idx // w, minlength=n + 1)
        cols_sum = np.bincount(lab, weights=idx % w, minlength=n + 1)
        with np.errstate(invalid="ignore", divide="ignore"):
            cy, cx = rows_sum / sizes, cols_sum / sizes
        dist = np.hypot(cy - seed_rc[0], cx - seed_rc[1])
        r_seed, c_seed = int(round(seed_rc[0])), int(round(seed_rc[1]))
        at_seed = labels[r_seed, c_seed] if 0 <= r_seed < h and 0 <= c_seed < w else 0
        if at_seed and big[at_seed]:
            main = [int(at_seed)]
        else:
            # Nearest sizeable component, favouring large ones: size / (1 + distance / side)^2.
            score = np.where(big, sizes / (1.0 + dist / (0.1 * max(h, w))) ** 2, -1.0)
            main = [int(np.argmax(score))]
        largest = int(np.argmax(sizes))
        if sizes[largest] > 5 * sizes[main[0]]:
            main.append(largest)  # the seed sat on a small blob (an electrode standing free)
        sizeable = big & (sizes >= max(min_object_px, 0.002 * sizes[largest]))
        keep = sizeable & _linked(labels, idx, lab, n, main, width_px)
        # An arm the threshold broke off is as thin as the deposit's branches; a piece nearby
        # several times wider than them and than the main piece's strokes is something else
        # (a shadow along the wall, a bubble).
        keep[main] = False
        if keep.any():
            strokes = _stroke_widths(labels, sizes)
            keep &= strokes <= WIDE_PIECE * max(width_px, float(strokes[main].max()))
        keep[main] = True
    keep[0] = False
    # Sizeable pieces left out that are at least a quarter of what is kept (SEVERAL_OBJECTS).
    left_out = sizes[big & ~keep]
    info["left_out_comparable"] = int(np.count_nonzero(left_out >= 0.25 * sizes[keep].sum()))
    kept = np.zeros(mask.shape, dtype=bool)
    kept.ravel()[idx[keep[lab]]] = True
    del labels
    if max_hole_px > 0:
        kept = fill_small_holes(kept, max_hole_px, clear_background)
    info["components_kept"] = int(np.count_nonzero(keep))
    return kept, info


#: A piece apart from the deposit this many branch widths wide or more is not a broken-off arm.
WIDE_PIECE = 3.0


def _stroke_widths(labels: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Each component's stroke width, twice its area over its outline length, the outline
    counted as pixel edges along rows and columns (4 / pi times its length, Cauchy-Crofton)."""
    edges = np.zeros(sizes.size, dtype=np.int64)
    for a, b in ((labels[:, 1:], labels[:, :-1]), (labels[1:], labels[:-1])):
        differ = a != b
        edges += np.bincount(a[differ], minlength=sizes.size) + np.bincount(b[differ], minlength=sizes.size)
    for line in (labels[0], labels[-1], labels[:, 0], labels[:, -1]):  # the frame's edge is outline too
        edges += np.bincount(line, minlength=sizes.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        return 8.0 * sizes / (np.pi * edges)


def _linked(labels: np.ndarray, idx: np.ndarray, lab: np.ndarray, n: int, main: list[int],
            width_px: float) -> np.ndarray:
    """Components joined to ``main`` through gaps of at most eight branch widths.

    A thin link that the threshold broke leaves an arm apart from the deposit; a chain of
    such gaps still makes one aggregate. Strategy: on a copy reduced so the gap is a few
    pixels, dilate the mask by half the gap, label the result, and keep every component
    whose pixels fall in the dilated piece that holds the main components.
    """
    h, w = labels.shape
    gap = 8.0 * max(width_px, 1.0)
    factor = max(1, int(gap // 6))
    sh, sw = -(-h // factor), -(-w // factor)
    small = np.zeros((sh, sw), dtype=bool)
    small[(idx // w) // factor, (idx % w) // factor] = True
    grown = ndimage.binary_dilation(small, iterations=max(1, int(round(0.5 * gap / factor))))
    pieces, _ = ndimage.label(grown, structure=EIGHT)
    piece_of = pieces[(idx // w) // factor, (idx % w) // factor]
    main_pieces = np.unique(piece_of[np.isin(lab, main)])
    linked = np.zeros(n + 1, dtype=bool)
    linked[np.unique(lab[np.isin(piece_of, main_pieces)])] = True
    return linked


def fill_small_holes(mask: np.ndarray, max_hole_px: int, clear_background: np.ndarray | None = None) -> np.ndarray:
    """Fill holes of at most ``max_hole_px`` pixels (in place, and returned), except those
    holding a pixel of ``clear_background``."""
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    if rows.size == 0:
        return mask
    r0, r1, c0, c1 = rows[0], rows[-1] + 1, cols[0], cols[-1] + 1
    crop = mask[r0:r1, c0:c1]
    holes, n = ndimage.label(~crop)  # 4-connected background, the dual of 8-connected foreground
    if n == 0:
        return mask
    sizes = np.bincount(holes.ravel())
    border = np.unique(np.concatenate([holes[0], holes[-1], holes[:, 0], holes[:, -1]]))
    fill = sizes <= max_hole_px
    fill[0] = False
    fill[border] = False
    if clear_background is not None and fill.any():
        fill[holes[clear_background[r0:r1, c0:c1]]] = False  # label 0, the mask, is never filled anyway
    if fill.any():
        crop |= fill[holes]
    return mask
