"""Automatic segmentation of specimen photographs, with overrides.

Two pipelines share their first and last steps:

- ``threshold`` (deposits, roots, corals on a plain background): even out the light,
  detect the polarity, pick a global threshold, keep the specimen.
- ``ridge`` (thin dark vessels on a textured background, e.g. fundus photographs):
  a multiscale Hessian line measure, thresholded.

Both find the field of view first (a dish rim, or a bright field on a dark surround) and
exclude the rim and everything outside it; both end with the same cleanup (specks and
pinholes scaled to the image), the centre electrode (kept as the seed), warnings, and an
overlay. Everything expensive is done at reduced resolution or on one full-size pass.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import ndimage

from service.errors import SpecimenError
from service.imaging.load import LoadedImage, _luma

__all__ = ["MODES", "POLARITIES", "Segmentation", "segment"]

MODES = ("auto", "threshold", "ridge")
POLARITIES = ("auto", "dark", "bright")

# Long side of the reduced copy used for the background, the field of view and the polarity.
_SMALL_SIDE_PX = 512
# Long side of the copy used for the Hough search of the dish rim.
_HOUGH_SIDE_PX = 192
_EIGHT = np.ones((3, 3), dtype=bool)
# The specimen's full-contrast grey: this percentile of the Otsu foreground (from the far end).
_FULL_CONTRAST_PERCENTILE = 15.0
# Ridge mode keeps line-measure values this many robust standard deviations above the median.
_RIDGE_NOISE_LEVELS = 4.0
_OUTLINE_RGB = (255, 0, 255)
_FIELD_RGB = (0, 200, 0)
_SEED_RGB = (255, 40, 0)


@dataclass(frozen=True, eq=False)
class Segmentation:
    """A specimen mask and how it was obtained.

    Attributes
    ----------
    mask : ndarray of bool, shape (H, W)
        The specimen.
    overlay : ndarray of uint8, shape (H, W, 3)
        The photograph with the mask outline (magenta), the field of view (green) and the
        seed (red cross) drawn on it.
    settings : dict
        What was actually used: mode, polarity, threshold value and method, field of view,
        background model, cleanup sizes, electrode, components kept.
    warnings : list of str
        Conditions that make the measurement doubtful.
    center_rc : tuple of float
        Seed for radial measures: the electrode centre when one was found, else the mask's
        centroid, (row, col) px.
    """

    mask: np.ndarray
    overlay: np.ndarray
    settings: dict[str, Any]
    warnings: list[str] = field(default_factory=list)
    center_rc: tuple[float, float] = (0.0, 0.0)

    def to_dict(self) -> dict[str, Any]:
        """Settings, warnings, seed and mask area (not the arrays)."""
        return {
            **self.settings,
            "center_rc": [float(v) for v in self.center_rc],
            "mask_area_px": int(np.count_nonzero(self.mask)),
            "warnings": list(self.warnings),
        }


@dataclass(frozen=True)
class _Field:
    """Circular field of view in full-resolution pixels."""

    cy: float
    cx: float
    r: float
    source: str

    def to_dict(self) -> dict[str, Any]:
        return {"center_rc": [round(self.cy, 1), round(self.cx, 1)], "radius_px": round(self.r, 1),
                "source": self.source}


def segment(
    image: LoadedImage | np.ndarray,
    *,
    mode: str = "auto",
    polarity: str = "auto",
    threshold: float | None = None,
    roi: tuple[float, float, float] | None = None,
) -> Segmentation:
    """Segment the specimen in a photograph.

    Parameters
    ----------
    image : LoadedImage or ndarray
        A loaded photograph, or a grey (H, W) or RGB (H, W, 3) array (uint8, uint16,
        bool, or float in [0, 1]).
    mode : {"auto", "threshold", "ridge"}
        ``threshold`` for specimens on a plain background, ``ridge`` for thin vessels on
        a textured background; ``auto`` picks the one that fits (see Notes).
    polarity : {"auto", "dark", "bright"}
        Whether the specimen is darker or brighter than its background. Ridge mode
        follows dark vessels unless ``"bright"`` is given.
    threshold : float, optional
        Manual threshold. In threshold mode, a grey level in (0, 1) of the photograph
        after the light has been evened out (the background keeps its median grey); in
        ridge mode, a line-measure value in (0, 1) relative to its 99.5th percentile.
    roi : (cx, cy, r), optional
        Circular region of interest in px (centre column, centre row, radius); replaces
        the automatic field of view.

    Returns
    -------
    Segmentation

    Raises
    ------
    SpecimenError
        The image has no contrast, or nothing is left after cleanup.
    ValueError
        An argument is out of range.

    Notes
    -----
    Background: a quadratic surface fitted by least squares with iterative 3-sigma
    clipping at reduced resolution, refitted on the background class alone, and divided
    out at full resolution (lighting multiplies). Polarity: of the two Otsu classes of the
    evened picture, the one filling the field's outer band is the background (a deposit
    grows from the centre and stops short of the rim). Threshold: Otsu's method [1]_ on
    the evened picture inside the field, moved half way between the background (median of
    the other class) and the specimen's full-contrast grey (15th percentile of the Otsu
    foreground, 85th when bright): the level at which a blurred edge crosses half its
    contrast, i.e. where the true outline lies. Dish rim: a circular Hough transform [2]_
    on Canny edges at reduced resolution, accepted when edges whose gradient points along
    the radius line most of the circle's visible length and the disc holds detail beyond
    noise. Ridge measure: the larger Hessian eigenvalue minus the magnitude of the
    smaller, scale-normalised (sigma^2) and maximised over three scales, a line measure in
    the spirit of [3]_ and [4]_; it keeps values more than 4 robust standard deviations
    (1.4826 MAD) above the field's median. ``auto`` picks ridge when the photograph is a
    bright field on a dark surround, its evened histogram is not bimodal (Otsu's
    separability below 0.6), and the line measure finds an elongated network there.

    References
    ----------
    .. [1] N. Otsu, "A threshold selection method from gray-level histograms", IEEE Trans.
       Syst. Man Cybern. 9, 62-66 (1979).
    .. [2] R. O. Duda, P. E. Hart, "Use of the Hough transformation to detect lines and
       curves in pictures", Commun. ACM 15, 11-15 (1972).
    .. [3] Y. Sato et al., "Three-dimensional multi-scale line filter for segmentation and
       visualization of curvilinear structures in medical images", Med. Image Anal. 2,
       143-168 (1998).
    .. [4] A. F. Frangi et al., "Multiscale vessel enhancement filtering", MICCAI 1998,
       LNCS 1496, 130-137.
    """
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}, got {mode!r}")
    if polarity not in POLARITIES:
        raise ValueError(f"polarity must be one of {POLARITIES}, got {polarity!r}")
    if threshold is not None and not (0.0 < float(threshold) < 1.0):
        raise ValueError(f"threshold must lie strictly between 0 and 1, got {threshold}")
    gray, rgb = _as_gray_rgb(image)
    h, w = gray.shape
    if h < 16 or w < 16:
        raise SpecimenError(f"image is {w} x {h} px; at least 16 x 16 px is needed to segment a specimen")
    if roi is not None:
        cx, cy, r = (float(v) for v in roi)
        if not (r > 0 and math.isfinite(cx) and math.isfinite(cy)):
            raise ValueError(f"roi must be (cx, cy, r) with r > 0, got {roi}")
        if cx + r < 0 or cy + r < 0 or cx - r >= w or cy - r >= h:
            raise ValueError(f"roi {roi} lies outside the {w} x {h} px image")

    factor = max(1, math.ceil(max(h, w) / _SMALL_SIDE_PX))
    small = _block_mean(gray, factor)
    if float(small.max() - small.min()) < 2.0 / 255.0 and float(gray.max() - gray.min()) < 4.0 / 255.0:
        raise SpecimenError("the image is uniform (no contrast): there is no specimen to segment")

    if roi is not None:
        fov: _Field | None = _Field(cy, cx, r, "roi")
        fov_kind = "roi"
    else:
        fov, fov_kind = _find_field(small, factor)
    small_fov = _disc_mask(small.shape, fov, factor) if fov is not None else np.ones(small.shape, dtype=bool)
    if np.count_nonzero(small_fov) < 64:
        raise SpecimenError("the field of view is too small to hold a specimen")

    settings: dict[str, Any] = {
        "field_of_view": fov.to_dict() if fov is not None else {"source": "whole image"},
        "reduced_resolution_factor": factor,
    }
    warnings: list[str] = []

    # A plane cannot mimic a centred specimen the way a quadratic bump can, so the first
    # evening, used to find the classes, is planar; the background is refitted later.
    background = _fit_background(small, small_fov, degree=1)
    if mode == "auto":
        chosen, decision = _choose_mode(gray, rgb, small, small_fov, fov_kind, factor, background)
        settings["mode_decision"] = decision
    else:
        chosen = mode
    settings["mode_requested"] = mode
    settings["mode"] = chosen

    if chosen == "ridge":
        mask, details, contrast = _ridge_mask(gray, rgb, small, small_fov, fov, factor, polarity, threshold)
    else:
        mask, details, contrast = _threshold_mask(gray, small, small_fov, fov, factor, polarity, threshold, background)
    settings.update(details)
    if contrast < 3.0:
        warnings.append(f"low contrast: the specimen stands {contrast:.1f} noise levels from the background")

    seed_rc = (fov.cy, fov.cx) if fov is not None else ((h - 1) / 2.0, (w - 1) / 2.0)
    mask, cleanup = _keep_specimen(mask, seed_rc, keep_all=(chosen == "ridge"))
    settings["cleanup"] = cleanup
    if not mask.any():
        raise SpecimenError("no specimen found: nothing is left after thresholding and removing specks")

    outline = mask & ~ndimage.binary_erosion(mask, structure=_EIGHT, border_value=0)
    area = int(np.count_nonzero(mask))
    width_px = 2.0 * area / max(1, int(np.count_nonzero(outline)))
    settings["branch_width_px"] = round(width_px, 2)
    electrode = _find_electrode(mask, seed_rc, width_px) if chosen == "threshold" else None
    settings["electrode"] = electrode
    rows, cols = np.nonzero(mask)
    if electrode is not None:
        center_rc = (float(electrode["center_rc"][0]), float(electrode["center_rc"][1]))
    else:
        center_rc = (float(rows.mean()), float(cols.mean()))

    warnings.extend(_warnings(mask, rows, cols, center_rc, fov, width_px, small_fov, factor, chosen))
    overlay = _overlay(rgb, outline, fov, center_rc)
    return Segmentation(mask=mask, overlay=overlay, settings=settings, warnings=warnings, center_rc=center_rc)


# ----------------------------------------------------------------------------- inputs


def _as_gray_rgb(image: LoadedImage | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(image, LoadedImage):
        return image.gray, image.rgb
    arr = np.asarray(image)
    if arr.ndim == 3 and arr.shape[2] == 4:
        arr = arr[:, :, :3]
    if not (arr.ndim == 2 or (arr.ndim == 3 and arr.shape[2] == 3)):
        raise ValueError(f"image must be a grey (H, W) or RGB (H, W, 3) array, got shape {arr.shape}")
    if arr.dtype == bool:
        arr = arr.astype(np.uint8) * np.uint8(255)
    if arr.dtype.kind == "f":
        if not np.isfinite(arr).all():
            raise ValueError("image holds NaN or infinite values")
        if arr.min() < 0.0 or arr.max() > 1.0:
            raise ValueError("a float image must lie in [0, 1]")
    elif arr.dtype not in (np.uint8, np.uint16):
        raise ValueError(f"image dtype {arr.dtype} is not supported (uint8, uint16, bool or float in [0, 1])")
    full = 255.0 if arr.dtype == np.uint8 else 65535.0 if arr.dtype == np.uint16 else 1.0
    if arr.ndim == 3:
        rgb = arr if arr.dtype == np.uint8 else (arr * np.float32(255.0 / full) + np.float32(0.5)).astype(np.uint8)
        return _luma(arr, full), np.ascontiguousarray(rgb)
    gray = np.ascontiguousarray(arr, dtype=np.float32) * np.float32(1.0 / full)
    return gray, np.repeat((gray * 255.0 + 0.5).astype(np.uint8)[:, :, None], 3, axis=2)


def _block_mean(a: np.ndarray, factor: int) -> np.ndarray:
    """Mean over factor x factor blocks (the last partial blocks are dropped)."""
    if factor == 1:
        return a.astype(np.float32, copy=True)
    h, w = (a.shape[0] // factor) * factor, (a.shape[1] // factor) * factor
    return a[:h, :w].reshape(h // factor, factor, w // factor, factor).mean(axis=(1, 3), dtype=np.float32)


def _disc_mask(shape: tuple[int, int], fov: _Field, factor: int = 1, shrink_px: float = 0.0) -> np.ndarray:
    """Boolean disc of the field of view on a grid reduced by ``factor``."""
    yy = (np.arange(shape[0], dtype=np.float32) * factor + (factor - 1) / 2.0 - fov.cy)[:, None]
    xx = (np.arange(shape[1], dtype=np.float32) * factor + (factor - 1) / 2.0 - fov.cx)[None, :]
    return yy * yy + xx * xx <= np.float32(max(fov.r - shrink_px, 0.0) ** 2)


def _clip_to_disc(mask: np.ndarray, fov: _Field) -> None:
    """Clear ``mask`` outside the field of view in place, row by row (no full-size temporaries)."""
    h, w = mask.shape
    for y in range(h):
        dy = y - fov.cy
        if abs(dy) >= fov.r:
            mask[y] = False
            continue
        half = math.sqrt(fov.r * fov.r - dy * dy)
        x0, x1 = math.ceil(fov.cx - half), math.floor(fov.cx + half) + 1
        mask[y, : max(0, min(w, x0))] = False
        mask[y, max(0, min(w, x1)):] = False


# ----------------------------------------------------------------------------- field of view


def _find_field(small: np.ndarray, factor: int) -> tuple[_Field | None, str]:
    """Field of view in full-resolution px: a bright field on a dark surround, or a dish rim."""
    found = _dark_surround_field(small, factor)
    if found is not None:
        return found, "dark surround"
    found = _dish_rim_field(small, factor)
    if found is not None:
        return found, "dish rim"
    return None, "whole image"


def _holds_structure(small: np.ndarray, inside: np.ndarray) -> bool:
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
    limit = max(6.0 * _robust_sigma(values), 0.02)
    return float(np.mean(np.abs(values - centre) > limit)) >= 0.002


def _dark_surround_field(small: np.ndarray, factor: int) -> _Field | None:
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
    if not _holds_structure(small, ndimage.binary_erosion(main, iterations=8)):
        return None
    rows, cols = np.nonzero(main)
    # Shrink by two reduced pixels so the dark edge and its halo stay outside.
    r_small = math.sqrt(area / math.pi) - 2.0
    return _Field(float(rows.mean()) * factor + (factor - 1) / 2.0, float(cols.mean()) * factor + (factor - 1) / 2.0,
                  r_small * factor, "dark surround")


def _dish_rim_field(small: np.ndarray, factor: int) -> _Field | None:
    from skimage.feature import canny
    from skimage.transform import hough_circle

    h, w = small.shape
    f2 = max(1, math.ceil(max(h, w) / _HOUGH_SIDE_PX))
    tiny = _block_mean(small, f2)
    th, tw = tiny.shape
    edges = canny(tiny, sigma=1.5, low_threshold=None, high_threshold=None, use_quantiles=False)
    if np.count_nonzero(edges) < 20:
        return None
    lo, hi = int(0.3 * min(th, tw)), int(0.62 * max(th, tw))
    radii = np.arange(lo, hi + 1)
    spaces = hough_circle(edges, radii, normalize=True, full_output=False)
    # Candidates: the best centre for every radius (the rim's circles are among them).
    best = spaces.reshape(len(radii), -1).argmax(axis=1)
    pcy, pcx = np.unravel_index(best, spaces.shape[1:])
    prad = radii
    # Support: edge pixels (within one pixel) whose smoothed gradient points along the
    # radius, as a rim's does; branches crossing a circle point every which way.
    smooth = ndimage.gaussian_filter(tiny, 1.5)
    g_r, g_c = ndimage.sobel(smooth, axis=0), ndimage.sobel(smooth, axis=1)
    g_norm = np.hypot(g_r, g_c) + 1e-12
    angles = np.linspace(0.0, 2.0 * np.pi, 720, endpoint=False)
    accepted: list[tuple[float, float, float]] = []
    for x0, y0, r0 in zip(pcx, pcy, prad):
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
    # The dish is the largest supported circle with a specimen inside; its rim is a band, so
    # take the innermost supported circle concentric with it, and step a little further in.
    yy, xx = np.ogrid[:th, :tw]
    accepted = [c for c in accepted if _holds_structure(tiny, (yy - c[0]) ** 2 + (xx - c[1]) ** 2 <= (c[2] - 8.0) ** 2)]
    if not accepted:
        return None
    y0, x0, r0 = max(accepted, key=lambda c: c[2])
    concentric = [c for c in accepted if math.hypot(c[0] - y0, c[1] - x0) <= 0.04 * r0 and c[2] >= 0.85 * r0]
    r_in = min(c[2] for c in concentric)
    scale = f2 * factor
    margin = 0.015 * r_in * scale + 1.5 * scale
    return _Field(y0 * scale + (scale - 1) / 2.0, x0 * scale + (scale - 1) / 2.0, r_in * scale - margin, "dish rim")


# ----------------------------------------------------------------------------- background and threshold


def _fit_background(small: np.ndarray, inside: np.ndarray, degree: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Plane or quadratic background of ``small`` by 3-sigma clipped least squares.

    Returns the six quadratic coefficients (the last three zero for a plane) and the
    fitted surface on the reduced grid. Six coefficients need few points, so the fit uses
    a sparse grid of about 16,000.
    """
    h, w = small.shape
    y = np.linspace(-1.0, 1.0, h, dtype=np.float64)
    x = np.linspace(-1.0, 1.0, w, dtype=np.float64)
    step = max(1, math.ceil(math.sqrt(h * w / 16_000)))
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
        sigma = _robust_sigma(resid[keep])
        new_keep = inside_s & (np.abs(resid) < 3.0 * sigma)
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    coef = np.concatenate([coef, np.zeros(6 - n_terms)])
    c = coef.astype(np.float32)
    yf, xf = y.astype(np.float32)[:, None], x.astype(np.float32)[None, :]
    fitted = (c[0] + c[1] * yf + c[3] * yf * yf) + (c[2] + c[4] * yf) * xf + c[5] * xf * xf
    return coef, fitted.astype(np.float32)


def _background_full(coef: np.ndarray, shape: tuple[int, int], small_shape: tuple[int, int], factor: int) -> np.ndarray:
    """Evaluate the quadratic at full resolution with three broadcast operations."""
    h, w = shape
    sh, sw = small_shape
    # Full-res pixel i sits at reduced coordinate (i - (factor - 1) / 2) / factor.
    y = (-1.0 + 2.0 * ((np.arange(h) - (factor - 1) / 2.0) / factor) / max(sh - 1, 1)).astype(np.float32)
    x = (-1.0 + 2.0 * ((np.arange(w) - (factor - 1) / 2.0) / factor) / max(sw - 1, 1)).astype(np.float32)
    c = coef.astype(np.float32)
    by_row = c[0] + c[1] * y + c[3] * y * y
    slope = c[2] + c[4] * y
    bg = by_row[:, None] + slope[:, None] * x[None, :]
    bg += (c[5] * x * x)[None, :]
    return bg


def _robust_sigma(values: np.ndarray) -> float:
    return 1.4826 * float(np.median(np.abs(values - np.median(values)))) + 1e-6


def _outer_band(shape: tuple[int, int], fov: _Field | None, factor: int) -> np.ndarray:
    """The field's outer band on the reduced grid: where a grown specimen rarely reaches."""
    if fov is not None:
        return _disc_mask(shape, fov, factor) & ~_disc_mask(shape, fov, factor, shrink_px=0.15 * fov.r)
    band = np.zeros(shape, dtype=bool)
    k = max(1, int(0.07 * min(shape)))
    band[:k], band[-k:], band[:, :k], band[:, -k:] = True, True, True, True
    return band


def _threshold_mask(gray: np.ndarray, small: np.ndarray, small_fov: np.ndarray, fov: _Field | None, factor: int,
                    polarity: str, threshold: float | None,
                    background: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, dict[str, Any], float]:
    from skimage.filters import threshold_otsu

    # Strategy: the first (planar, symmetrically clipped) fit follows whichever class fills
    # most of the field; lighting multiplies both classes alike, so it evens the picture
    # either way. Otsu then splits the evened picture; the class that fills the field's outer band is the
    # background (a deposit grows from the centre and stops short of the rim), which gives
    # the polarity; the background is refitted on that class alone and divided out.
    _, fitted = background
    evened_small = small / np.maximum(fitted, np.float32(0.02))
    t_small = float(threshold_otsu(evened_small[small_fov], nbins=256))
    high = evened_small >= t_small
    if polarity == "auto":
        band = _outer_band(small.shape, fov, factor) & small_fov
        high_share = float(high[band].mean()) if band.any() else 1.0
        chosen = "dark" if high_share >= 0.5 else "bright"
        polarity_source = f"auto: {max(high_share, 1 - high_share):.0%} of the field's outer band is background"
    else:
        chosen, polarity_source = polarity, "given"
    background_class = small_fov & (high if chosen == "dark" else ~high)
    if np.count_nonzero(background_class) < 64:
        background_class = small_fov
    coef, fitted = _fit_background(small, background_class)
    floor = np.float32(max(0.02, 0.05 * float(np.median(fitted[small_fov]))))
    level = float(np.median(np.maximum(fitted[small_fov], floor)))
    # Evened image: gray * level / background, in place in the background buffer.
    even = _background_full(coef, gray.shape, small.shape, factor)
    np.maximum(even, floor, out=even)
    np.divide(gray, even, out=even)
    even *= np.float32(level)

    step = max(1, int(math.sqrt(gray.size / 1_000_000)))
    sample = even[::step, ::step]
    sample = sample[_disc_mask(sample.shape, fov, step)] if fov is not None else sample.ravel()
    if threshold is not None:
        t, method = float(threshold), "given"
    else:
        t_otsu = float(threshold_otsu(sample, nbins=512))
        fg = sample < t_otsu if chosen == "dark" else sample > t_otsu
        t, method = t_otsu, "otsu"
        if fg.any() and (~fg).any():
            # Half way between the background (median of the other class) and the specimen's
            # full-contrast level (15th percentile of the foreground, 85th when bright): the
            # level where a blurred edge crosses half its contrast, i.e. the drawn outline.
            # A percentile this far in keeps a brighter electrode or glint from setting it.
            q = _FULL_CONTRAST_PERCENTILE
            full = float(np.percentile(sample[fg], q if chosen == "dark" else 100.0 - q))
            t = 0.5 * (full + float(np.median(sample[~fg])))
            method = "otsu, moved to half contrast between background and specimen"
    fg = sample < t if chosen == "dark" else sample > t
    contrast = 0.0
    if fg.any() and (~fg).any():
        noise = _robust_sigma(sample[~fg])
        contrast = abs(float(np.median(sample[fg])) - float(np.median(sample[~fg]))) / noise

    mask = even < np.float32(t) if chosen == "dark" else even > np.float32(t)
    del even
    if fov is not None:
        _clip_to_disc(mask, fov)
    details = {
        "polarity": chosen,
        "polarity_source": polarity_source,
        "threshold": round(t, 4),
        "threshold_method": method,
        "threshold_scale": "grey level after evening the light (background at its median grey)",
        "background": {"model": "quadratic surface, 3-sigma clipped least squares on the background class",
                       "fitted_at_factor": factor, "median_grey": round(level, 4)},
        "contrast_to_noise": round(contrast, 2),
    }
    return mask, details, contrast


# ----------------------------------------------------------------------------- ridge mode


def _ridge_sigmas(shape: tuple[int, int]) -> list[float]:
    # Vessels of fundus photographs about 1400 px across are 3 to 20 px wide.
    base = max(1.0, min(shape) / 1400.0)
    return [base, 2.0 * base, 4.0 * base]


def _line_measure(channel: np.ndarray, sigmas: list[float], dark: bool) -> np.ndarray:
    """Scale-normalised Hessian line measure, max over ``sigmas`` (float32, one scale at a time)."""
    best = np.zeros(channel.shape, dtype=np.float32)
    sign = np.float32(1.0 if dark else -1.0)
    for s in sigmas:
        hrr = ndimage.gaussian_filter(channel, s, order=(2, 0), output=np.float32)
        hcc = ndimage.gaussian_filter(channel, s, order=(0, 2), output=np.float32)
        hrc = ndimage.gaussian_filter(channel, s, order=(1, 1), output=np.float32)
        # Eigenvalues of [[hrr, hrc], [hrc, hcc]]: mean +- root. Across a dark line the
        # large one is positive and the along-line one near zero; blobs have both large.
        mean = (hrr + hcc) * np.float32(0.5)
        hrr -= hcc
        hrr *= np.float32(0.5)
        np.hypot(hrr, hrc, out=hrr)  # root
        del hcc, hrc
        mean *= sign
        big = mean + hrr
        small_abs = np.abs(mean - hrr)
        big -= small_abs
        big *= np.float32(s * s)
        np.maximum(best, big, out=best)
        del mean, big, small_abs, hrr
    return best


def _ridge_channel(gray: np.ndarray, rgb: np.ndarray) -> tuple[np.ndarray, str]:
    # Vessels contrast best in the green channel of a colour fundus photograph (haemoglobin
    # absorbs green; red is nearly saturated). Grey pictures use their grey.
    if rgb.ndim == 3 and not (np.array_equal(rgb[::16, ::16, 0], rgb[::16, ::16, 1])):
        return rgb[:, :, 1].astype(np.float32) / np.float32(255.0), "green"
    return gray, "grey"


def _ridge_mask(gray: np.ndarray, rgb: np.ndarray, small: np.ndarray, small_fov: np.ndarray, fov: _Field | None,
                factor: int, polarity: str, threshold: float | None) -> tuple[np.ndarray, dict[str, Any], float]:
    channel, channel_name = _ridge_channel(gray, rgb)
    dark = polarity != "bright"
    sigmas = _ridge_sigmas(gray.shape)
    # Divide out the slowly varying brightness so vessel contrast is comparable everywhere.
    small_ch = _block_mean(channel, factor)
    bg_sigma = max(2.0, min(small_ch.shape) / 40.0)
    weight = ndimage.gaussian_filter(small_fov.astype(np.float32), bg_sigma)
    bg_small = ndimage.gaussian_filter(np.where(small_fov, small_ch, 0.0).astype(np.float32), bg_sigma)
    bg_small /= np.maximum(weight, 1e-3)
    bg = ndimage.zoom(bg_small, (gray.shape[0] / bg_small.shape[0], gray.shape[1] / bg_small.shape[1]), order=1,
                      grid_mode=True, mode="nearest")[: gray.shape[0], : gray.shape[1]]
    if bg.shape != gray.shape:
        bg = np.pad(bg, ((0, gray.shape[0] - bg.shape[0]), (0, gray.shape[1] - bg.shape[1])), mode="edge")
    np.maximum(bg, np.float32(0.02), out=bg)
    evened = channel / bg
    del bg
    inside = _disc_mask(gray.shape, fov, 1) if fov is not None else np.ones(gray.shape, dtype=bool)
    # Outside the field, continue the field's mean level so its edge is not a line.
    evened[~inside] = np.float32(1.0)
    response = _line_measure(evened, sigmas, dark)
    del evened
    if fov is not None:
        edge_fov = _Field(fov.cy, fov.cx, fov.r - 3.0 * sigmas[-1], fov.source)
        inside = _disc_mask(gray.shape, edge_fov, 1)
    values = response[inside]
    top = float(np.percentile(values, 99.5)) + 1e-9
    noise = _robust_sigma(values)
    if threshold is not None:
        t, method = float(threshold) * top, "given (fraction of the 99.5th percentile)"
    else:
        # Vessels are a minority of the field, so the median and the MAD of the line
        # measure describe the background texture; keep what stands well clear of it.
        t = float(np.median(values)) + _RIDGE_NOISE_LEVELS * noise
        method = f"median + {_RIDGE_NOISE_LEVELS:g} robust standard deviations of the line measure"
    mask = (response > np.float32(t)) & inside
    on = values[values > t]
    contrast = (float(np.median(on)) - float(np.median(values))) / noise if on.size else 0.0
    details = {
        "polarity": "dark" if dark else "bright",
        "polarity_source": "given" if polarity != "auto" else "dark vessels assumed",
        "channel": channel_name,
        "threshold": round(t / top, 4),
        "threshold_method": method,
        "threshold_scale": "line measure as a fraction of its 99.5th percentile inside the field",
        "line_measure_sigmas_px": [round(s, 2) for s in sigmas],
        "background": {"model": "Gaussian local mean at reduced resolution", "sigma_px": round(bg_sigma * factor, 1)},
        "contrast_to_noise": round(contrast, 2),
    }
    return mask, details, contrast


def _choose_mode(gray: np.ndarray, rgb: np.ndarray, small: np.ndarray, small_fov: np.ndarray, fov_kind: str,
                 factor: int, background: tuple[np.ndarray, np.ndarray]) -> tuple[str, dict[str, Any]]:
    """Pick threshold or ridge mode from cheap statistics at reduced resolution."""
    from skimage.filters import threshold_otsu

    _, fitted = background
    evened = (small / np.maximum(fitted, 0.02))[small_fov]
    t = float(threshold_otsu(evened, nbins=256))
    lo, hi = evened[evened < t], evened[evened >= t]
    total = float(evened.var()) + 1e-12
    separability = (lo.size * hi.size / evened.size**2) * (float(lo.mean()) - float(hi.mean())) ** 2 / total \
        if lo.size and hi.size else 0.0
    decision = {"otsu_separability": round(separability, 3), "field": fov_kind}
    if fov_kind != "dark surround" or separability >= 0.6:
        return "threshold", decision
    # Elongation of what a line measure finds at reduced resolution: a network of thin
    # vessels has a large share of boundary pixels (about 2 / width), texture blobs do not.
    channel, _ = _ridge_channel(gray, rgb)
    response = _line_measure(_block_mean(channel, factor), [1.0, 1.7], dark=True)
    vals = response[small_fov]
    t_line = float(threshold_otsu(vals[vals > 0], nbins=256)) if np.count_nonzero(vals > 0) > 16 else np.inf
    lines = response > t_line
    area = max(1, int(np.count_nonzero(lines)))
    perimeter = int(np.count_nonzero(lines & ~ndimage.binary_erosion(lines, structure=_EIGHT)))
    elongation = perimeter / area
    decision["line_perimeter_per_area"] = round(elongation, 3)
    return ("ridge" if elongation > 0.5 else "threshold"), decision


# ----------------------------------------------------------------------------- specimen, electrode, warnings


def _keep_specimen(mask: np.ndarray, seed_rc: tuple[float, float], keep_all: bool) -> tuple[np.ndarray, dict[str, Any]]:
    """Remove specks and pinholes; keep the component at or nearest the seed and sizeable others nearby."""
    h, w = mask.shape
    min_object_px = max(16, round(2.5e-5 * h * w))
    labels, n = ndimage.label(mask, structure=_EIGHT)
    info: dict[str, Any] = {"min_object_px": min_object_px, "components_found": int(n)}
    if n == 0:
        info.update(components_kept=0, holes_filled_below_px=min_object_px)
        return mask, info
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    big = sizes >= min_object_px
    if not big.any():
        info.update(components_kept=0, holes_filled_below_px=min_object_px)
        return np.zeros_like(mask), info
    if keep_all:
        keep = big
    else:
        # Component centroids from one pass over the foreground pixels.
        flat = labels.ravel()
        idx = np.flatnonzero(flat)
        lab = flat[idx]
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
        # Reach of the main components from the seed: their farthest pixel.
        main_idx = idx[np.isin(lab, main)]
        reach = float(np.sqrt(((main_idx // w - seed_rc[0]) ** 2 + (main_idx % w - seed_rc[1]) ** 2).max()))
        keep = big & (sizes >= max(min_object_px, 0.002 * sizes[largest])) & (dist <= 1.1 * reach + 1.0)
        keep[main] = True
    keep[0] = False
    kept = keep[labels]
    del labels
    kept = _fill_small_holes(kept, min_object_px)
    info.update(components_kept=int(np.count_nonzero(keep)), holes_filled_below_px=min_object_px)
    return kept, info


def _fill_small_holes(mask: np.ndarray, max_hole_px: int) -> np.ndarray:
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
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
    if fill.any():
        crop |= fill[holes]
    return mask


def _find_electrode(mask: np.ndarray, seed_rc: tuple[float, float], width_px: float) -> dict[str, Any] | None:
    """A compact disc much thicker than the branches near the seed: the centre electrode."""
    h, w = mask.shape
    half = int(max(16, 0.12 * min(h, w)))
    r0, c0 = max(0, int(seed_rc[0]) - half), max(0, int(seed_rc[1]) - half)
    crop = mask[r0: int(seed_rc[0]) + half, c0: int(seed_rc[1]) + half]
    if not crop.any():
        return None
    # Padding with background makes the crop's edge count as an edge: a blob cut by the
    # window is not mistaken for a wider one.
    dist = ndimage.distance_transform_edt(np.pad(crop, 1))[1:-1, 1:-1]
    peak = float(dist.max())
    if peak < max(4.0, 1.25 * width_px) or peak > 0.06 * min(h, w):
        return None  # as thin as the branches, or so wide that the specimen itself is compact
    core = dist >= 0.7 * peak
    labels, _ = ndimage.label(core)
    pr, pc = np.unravel_index(int(np.argmax(dist)), dist.shape)
    rows, cols = np.nonzero(labels == labels[pr, pc])
    return {"center_rc": [round(float(rows.mean()) + r0, 1), round(float(cols.mean()) + c0, 1)],
            "radius_px": round(peak, 1)}


def _warnings(mask: np.ndarray, rows: np.ndarray, cols: np.ndarray, center_rc: tuple[float, float],
              fov: _Field | None, width_px: float, small_fov: np.ndarray, factor: int, mode: str) -> list[str]:
    out: list[str] = []
    if mask[0].any() or mask[-1].any() or mask[:, 0].any() or mask[:, -1].any():
        out.append("the specimen touches the image frame: it may extend beyond the photograph")
    if fov is not None and mode == "threshold":
        reach = float(np.sqrt(((rows - fov.cy) ** 2 + (cols - fov.cx) ** 2).max()))
        if reach >= fov.r - 0.01 * fov.r - 2.0 * min(width_px, 0.02 * fov.r):
            out.append(f"the specimen touches the {'dish rim' if fov.source == 'dish rim' else 'field edge'}"
                       ": growth may have been cut off or the rim included")
    area = rows.size
    extent = float(np.sqrt(((rows - center_rc[0]) ** 2 + (cols - center_rc[1]) ** 2).max())) + 0.5
    fill = area / (math.pi * extent * extent)
    if fill <= 0.5 and (area < 400 or extent < 10.0 * width_px):
        out.append(f"specimen too small: it spans {extent / max(width_px, 1e-9):.0f} branch widths, "
                   "too few scales for a dimension fit (at least 10 wanted)")
    field_area = float(np.count_nonzero(small_fov)) * factor * factor
    if mode == "threshold" and fill > 0.5:
        out.append(f"the mask fills {fill:.0%} of its bounding circle: a compact blob, probably not a branching pattern")
    elif area > 0.6 * field_area:
        out.append(f"the mask covers {area / field_area:.0%} of the field of view: probably not a branching pattern")
    return out


def _overlay(rgb: np.ndarray, outline: np.ndarray, fov: _Field | None, center_rc: tuple[float, float]) -> np.ndarray:
    over = rgb.copy()
    h, w = outline.shape
    if fov is not None:
        angles = np.linspace(0.0, 2.0 * np.pi, max(360, int(2 * np.pi * fov.r)), endpoint=False)
        ys = np.rint(fov.cy + fov.r * np.sin(angles)).astype(int)
        xs = np.rint(fov.cx + fov.r * np.cos(angles)).astype(int)
        ok = (ys >= 0) & (ys < h) & (xs >= 0) & (xs < w)
        over[ys[ok], xs[ok]] = _FIELD_RGB
    over[outline] = _OUTLINE_RGB
    arm = max(4, min(h, w) // 100)
    r, c = int(round(center_rc[0])), int(round(center_rc[1]))
    over[max(0, r - arm): r + arm + 1, min(max(c, 0), w - 1)] = _SEED_RGB
    over[min(max(r, 0), h - 1), max(0, c - arm): c + arm + 1] = _SEED_RGB
    return over
