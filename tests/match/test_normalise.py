"""Normalisation to one branch width per site, and the lattice feature vector."""

from __future__ import annotations

import numpy as np
import pytest

from service.errors import SpecimenError
from service.match import FEATURE_NAMES, lattice_features, normalise
from service.match.normalise import MIN_RADIUS_SITES
from service.simulate import grow


@pytest.fixture(scope="module")
def dla_cluster() -> np.ndarray:
    return grow("dla", 2000, seed=11) > 0


def _feature(vector, name: str) -> float:
    return float(vector.values[FEATURE_NAMES.index(name)])


@pytest.mark.parametrize("scale", [3, 5, 8])
def test_a_lattice_drawn_at_s_pixels_per_site_comes_back_to_the_lattice(dla_cluster, scale):
    # Exact construction: np.kron draws every site as an s x s block, so one branch = s px
    # and the normalised lattice should be the cluster again, whatever s is.
    drawn = np.kron(dla_cluster, np.ones((scale, scale), dtype=bool))
    result = normalise(drawn)
    assert result.scale_px == pytest.approx(scale, rel=0.15)
    assert result.lattice.sum() == pytest.approx(dla_cluster.sum(), rel=0.3)
    original, again = lattice_features(dla_cluster), lattice_features(result.lattice)
    assert _feature(again, "box_dimension") == pytest.approx(_feature(original, "box_dimension"), abs=0.05)
    assert _feature(again, "log_lacunarity_r4") == pytest.approx(_feature(original, "log_lacunarity_r4"), abs=0.1)


def test_a_lattice_cluster_is_left_as_it_is(dla_cluster):
    result = normalise(dla_cluster)
    assert result.scale_px == 1.0
    assert result.lattice.sum() == dla_cluster.sum()


def test_a_filled_disc_keeps_a_lattice_of_the_minimum_radius_and_its_exact_outline():
    yy, xx = np.mgrid[:801, :801]
    disc = (yy - 400) ** 2 + (xx - 400) ** 2 <= 350**2
    result = normalise(disc)
    assert result.capped
    radius_sites = np.sqrt(result.lattice.sum() / np.pi)
    assert radius_sites == pytest.approx(MIN_RADIUS_SITES, rel=0.05)
    vector = lattice_features(result.lattice)
    # Exact: the 4-connected outline of a digital convex set is the perimeter of its
    # bounding box, 8R for a disc, against 2 pi R for the disc itself: ratio 4 / pi.
    assert _feature(vector, "log_roughness") == pytest.approx(np.log(4 / np.pi), abs=0.03)
    assert _feature(vector, "hole_fraction") == 0.0
    # A disc fills its bounding circle (up to the digitisation of its edge).
    assert _feature(vector, "log_fill_fraction") == pytest.approx(0.0, abs=0.06)
    assert _feature(vector, "aspect_ratio") == pytest.approx(1.0, abs=0.02)


def test_a_thick_straight_stroke_is_a_line_one_site_wide():
    stroke = np.zeros((100, 900), dtype=bool)
    stroke[46:53, 50:850] = True  # 7 px wide, 800 px long
    result = normalise(stroke)
    assert result.scale_px == pytest.approx(7.0, rel=0.1)
    assert result.lattice.sum() == pytest.approx(800 / 7, rel=0.15)
    vector = lattice_features(result.lattice)
    # Exact for a line: its gyration tensor has one eigenvalue ~0 (width over length here).
    assert _feature(vector, "aspect_ratio") < 0.03
    # Exact for a segment: box dimension 1 (one box per box length along it).
    assert _feature(vector, "box_dimension") == pytest.approx(1.0, abs=0.05)


def test_too_small_a_specimen_is_refused_clearly():
    tiny = np.zeros((20, 20), dtype=bool)
    tiny[5:9, 5:9] = True
    with pytest.raises(SpecimenError, match="at least"):
        lattice_features(normalise(tiny).lattice)
    with pytest.raises(SpecimenError):
        normalise(np.zeros((10, 10), dtype=bool))


def test_skeleton_length_counts_side_steps_as_1_and_diagonal_steps_as_root_2():
    """Exact objects: a straight run of n pixels along a row is n - 1 long, along a diagonal
    (n - 1) sqrt 2; the 8-pixel ring round one pixel has 8 side links and 4 diagonal ones
    (edge midpoint to edge midpoint), and lies on the frame's edge so that pixels beyond the
    frame must count as empty."""
    from service.match.normalise import skeleton_length_px

    row = np.zeros((5, 40), dtype=bool)
    row[2, 3:33] = True
    assert skeleton_length_px(row) == pytest.approx(29.0)
    diagonal = np.eye(25, dtype=bool)
    assert skeleton_length_px(diagonal) == pytest.approx(24 * np.sqrt(2.0))
    ring = np.ones((3, 3), dtype=bool)
    ring[1, 1] = False
    # Corners see 2 side neighbours; edge midpoints 2 side and 2 diagonal ones; each link is seen twice.
    side_links, diagonal_links = (4 * 2 + 4 * 2) / 2, (4 * 2) / 2
    assert skeleton_length_px(ring) == pytest.approx(side_links + np.sqrt(2.0) * diagonal_links)
