"""Gliding-box lacunarity against the binomial law (Allain & Cloitre, PRA 44, 3552, 1991)."""

import numpy as np
import pytest

from service.errors import SpecimenError
from service.features import lacunarity
from tests.features.shapes import bernoulli_field, sierpinski_carpet


@pytest.mark.parametrize("p", [0.05, 0.3, 0.7])
def test_bernoulli_field_follows_binomial_variance(p):
    field = bernoulli_field((500, 500), p, seed=11)
    curve = lacunarity(field, scales_px=[1, 2, 3, 5, 8, 13, 21])
    r = curve.scales_px.astype(float)
    # Box mass ~ Binomial(r^2, p): L(r) = 1 + (1 - p) / (p r^2) (CHECK_VALUES.md, exact).
    expected = 1 + (1 - p) / (p * r**2)
    assert np.allclose(curve.values, expected, rtol=0.02)


def test_full_image_is_exactly_one():
    # Every box holds r^2 pixels: zero variance, L = 1 exactly (CHECK_VALUES.md).
    curve = lacunarity(np.ones((257, 300), dtype=bool))
    assert np.all(curve.values == 1.0)


def test_single_pixel_matches_hand_count():
    # One occupied pixel in an n x n image, box side r: the mass is 1 in r^2 of the
    # (n - r + 1)^2 positions, so L = (n - r + 1)^2 / r^2 (direct count).
    image = np.zeros((40, 40), dtype=bool)
    image[20, 20] = True
    curve = lacunarity(image, scales_px=[1, 4, 10])
    r = curve.scales_px.astype(float)
    assert np.allclose(curve.values, (41 - r) ** 2 / r**2)


def test_gaps_raise_lacunarity_at_equal_density():
    # Same occupied fraction, clustered into one block: more lacunar at every scale
    # beyond one pixel than an even scatter (Allain & Cloitre 1991, Fig. 1 discussion).
    scattered = np.zeros((64, 64), dtype=bool)
    scattered[::2, ::2] = True
    clustered = np.zeros((64, 64), dtype=bool)
    clustered[:32, :32] = True
    lac_s = lacunarity(scattered, scales_px=[2, 4, 8]).values
    lac_c = lacunarity(clustered, scales_px=[2, 4, 8]).values
    assert np.all(lac_c > lac_s)


def test_dict_and_bad_input():
    curve = lacunarity(sierpinski_carpet(4))
    d = curve.to_dict(pixel_size_mm=0.5)
    assert d["scales_mm"] == [s * 0.5 for s in d["scales_px"]]
    assert all(type(v) is float for v in d["values"])
    with pytest.raises(SpecimenError):
        lacunarity(np.zeros((10, 10)))
    with pytest.raises(ValueError):
        lacunarity(np.ones((10, 10)), scales_px=[0, 2])
    with pytest.raises(ValueError):
        lacunarity(np.ones((10, 10)), scales_px=[11])
