"""The field of view: where in the photograph a specimen can be.

Three kinds are recognised, tried in this order:

- a bright field on a dark surround (fundus cameras, microscopes);
- a dish: the region that the bench around the frame does not reach, bounded by a strong,
  closed, elliptical edge (a dish seen at a slant is an ellipse), whatever the bench, the
  solution and the rim look like;
- a dish whose wall's edge drowns in the bench's texture (brushed metal, wood grain): the same
  search on a median-filtered copy, then the region of colours the bench does not have;
- a dish rim found by a circular Hough transform (a rim on a bench of the solution's own colour).

When none fits, the whole image is the field. A region of interest given by the user
replaces all of them.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from service.imaging.segmentation._common import Field, block_mean, robust_sigma

# Long side of the copy used to find a dish.
_DISH_SIDE_PX = 256
# Long side of the copy used for the Hough search of the dish rim.
_HOUGH_SIDE_PX = 192


def parse_roi(roi, shape: tuple[int, int]) -> Field:
    """A user's region of interest, ``(cx, cy, r)`` or ``(cx, cy, rx, ry, angle_deg)`` in px."""
    h, w = shape
    try:
        values = [float(v) for v in roi]
    except (TypeError, ValueError):
        raise ValueError(f"roi must be 3 numbers (cx, cy, r) or 5 (cx, cy, rx, ry, angle_deg), got {roi!r}") from None
    if len(values) == 3:
        cx, cy, r = values
        rx, ry, angle = r, r, 0.0
    elif len(values) == 5:
        cx, cy, rx, ry, angle = values
    else:
        raise ValueError(f"roi must be 3 numbers (cx, cy, r) or 5 (cx, cy, rx, ry, angle_deg), got {len(values)}")
    if not all(math.isfinite(v) for v in values):
        raise ValueError(f"roi must hold finite numbers, got {roi!r}")
    if not (rx > 0 and ry > 0):
        raise ValueError(f"roi radii must be positive, got {rx:g} and {ry:g}")
    reach = max(rx, ry)
    if cx + reach < 0 or cy + reach < 0 or cx - reach >= w or cy - reach >= h:
        raise ValueError(f"roi {tuple(values)} lies outside the {w} x {h} px image")
    return Field(cy, cx, rx, ry, math.radians(angle), "roi")


def find_field(small: np.ndarray, small_rgb: np.ndarray, factor: int) -> tuple[Field | None, str]:
    """Field of view in full-resolution px from the reduced grey and RGB copies."""
    surround = _dark_surround_field(small, factor)
    dish = _dish_field(small, small_rgb, factor)
    if dish is None:
        dish = _dish_field(small, small_rgb, factor, despeckle=True)
    if dish is None:
        dish = _off_bench_field(small, small_rgb, factor)
    if surround is not None:
        # A bright field on a dark surround: a fundus camera's, or a dish on a dark bench. The
        # dish finder's ellipse follows a field seen at a slant better than an equal-area circle.
        if dish is not None:
            surround = Field(dish.cy, dish.cx, dish.a, dish.b, dish.theta, "dark surround")
        return surround, "dark surround"
    if dish is not None:
        return dish, "dish rim"
    found = _hough_rim_field(small, factor)
    if found is not None:
        return found, "dish rim"
    return None, "whole image"


def holds_structure(small: np.ndarray, inside: np.ndarray) -> bool:
    """Whether the region holds local detail beyond noise (a field with a specimen in it).

    A filled disc photographed alone would otherwise pass for a dish or a field of view:
    its inside is flat, while a field holding a specimen has edges well above the noise.
    """
    if np.count_nonzero(inside) < 64:
        return False
    detail = small - ndimage.gaussian_filter(small, 2.0)
    values = detail[inside]
    centre = float(np.median(values))
    # Reduced copies are nearly noiseless, so detail must also clear 2% of full scale.
    limit = max(6.0 * robust_sigma(values), 0.02)
    return float(np.mean(np.abs(values - centre) > limit)) >= 0.002


def _to_full(cy: float, cx: float, scale: int) -> tuple[float, float]:
    return cy * scale + (scale - 1) / 2.0, cx * scale + (scale - 1) / 2.0


def _dark_surround_field(small: np.ndarray, factor: int) -> Field | None:
    # Fundus cameras and microscopes image a bright disc on black: all four corners dark,
    # the centre much brighter. The field is the bright component, as an equal-area circle.
    h, w = small.shape
    k = max(2, min(h, w) // 16)
    corners = [small[:k, :k], small[:k, -k:], small[-k:, :k], small[-k:, -k:]]
    corner_level = max(float(np.median(c)) for c in corners)
    centre_level = float(np.median(small[h // 4: 3 * h // 4, w // 4: 3 * w // 4]))
    if not (corner_level < 0.12 and centre_level > 2.5 * corner_level + 0.08):
        return None
    bright = small > corner_level + 0.25 * (centre_level - corner_level)
    labels, n = ndimage.label(bright)
    if n == 0:
        return None
    sizes = np.bincount(labels.ravel())[1:]
    main = labels == (int(np.argmax(sizes)) + 1)
    main = ndimage.binary_fill_holes(main)
    area = float(np.count_nonzero(main))
    if area < 0.2 * h * w:
        return None
    if not holds_structure(small, ndimage.binary_erosion(main, iterations=8)):
        return None
    rows, cols = np.nonzero(main)
    # Shrink by two reduced pixels so the dark edge and its halo stay outside.
    r_full = (math.sqrt(area / math.pi) - 2.0) * factor
    cy, cx = _to_full(float(rows.mean()), float(cols.mean()), factor)
    return Field(cy, cx, r_full, r_full, 0.0, "dark surround")


def _colour_gradient(img: np.ndarray) -> np.ndarray:
    """Gradient magnitude summed over the colour channels of a smoothed (H, W, 3) picture."""
    total = np.zeros(img.shape[:2], dtype=np.float32)
    for ch in range(img.shape[2]):
        smooth = ndimage.gaussian_filter(img[:, :, ch], 1.0)
        total += np.hypot(ndimage.sobel(smooth, axis=0), ndimage.sobel(smooth, axis=1))
    return total


def _despeckled(img: np.ndarray) -> np.ndarray:
    """Each channel median-filtered over 5 x 5 px: the streaks of brushed metal or wood grain
    (a pixel or two wide at this size) go, a dish wall's edge stays where it was."""
    return np.stack([ndimage.median_filter(img[:, :, ch], 5) for ch in range(img.shape[2])], axis=-1)


def _frame_band(th: int, tw: int) -> np.ndarray:
    k = max(2, round(0.03 * min(th, tw)))
    band = np.zeros((th, tw), dtype=bool)
    band[:k], band[-k:], band[:, :k], band[:, -k:] = True, True, True, True
    return band


def _dish_field(small: np.ndarray, small_rgb: np.ndarray, factor: int, despeckle: bool = False) -> Field | None:
    """The dish as the ellipse that bounds what the bench does not reach.

    Strategy: the bench is what fills the frame's outer band (its most common colour there; a
    label, a scale bar, a wire or a dish cut by the frame differ from it and are left out).
    A watershed of the colour gradient, flooded from that bench and from the image centre,
    stops at the strongest closed edge between them: the dish wall. The region's outline,
    less the stretches on the frame, is fitted with an ellipse by RANSAC (a wire or a
    reflection leaves outliers); the dish is accepted when most of the outline lies on the
    ellipse, the edge there is far stronger than the bench's texture, and the inside holds
    a specimen. With ``despeckle`` the colours are median-filtered first (see ``_despeckled``).
    """
    f2 = max(1, math.ceil(max(small.shape) / _DISH_SIDE_PX))
    img = block_mean(small_rgb, f2)
    grey = block_mean(small, f2)
    th, tw = grey.shape
    if min(th, tw) < 32:
        return None
    if despeckle:
        img = _despeckled(img)
    grad = _colour_gradient(img)
    band = _frame_band(th, tw)
    bench_colour = np.median(img[band], axis=0)
    dist = np.sqrt(((img - bench_colour) ** 2).sum(axis=2))
    spread = robust_sigma(dist[band])
    bench = band & (dist < max(3.0 * spread, 0.05))
    if np.count_nonzero(bench) < 0.5 * np.count_nonzero(band):
        return None  # no bench fills the frame's edge: the specimen or the field reaches it
    yy, xx = np.ogrid[:th, :tw]
    rows_f, cols_f = np.broadcast_arrays(yy.astype(np.float64), xx.astype(np.float64))
    centre = (yy - (th - 1) / 2.0) ** 2 + (xx - (tw - 1) / 2.0) ** 2 <= (0.03 * min(th, tw)) ** 2
    if np.any(bench & centre):
        return None
    bench_like = dist < max(3.0 * spread, 0.05)
    detail = grey - ndimage.gaussian_filter(grey, 2.0)
    noise = robust_sigma(detail[bench])
    texture = float(np.percentile(grad[bench], 90)) + 1e-6
    inner = centre
    # A compact specimen, or the solution inside a lighter ring, can close a strong edge of
    # its own; the dish is the closed edge with the bench just beyond it, so step outwards
    # past each edge that fails that, a few times at most.
    for _ in range(4):
        ell, inliers_pts, region = _closed_ellipse(grad, bench, inner, th, tw)
        if region is None:
            return None
        if ell is None:
            # Not a dish's outline (a rough compact deposit, say): look beyond it.
            inner = ndimage.binary_dilation(region, iterations=max(2, int(0.05 * math.sqrt(region.sum()))))
            continue
        edge = float(np.median(grad[np.clip(np.rint(inliers_pts[:, 1]).astype(int), 0, th - 1),
                                    np.clip(np.rint(inliers_pts[:, 0]).astype(int), 0, tw - 1)]))
        rho = ell.rho(rows_f, cols_f)
        if edge >= 3.0 * texture and _bench_beyond(ell, rho, bench_like):
            break
        inner = rho <= 1.1
    else:
        return None
    # A specimen inside: detail far above the bench's own noise (a flat disc photographed
    # alone has none; a dense deposit has so much that the inside's own spread is no yardstick).
    if float(np.mean(np.abs(detail[rho <= 0.9]) > max(6.0 * noise, 0.02))) < 0.002:
        return None
    return _dish_at_full(ell, f2 * factor)


def _dish_at_full(ell: Field, scale: int) -> Field:
    """A dish ellipse found on a copy reduced ``scale`` times, in full-resolution px, stepped in
    by about a reduced pixel (the outline found sits on the wall's edge)."""
    cy, cx = _to_full(ell.cy, ell.cx, scale)
    margin = 1.5 * scale
    return Field(cy, cx, ell.a * scale - margin, ell.b * scale - margin, ell.theta, "dish rim")


def _bench_beyond(ell: Field, rho: np.ndarray, bench: np.ndarray) -> bool:
    """Whether the bench fills most of the ring just beyond the ellipse (rho 1.12 to 1.3), or too
    little of that ring lies in the picture to tell."""
    beyond = (rho >= 1.12) & (rho <= 1.3)
    return (np.count_nonzero(beyond) < 0.1 * math.pi * (1.3 ** 2 - 1.12 ** 2) * ell.a * ell.b
            or float(bench[beyond].mean()) >= 0.5)


def _outline_ellipse(region: np.ndarray) -> tuple[Field | None, np.ndarray | None]:
    """The ellipse of a region's outline (its stretches on the frame left out) and the outline
    points (x, y) on it, when 70% of the outline lies within 1.5 px (or 3% of the region's
    size) of it and it has a dish's shape: a tenth of the picture across at least, its short
    axis half its long one or more. (None, None) otherwise."""
    from skimage.measure import find_contours

    th, tw = region.shape
    contours = find_contours(np.pad(region, 1).astype(np.float32), 0.5)
    if not contours:
        return None, None
    outline = max(contours, key=len) - 1.0  # (row, col), back to unpadded coordinates
    on_frame = (outline[:, 0] <= 1.0) | (outline[:, 1] <= 1.0) | (outline[:, 0] >= th - 2.0) | (outline[:, 1] >= tw - 2.0)
    pts = outline[~on_frame][:, ::-1]  # (x, y)
    if len(pts) < 40:
        return None, None
    pts = pts[:: max(1, len(pts) // 400)]
    size = math.sqrt(np.count_nonzero(region) / math.pi)
    # An outline wanders a pixel either side of the wall's edge, and a lead or a wall
    # highlight pulls parts of it away.
    fitted = fit_ellipse_robust(pts, tolerance_px=max(1.5, 0.03 * size))
    if fitted is None or float(fitted[1].mean()) < 0.7:
        return None, None
    (xc, yc, a, b, theta), inliers = fitted
    if min(a, b) <= 0.1 * min(th, tw) or min(a, b) < 0.5 * max(a, b):
        return None, None
    return Field(yc, xc, a, b, theta, "dish rim"), pts[inliers]


def _off_bench_field(small: np.ndarray, small_rgb: np.ndarray, factor: int) -> Field | None:
    """The dish as the largest region of colours the bench does not have, fitted by an ellipse.

    For a dish whose wall leaves no closed edge stronger than the bench's grain, but whose
    solution or wall differs in colour from the bench: the bench's colour is read in the
    frame's outer band (median-filtered, see ``_despeckled``), everything farther from it, in
    colour or in hue (colour over brightness), than four times the band's own spread is off
    the bench; the largest such region, holes filled,
    is the dish when most of its outline off the frame lies on one ellipse, the bench lies
    just beyond it, and a specimen lies inside.
    """
    f2 = max(1, math.ceil(max(small.shape) / _DISH_SIDE_PX))
    img = _despeckled(block_mean(small_rgb, f2))
    grey = block_mean(small, f2)
    th, tw = grey.shape
    if min(th, tw) < 32:
        return None
    band = _frame_band(th, tw)
    dist = np.sqrt(((img - np.median(img[band], axis=0)) ** 2).sum(axis=2))
    bench = dist < max(4.0 * robust_sigma(dist[band]), 0.06)
    # ... and in hue: a shadow over the dish can bring its solution as near the bench's colour
    # as the grain of a wooden bench comes, but not its hue.
    chroma = img / (img.sum(axis=2, keepdims=True) + 0.1)
    hue_dist = np.sqrt(((chroma - np.median(chroma[band], axis=0)) ** 2).sum(axis=2))
    bench &= hue_dist < max(4.0 * robust_sigma(hue_dist[band]), 0.03)
    if np.count_nonzero(bench & band) < 0.4 * np.count_nonzero(band):
        return None
    labels, n = ndimage.label(ndimage.binary_opening(~bench, iterations=2))
    if n == 0:
        return None
    region = ndimage.binary_fill_holes(labels == int(np.argmax(np.bincount(labels.ravel())[1:])) + 1)
    if not 0.06 <= np.count_nonzero(region) / region.size <= 0.97:
        return None
    ell, _ = _outline_ellipse(region)
    if ell is None:
        return None
    yy, xx = np.ogrid[:th, :tw]
    rho = ell.rho(*np.broadcast_arrays(yy.astype(np.float64), xx.astype(np.float64)))
    if not _bench_beyond(ell, rho, bench) or not holds_structure(grey, rho <= 0.9):
        return None
    return _dish_at_full(ell, f2 * factor)


def _closed_ellipse(grad: np.ndarray, bench: np.ndarray, inner: np.ndarray, th: int,
                    tw: int) -> tuple[Field | None, np.ndarray | None, np.ndarray | None]:
    """The region the strongest closed edge between ``inner`` and the bench bounds, with the
    ellipse of that edge and its outline points (x, y) on it when most of the outline lies on
    one with a dish's shape (else None for both); all None when no usable region is found."""
    from skimage.segmentation import watershed

    markers = np.zeros((th, tw), dtype=np.int32)
    markers[bench] = 1
    markers[inner & ~bench] = 2
    region = ndimage.binary_fill_holes(watershed(grad, markers) == 2)
    share = np.count_nonzero(region) / region.size
    if not 0.0 < share <= 0.97:
        return None, None, None
    if share < 0.06:
        return None, None, region
    ell, pts = _outline_ellipse(region)
    return ell, pts, region


def fit_ellipse_robust(pts: np.ndarray, *, tolerance_px: float, trials: int = 80,
                       seed: int = 0) -> tuple[tuple[float, float, float, float, float], np.ndarray] | None:
    """RANSAC ellipse through (x, y) points: ``((xc, yc, a, b, theta), inliers)`` or None.

    Samples of five points are fitted in closed form (scikit-image's ``EllipseModel``); a
    point's residual is its normalised radial offset times the mean semi-axis, which is
    close to the geometric distance for the near-circles a dish makes and far cheaper.
    The best sample's inliers are refitted once.
    """
    from skimage.measure import EllipseModel

    rng = np.random.default_rng(seed)
    n = len(pts)
    if n < 5:
        return None

    def fit(sample: np.ndarray):
        model = EllipseModel.from_estimate(sample)
        if not model:
            return None
        a, b = (float(v) for v in model.axis_lengths)
        if not (a > 0 and b > 0 and math.isfinite(a) and math.isfinite(b)):
            return None
        xc, yc = (float(v) for v in model.center)
        return xc, yc, a, b, float(model.theta)

    def inliers_of(params) -> np.ndarray:
        xc, yc, a, b, theta = params
        ell = Field(yc, xc, a, b, theta, "")
        return np.abs(ell.rho(pts[:, 1], pts[:, 0]) - 1.0) * 0.5 * (a + b) <= tolerance_px

    best, best_in = None, None
    for _ in range(trials):
        params = fit(pts[rng.choice(n, 5, replace=False)])
        if params is None:
            continue
        inl = inliers_of(params)
        if best_in is None or inl.sum() > best_in.sum():
            best, best_in = params, inl
    if best is None or best_in.sum() < 5:
        return None
    refined = fit(pts[best_in])
    if refined is not None:
        best, best_in = refined, inliers_of(refined)
    return best, best_in


def _hough_rim_field(small: np.ndarray, factor: int) -> Field | None:
    """A circular rim whose edges point along the radius most of the way round."""
    from skimage.feature import canny
    from skimage.transform import hough_circle

    h, w = small.shape
    f2 = max(1, math.ceil(max(h, w) / _HOUGH_SIDE_PX))
    tiny = block_mean(small, f2)
    th, tw = tiny.shape
    edges = canny(tiny, sigma=1.5, low_threshold=None, high_threshold=None, use_quantiles=False)
    if np.count_nonzero(edges) < 20:
        return None
    lo, hi = int(0.3 * min(th, tw)), int(0.62 * max(th, tw))
    radii = np.arange(lo, hi + 1)
    spaces = hough_circle(edges, radii, normalize=True, full_output=False)
    best = spaces.reshape(len(radii), -1).argmax(axis=1)
    pcy, pcx = np.unravel_index(best, spaces.shape[1:])
    smooth = ndimage.gaussian_filter(tiny, 1.5)
    g_r, g_c = ndimage.sobel(smooth, axis=0), ndimage.sobel(smooth, axis=1)
    g_norm = np.hypot(g_r, g_c) + 1e-12
    angles = np.linspace(0.0, 2.0 * np.pi, 720, endpoint=False)
    accepted: list[tuple[float, float, float]] = []
    for x0, y0, r0 in zip(pcx, pcy, radii):
        support = np.zeros(angles.size)
        for dr in (-1.0, 0.0, 1.0):
            ys = np.rint(y0 + (r0 + dr) * np.sin(angles)).astype(int)
            xs = np.rint(x0 + (r0 + dr) * np.cos(angles)).astype(int)
            visible = (ys >= 0) & (ys < th) & (xs >= 0) & (xs < tw)
            yv, xv = np.clip(ys, 0, th - 1), np.clip(xs, 0, tw - 1)
            radial = np.abs(g_r[yv, xv] * np.sin(angles) + g_c[yv, xv] * np.cos(angles)) / g_norm[yv, xv]
            support = np.maximum(support, visible & edges[yv, xv] & (radial > 0.8))
        if visible.mean() >= 0.6 and support[visible].mean() >= 0.6:
            accepted.append((float(y0), float(x0), float(r0)))
    yy, xx = np.ogrid[:th, :tw]
    accepted = [c for c in accepted if holds_structure(tiny, (yy - c[0]) ** 2 + (xx - c[1]) ** 2 <= (c[2] - 8.0) ** 2)]
    if not accepted:
        return None
    # The rim is a band: take the innermost supported circle concentric with the largest.
    y0, x0, r0 = max(accepted, key=lambda c: c[2])
    concentric = [c for c in accepted if math.hypot(c[0] - y0, c[1] - x0) <= 0.04 * r0 and c[2] >= 0.85 * r0]
    r_in = min(c[2] for c in concentric)
    scale = f2 * factor
    margin = 0.015 * r_in * scale + 1.5 * scale
    cy, cx = _to_full(y0, x0, scale)
    r = r_in * scale - margin
    return Field(cy, cx, r, r, 0.0, "dish rim")
