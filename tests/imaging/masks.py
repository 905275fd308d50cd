"""Known masks drawn for the imaging tests: exact fractals and a seeded random tree."""

from __future__ import annotations

import numpy as np


def vicsek(level: int) -> np.ndarray:
    """Vicsek fractal (cross form) on a 3**level grid: similarity dimension log 5 / log 3."""
    grid = np.ones((1, 1), dtype=bool)
    cross = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], dtype=bool)
    for _ in range(level):
        grid = np.kron(cross, grid)
    return grid


def sierpinski_triangle(level: int) -> np.ndarray:
    """Sierpinski triangle as Pascal's triangle mod 2 on 2**level rows: dimension log 3 / log 2.

    Site (i, j) is occupied when binomial(i, j) is odd, i.e. when ``i & j == j`` (Lucas).
    """
    n = 2**level
    i, j = np.ogrid[:n, :n]
    return ((i & j) == j) & (j <= i)


def random_tree(size: int = 256, *, seed: int, trunks: int = 5, depth: int = 6) -> np.ndarray:
    """A branching tree of one-pixel lines grown from the centre, with a seeded layout.

    Each trunk splits in two at the end of every segment, segments shrinking by 0.72 and
    turning by 18 to 40 degrees, like a sparse deposit; lines are 8-connected.
    """
    rng = np.random.default_rng(seed)
    out = np.zeros((size, size), dtype=bool)
    centre = np.array([size // 2, size // 2], dtype=float)
    stack = [(centre, a, 0.17 * size, 0) for a in rng.uniform(0, 2 * np.pi, trunks)]
    while stack:
        start, angle, length, level = stack.pop()
        end = start + length * np.array([np.sin(angle), np.cos(angle)])
        steps = int(np.ceil(length * 2)) + 1
        pts = np.rint(start[None, :] + np.linspace(0, 1, steps)[:, None] * (end - start)[None, :]).astype(int)
        ok = (pts >= 0).all(axis=1) & (pts < size).all(axis=1)
        out[pts[ok, 0], pts[ok, 1]] = True
        if level + 1 < depth:
            for sign in (-1.0, 1.0):
                turn = sign * np.deg2rad(rng.uniform(18, 40))
                stack.append((end, angle + turn, length * 0.72, level + 1))
    return out


def filled_disk(size: int = 128) -> np.ndarray:
    yy, xx = np.ogrid[:size, :size]
    return (yy - size // 2) ** 2 + (xx - size // 2) ** 2 <= (0.45 * size) ** 2
