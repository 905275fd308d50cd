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
    # site with branches 0.7 to 3 sites wide).
    assert table.scale_px.min() >= 1.5
    # The grid the drawings came from is stored beside the vectors.
    cached = reference_set.read_cache(CACHE_NAME)
    assert json.loads(str(cached["nuisance_grid"])) == nuisance_grid()


def test_the_bundled_cache_was_computed_by_this_measurement_code(reference_set, table):
    # Fails when the normalisation, the features or the measurement building blocks change
    # without a rebuild of the cache (build_feature_cache), which would compare specimens
    # measured one way with references measured another.
    assert cache_discrepancy(reference_set, table, n_checks=5) <= 1e-9


def test_reading_features_never_regrows_a_reference(tmp_path, monkeypatch):
    # The largest references are kept as seeds and regrown on demand (issue 11): ranking a
    # specimen reads only their features, fingerprint and thumbnail, so it must never pay for
    # their growth. A spy on the simulator entry point counts regrowths.
    import service.library.build as build
    from service.library import Ensemble
    from service.library.storage import sites_from_lattice, write_reference_set
    from service.simulate import grow

    ensembles = [
        Ensemble("eden", {}, 300, 2, seeds=(1, 2), clusters="clusters/eden_n300.npz", thumbnail="thumbnails/a.png"),
        Ensemble("eden", {}, 600, 2, seeds=(3, 4), thumbnail="thumbnails/b.png", sites_stored=False),
        Ensemble("ballistic", {}, 600, 2, seeds=(5, 6), thumbnail="thumbnails/c.png", sites_stored=False),
    ]
    sites = [sites_from_lattice(grow(e.regime, e.n_particles, seed=s)) for e in ensembles for s in e.seeds]
    write_reference_set(tmp_path / "set", preset="test", ensembles=ensembles, sites=sites, seed_rule="by hand", build={})
    built = load_reference_table(load_reference_set(tmp_path / "set"), build_if_missing=True)

    grown = []
    real_grow_sites = build.grow_sites
    monkeypatch.setattr(build, "grow_sites", lambda *args: grown.append(args) or real_grow_sites(*args))
    refs = load_reference_set(tmp_path / "set")
    table = load_reference_table(refs, build_if_missing=False)
    assert cache_discrepancy(refs, table, n_checks=3) <= 1e-9
    assert refs.read_cache(CACHE_NAME) is not None and len(refs.fingerprint) == 64
    for ensemble in refs.ensembles:
        refs.thumbnail_bytes(ensemble)
    refs.verify()
    np.testing.assert_array_equal(table.values, built.values)
    assert grown == []
    # ... while asking for a regrown cluster's sites does regrow it (the spy sees it).
    refs.arrival_order("ballistic_n600", 1)
    assert grown == [("ballistic", {}, 600, 6)]
