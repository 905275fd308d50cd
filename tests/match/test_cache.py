"""The reference feature cache: computed on Dask like in process, tied to its clusters."""

from __future__ import annotations

import json

import numpy as np
import pytest

from service.errors import LibraryError
from service.library import load_reference_set
from service.match import build_feature_cache, load_reference_table
from service.match.cache import CACHE_NAME, cache_discrepancy, compute_reference_table
from service.match.nuisance import THICKNESS_SITES, n_styles, nuisance_grid
from tests.match.subsets import smallest_of_three_regimes, write_subset


@pytest.mark.slow
def test_the_cache_is_the_same_on_dask_and_in_process_and_is_read_back(reference_set, tmp_path):
    subset = load_reference_set(write_subset(reference_set, smallest_of_three_regimes(reference_set)[:2], tmp_path))
    with pytest.raises(LibraryError, match="build_feature_cache"):
        load_reference_table(subset, build_if_missing=False)
    on_dask = build_feature_cache(subset, workers=2, progress=False)
    in_process = compute_reference_table(subset, in_process=True)
    # Same clusters, same drawing seeds (from the clusters' own bytes): the same vectors, up
    # to floating-point summation order in another process.
    np.testing.assert_allclose(on_dask.values, in_process.values, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(on_dask.log_sites, in_process.log_sites)
    read_back = load_reference_table(subset, build_if_missing=False)
    for name, array in on_dask.arrays().items():
        np.testing.assert_array_equal(getattr(read_back, name), array)
    assert (subset.path / "cache" / f"{CACHE_NAME}.npz").is_file()


def test_the_bundled_cache_covers_every_cluster_in_every_drawing_style(reference_set, table):
    # One row per (cluster, drawing style); every ensemble holds drawings at every thickness
    # level of the grid, and a cluster is never drawn twice in one style.
    counts = np.bincount(table.ensemble, minlength=len(reference_set.ensembles))
    assert counts.tolist() == [e.n_realisations * n_styles(e.n_particles) for e in reference_set.ensembles]
    for e in range(len(reference_set.ensembles)):
        rows = table.ensemble == e
        pairs = set(zip(table.realisation[rows].tolist(), table.thickness_sites[rows].tolist()))
        assert len(pairs) == rows.sum()
        assert set(table.thickness_sites[rows].tolist()) == set(THICKNESS_SITES)
    assert np.isfinite(table.values).all()
    # Every reference drawing is normalised to at least 1.5 px per site (drawn at 3-5 px per
    # site with branches 0.7 to 2 sites wide).
    assert table.scale_px.min() >= 1.5
    # The grid the drawings came from is stored beside the vectors.
    cached = reference_set.read_cache(CACHE_NAME)
    assert json.loads(str(cached["nuisance_grid"])) == nuisance_grid()


def test_the_bundled_cache_was_computed_by_this_measurement_code(reference_set, table):
    # Fails when the normalisation, the features or the measurement building blocks change
    # without a rebuild of the cache (build_feature_cache), which would compare specimens
    # measured one way with references measured another.
    assert cache_discrepancy(reference_set, table, n_checks=5) <= 1e-9
