"""Shared pieces of the segmentation package: input conversion, reduced copies, the field
of view as an ellipse, and robust statistics."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage

from service.imaging.load import LoadedImage, _luma

EIGHT = np.ones((3, 3), dtype=bool)
# Long side of the reduced copy used for the background, the field of view and the polarity.
SMALL_SIDE_PX = 512


@dataclass(frozen=True)
class Field:
    """An elliptical field of view in full-resolution pixels.

    ``a`` is the semi-axis along the direction ``theta`` (radians, from +x towards +y in image
    coordinates), ``b`` the other; a circle has ``a == b``.
    """

    cy: float
    cx: float
    a: float
    b: float
    theta: float
    source: str

    @property
    def r(self) -> float:
        """Radius of the circle of equal area."""
        return math.sqrt(self.a * self.b)

    def scaled(self, factor: float, source: str | None = None) -> "Field":
        """The same ellipse with both semi-axes times ``factor``."""
        return Field(self.cy, self.cx, self.a * factor, self.b * factor, self.theta, source or self.source)

    def shrunk(self, px: float) -> "Field":
        """The ellipse with both semi-axes ``px`` shorter (not below one pixel)."""
        return Field(self.cy, self.cx, max(self.a - px, 1.0), max(self.b - px, 1.0), self.theta, self.source)

    def reduced(self, factor: int) -> "Field":
        """The same ellipse on a grid reduced by ``factor`` (pixel i there sits at i * factor + (factor - 1) / 2)."""
        if factor == 1:
            return self
        off = (factor - 1) / 2.0
        return Field((self.cy - off) / factor, (self.cx - off) / factor, self.a / factor, self.b / factor, self.theta,
                     self.source)

    def boundary(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """``n`` points on the ellipse, as (rows, cols)."""
        t = np.linspace(0.0, 2.0 * np.pi, n, endpoint=False)
        c, s = math.cos(self.theta), math.sin(self.theta)
        x = self.a * np.cos(t)
        y = self.b * np.sin(t)
        return self.cy + x * s + y * c, self.cx + x * c - y * s

    def rho(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Normalised elliptical radius of points (1 on the boundary)."""
        dy, dx = rows - self.cy, cols - self.cx
        c, s = math.cos(self.theta), math.sin(self.theta)
        u = (dx * c + dy * s) / self.a
        v = (-dx * s + dy * c) / self.b
        return np.sqrt(u * u + v * v)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"center_rc": [round(self.cy, 1), round(self.cx, 1)], "radius_px": round(self.r, 1),
                               "source": self.source}
        if abs(self.a - self.b) > 0.005 * max(self.a, self.b):
            out["ellipse"] = {"semi_axes_px": [round(self.a, 1), round(self.b, 1)],
                              "angle_deg": round(math.degrees(self.theta) % 180.0, 1)}
        return out

    def as_roi(self) -> tuple[float, ...]:
        """The ``roi`` argument of ``segment`` that reproduces this field."""
        if abs(self.a - self.b) <= 0.005 * max(self.a, self.b):
            return (round(self.cx, 1), round(self.cy, 1), round(self.r, 1))
        return (round(self.cx, 1), round(self.cy, 1), round(self.a, 1), round(self.b, 1),
                round(math.degrees(self.theta) % 180.0, 2))


def field_mask(shape: tuple[int, int], fov: Field, factor: int = 1) -> np.ndarray:
    """Boolean mask of the field on a grid reduced by ``factor``, built row by row."""
    mask = np.ones(shape, dtype=bool)
    clip_to_field(mask, fov, factor)
    return mask


def clip_to_field(mask: np.ndarray, fov: Field, factor: int = 1) -> None:
    """Clear ``mask`` outside the ellipse in place, row by row (no temporaries).

    Row ``i`` of a grid reduced by ``factor`` sits at full-resolution row ``i * factor + (factor - 1) / 2``;
    each row's inside is the run of columns between the ellipse's two crossings of it.
    """
    h, w = mask.shape
    c, s = math.cos(fov.theta), math.sin(fov.theta)
    # The ellipse as A x^2 + B x y + C y^2 <= 1 in centred full-resolution coordinates.
    ia2, ib2 = 1.0 / (fov.a * fov.a), 1.0 / (fov.b * fov.b)
    qa = c * c * ia2 + s * s * ib2
    qb = 2.0 * c * s * (ia2 - ib2)
    qc = s * s * ia2 + c * c * ib2
    off = (factor - 1) / 2.0
    y = np.arange(h) * float(factor) + (off - fov.cy)
    disc = (qb * y) ** 2 - 4.0 * qa * (qc * y * y - 1.0)
    root = np.sqrt(np.maximum(disc, 0.0))
    x_lo = (-qb * y - root) / (2.0 * qa) + fov.cx
    x_hi = (-qb * y + root) / (2.0 * qa) + fov.cx
    j0 = np.clip(np.ceil((x_lo - off) / factor), 0, w).astype(np.int64)
    j1 = np.clip(np.floor((x_hi - off) / factor) + 1, 0, w).astype(np.int64)
    j1[disc <= 0.0] = 0  # rows the ellipse does not reach
    for row, start, stop in zip(mask, j0.tolist(), j1.tolist()):
        row[:start] = False
        row[max(start, stop):] = False


def as_gray_rgb(image: LoadedImage | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Grey float32 in [0, 1] and RGB uint8 views of a loaded photograph or an array."""
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


def block_mean(a: np.ndarray, factor: int) -> np.ndarray:
    """Mean over factor x factor blocks as float32 (the last partial blocks are dropped); works on
    (H, W) and (H, W, C) arrays of any numeric or bool type without a full-size float copy."""
    if factor == 1:
        return a.astype(np.float32, copy=True)
    if a.dtype == bool:
        # Whole counts, divided as numpy's float32 mean of the blocks divides its sum.
        counts = _block_sums(a, factor, np.uint16 if factor * factor < 2**16 else np.uint32)
        return counts.astype(np.float32) / np.float32(factor * factor)
    out = _block_sums(a, factor, np.float32)
    out *= np.float32(1.0 / (factor * factor))
    return out


def _block_sums(a: np.ndarray, factor: int, dtype) -> np.ndarray:
    """Sums over factor x factor blocks by strided sums, columns then rows: three times faster
    than a sum over the reshaped axes on an RGB photograph, whose short inner axes numpy
    reduces slowly, and five times on a mask."""
    h, w = (a.shape[0] // factor) * factor, (a.shape[1] // factor) * factor
    cols = np.zeros((h, w // factor) + a.shape[2:], dtype=dtype)
    for k in range(factor):
        cols += a[:h, k:w:factor]
    out = np.zeros((h // factor, w // factor) + a.shape[2:], dtype=dtype)
    for k in range(factor):
        out += cols[k::factor]
    return out


def square_closing(mask: np.ndarray, radius: int) -> np.ndarray:
    """``ndimage.binary_closing(mask, structure=EIGHT, iterations=radius)`` (outside the frame
    is background), as one dilation and one erosion by the (2 radius + 1) square, each two
    running extrema along rows and columns: the same pixels, at a third of the cost."""
    size = 2 * radius + 1
    grown = mask.astype(np.uint8)
    for axis in (0, 1):
        grown = ndimage.maximum_filter1d(grown, size, axis=axis, mode="constant", cval=0)
    for axis in (0, 1):
        grown = ndimage.minimum_filter1d(grown, size, axis=axis, mode="constant", cval=0)
    return grown.astype(bool)


def robust_sigma(values: np.ndarray) -> float:
    """1.4826 times the median absolute deviation: the standard deviation of Gaussian noise."""
    return 1.4826 * float(np.median(np.abs(values - np.median(values)))) + 1e-6


def _median_of_counts(counts: np.ndarray) -> float:
    """Median of the values 0, 1, 2, ... held ``counts`` times each (the mean of the two middle ones)."""
    n = int(counts.sum())
    below = np.cumsum(counts)
    return 0.5 * float(np.searchsorted(below, (n - 1) // 2, side="right") + np.searchsorted(below, n // 2, side="right"))


def median_uint8(values: np.ndarray) -> float:
    """``np.median`` of uint8 values, from their histogram: the same number, without a sort."""
    return _median_of_counts(np.bincount(values.ravel(), minlength=256))


def robust_sigma_uint8_steps(levels: np.ndarray) -> float:
    """:func:`robust_sigma` of the differences of horizontal neighbours in a uint8 picture,
    from the histogram of the differences: the same number (every value and mean involved
    is a multiple of a half below 1024, exact in float32), without two sorts."""
    steps = levels[:, 1:].astype(np.int16) - levels[:, :-1]
    counts = np.bincount((steps + 255).ravel(), minlength=511)
    twice_median = 2.0 * _median_of_counts(counts) - 510.0
    # Deviations from the median, doubled so that they are integers.
    twice_deviation = np.abs(2 * np.arange(-255, 256) - int(twice_median))
    return 1.4826 * 0.5 * _median_of_counts(np.bincount(twice_deviation, weights=counts)) + 1e-6
