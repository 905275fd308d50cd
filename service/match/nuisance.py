"""What a camera adds to a growth pattern: the drawing-style nuisance the references are marginalised over.

A photograph of a deposit shows its branches some number of lattice sites wide (a branch
of a real deposit is as wide as the physics and the optics make it: 0.7 to 3 sites, where a
renderer or a thick deposit draws each site as a disc wider than the lattice spacing and
neighbouring branches merge), softened by the optics, cut at some grey level by the segmentation and
compressed as JPEG. None of this is growth. Every reference cluster is therefore drawn in
several styles (:data:`NUISANCE_GRID`), each drawing goes through the specimen path
(normalisation, features), and the spread the styles cause enters each family's statistics
beside the spread between realisations: a feature that moves with the drawing weighs little.

The grid is explicit and seeded: the thickness levels are the same for every cluster (so the
whole range is covered by every ensemble), and the other settings are drawn for each
(cluster, style) from a seed derived from the cluster's own bytes, so the same cluster always
gets the same drawings.
"""

from __future__ import annotations

import io
import zlib
from dataclasses import asdict, dataclass

import numpy as np
from PIL import Image
from scipy import ndimage

#: Branch widths, in lattice sites, each cluster is drawn at (one drawing per level).
THICKNESS_SITES: tuple[float, ...] = (0.7, 1.0, 1.4, 2.0, 3.0)
#: The first this many levels are drawn in rotation (``STYLES_BY_SIZE``); the widest level
#: after them is drawn for every cluster. At three sites neighbouring branches merge and the
#: smallest gaps close, so that drawing is where families come closest (a ballistic cluster
#: drawn three sites wide measures like a compact DBM one): every cluster's must count, and
#: the drawings of the rotated levels stay as they were.
ROTATED_LEVELS = 4
#: How many of the rotated thickness levels each cluster is drawn at, by its number of sites:
#: every level for small clusters, fewer for large ones, whose drawings cost the most (each
#: ensemble of 16 still covers every level, and its spread holds both kinds of variation).
STYLES_BY_SIZE: tuple[tuple[int, int], ...] = ((3000, 4), (10000, 2), (10**9, 1))
#: Pixels per lattice site of a drawing: a stroke about a one-pixel centreline is an odd
#: number of pixels wide, so each drawing takes one of the odd widths (3 to 11 px) whose
#: pixels per site for the style's thickness fall in this range.
PX_PER_SITE = (3.0, 5.0)
ODD_WIDTHS_PX = (3, 5, 7, 9, 11)
#: Gaussian blur of the optics, sigma in pixels (uniform).
BLUR_PX = (0.4, 1.0)
#: Grey level, between background (0) and deposit (1), at which the blurred drawing is cut.
THRESHOLD_LEVEL = (0.38, 0.62)
#: JPEG qualities a drawing is compressed at (None: not compressed), chosen uniformly.
JPEG_QUALITIES: tuple[int | None, ...] = (None, 90, 75, 55)
#: Share of drawings with a centre electrode disc; its radius in sites is log-uniform in this range.
ELECTRODE_SHARE = 0.6
ELECTRODE_SITES = (1.0, 8.0)
#: Grey levels of the background and the deposit in the compressed picture, and the sensor
#: noise added before compression (standard deviation, grey levels).
BACKGROUND_GREY, DEPOSIT_GREY, NOISE_GREY = 60.0, 190.0, 3.0


@dataclass(frozen=True)
class DrawingStyle:
    """How one reference drawing was made (recorded per row of the feature cache)."""

    thickness_sites: float
    px_per_site: float
    blur_px: float
    threshold_level: float
    jpeg_quality: int  # 0: not compressed
    electrode_sites: float  # 0: no electrode

    def to_dict(self) -> dict:
        return asdict(self)


def nuisance_grid() -> dict:
    """The grid as data (written beside the feature cache, and into reports)."""
    return {
        "thickness_sites": list(THICKNESS_SITES),
        "styles_by_size": [list(pair) for pair in STYLES_BY_SIZE],
        "px_per_site": list(PX_PER_SITE),
        "odd_widths_px": list(ODD_WIDTHS_PX),
        "blur_px": list(BLUR_PX),
        "threshold_level": list(THRESHOLD_LEVEL),
        "jpeg_qualities": [q or 0 for q in JPEG_QUALITIES],
        "electrode_share": ELECTRODE_SHARE,
        "electrode_sites": list(ELECTRODE_SITES),
        "grey_levels": [BACKGROUND_GREY, DEPOSIT_GREY, NOISE_GREY],
        "rotated_levels": ROTATED_LEVELS,
        "rule": (
            "every cluster is drawn at styles_by_size(sites) of the first rotated_levels thickness levels, "
            "evenly spaced from level seed mod rotated_levels, and at every level after them, each with a "
            "stroke of one of the odd pixel widths "
            "whose pixels per site fall in px_per_site; the other settings are uniform in their ranges, drawn from numpy default_rng(CRC-32 of the cluster's int32 arrival-order bytes "
            "XOR the feature schema, style index)"
        ),
    }


def _rotated(n_sites: int) -> int:
    return next(count for limit, count in STYLES_BY_SIZE if n_sites <= limit)


def n_styles(n_sites: int) -> int:
    """How many drawings a cluster of ``n_sites`` gets (``STYLES_BY_SIZE`` of the rotated
    levels, and every level after them)."""
    return _rotated(n_sites) + len(THICKNESS_SITES) - ROTATED_LEVELS


def style_indices(cluster_seed: int, n_sites: int) -> tuple[int, ...]:
    """Which thickness levels a cluster is drawn at: ``STYLES_BY_SIZE`` of the rotated ones,
    evenly spaced through them from one picked by the seed (a thin one with a thick one,
    say), and every level after them."""
    count = _rotated(n_sites)
    start = cluster_seed % ROTATED_LEVELS
    step = ROTATED_LEVELS // count
    rotated = sorted((start + step * i) % ROTATED_LEVELS for i in range(count))
    return (*rotated, *range(ROTATED_LEVELS, len(THICKNESS_SITES)))


def drawing_styles(cluster_seed: int) -> tuple[DrawingStyle, ...]:
    """Every style a cluster may be drawn in (one per thickness level), from its seed."""
    styles = []
    for index, thickness in enumerate(THICKNESS_SITES):
        rng = np.random.default_rng([cluster_seed, index])
        fitting = [w for w in ODD_WIDTHS_PX if PX_PER_SITE[0] <= w / thickness <= PX_PER_SITE[1]]
        px = float(fitting[int(rng.integers(len(fitting)))] / thickness)
        blur = float(rng.uniform(*BLUR_PX))
        level = float(rng.uniform(*THRESHOLD_LEVEL))
        quality = JPEG_QUALITIES[int(rng.integers(len(JPEG_QUALITIES)))]
        electrode = (
            float(np.exp(rng.uniform(np.log(ELECTRODE_SITES[0]), np.log(ELECTRODE_SITES[1]))))
            if rng.random() < ELECTRODE_SHARE else 0.0
        )
        styles.append(DrawingStyle(thickness, px, blur, level, quality or 0, electrode))
    return tuple(styles)


def cluster_seed(arrival_order: np.ndarray, schema: int) -> int:
    """Seed of a cluster's drawings: CRC-32 of its int32 arrival-order bytes XOR ``schema``."""
    return zlib.crc32(np.ascontiguousarray(arrival_order, dtype=np.int32).tobytes()) ^ schema


def _bond_centrelines(occupied: np.ndarray, px: float, pad: int) -> np.ndarray:
    """The cluster's bonds as one-pixel centrelines, with fully occupied plaquettes filled.

    Strategy: site ``(i, j)`` sits at pixel ``pad + (i + 0.5) px``; every pair of occupied
    side neighbours is joined by a straight run of pixels, a diagonal pair by a diagonal run
    unless a shared side neighbour already joins them; a 2 x 2 block of occupied sites is
    filled between its four centres, so compact regions stay solid at any thickness.
    """
    h, w = occupied.shape
    size_h, size_w = int(np.ceil(h * px)) + 2 * pad, int(np.ceil(w * px)) + 2 * pad
    canvas = np.zeros((size_h, size_w), dtype=bool)
    steps = np.linspace(0.0, 1.0, int(np.ceil(px * 1.5)) + 2)

    def centre(index):
        return pad + (index + 0.5) * px

    def draw(rows, cols, d_row, d_col):
        if rows.size == 0:
            return
        rr = np.rint(centre(rows[:, None]) + d_row * px * steps[None, :]).astype(np.intp)
        cc = np.rint(centre(cols[:, None]) + d_col * px * steps[None, :]).astype(np.intp)
        canvas[rr.ravel(), cc.ravel()] = True

    rows, cols = np.nonzero(occupied)
    canvas[np.rint(centre(rows)).astype(np.intp), np.rint(centre(cols)).astype(np.intp)] = True
    right = occupied[:, :-1] & occupied[:, 1:]
    down = occupied[:-1, :] & occupied[1:, :]
    draw(*np.nonzero(right), 0, 1)
    draw(*np.nonzero(down), 1, 0)
    diagonal = occupied[:-1, :-1] & occupied[1:, 1:] & ~(occupied[:-1, 1:] | occupied[1:, :-1])
    anti = occupied[:-1, 1:] & occupied[1:, :-1] & ~(occupied[:-1, :-1] | occupied[1:, 1:])
    draw(*np.nonzero(diagonal), 1, 1)
    r, c = np.nonzero(anti)
    draw(r, c + 1, 1, -1)
    block = occupied[:-1, :-1] & occupied[1:, 1:] & occupied[:-1, 1:] & occupied[1:, :-1]
    if block.any():
        # Fill the square between the four centres: mark its pixels on a site-resolution
        # map shifted by half a site and read it back at pixel resolution.
        row_site = (np.arange(size_h) - pad) / px - 0.5
        col_site = (np.arange(size_w) - pad) / px - 0.5
        ri = np.floor(row_site).astype(np.intp)
        ci = np.floor(col_site).astype(np.intp)
        r_ok = (ri >= 0) & (ri < h - 1)
        c_ok = (ci >= 0) & (ci < w - 1)
        filled = np.zeros_like(canvas)
        filled[np.ix_(r_ok, c_ok)] = block[np.ix_(ri[r_ok], ci[c_ok])]
        canvas |= filled
    return canvas


def _dilate_disc(mask: np.ndarray, radius_px: float) -> np.ndarray:
    """Dilation by the digital disc ``{(i, j): i^2 + j^2 <= r^2}``.

    Strategy: that disc is the union, over rows ``a = 0..floor(r)``, of the rectangles of
    half-sides ``a`` and ``floor(sqrt(r^2 - a^2))``; a rectangle dilation is two running
    maxima (one per axis), so the whole costs a few passes over the picture instead of a
    distance transform.
    """
    image = mask.astype(np.uint8)
    out = np.zeros_like(image)
    for a in range(int(np.floor(radius_px)) + 1):
        b = int(np.floor(np.sqrt(max(radius_px**2 - a * a, 0.0))))
        rect = ndimage.maximum_filter1d(image, 2 * a + 1, axis=0, mode="constant")
        rect = ndimage.maximum_filter1d(rect, 2 * b + 1, axis=1, mode="constant")
        np.maximum(out, rect, out=out)
    return out.astype(bool)


def _decode_own_jpeg(data: bytes, shape: tuple[int, int]) -> np.ndarray:
    """A JPEG this module has just written, decoded as float32. A drawing of a 100,000-site
    cluster can exceed Pillow's guard against decompression bombs (about 179 million
    pixels), which exists for files from outside; the guard is lifted for this decoding
    only when the picture is larger, which happens only in library builds."""
    limit = Image.MAX_IMAGE_PIXELS
    if limit is not None and shape[0] * shape[1] > limit:
        Image.MAX_IMAGE_PIXELS = None
    try:
        return np.asarray(Image.open(io.BytesIO(data)), dtype=np.float32)
    finally:
        Image.MAX_IMAGE_PIXELS = limit


def draw_cluster(lattice: np.ndarray, style: DrawingStyle) -> np.ndarray:
    """A lattice cluster as a segmented photograph drawn in ``style`` would show it.

    Branches become strokes ``thickness_sites`` sites wide about the bonds between occupied
    sites (:func:`_bond_centrelines`), a centre electrode disc is added at the seed when the
    style has one, the drawing is blurred, optionally compressed as JPEG (grey deposit on a
    grey background with a little sensor noise) and cut at ``threshold_level``.

    Parameters
    ----------
    lattice : (h, w) array
        Non-zero sites are occupied; the seed is at ``(h // 2, w // 2)``.
    style : DrawingStyle

    Returns
    -------
    (H, W) bool ndarray
    """
    occupied = np.asarray(lattice) != 0
    px = style.px_per_site
    width_px = style.thickness_sites * px
    pad = int(np.ceil(width_px + 4 * style.blur_px + style.electrode_sites * px)) + 3
    centrelines = _bond_centrelines(occupied, px, pad)
    # A digital disc of integer radius R widens a one-pixel line to 2R + 1 pixels.
    drawn = _dilate_disc(centrelines, max(round(0.5 * (width_px - 1.0)), 0)).astype(np.float32)
    if style.electrode_sites > 0:
        h, w = occupied.shape
        cy, cx = pad + (h // 2 + 0.5) * px, pad + (w // 2 + 0.5) * px
        yy, xx = np.ogrid[: drawn.shape[0], : drawn.shape[1]]
        drawn[(yy - cy) ** 2 + (xx - cx) ** 2 <= (style.electrode_sites * px) ** 2] = 1.0
    soft = ndimage.gaussian_filter(drawn, style.blur_px)
    if style.jpeg_quality:
        rng = np.random.default_rng(int(style.jpeg_quality * 1000 + round(style.blur_px * 1000)))
        grey = BACKGROUND_GREY + (DEPOSIT_GREY - BACKGROUND_GREY) * soft
        grey += rng.normal(0.0, NOISE_GREY, size=grey.shape)
        buffer = io.BytesIO()
        Image.fromarray(np.clip(np.rint(grey), 0, 255).astype(np.uint8)).save(
            buffer, format="JPEG", quality=int(style.jpeg_quality)
        )
        decoded = _decode_own_jpeg(buffer.getvalue(), grey.shape)
        soft = (decoded - BACKGROUND_GREY) / (DEPOSIT_GREY - BACKGROUND_GREY)
    cut = soft >= style.threshold_level
    # A segmentation keeps the deposit, not compression specks: keep the largest piece and
    # pieces of at least a site's area.
    labels, n = ndimage.label(cut, structure=np.ones((3, 3)))
    if n > 1:
        sizes = np.bincount(labels.ravel())
        sizes[0] = 0
        keep = sizes >= max(px * px, 1.0)
        keep[int(sizes.argmax())] = True
        keep[0] = False
        cut = keep[labels]
    return cut
