"""The distance transform every measure uses, against scipy's (the reference library) and
against distances worked out by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from service.distance import distance_to_background


def _masks():
    rng = np.random.default_rng(11)
    yield "noise", rng.random((301, 257)) < 0.6
    yield "blobs", ndimage.binary_dilation(rng.random((400, 500)) < 0.002, iterations=12)
    yield "one pixel", np.pad(np.ones((1, 1), bool), 5)
    yield "no background on a side", np.pad(np.ones((40, 60), bool), ((0, 3), (0, 0)))
    yield "view, not contiguous", (rng.random((200, 300)) < 0.8)[::2, 1::3]
    yield "empty", np.zeros((20, 30), bool)
    yield "no background at all", np.ones((20, 30), bool)
    yield "one row", rng.random((1, 50)) < 0.5


@pytest.mark.parametrize("name, mask", list(_masks()), ids=[n for n, _ in _masks()])
def test_distances_are_scipys_bit_for_bit(name, mask):
    """The values feed medians and comparisons with thresholds: they must be scipy's
    ``distance_transform_edt`` exactly, not to within rounding, so no reading changes."""
    want = ndimage.distance_transform_edt(mask)
    got = distance_to_background(mask)
    assert got.dtype == np.float64 and got.shape == mask.shape
    np.testing.assert_array_equal(got, want)


def test_distances_worked_out_by_hand():
    """A 7 x 9 block of specimen in background: a pixel's distance is to the nearest pixel
    outside, so 1 on the outline, and the block's centre is 4 rows from the nearer side;
    a pixel beside a single background pixel diagonally away is sqrt(2) from it."""
    mask = np.zeros((11, 13), bool)
    mask[2:9, 2:11] = True
    d = distance_to_background(mask)
    assert d[2, 5] == 1.0 and d[8, 10] == 1.0
    assert d[5, 6] == 4.0
    assert not d[~mask].any()
    hole = np.ones((5, 5), bool)
    hole[0, 0] = False
    assert distance_to_background(hole)[1, 1] == math.sqrt(2.0)
