"""Photo-like renderings: the mask drawn is the mask shown, at the width and polarity asked for."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from service.imaging import render_photo, render_specimen
from tests.imaging.masks import random_tree, vicsek


def test_same_seed_same_photo_other_seed_other_photo():
    tree = random_tree(128, seed=3)
    a = render_specimen(tree, seed=1, size_px=256)
    b = render_specimen(tree, seed=1, size_px=256)
    c = render_specimen(tree, seed=2, size_px=256)
    np.testing.assert_array_equal(a.image, b.image)
    np.testing.assert_array_equal(a.truth, b.truth)
    assert not np.array_equal(a.image, c.image)
    np.testing.assert_array_equal(render_photo(tree, seed=1, size_px=256), a.image)


def test_a_one_site_line_is_drawn_at_the_requested_thickness():
    line = np.zeros((101, 101), dtype=bool)
    line[50, 10:91] = True  # through the seed site (50, 50)
    rendered = render_specimen(line, seed=0, size_px=512, thickness_px=9.0, electrode=False, offset=0.0)
    column = rendered.truth[:, 256]
    assert column.sum() in (8, 9, 10)  # 9 px, give or take the pixel grid
    assert rendered.image.shape == (512, 512, 3) and rendered.image.dtype == np.uint8


def test_scaling_maps_the_farthest_site_to_the_requested_extent():
    square = vicsek(3)  # 27 x 27, seed at (13, 13), farthest sites at the arm ends
    rendered = render_specimen(square, seed=0, size_px=600, extent=0.5, electrode=False, offset=0.0)
    rows, cols = np.nonzero(rendered.truth)
    reach = np.hypot(rows - rendered.center_rc[0], cols - rendered.center_rc[1]).max()
    assert reach == pytest.approx(0.5 * rendered.dish_radius_px, rel=0.04)


@pytest.mark.parametrize("polarity", ["dark", "bright"])
def test_polarity_electrode_and_dish(polarity):
    tree = random_tree(128, seed=5)
    rendered = render_specimen(tree, seed=4, size_px=400, polarity=polarity, thickness_px=7.0)
    gray = rendered.image.astype(float).mean(axis=2)
    core = ndimage.binary_erosion(rendered.truth, iterations=2)
    dy = np.arange(400)[:, None] - rendered.dish_center_rc[0]
    dx = np.arange(400)[None, :] - rendered.dish_center_rc[1]
    solution = ~ndimage.binary_dilation(rendered.truth, iterations=6) & (dy**2 + dx**2 < (0.8 * rendered.dish_radius_px) ** 2)
    if polarity == "dark":
        assert gray[core].mean() < gray[solution].mean() - 60
    else:
        assert gray[core].mean() > gray[solution].mean() + 60
    r, c = (int(round(v)) for v in rendered.center_rc)
    assert rendered.truth[r, c]  # the electrode disc is part of the specimen drawn
    assert (dy**2 + dx**2)[rendered.truth].max() < rendered.dish_radius_px**2  # inside the dish


def test_jpeg_round_trip_changes_the_pixels_a_little():
    tree = random_tree(128, seed=6)
    plain = render_specimen(tree, seed=3, size_px=256, noise=0.0)
    jpeg = render_specimen(tree, seed=3, size_px=256, noise=0.0, jpeg_quality=60)
    difference = np.abs(plain.image.astype(int) - jpeg.image.astype(int))
    assert 0 < difference.mean() < 6


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="empty"):
        render_specimen(np.zeros((10, 10)), seed=0)
    with pytest.raises(ValueError, match="polarity"):
        render_specimen(np.ones((3, 3)), seed=0, polarity="grey")
    with pytest.raises(ValueError, match="jpeg_quality"):
        render_specimen(np.ones((3, 3)), seed=0, jpeg_quality=100)
