"""Build the tiny preset on Dask, twice, and load it back.

Every regime and parameter of the default grid is grown at a very small size through the same
code path as the bundled set: once on a LocalCluster the build starts itself, once on an
existing scheduler. The two must agree bit for bit.
"""

import io
import json
import shutil

import numpy as np
import pytest

from service.library import PRESETS, build_library, load_reference_set
from service.library.build import PARAMETER_GRID, grow_sites, realisation_seed
from service.simulate import REGIMES

pytestmark = pytest.mark.xdist_group("library-dask")


@pytest.fixture(scope="module")
def dask_cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0") as cluster:
        yield cluster


@pytest.fixture(scope="module")
def tiny_sets(tmp_path_factory, dask_cluster):
    root = tmp_path_factory.mktemp("sets")
    own = build_library("tiny", root / "own", workers=2, progress=False)
    shared = build_library("tiny", root / "shared", scheduler=dask_cluster.scheduler_address, progress=False)
    return own, shared


def test_tiny_set_holds_the_preset(tiny_sets):
    refs = load_reference_set(tiny_sets[0])
    specs = PRESETS["tiny"]
    assert [(e.regime, dict(e.parameters), e.n_particles, e.n_realisations) for e in refs.ensembles] == [
        (s.regime, dict(s.parameters), s.n_particles, s.n_realisations) for s in specs
    ]
    assert {e.regime for e in refs.ensembles} == set(REGIMES) == set(PARAMETER_GRID)
    for ensemble, spec in zip(refs.ensembles, specs):
        assert list(ensemble.seeds) == [realisation_seed("tiny", spec, i) for i in range(spec.n_realisations)]
        lattices = refs.arrival_orders(ensemble)
        assert len(lattices) == spec.n_realisations
        for lattice in lattices:
            h, w = lattice.shape
            assert lattice[h // 2, w // 2] == 1
            # a DBM deposit grown towards a near electrode may stop short of n sites
            n = int(lattice.max()) if ensemble.stops_early else spec.n_particles
            assert n <= spec.n_particles
            assert np.array_equal(np.sort(lattice[lattice > 0]), np.arange(1, n + 1))
        assert refs.mask(ensemble, 0).sum() == lattices[0].max()
    assert len({s for e in refs.ensembles for s in e.seeds}) == sum(s.n_realisations for s in specs)
    refs.verify()


def test_recorded_seeds_regrow_the_stored_clusters(tiny_sets):
    refs = load_reference_set(tiny_sets[0])
    for ensemble in refs.ensembles[:: max(1, len(refs.ensembles) // 5)]:
        stored = refs.sites(ensemble)[-1]
        regrown = grow_sites(ensemble.regime, dict(ensemble.parameters), ensemble.n_particles, ensemble.seeds[-1])
        assert np.array_equal(stored, regrown), ensemble.id


def test_rebuild_on_another_cluster_is_byte_identical(tiny_sets):
    own, shared = (json.loads((p / "manifest.json").read_text()) for p in tiny_sets)
    assert own["files"] == shared["files"]
    for path in own["files"]:
        assert (tiny_sets[0] / path).read_bytes() == (tiny_sets[1] / path).read_bytes()
    own.pop("build"), shared.pop("build")
    assert own == shared


def test_a_build_that_regrows_every_cluster_regrows_the_clusters_it_grew(tiny_sets, dask_cluster, tmp_path):
    # The same preset built with no sites stored: same thumbnails byte for byte, no cluster
    # file, and every cluster regrown (in process, and on the Dask workers by map_clusters)
    # equal to the one the stored build holds.
    regrown_path = build_library("tiny", tmp_path / "regrown", scheduler=dask_cluster.scheduler_address,
                                 progress=False, stored_sites_max=0)
    stored, regrown = load_reference_set(tiny_sets[0]), load_reference_set(regrown_path)
    assert not (regrown_path / "clusters").exists()
    assert regrown.manifest["files"] == {e.thumbnail: stored.manifest["files"][e.thumbnail] for e in stored.ensembles}
    assert regrown.fingerprint != stored.fingerprint
    for a, b in zip(stored.ensembles, regrown.ensembles):
        assert a.sites_stored and not b.sites_stored
        assert all(np.array_equal(x, y) for x, y in zip(stored.sites(a), regrown.sites(b))), a.id
    on_workers = regrown.map_clusters(_size_and_first_order, scheduler=dask_cluster.scheduler_address, progress=False)
    assert on_workers == stored.map_clusters(_size_and_first_order, scheduler=dask_cluster.scheduler_address,
                                             progress=False)


def test_thumbnails_are_pngs_of_the_first_realisation(tiny_sets):
    from PIL import Image

    refs = load_reference_set(tiny_sets[0])
    ensemble = refs.ensembles[0]
    image = Image.open(io.BytesIO(refs.thumbnail_bytes(ensemble)))
    assert image.format == "PNG" and image.size == (96, 96)
    assert refs.thumbnail_path(ensemble).is_file()


def _size_and_first_order(lattice, ensemble):
    return int((lattice > 0).sum()), int(lattice[lattice.shape[0] // 2, lattice.shape[1] // 2]), ensemble.id


def test_map_clusters_returns_results_in_manifest_order(tiny_sets, dask_cluster):
    refs = load_reference_set(tiny_sets[0])
    results = refs.map_clusters(_size_and_first_order, scheduler=dask_cluster.scheduler_address, progress=False)
    assert list(results) == [e.id for e in refs.ensembles]
    for ensemble in refs.ensembles:
        sizes = [len(s) for s in refs.sites(ensemble)]
        assert results[ensemble.id] == [(n, 1, ensemble.id) for n in sizes]
        assert all(n == ensemble.n_particles or ensemble.stops_early for n in sizes)


def test_rebuild_replaces_the_set_and_keeps_its_cache(tiny_sets, dask_cluster, tmp_path):
    target = tmp_path / "set"
    shutil.copytree(tiny_sets[0], target)
    load_reference_set(target).write_cache("sizes", {"n": np.arange(3)})
    (target / "clusters" / "stale.npz").write_bytes(b"old")
    build_library("tiny", target, scheduler=dask_cluster.scheduler_address, progress=False)
    assert not (target / "clusters" / "stale.npz").exists()
    assert np.array_equal(load_reference_set(target).read_cache("sizes")["n"], np.arange(3))


def test_default_preset_covers_the_grid_the_library_promises():
    # The grid of the reference-library specification (issue 2): DLA sticking 1, 0.3, 0.1 in
    # both neighbourhoods, Eden, ballistic, DBM eta 0.5-4, several realisations each; and
    # the off-lattice DLA of unit discs that real deposits resemble, and DBM with the outer
    # electrode near, as a deposit grown up to the rim electrode (issue 10); ballistic
    # aggregation under both stopping rules in use (issue 9: an outside simulator's
    # ballistic clusters lie between them).
    specs = PRESETS["default"]
    grid = {(s.regime, tuple(sorted(s.parameters.items()))) for s in specs}
    dla = {("dla", (("neighborhood", nb), ("sticking", st))) for nb in ("von_neumann", "moore") for st in (1.0, 0.3, 0.1)}
    dla.add(("dla", (("off_lattice", True), ("sticking", 1.0))))
    dbm = {("dbm", (("eta", eta),)) for eta in (0.5, 1.0, 1.5, 2.0, 3.0, 4.0)}
    dbm |= {("dbm", (("electrode", "near"), ("eta", eta))) for eta in (0.5, 1.0, 1.5, 2.0, 3.0, 4.0)}
    ballistic = {("ballistic", ()), ("ballistic", (("stop", "on_impact"),))}
    assert grid == dla | dbm | ballistic | {("eden", ())}
    assert min(s.n_realisations for s in specs) >= 8
    assert len({s.id for s in specs}) == len(specs)
    # Finite-size effects are large below 10^4 sites: every family reaches it, and DLA, Eden
    # and ballistic reach 10^5, the size of specimens hundreds of branch widths across (issue 11).
    largest = {}
    for s in specs:
        key = (s.regime, tuple(sorted(s.parameters.items())))
        largest[key] = max(largest.get(key, 0), s.n_particles)
    assert all(n >= (10_000 if key[0] == "dbm" else 100_000) for key, n in largest.items())
    # Every family has at least 16 realisations at each size up to 3,000 sites.
    assert all(s.n_realisations >= 16 for s in specs if s.n_particles <= 3000)


def test_an_interrupted_build_resumes_from_the_clusters_it_kept(tiny_sets, dask_cluster, tmp_path):
    # A build keeps each cluster as it arrives in <out>.grown/; building again takes the kept
    # ones instead of growing them anew. One kept cluster is marked (its arrival order
    # reversed): the resumed set must hold the marked one, which no simulator grows.
    from service.library.build import GrownClusters

    stored = load_reference_set(tiny_sets[0])
    ensemble = stored.ensembles[0]
    marked = stored.sites(ensemble)[1][::-1].copy()
    kept = GrownClusters(tmp_path / "set.grown")
    kept.put((ensemble.regime, dict(ensemble.parameters), ensemble.n_particles, ensemble.seeds[1]), marked)
    resumed = build_library("tiny", tmp_path / "set", scheduler=dask_cluster.scheduler_address, progress=False)
    assert np.array_equal(load_reference_set(resumed).sites(ensemble)[1], marked)
    assert not (tmp_path / "set.grown").exists()
    # Kept clusters of other simulators are not trusted: the folder is emptied.
    kept = GrownClusters(tmp_path / "again.grown")
    kept.put((ensemble.regime, dict(ensemble.parameters), ensemble.n_particles, ensemble.seeds[1]), marked)
    (tmp_path / "again.grown" / "simulators.txt").write_text("grown by other simulators")
    again = build_library("tiny", tmp_path / "again", scheduler=dask_cluster.scheduler_address, progress=False)
    assert np.array_equal(load_reference_set(again).sites(ensemble)[1], stored.sites(ensemble)[1])
