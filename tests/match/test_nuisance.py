"""The reference drawings in several styles: what each style draws, and that it is repeatable."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import ndimage

from service.match.normalise import normalise
from service.match.nuisance import THICKNESS_SITES, DrawingStyle, _dilate_disc, draw_cluster, drawing_styles
from service.match.vector import lattice_features, FEATURE_NAMES


@pytest.mark.parametrize("radius", [1.0, 1.5, 2.3, 3.7, 5.0])
def test_the_disc_dilation_is_the_euclidean_distance_threshold(radius):
    # Reference: scipy's exact Euclidean distance transform; a pixel is inside the dilation
    # by the digital disc of radius r iff its distance to the nearest marked pixel is <= r.
    marks = np.random.default_rng(3).random((120, 140)) < 0.004
    expected = ndimage.distance_transform_edt(~marks) <= radius
    np.testing.assert_array_equal(_dilate_disc(marks, radius), expected)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_straight_branch_is_drawn_as_wide_as_the_style_says(seed):
    # Exact geometry: a strip of width w and length L has area w L, which is what the
    # normalisation's width (area over skeleton length) reads; a blur and a threshold near
    # one half move a straight edge by a fraction of a pixel.
    row = np.zeros((5, 161), dtype=np.int32)
    row[2, :] = np.arange(1, 162)
    for style in drawing_styles(seed):
        style = dataclasses.replace(style, electrode_sites=0.0)  # the disc is not a branch
        width_sites = normalise(draw_cluster(row, style)).branch_width_px / style.px_per_site
        assert width_sites == pytest.approx(style.thickness_sites, abs=0.12), style


def test_a_compact_cluster_stays_solid_at_the_thinnest_drawing():
    # A filled square of sites is a convex region whatever the stroke width: its drawing
    # has no enclosed holes (hole fraction exactly 0).
    block = np.zeros((44, 44), dtype=np.int32)
    block[2:42, 2:42] = 1
    drawn = draw_cluster(block, DrawingStyle(0.7, 4.0, 0.5, 0.5, 0, 0.0))
    vector = lattice_features(normalise(drawn).lattice)
    assert vector.values[FEATURE_NAMES.index("hole_fraction")] == 0.0


def test_every_cluster_is_drawn_at_every_thickness_and_repeatably():
    styles = drawing_styles(12345)
    assert [s.thickness_sites for s in styles] == list(THICKNESS_SITES)
    assert drawing_styles(12345) == styles
    assert drawing_styles(54321) != styles
    cluster = np.zeros((9, 9), dtype=np.int32)
    cluster[4, 1:8] = np.arange(1, 8)
    cluster[1:8, 4] = np.arange(8, 15)
    cluster[4, 4] = 1
    for style in styles:
        np.testing.assert_array_equal(draw_cluster(cluster, style), draw_cluster(cluster, style))


def test_a_drawing_larger_than_pillows_bomb_guard_is_still_compressed_and_decoded(monkeypatch):
    # A 100,000-site cluster drawn at 5 px a site exceeds Pillow's guard against
    # decompression bombs (about 179 million pixels); the library build decodes its own JPEG
    # all the same. The guard is lowered here so that a small drawing exceeds it: the
    # drawing must be the one made under the usual guard, and the guard must be restored.
    from PIL import Image

    cluster = np.zeros((9, 9), dtype=np.int32)
    cluster[4, 1:8] = np.arange(1, 8)
    style = DrawingStyle(1.0, 4.0, 0.6, 0.5, 75, 0.0)
    expected = draw_cluster(cluster, style)
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 100)
    np.testing.assert_array_equal(draw_cluster(cluster, style), expected)
    assert Image.MAX_IMAGE_PIXELS == 100
