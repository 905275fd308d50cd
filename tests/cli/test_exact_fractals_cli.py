"""Exact fractals drawn with one-pixel strokes keep their dimension through `ramiform analyze`.

Each fractal is drawn here with numpy (its smallest copies one pixel across), saved as a
PNG (dark on white, padded 40 px) and measured through the command line. The box dimension
the CLI reports must equal that of the drawn mask measured directly with
``service.features.measure`` within 0.01 (segmentation and cleanup must not change a
pattern whose branches are 1 px wide), and lie within 0.04 of the exact value.

Exact values: the similarity dimension log N / log(1/r) of a set made of N copies of itself
scaled by r (B. B. Mandelbrot, *The Fractal Geometry of Nature*, Freeman, 1982; exact
mathematics): Sierpinski carpet log 8 / log 3 = 1.8928, Sierpinski triangle log 3 / log 2 =
1.5850, Vicsek fractal log 5 / log 3 = 1.4650, Koch curve log 4 / log 3 = 1.2619.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from service.cli import main
from service.features import measure

PAD_PX = 40
SAME_AS_MASK = 0.01
NEAR_EXACT = 0.04


def carpet(level: int) -> np.ndarray:
    """Sierpinski carpet on 3**level px: 8 copies at 1/3 (the centre ninth removed at every level)."""
    motif = np.ones((3, 3), dtype=bool)
    motif[1, 1] = False
    out = np.ones((1, 1), dtype=bool)
    for _ in range(level):
        out = np.kron(motif, out)
    return out


def pascal_triangle(rows: int) -> np.ndarray:
    """Pascal's triangle mod 2 on ``rows`` rows: cell (i, j) is set when C(i, j) is odd.

    Built row by row with the recurrence C(i, j) = C(i-1, j-1) + C(i-1, j) taken mod 2 (an
    exclusive or), so no closed form is assumed; at 2**k rows it is the Sierpinski triangle
    (3 copies at 1/2).
    """
    out = np.zeros((rows, rows), dtype=bool)
    out[0, 0] = True
    for i in range(1, rows):
        prev = out[i - 1]
        out[i, 0] = True
        out[i, 1:] = prev[:-1] ^ prev[1:]
    return out


def vicsek(level: int) -> np.ndarray:
    """Vicsek fractal (cross form) on 3**level px: 5 copies at 1/3, the centre and the four arms."""
    motif = np.zeros((3, 3), dtype=bool)
    motif[1, :] = True
    motif[:, 1] = True
    out = np.ones((1, 1), dtype=bool)
    for _ in range(level):
        out = np.kron(motif, out)
    return out


def _draw_polyline(points_xy: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """One-pixel, 8-connected line through the points: one pixel per step along the major axis."""
    out = np.zeros(shape, dtype=bool)
    for (x0, y0), (x1, y1) in zip(points_xy[:-1], points_xy[1:]):
        steps = int(math.ceil(max(abs(x1 - x0), abs(y1 - y0)))) + 1
        t = np.linspace(0.0, 1.0, steps)
        cols = np.rint(x0 + t * (x1 - x0)).astype(int)
        rows = np.rint(y0 + t * (y1 - y0)).astype(int)
        out[rows, cols] = True
    return out


def koch_curve(width_px: int, level: int) -> np.ndarray:
    """Koch curve (4 copies at 1/3) spanning ``width_px``, drawn as a 1 px line."""
    points = np.array([[0.0, 0.0], [width_px - 1.0, 0.0]])
    turn = np.array([[math.cos(math.pi / 3), -math.sin(math.pi / 3)], [math.sin(math.pi / 3), math.cos(math.pi / 3)]])
    for _ in range(level):
        a, b = points[:-1], points[1:]
        third = (b - a) / 3.0
        p1, p3 = a + third, a + 2.0 * third
        p2 = p1 + third @ turn.T  # the bump, turned 60 degrees out of the line
        new = np.stack([a, p1, p2, p3], axis=1).reshape(-1, 2)
        points = np.vstack([new, points[-1:]])
    # y grows downwards in the image: the bumps point up; shift so every point is inside.
    points[:, 1] = -points[:, 1]
    points[:, 1] -= points[:, 1].min()
    height = int(math.ceil(points[:, 1].max())) + 1
    return _draw_polyline(points, (height, width_px))


CASES = {
    # name: (mask builder, exact similarity dimension log N / log(1/r), Mandelbrot 1982)
    "sierpinski_carpet_level6_729px": (lambda: carpet(6), math.log(8) / math.log(3)),
    "sierpinski_triangle_pascal_mod2_1024px": (lambda: pascal_triangle(1024), math.log(3) / math.log(2)),
    "vicsek_level6_729px": (lambda: vicsek(6), math.log(5) / math.log(3)),
    # Level 5: its smallest segments are 5.8 px; at level 6 (1.9 px) the pixel grid can no
    # longer draw them as a line and the curve collapses into 2 x 2 blobs.
    "koch_curve_1px_line_1400px": (lambda: koch_curve(1400, 5), math.log(4) / math.log(3)),
}


def test_the_drawings_are_the_fractals_asked_for():
    assert carpet(6).shape == (729, 729) and carpet(6).sum() == 8**6
    triangle = pascal_triangle(1024)
    assert triangle.shape == (1024, 1024) and triangle.sum() == 3**10  # Pascal mod 2: 3**k odd entries in 2**k rows
    i, j = 100, 36
    assert triangle[i, j] == (math.comb(i, j) % 2 == 1)
    assert vicsek(6).shape == (729, 729) and vicsek(6).sum() == 5**6
    koch = koch_curve(1400, 5)
    assert koch.shape[1] == 1400
    assert abs(koch.shape[0] - 1400 * math.sqrt(3) / 6) < 3  # the curve's height is sqrt(3)/6 of its span
    # A 1 px line: no 2 x 2 block is fully set.
    k = koch.astype(np.uint8)
    assert (k[:-1, :-1] + k[1:, :-1] + k[:-1, 1:] + k[1:, 1:]).max() <= 3


@pytest.mark.parametrize("name", list(CASES))
def test_cli_measures_the_dimension_of_the_drawn_fractal(name, tmp_path: Path, capsys):
    build, exact = CASES[name]
    mask = np.pad(build(), PAD_PX, constant_values=False)
    picture = np.where(mask, 0, 255).astype(np.uint8)  # dark strokes on white
    path = tmp_path / f"{name}.png"
    Image.fromarray(picture).save(path)

    on_mask = measure(mask).to_dict()["box_dimension"]["value"]
    status = main(["analyze", str(path), "--json", "--workers", "1"])
    record = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert status == 0, record
    through_cli = record["features"]["box_dimension"]["value"]
    cleanup = record["segmentation"].get("cleanup")
    where = f"{name}: CLI {through_cli:.4f}, mask {on_mask:.4f}, exact {exact:.4f}; cleanup {cleanup}"
    print(where)
    assert abs(through_cli - on_mask) <= SAME_AS_MASK, where
    assert abs(through_cli - exact) <= NEAR_EXACT, where  # similarity dimension, Mandelbrot (1982)
