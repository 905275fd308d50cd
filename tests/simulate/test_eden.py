"""Eden growth: structure, determinism, and compactness (D = 2)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from service.simulate.eden import eden
from tests.simulate.growth_helpers import (
    arrival_sites,
    disc_fill_fraction,
    grown,
    is_connected_in_order,
    mass_radius_dimension,
)

SEEDS = (0, 1, 2, 3)


def test_cluster_is_compact():
    clusters = [grown("eden", 10000, s) for s in SEEDS]
    # Eden clusters are compact, D = 2 (Eden 1961; from memory). Mass within r of the seed,
    # r in [3, R/2], mean of 4 seeds of 10,000 sites:
    assert np.mean([mass_radius_dimension(c) for c in clusters]) >= 1.9
    # Compact means hole-free inside: perimeter sites deep in the cluster are filled long
    # before the front moves on (Eden 1961). Disc of half the cluster radius about the seed:
    assert min(disc_fill_fraction(c, 0.5) for c in clusters) >= 0.995


def _growth_exponent(lattice: np.ndarray, counts: np.ndarray) -> float:
    """Slope of log W against log R for the outer boundary of the first N sites, N in counts.

    W is the standard deviation and R the mean of the boundary sites' distances to the seed.
    For radial growth R grows linearly in time, so W ~ R^beta.
    """
    centre = np.array(lattice.shape) // 2
    mean_radius, width = [], []
    for n in counts:
        body = ndimage.binary_fill_holes((lattice > 0) & (lattice <= n))
        rows, cols = np.nonzero(body & ~ndimage.binary_erosion(body))
        radius = np.hypot(rows - centre[0], cols - centre[1])
        mean_radius.append(radius.mean())
        width.append(radius.std())
    return float(np.polyfit(np.log(mean_radius), np.log(width), 1)[0])


def test_interface_roughens_with_the_kpz_growth_exponent():
    n = 30000
    counts = np.geomspace(n / 30, n, 10).astype(int)
    betas = [_growth_exponent(grown("eden", n, s), counts) for s in range(8)]
    # The Eden front is in the KPZ class: width ~ t^beta with beta = 1/3 in 2-D (Kardar,
    # Parisi & Zhang, Phys. Rev. Lett. 56, 889, 1986; from memory). Mean of 8 seeds over a
    # 30-fold range of sizes; single clusters scatter by about 0.1, so the band is wide, but
    # it excludes a smooth front (0) and uncorrelated deposition (1/2).
    assert 0.22 <= np.mean(betas) <= 0.45


def test_structure_of_the_returned_lattice():
    n = 4000
    lattice = grown("eden", n, 5)
    assert lattice.dtype == np.int32 and lattice.ndim == 2
    # Arrival order is a permutation of 1..n (the contract in DEVELOPERS.md).
    assert np.array_equal(np.sort(lattice[lattice > 0]), np.arange(1, n + 1))
    assert np.count_nonzero(lattice) == n
    assert lattice[lattice.shape[0] // 2, lattice.shape[1] // 2] == 1
    # Each new site comes from the von Neumann perimeter of the cluster so far.
    assert is_connected_in_order(lattice, moore=False)
    # The first sites are the seed's neighbours or theirs: site 2 is next to the seed.
    assert np.abs(arrival_sites(lattice)[1]).sum() == 1


def test_same_seed_same_cluster_other_seed_other_cluster():
    assert np.array_equal(eden(2000, seed=3), eden(2000, seed=3))
    first, other = eden(2000, seed=3), eden(2000, seed=4)
    assert first.shape != other.shape or not np.array_equal(first, other)


def test_single_site_is_the_seed():
    assert np.array_equal(eden(1, seed=0), np.pad(np.ones((1, 1), np.int32), 2))


@pytest.mark.parametrize("n_particles, seed", [(0, 0), (-1, 0), (2.5, 0), (10, -3), (10, "a")])
def test_bad_input_raises_value_error(n_particles, seed):
    with pytest.raises(ValueError):
        eden(n_particles, seed=seed)
