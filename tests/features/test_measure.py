"""measure(): the stable dict, calibration, and input checks."""

import json

import numpy as np
import pytest

from service.errors import SpecimenError
from service.features import Features, measure, radial_profile
from tests.features import shapes


def _plain(value):
    """True when ``value`` holds only JSON-ready plain Python objects."""
    if isinstance(value, dict):
        return all(isinstance(k, str) and _plain(v) for k, v in value.items())
    if isinstance(value, list):
        return all(_plain(v) for v in value)
    return value is None or type(value) in (bool, int, float, str)


@pytest.fixture(scope="module")
def tree():
    mask, truth = shapes.binary_tree(5)
    return mask, truth


def test_stable_keys_and_plain_values(tree):
    mask, truth = tree
    features = measure(mask, center_rc=truth["foot_rc"])
    assert isinstance(features, Features)
    d = features.to_dict()
    assert _plain(d)
    json.dumps(d)
    assert d["calibrated"] is False
    assert isinstance(d["box_dimension"]["value"], float)
    low, high = d["box_dimension"]["ci95"]
    assert low < d["box_dimension"]["value"] < high
    assert isinstance(d["mass_radius_dimension"]["value"], float)
    assert len(d["lacunarity"]["scales_px"]) == len(d["lacunarity"]["values"]) > 0
    assert (d["skeleton"]["tips"], d["skeleton"]["junctions"], d["skeleton"]["branches"]) == (17, 15, 31)
    assert isinstance(d["warnings"], list)
    # Overlay arrays are in the mask's frame and lie on the specimen.
    assert features.skeleton_mask.shape == mask.shape and mask[features.skeleton_mask].all()
    assert features.tips_rc.shape == (17, 2) and mask[tuple(features.tips_rc.T)].all()
    assert features.junctions_rc.shape == (15, 2)


def test_calibrated_lengths_are_pixel_lengths_times_pixel_size(tree):
    mask, truth = tree
    px = measure(mask, center_rc=truth["foot_rc"]).to_dict()
    mm = measure(mask, center_rc=truth["foot_rc"], pixel_size_mm=0.025).to_dict()
    assert mm["calibrated"] is True and mm["pixel_size_mm"] == 0.025
    assert mm["box_dimension"]["value"] == px["box_dimension"]["value"]
    pairs = [
        (mm["branch_width_mm"], px["branch_width_px"]),
        (mm["skeleton"]["total_length_mm"], mm["skeleton"]["total_length_px"]),
        (mm["skeleton"]["branch_length_mm"]["median"], px["skeleton"]["branch_length_px"]["median"]),
        (mm["profile"]["radius_of_gyration_mm"], px["profile"]["radius_of_gyration_px"]),
        (mm["profile"]["perimeter_mm"], px["profile"]["perimeter_px"]),
        (mm["profile"]["area_mm2"], px["profile"]["area_px"] * 0.025),
    ]
    for calibrated, pixels in pairs:
        assert calibrated == pytest.approx(pixels * 0.025, rel=1e-12)
    assert mm["box_dimension"]["fit_range_mm"] == pytest.approx([v * 0.025 for v in px["box_dimension"]["fit_range_px"]])
    assert mm["lacunarity"]["scales_mm"] == pytest.approx([v * 0.025 for v in px["lacunarity"]["scales_px"]])


def test_radial_profile_of_a_disk():
    disk = shapes.filled_disk(401)
    profile = radial_profile(disk, center_rc=(200, 200))
    # Exact for a disk of radius R: Rg = R / sqrt(2), area fraction 1, perimeter 2 pi R,
    # radial density 1 inside.
    r = profile.bounding_radius_px
    assert r == pytest.approx(199, abs=1)
    assert profile.radius_of_gyration_px == pytest.approx(r / np.sqrt(2), rel=0.01)
    assert profile.area_fraction == pytest.approx(1.0, abs=0.02)
    assert profile.perimeter_px == pytest.approx(2 * np.pi * r, rel=0.03)
    assert np.all(profile.density[:-1] > 0.98)


def test_bad_input():
    with pytest.raises(SpecimenError):
        measure(np.zeros((64, 64), dtype=bool))
    tiny = np.zeros((64, 64), dtype=bool)
    tiny[30:33, 30:35] = True  # 5 px across: too few box sizes for any fit
    with pytest.raises(SpecimenError):
        measure(tiny)
    with pytest.raises(ValueError):
        measure(np.ones((3, 3, 3), dtype=bool))
    with pytest.raises(ValueError):
        measure(shapes.filled_disk(41), pixel_size_mm=-1.0)
    with pytest.raises(ValueError):
        measure(shapes.filled_disk(41), center_rc=(1.0, float("inf")))


def test_crofton_perimeter_is_scikit_images():
    """The radial profile's perimeter is scikit-image's ``perimeter_crofton`` in four
    directions (the reference library), to the last bit, on random masks of every density,
    masks touching their frame and a single pixel."""
    from skimage.measure import perimeter_crofton

    from service.features.profiles import crofton_perimeter

    rng = np.random.default_rng(4)
    masks = [rng.random((int(rng.integers(1, 50)), int(rng.integers(1, 50)))) < rng.uniform(0.0, 1.0)
             for _ in range(200)]
    masks.append(np.ones((1, 1), dtype=bool))
    for mask in masks:
        assert crofton_perimeter(mask) == perimeter_crofton(mask, directions=4)
