"""Ridge mode: thin vessels on a textured background (fundus photographs), by a multiscale
Hessian line measure; and the choice between ridge and threshold mode."""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import ndimage

from service.imaging.segmentation._common import EIGHT, Field, block_mean, field_mask, robust_sigma

# Ridge mode keeps line-measure values this many robust standard deviations above the median.
RIDGE_NOISE_LEVELS = 4.0


def ridge_sigmas(shape: tuple[int, int]) -> list[float]:
    # Vessels of fundus photographs about 1400 px across are 3 to 20 px wide.
    base = max(1.0, min(shape) / 1400.0)
    return [base, 2.0 * base, 4.0 * base]


def line_measure(channel: np.ndarray, sigmas: list[float], dark: bool) -> np.ndarray:
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


def ridge_channel(gray: np.ndarray, rgb: np.ndarray) -> tuple[np.ndarray, str]:
    # Vessels contrast best in the green channel of a colour fundus photograph (haemoglobin
    # absorbs green; red is nearly saturated). Grey pictures use their grey.
    if rgb.ndim == 3 and not (np.array_equal(rgb[::16, ::16, 0], rgb[::16, ::16, 1])):
        return rgb[:, :, 1].astype(np.float32) / np.float32(255.0), "green"
    return gray, "grey"


def ridge_mask(gray: np.ndarray, rgb: np.ndarray, small: np.ndarray, small_fov: np.ndarray, fov: Field | None,
                factor: int, polarity: str, threshold: float | None) -> tuple[np.ndarray, dict[str, Any], float]:
    channel, channel_name = ridge_channel(gray, rgb)
    dark = polarity != "bright"
    sigmas = ridge_sigmas(gray.shape)
    # Divide out the slowly varying brightness so vessel contrast is comparable everywhere.
    small_ch = block_mean(channel, factor)
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
    inside = field_mask(gray.shape, fov) if fov is not None else np.ones(gray.shape, dtype=bool)
    # Outside the field, continue the field's mean level so its edge is not a line.
    evened[~inside] = np.float32(1.0)
    response = line_measure(evened, sigmas, dark)
    del evened
    if fov is not None:
        inside = field_mask(gray.shape, fov.shrunk(3.0 * sigmas[-1]))
    values = response[inside]
    top = float(np.percentile(values, 99.5)) + 1e-9
    noise = robust_sigma(values)
    if threshold is not None:
        t, method = float(threshold) * top, "given (fraction of the 99.5th percentile)"
    else:
        # Vessels are a minority of the field, so the median and the MAD of the line
        # measure describe the background texture; keep what stands well clear of it.
        t = float(np.median(values)) + RIDGE_NOISE_LEVELS * noise
        method = f"median + {RIDGE_NOISE_LEVELS:g} robust standard deviations of the line measure"
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


def choose_mode(gray: np.ndarray, rgb: np.ndarray, small: np.ndarray, small_fov: np.ndarray, fov_kind: str,
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
    channel, _ = ridge_channel(gray, rgb)
    response = line_measure(block_mean(channel, factor), [1.0, 1.7], dark=True)
    vals = response[small_fov]
    t_line = float(threshold_otsu(vals[vals > 0], nbins=256)) if np.count_nonzero(vals > 0) > 16 else np.inf
    lines = response > t_line
    area = max(1, int(np.count_nonzero(lines)))
    perimeter = int(np.count_nonzero(lines & ~ndimage.binary_erosion(lines, structure=EIGHT)))
    elongation = perimeter / area
    decision["line_perimeter_per_area"] = round(elongation, 3)
    return ("ridge" if elongation > 0.5 else "threshold"), decision


