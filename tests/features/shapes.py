"""Exact geometric objects drawn as binary images, for checks against known values.

Each generator returns a bool mask. The self-similar sets are drawn at their natural
level so one pixel is one smallest copy: their similarity dimension log N / log(1/r)
is exact (CHECK_VALUES.md, "Exact (mathematics)").
"""

from __future__ import annotations

import math

import numpy as np
from skimage.draw import disk as draw_disk
from skimage.draw import line as draw_line
from skimage.draw import polygon as draw_polygon

SIERPINSKI_CARPET_DIMENSION = math.log(8) / math.log(3)
SIERPINSKI_TRIANGLE_DIMENSION = math.log(3) / math.log(2)
VICSEK_DIMENSION = math.log(5) / math.log(3)
KOCH_DIMENSION = math.log(4) / math.log(3)


def _kronecker_fractal(motif: np.ndarray, level: int) -> np.ndarray:
    image = np.ones((1, 1), dtype=bool)
    for _ in range(level):
        image = np.kron(image, motif).astype(bool)
    return image


def sierpinski_carpet(level: int = 6) -> np.ndarray:
    """Sierpinski carpet, ``3 ** level`` px square: 8 copies at ratio 1/3."""
    motif = np.ones((3, 3), dtype=bool)
    motif[1, 1] = False
    return _kronecker_fractal(motif, level)


def vicsek(level: int = 6) -> np.ndarray:
    """Vicsek fractal (cross form), ``3 ** level`` px square: 5 copies at ratio 1/3."""
    motif = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], dtype=bool)
    return _kronecker_fractal(motif, level)


def sierpinski_triangle(level: int = 10) -> np.ndarray:
    """Sierpinski triangle as Pascal's triangle mod 2, ``2 ** level`` px: 3 copies at 1/2.

    Pixel (i, j) is set when C(i, j) is odd, i.e. ``i & j == j`` (Lucas' theorem).
    """
    n = 2**level
    i, j = np.ogrid[:n, :n]
    return (i & j) == j


def koch_curve(level: int = 6, width_px: int = 1460) -> np.ndarray:
    """Koch curve drawn as a one-pixel 8-connected polyline, ``width_px`` across."""
    points = np.array([0.0 + 0.0j, 1.0 + 0.0j])
    rotate = np.exp(1j * np.pi / 3)
    for _ in range(level):
        a, b = points[:-1], points[1:]
        step = (b - a) / 3
        p1, p2 = a + step, a + 2 * step
        peak = p1 + step * rotate
        points = np.append(np.stack([a, p1, peak, p2], axis=1).ravel(), points[-1])
    scale = width_px - 3
    rows = np.round((points.imag.max() - points.imag) * scale).astype(int) + 1
    cols = np.round(points.real * scale).astype(int) + 1
    image = np.zeros((rows.max() + 2, width_px), dtype=bool)
    for r0, c0, r1, c1 in zip(rows[:-1], cols[:-1], rows[1:], cols[1:]):
        rr, cc = draw_line(r0, c0, r1, c1)
        image[rr, cc] = True
    return image


def filled_disk(size_px: int = 801) -> np.ndarray:
    """A filled disk touching the frame."""
    image = np.zeros((size_px, size_px), dtype=bool)
    rr, cc = draw_disk((size_px // 2, size_px // 2), size_px // 2 - 1, shape=image.shape)
    image[rr, cc] = True
    return image


def straight_line(length_px: int = 1000, angle_deg: float = 0.0) -> np.ndarray:
    """A one-pixel straight segment of the given length and angle."""
    theta = math.radians(angle_deg)
    dr, dc = -math.sin(theta) * (length_px - 1), math.cos(theta) * (length_px - 1)
    size = length_px + 4
    image = np.zeros((size, size), dtype=bool)
    r0 = size // 2 - int(round(dr / 2))
    c0 = size // 2 - int(round(dc / 2))
    rr, cc = draw_line(r0, c0, r0 + int(round(dr)), c0 + int(round(dc)))
    image[rr, cc] = True
    return image


def bernoulli_field(shape: tuple[int, int], p: float, seed: int) -> np.ndarray:
    """Each pixel occupied independently with probability ``p``."""
    return np.random.default_rng(seed).random(shape) < p


def _thick_segment(image: np.ndarray, start: tuple[float, float], end: tuple[float, float], width: float) -> None:
    (r0, c0), (r1, c1) = start, end
    length = math.hypot(r1 - r0, c1 - c0)
    nr, nc = -(c1 - c0) / length * width / 2, (r1 - r0) / length * width / 2
    rr, cc = draw_polygon(
        [r0 + nr, r1 + nr, r1 - nr, r0 - nr], [c0 + nc, c1 + nc, c1 - nc, c0 - nc], shape=image.shape
    )
    image[rr, cc] = True


def binary_tree(
    depth: int = 5,
    *,
    width_px: float = 7.0,
    trunk_px: float = 260.0,
    shrink: float = 0.6,
    half_angle_deg: float = 35.0,
) -> tuple[np.ndarray, dict]:
    """A perfect binary tree drawn with thick straight strokes and no crossings.

    Generation 1 is the trunk (growing up from the bottom centre); each generation
    splits into two at ``+- half_angle_deg``, ``depth`` generations in all. Strokes
    have square ends (so a bare skeleton grows spurs at every tip) and round joints.

    Returns the mask and the exact graph: tips ``2 ** (depth - 1) + 1`` (leaves and the
    trunk's foot), junctions ``2 ** (depth - 1) - 1``, branches ``2 ** depth - 1``,
    Strahler order ``depth``, the foot's (row, col) and the branching angle.
    """
    height = int(trunk_px * sum(shrink**g for g in range(depth)) + 4 * width_px)
    width = int(2 * height)
    image = np.zeros((height, width), dtype=bool)
    foot = (height - 2 * width_px, width / 2)
    stack = [(foot, math.pi / 2, trunk_px, 1)]
    while stack:
        (r, c), heading, length, generation = stack.pop()
        end = (r - length * math.sin(heading), c + length * math.cos(heading))
        _thick_segment(image, (r, c), end, width_px)
        if generation < depth:
            rr, cc = draw_disk(end, width_px / 2, shape=image.shape)
            image[rr, cc] = True
            for turn in (-1, 1):
                stack.append((end, heading + turn * math.radians(half_angle_deg), length * shrink, generation + 1))
    leaves = 2 ** (depth - 1)
    truth = {
        "tips": leaves + 1,
        "junctions": leaves - 1,
        "branches": 2 * leaves - 1,
        "strahler_order": depth,
        "foot_rc": foot,
        "branching_angle_deg": 2 * half_angle_deg,
    }
    return image, truth
