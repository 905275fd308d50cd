"""Areas painted out with a brush: the rasteriser against exact digital shapes.

References: a single brush dab is the digital disc scikit-image draws
(``skimage.draw.disk``: pixel centres strictly within the radius); a straight stroke is the
set of pixel centres closer than the radius to a line segment (the Minkowski sum of the
segment and an open disc, a "capsule"), worked out here by hand for a horizontal stroke.
"""

from __future__ import annotations

import numpy as np
import pytest
from skimage.draw import disk

from service.imaging import segment
from service.imaging.segmentation.scene import stroke_mask


@pytest.mark.parametrize("radius", [0.7, 1.0, 2.5, 6.0, 11.3])
def test_one_dab_is_scikit_images_digital_disc(radius):
    shape = (40, 50)
    # Pixel (row 17, column 23) has its centre at x = 23.5, y = 17.5 in photo pixels.
    painted = stroke_mask([([[23.5, 17.5]], radius)], shape)
    expected = np.zeros(shape, dtype=bool)
    expected[disk((17, 23), radius, shape=shape)] = True
    assert np.array_equal(painted, expected)


def test_a_dab_at_the_edge_is_cut_to_the_image():
    shape = (20, 20)
    painted = stroke_mask([([[0.5, 0.5]], 4.0)], shape)
    expected = np.zeros(shape, dtype=bool)
    expected[disk((0, 0), 4.0, shape=shape)] = True
    assert np.array_equal(painted, expected)


def test_a_horizontal_stroke_covers_exactly_the_rows_within_the_radius_and_rounded_ends():
    shape = (30, 60)
    x0, x1, y, r = 10.5, 40.5, 15.5, 3.0
    painted = stroke_mask([([[x0, y], [25.0, y], [x1, y]], r)], shape)
    rows, cols = np.mgrid[: shape[0], : shape[1]]
    cx, cy = cols + 0.5, rows + 0.5
    # Capsule by hand: the band |y' - y| < r between the ends, and a disc round each end.
    band = (np.abs(cy - y) < r) & (cx >= x0) & (cx <= x1)
    ends = ((cx - x0) ** 2 + (cy - y) ** 2 < r * r) | ((cx - x1) ** 2 + (cy - y) ** 2 < r * r)
    assert np.array_equal(painted, band | ends)
    # between the ends, exactly the rows 13..17 (centres 13.5..17.5, within 3 of 15.5 strictly)
    assert np.flatnonzero(painted[:, 25]).tolist() == [13, 14, 15, 16, 17]


def test_a_slanted_stroke_is_the_union_of_dabs_placed_densely_along_it():
    # The capsule of a segment is the union of the discs centred on it; dabs every 0.01 px
    # approximate it from inside, so they may miss only pixels whose centre lies within
    # 0.01 px of the capsule's edge - none here (checked by the exact distance below).
    shape = (48, 48)
    a, b, r = np.array([6.0, 9.0]), np.array([40.0, 33.0]), 4.2
    painted = stroke_mask([([a.tolist(), b.tolist()], r)], shape)
    union = np.zeros(shape, dtype=bool)
    for t in np.linspace(0, 1, 4200):
        x, y = a + t * (b - a)
        union[disk((y - 0.5, x - 0.5), r, shape=shape)] = True
    assert np.array_equal(painted, union)


def test_strokes_are_ored_and_none_paints_nothing():
    shape = (20, 30)
    one, two = ([[5.5, 5.5]], 2.0), ([[20.5, 12.5], [25.5, 12.5]], 1.5)
    both = stroke_mask([one, two], shape)
    assert np.array_equal(both, stroke_mask([one], shape) | stroke_mask([two], shape))
    assert stroke_mask(None, shape) is None and stroke_mask([], shape) is None


@pytest.mark.parametrize("stroke, reason", [
    (([[500.0, 500.0], [600.0, 520.0]], 5.0), "outside"),
    (([[-10.0, 5.0]], 3.0), "outside"),
    (([], 3.0), "finite point"),
    (([[5.0, 5.0]], 0.0), "radius"),
    (([[5.0, float("nan")]], 2.0), "finite point"),
])
def test_bad_strokes_are_refused_with_the_reason(stroke, reason):
    with pytest.raises(ValueError, match=reason):
        stroke_mask([stroke], (40, 40))


def test_painting_over_part_of_a_specimen_leaves_it_out_of_the_mask():
    # A dark cross on white (a scenario of our own); painting over one arm removes that arm
    # and nothing the brush did not reach, and the reading records the stroke.
    image = np.full((96, 96), 1.0)
    image[46:50, 10:86] = 0.0
    image[10:86, 46:50] = 0.0
    whole = segment(image, polarity="dark", roi=(48, 48, 47))
    stroke = ([[75.0, 48.0], [90.0, 48.0]], 6.0)
    painted = stroke_mask([stroke], image.shape)
    cut = segment(image, polarity="dark", roi=(48, 48, 47), exclude_strokes=[stroke])
    assert whole.mask[painted].any() and not cut.mask[painted].any()
    assert np.count_nonzero(cut.mask) < np.count_nonzero(whole.mask)
    assert cut.settings["reading"]["exclude_strokes"] == [{"points": [[75.0, 48.0], [90.0, 48.0]], "radius_px": 6.0}]
