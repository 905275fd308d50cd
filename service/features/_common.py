"""Input checks and the local branch width shared by every measurement."""

from __future__ import annotations

import threading

import numpy as np
from skimage.morphology import skeletonize

from service.distance import distance_to_background
from service.errors import SpecimenError


def as_specimen_mask(mask: np.ndarray) -> np.ndarray:
    """Return ``mask`` as a 2-D bool array, raising if it cannot be measured.

    Raises
    ------
    ValueError
        If ``mask`` is not a 2-D array (a programmer error).
    SpecimenError
        If the mask holds no occupied pixel.
    """
    mask = np.asarray(mask)
    if mask.ndim != 2:
        raise ValueError(f"mask must be a 2-D array, got {mask.ndim} dimension(s) of shape {mask.shape}")
    if mask.dtype != bool:
        mask = mask != 0
    if not mask.any():
        raise SpecimenError("the mask is empty: no occupied pixel to measure")
    return mask


_LAST_SKELETON = threading.local()


def skeleton_of(mask: np.ndarray) -> np.ndarray:
    """Zhang-Suen skeleton of a 2-D bool mask (``skimage.morphology.skeletonize``), a fresh array.

    The last mask and its skeleton are kept per thread: the measurements and the matcher's
    normalisation both thin the same bounding-box crop of one specimen, and thinning is
    the dearest step they share. A mask equal to the last one, pixel for pixel, gets a copy
    of the same skeleton; any other mask is thinned anew.
    """
    last = getattr(_LAST_SKELETON, "entry", None)
    if last is not None and last[0].shape == mask.shape and np.array_equal(last[0], mask):
        return last[1].copy()
    skeleton = skeletonize(mask)
    _LAST_SKELETON.entry = (np.array(mask, dtype=bool), skeleton.copy())
    return skeleton


def check_pixel_size(pixel_size_mm: float | None) -> float | None:
    """Return a positive finite pixel size in mm, or None; raise ValueError otherwise."""
    if pixel_size_mm is None:
        return None
    value = float(pixel_size_mm)
    if not np.isfinite(value) or value <= 0:
        raise ValueError(f"pixel_size_mm must be a positive finite number, got {pixel_size_mm!r}")
    return value


def specimen_center(points_rc: np.ndarray, center_rc: tuple[float, float] | None) -> np.ndarray:
    """``center_rc`` as a checked float (row, col) pair; the centroid of the points if None."""
    if center_rc is None:
        return points_rc.mean(axis=0)
    center = np.asarray(center_rc, dtype=float)
    if center.shape != (2,) or not np.all(np.isfinite(center)):
        raise ValueError(f"center_rc must be a finite (row, col) pair, got {center_rc!r}")
    return center


def crop_to_specimen(mask: np.ndarray, pad_px: int = 1) -> tuple[np.ndarray, tuple[int, int]]:
    """Crop ``mask`` to the bounding box of its occupied pixels, padded with background.

    Returns the crop and the (row, col) of its origin in ``mask`` coordinates (the
    origin may be negative when padding reaches past the frame).
    """
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    r0, r1, c0, c1 = rows[0], rows[-1] + 1, cols[0], cols[-1] + 1
    crop = np.zeros((r1 - r0 + 2 * pad_px, c1 - c0 + 2 * pad_px), dtype=bool)
    crop[pad_px:-pad_px or None, pad_px:-pad_px or None] = mask[r0:r1, c0:c1]
    return crop, (int(r0) - pad_px, int(c0) - pad_px)


def paste_crop(crop: np.ndarray, origin_rc: tuple[int, int], shape: tuple[int, int]) -> np.ndarray:
    """Place ``crop`` (origin possibly outside the frame) into a zero array of ``shape``."""
    out = np.zeros(shape, dtype=crop.dtype)
    r0, c0 = origin_rc
    sr0, sc0 = max(r0, 0), max(c0, 0)
    sr1, sc1 = min(r0 + crop.shape[0], shape[0]), min(c0 + crop.shape[1], shape[1])
    out[sr0:sr1, sc0:sc1] = crop[sr0 - r0 : sr1 - r0, sc0 - c0 : sc1 - c0]
    return out


def window_of(full: np.ndarray, origin_rc: tuple[int, int], shape: tuple[int, int]) -> np.ndarray:
    """The ``shape`` window of ``full`` at ``origin_rc``, zero where it leaves the array."""
    out = np.zeros(shape, dtype=full.dtype)
    r0, c0 = origin_rc
    sr0, sc0 = max(r0, 0), max(c0, 0)
    sr1, sc1 = min(r0 + shape[0], full.shape[0]), min(c0 + shape[1], full.shape[1])
    out[sr0 - r0 : sr1 - r0, sc0 - c0 : sc1 - c0] = full[sr0:sr1, sc0:sc1]
    return out


def local_width_px(edt: np.ndarray) -> np.ndarray:
    """Stroke width at each pixel from its Euclidean distance to the background.

    A stroke ``w`` pixels wide has ``(w + 1) / 2`` from its centre pixel to the nearest
    background pixel centre, so the width is ``2 * edt - 1`` (a one-pixel line gives 1).
    """
    return 2.0 * edt - 1.0


def median_branch_width_px(
    mask: np.ndarray, *, edt: np.ndarray | None = None, skeleton_mask: np.ndarray | None = None
) -> float:
    """Median stroke width of the specimen, read on its skeleton.

    Parameters
    ----------
    mask : (H, W) bool ndarray
    edt, skeleton_mask : ndarray, optional
        The distance transform and skeleton of ``mask`` when the caller already has them.
    """
    if edt is None:
        edt = distance_to_background(mask)
    if skeleton_mask is None:
        skeleton_mask = skeleton_of(mask)
    on_skeleton = edt[skeleton_mask]
    if on_skeleton.size == 0:
        on_skeleton = edt[mask]
    return float(max(1.0, np.median(local_width_px(on_skeleton))))


def summed_area_table(mask: np.ndarray, dtype=None) -> np.ndarray:
    """Summed-area table with a zero first row and column: ``T[r, c] = mask[:r, :c].sum()``.

    By default int32 while the total fits (faster to build and read), int64 beyond; a
    float ``dtype`` serves interpolation between its entries.
    """
    if dtype is None:
        dtype = np.int32 if mask.size < 2**31 - 1 else np.int64
    table = np.zeros((mask.shape[0] + 1, mask.shape[1] + 1), dtype=dtype)
    # Copied in first: numpy's cumulative sum casting a bool mask as it goes is 3-4 times slower.
    table[1:, 1:] = mask
    np.cumsum(table[1:, 1:], axis=0, out=table[1:, 1:])
    np.cumsum(table[1:, 1:], axis=1, out=table[1:, 1:])
    return table
