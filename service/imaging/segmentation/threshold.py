"""Threshold mode: even out the light, decide the polarity, pick a global threshold."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy import ndimage

from service.imaging.segmentation._common import Field, block_mean, clip_to_field, field_mask, robust_sigma

# The specimen's full-contrast grey: this percentile of the Otsu foreground (from the far end); a
# quarter of the way in, so textured or thin blurred branches still reach it.
_FULL_CONTRAST_PERCENTILE = 25.0
# Share of the field's radius, from the edge, in which the polarity is read.
_BAND = (0.72, 0.93)


@dataclass(frozen=True, eq=False)
class Evened:
    """A photograph with its light evened out for one polarity hypothesis."""

    image: np.ndarray  # float32, full resolution: background at ``level``
    polarity: str
    polarity_source: str
    level: float
    details: dict[str, Any]


def fit_background(small: np.ndarray, inside: np.ndarray, degree: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Plane or quadratic background of ``small`` by 3-sigma clipped least squares.

    Returns the six quadratic coefficients (the last three zero for a plane) and the fitted
    surface on the reduced grid. Six coefficients need few points, so the fit uses a sparse
    grid of about 6,000.
    """
    h, w = small.shape
    y = np.linspace(-1.0, 1.0, h, dtype=np.float64)
    x = np.linspace(-1.0, 1.0, w, dtype=np.float64)
    step = max(1, math.ceil(math.sqrt(h * w / 6_000)))
    ys, xs = np.meshgrid(y[::step], x[::step], indexing="ij")
    n_terms = 6 if degree == 2 else 3
    terms = np.stack([np.ones_like(ys), ys, xs, ys * ys, ys * xs, xs * xs][:n_terms], axis=-1).reshape(-1, n_terms)
    values = small[::step, ::step].astype(np.float64).ravel()
    inside_s = inside[::step, ::step].ravel()
    keep = inside_s.copy()
    coef = np.array([float(np.median(values[inside_s])) if inside_s.any() else 0.5] + [0.0] * (n_terms - 1))
    for _ in range(6):
        if np.count_nonzero(keep) < 12:
            break
        coef, *_ = np.linalg.lstsq(terms[keep], values[keep], rcond=None)
        resid = values - terms @ coef
        sigma = robust_sigma(resid[keep])
        new_keep = inside_s & (np.abs(resid) < 3.0 * sigma)
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    coef = np.concatenate([coef, np.zeros(6 - n_terms)])
    c = coef.astype(np.float32)
    yf, xf = y.astype(np.float32)[:, None], x.astype(np.float32)[None, :]
    fitted = (c[0] + c[1] * yf + c[3] * yf * yf) + (c[2] + c[4] * yf) * xf + c[5] * xf * xf
    return coef, fitted.astype(np.float32)


def polarity_band(shape: tuple[int, int], fov: Field | None, factor: int) -> np.ndarray:
    """Where the polarity is read, on the reduced grid: the field's outer part, short of its edge
    (a deposit grows from the centre and stops short of the rim; the rim itself is left out)."""
    if fov is not None:
        return field_mask(shape, fov.scaled(_BAND[1]), factor) & ~field_mask(shape, fov.scaled(_BAND[0]), factor)
    band = np.zeros(shape, dtype=bool)
    k = max(1, int(0.07 * min(shape)))
    band[:k], band[-k:], band[:, :k], band[:, -k:] = True, True, True, True
    return band


def _upsample(small: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Bilinear upsampling of a reduced surface to ``shape`` (edges continued), separably:
    rows first on the narrow array, then columns by two gathers."""
    sh, sw = small.shape
    h, w = shape

    def taps(n_out: int, n_in: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        pos = np.clip((np.arange(n_out, dtype=np.float32) + 0.5) * (n_in / n_out) - 0.5, 0.0, n_in - 1.0)
        lo = np.floor(pos).astype(np.intp)
        hi = np.minimum(lo + 1, n_in - 1)
        return lo, hi, (pos - lo).astype(np.float32)

    r_lo, r_hi, r_t = taps(h, sh)
    rows = small[r_lo] * (1.0 - r_t)[:, None] + small[r_hi] * r_t[:, None]  # (h, sw)
    c_lo, c_hi, c_t = taps(w, sw)
    out = np.take(rows, c_lo, axis=1)
    out *= (1.0 - c_t)[None, :]
    hi = np.take(rows, c_hi, axis=1)
    hi *= c_t[None, :]
    out += hi
    return out.astype(np.float32, copy=False)


def _normalised_average(clean: np.ndarray, values: np.ndarray, scale_px: float) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian averages of the ``clean`` pixels' weight and of their ``values`` (zero elsewhere),
    at ``scale_px``. Smoothed four pixels or more, both are taken on a copy halved in each
    direction and brought back bilinearly: the averages are smooth at that scale, and the
    filter costs an eighth."""
    weight = clean.astype(np.float32)
    masked = np.where(clean, values, np.float32(0.0)).astype(np.float32)
    if scale_px < 4.0 or min(clean.shape) < 16:
        return ndimage.gaussian_filter(weight, scale_px), ndimage.gaussian_filter(masked, scale_px)
    half_w = ndimage.gaussian_filter(block_mean(weight, 2), 0.5 * scale_px)
    half_v = ndimage.gaussian_filter(block_mean(masked, 2), 0.5 * scale_px)
    return _upsample(half_w, clean.shape), _upsample(half_v, clean.shape)


EVENINGS = ("surface", "local")


def window_median(a: np.ndarray, size: int) -> np.ndarray:
    """``ndimage.median_filter(a, size, mode="nearest")`` for an odd ``size``: the same values,
    three to four times faster. Each window's middle value is selected (``np.partition``) from
    a strided view of the edge-padded array, a band of rows at a time so that memory stays
    near 16 MB."""
    if size % 2 != 1:
        raise ValueError(f"the window's side must be odd, got {size}")
    half = size // 2
    windows = sliding_window_view(np.pad(a, half, mode="edge"), (size, size))
    middle = size * size // 2
    out = np.empty_like(a)
    rows = max(1, (1 << 22) // (a.shape[1] * size * size))
    for r0 in range(0, a.shape[0], rows):
        band = windows[r0: r0 + rows].reshape(-1, size * size)
        out[r0: r0 + rows] = np.partition(band, middle, axis=1)[:, middle].reshape(-1, a.shape[1])
    return out


def local_background(small: np.ndarray, inside: np.ndarray, fov: Field | None, factor: int) -> np.ndarray:
    """A background that follows shadows and vignetting: a median over windows of a tenth of the
    field's radius, on a copy halved again, then smoothed. Thin branches are a minority of any
    window and vanish from it; a deposit denser than half a window does not."""
    half = block_mean(np.where(inside, small, np.float32(np.median(small[inside]))), 2)
    radius_px = (fov.r / factor if fov is not None else 0.5 * min(small.shape)) / 2.0
    size = max(5, int(0.2 * radius_px) | 1)
    med = window_median(half, size)
    med = ndimage.gaussian_filter(med, size / 4.0)
    return _upsample(med, small.shape)


def first_background(small: np.ndarray, small_fov: np.ndarray, fov: Field | None, factor: int,
                     evening: str) -> np.ndarray:
    """The lighting's first estimate, before the background class is known: the windowed
    median (``evening="local"``) or a plane fitted to the field."""
    if evening == "local":
        return local_background(small, small_fov, fov, factor)
    return fit_background(small, small_fov, degree=1)[1]


def even_light(gray: np.ndarray, small: np.ndarray, small_fov: np.ndarray, fov: Field | None, factor: int,
               polarity: str, evening: str = "surface", plane: np.ndarray | None = None) -> Evened:
    """Divide out the lighting, for the given polarity or the one the field's outer band shows.

    Strategy: a planar, symmetrically clipped fit follows whichever class fills most of the
    field; lighting multiplies both classes alike, so it evens the picture either way. Otsu
    then splits the evened picture; the class that fills the field's outer band (short of
    the rim) is the background, which gives the polarity. The background is refitted on
    that class alone as a quadratic surface, then corrected locally by a normalised
    Gaussian average of the background pixels that the quadratic explains to within 2.5
    noise levels: a shadow over part of the dish, or a vignette, is followed; glare, the
    specimen and the blur at its edges are not. ``evening="local"`` starts from a windowed
    median instead of the plane and the quadratic, for light that changes faster than a
    quadratic can follow (a sharp shadow, a strong vignette). ``plane`` is that first estimate
    (:func:`first_background`) when the caller already has it for this field and evening.
    """
    from skimage.filters import threshold_otsu

    if plane is None:
        plane = first_background(small, small_fov, fov, factor, evening)
    evened_small = small / np.maximum(plane, np.float32(0.02))
    inner = small_fov & (field_mask(small.shape, fov.scaled(_BAND[1]), factor) if fov is not None else True)
    if np.count_nonzero(inner) < 64:
        inner = small_fov
    t_small = float(threshold_otsu(evened_small[inner], nbins=256))
    high = evened_small >= t_small
    if polarity == "auto":
        band = polarity_band(small.shape, fov, factor) & small_fov
        high_share = float(high[band].mean()) if band.any() else 1.0
        chosen = "dark" if high_share >= 0.5 else "bright"
        source = f"auto: {max(high_share, 1 - high_share):.0%} of the field's outer part is background"
    else:
        chosen, source = polarity, "given"
    background_class = small_fov & (high if chosen == "dark" else ~high)
    if np.count_nonzero(background_class) < 64:
        background_class = small_fov
    fitted = plane.copy() if evening == "local" else fit_background(small, background_class)[1]
    floor = np.float32(max(0.02, 0.05 * float(np.median(fitted[small_fov]))))
    np.maximum(fitted, floor, out=fitted)
    ratio = small / fitted
    resid = ratio[background_class] - 1.0
    clean = background_class & (np.abs(ratio - 1.0 - float(np.median(resid))) < 2.5 * robust_sigma(resid))
    scale_px = max(2.0, 0.05 * (fov.r / factor if fov is not None else min(small.shape) / 2.0))
    weight, local = _normalised_average(clean, ratio, scale_px)
    # Where few background pixels are near (inside a dense deposit), fall back to the quadratic.
    trust = np.clip(weight / 0.15, 0.0, 1.0)
    correction = trust * (local / np.maximum(weight, 1e-6)) + (1.0 - trust)
    surface = fitted * correction.astype(np.float32)
    level = float(np.median(surface[small_fov]))
    even = _upsample(surface, gray.shape)
    np.maximum(even, floor, out=even)
    np.divide(gray, even, out=even)
    even *= np.float32(level)
    details = {"background": {"model": "quadratic surface on the background class, corrected by a local "
                                       "average of the background (shadows, vignetting)",
                              "local_scale_px": round(scale_px * factor, 1), "median_grey": round(level, 4)}}
    return Evened(even, chosen, source, level, details)


def pick_threshold(evened: Evened, fov: Field | None, threshold: float | None,
                   ignore: np.ndarray | None = None) -> tuple[float, str, float]:
    """Threshold on the evened picture: given, or Otsu's moved to half contrast.

    Pixels of ``ignore`` (glare and its halo, say: a third class, brighter than any deposit,
    that would pull Otsu's split above the specimen) are left out of the statistics.
    Returns the threshold, how it was found, and the specimen's contrast in noise levels.
    """
    from skimage.filters import threshold_otsu

    even = evened.image
    step = max(1, int(math.sqrt(even.size / 1_000_000)))
    grid = even[::step, ::step]
    inside = field_mask(grid.shape, fov.scaled(_BAND[1]), step) if fov is not None else np.ones(grid.shape, bool)
    if ignore is not None:
        inside &= ~ignore[::step, ::step]
    sample = grid[inside]
    # Pixel noise from differences of horizontal neighbours (both inside): blind to the
    # specimen and to the lighting, which vary slowly next to the noise.
    pair = inside[:, 1:] & inside[:, :-1]
    noise = robust_sigma((grid[:, 1:] - grid[:, :-1])[pair]) / math.sqrt(2.0) if pair.any() else 1.0
    noise = max(noise, 0.5 / 255.0)  # an 8-bit picture cannot show less
    dark = evened.polarity == "dark"
    if sample.size < 16 or float(sample.max() - sample.min()) <= 0.0:
        return (float(threshold) if threshold is not None else 0.5), "given" if threshold is not None else "none", 0.0
    # Otsu's split of the sample: the automatic threshold starts from it, and the contrast
    # is measured across it whatever threshold is used.
    t_split = float(threshold_otsu(sample, nbins=512))
    fg = sample < t_split if dark else sample > t_split
    both = bool(fg.any() and (~fg).any())
    background = float(np.median(sample[~fg])) if both else math.nan
    if threshold is not None:
        t, method = float(threshold), "given"
    else:
        t, method = t_split, "otsu"
        if both:
            # Half way between the background (median of the other class) and the specimen's
            # full-contrast level (25th percentile of the foreground, 75th when bright): the
            # level where a blurred edge crosses half its contrast, i.e. the drawn outline.
            q = _FULL_CONTRAST_PERCENTILE
            full = float(np.percentile(sample[fg], q if dark else 100.0 - q))
            t = 0.5 * (full + background)
            method = "otsu, moved to half contrast between background and specimen"
    # Contrast between Otsu's two classes: the specimen's median grey against the
    # background's, in noise levels, less the 1.35 that Otsu's split of pure Gaussian noise
    # gives by itself (the medians of a normal's two halves lie +-0.674 sigma from its
    # centre), so a specimen lost in the noise scores near zero.
    contrast = 0.0
    if both:
        contrast = max(0.0, abs(float(np.median(sample[fg])) - background) / noise - 1.35)
    return t, method, contrast


def threshold_mask(evened: Evened, fov: Field | None, t: float) -> np.ndarray:
    """The specimen side of ``t`` inside the field."""
    mask = evened.image < np.float32(t) if evened.polarity == "dark" else evened.image > np.float32(t)
    if fov is not None:
        clip_to_field(mask, fov)
    return mask


def levels_picture(evened: Evened) -> np.ndarray:
    """The evened picture as uint8, so that ``levels / 255`` compares with the threshold."""
    return (np.clip(evened.image, 0.0, 1.0) * np.float32(255.0) + np.float32(0.5)).astype(np.uint8)
