"""Raster pictures of a specimen for the pages: photo, annotated overlay, mask, thumbnail (PNG)."""

from __future__ import annotations

import io

import numpy as np
from PIL import Image
from skimage.draw import disk
from skimage.segmentation import find_boundaries

#: Longest side of the photo and overlay shown on the report page.
DISPLAY_PX = 1600
THUMBNAIL_PX = 192

OUTLINE_RGB = (0, 170, 210)
SKELETON_RGB = (255, 196, 0)
TIP_RGB = (230, 0, 120)
JUNCTION_RGB = (40, 90, 255)


def png_bytes(array: np.ndarray) -> bytes:
    """PNG of a uint8 RGB image or a boolean mask (1 bit per pixel)."""
    image = Image.fromarray(array) if array.dtype != bool else Image.fromarray(array).convert("1")
    out = io.BytesIO()
    image.save(out, format="PNG", optimize=array.dtype == bool)
    return out.getvalue()


def _display_scale(shape: tuple[int, ...], longest_px: int) -> float:
    return min(1.0, longest_px / max(shape[:2]))


def _splat(mask: np.ndarray, scale: float, out_shape: tuple[int, int]) -> np.ndarray:
    """Downscale a thin-line mask so no line is lost: every set pixel marks its target pixel."""
    rows, cols = np.nonzero(mask)
    out = np.zeros(out_shape, dtype=bool)
    out[np.minimum((rows * scale).astype(int), out_shape[0] - 1),
        np.minimum((cols * scale).astype(int), out_shape[1] - 1)] = True
    return out


def _resize(rgb: np.ndarray, out_shape: tuple[int, int]) -> np.ndarray:
    if rgb.shape[:2] == out_shape:
        return rgb
    return np.asarray(Image.fromarray(rgb).resize((out_shape[1], out_shape[0]), Image.Resampling.LANCZOS))


def display_photo(rgb: np.ndarray, longest_px: int = DISPLAY_PX) -> np.ndarray:
    """The photo at display size (never enlarged)."""
    scale = _display_scale(rgb.shape, longest_px)
    shape = (max(1, round(rgb.shape[0] * scale)), max(1, round(rgb.shape[1] * scale)))
    return _resize(rgb, shape)


def annotated_overlay(
    rgb: np.ndarray,
    mask: np.ndarray,
    skeleton: np.ndarray | None,
    tips_rc: np.ndarray | None,
    junctions_rc: np.ndarray | None,
    longest_px: int = DISPLAY_PX,
) -> np.ndarray:
    """The photo, dimmed, with the segmentation outline, the skeleton, tips and junctions.

    Drawn at display size; outline and skeleton are carried down without gaps, tips and
    junctions are discs whose radius grows with the picture.
    """
    scale = _display_scale(rgb.shape, longest_px)
    shape = (max(1, round(rgb.shape[0] * scale)), max(1, round(rgb.shape[1] * scale)))
    out = (_resize(rgb, shape).astype(np.float32) * 0.7).astype(np.uint8)
    outline = find_boundaries(mask, mode="inner")
    out[_splat(outline, scale, shape)] = OUTLINE_RGB
    if skeleton is not None:
        out[_splat(skeleton, scale, shape)] = SKELETON_RGB
    radius = max(2.0, max(shape) / 250)
    for points, colour in ((junctions_rc, JUNCTION_RGB), (tips_rc, TIP_RGB)):
        if points is None:
            continue
        for r, c in np.asarray(points, dtype=float).reshape(-1, 2) * scale:
            rr, cc = disk((r, c), radius, shape=shape)
            out[rr, cc] = colour
    return out


def thumbnail(rgb: np.ndarray, longest_px: int = THUMBNAIL_PX) -> np.ndarray:
    return display_photo(rgb, longest_px)


PAPER_RGB = (251, 250, 247)
INK_RGB = (29, 42, 51)


def mask_preview(mask: np.ndarray) -> np.ndarray:
    """A small mask as a picture: the specimen in ink on paper (RGB)."""
    out = np.empty((*mask.shape, 3), dtype=np.uint8)
    out[...] = PAPER_RGB
    out[np.asarray(mask, dtype=bool)] = INK_RGB
    return out


def levels_picture(levels: np.ndarray, display_shape: tuple[int, int]) -> np.ndarray:
    """The picture a threshold is applied to, at the size of the displayed photo (uint8 gray).

    The report page compares it with a slider's value in the browser, pixel by pixel, to
    preview a threshold before anything is measured.
    """
    levels = np.asarray(levels, dtype=np.uint8)
    if levels.shape == tuple(display_shape):
        return levels
    return np.asarray(Image.fromarray(levels).resize((display_shape[1], display_shape[0]), Image.Resampling.BOX))
