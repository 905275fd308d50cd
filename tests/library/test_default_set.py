"""The bundled reference set: it opens fast and holds exactly what its preset and manifest say."""

import time

import numpy as np
import pytest

from service.library import PRESETS, load_reference_set
from service.library.build import realisation_seed
from service.library.load import DEFAULT_DIR

pytestmark = pytest.mark.skipif(
    not (DEFAULT_DIR / "manifest.json").is_file(), reason="the default set is not built yet (`make library`)"
)


def test_default_set_opens_in_well_under_a_second():
    started = time.perf_counter()
    refs = load_reference_set(DEFAULT_DIR)
    assert time.perf_counter() - started < 0.25
    assert refs.preset == "default"


def test_default_set_matches_its_preset_and_checksums():
    refs = load_reference_set(DEFAULT_DIR)
    specs = PRESETS["default"]
    assert [e.id for e in refs.ensembles] == [s.id for s in specs]
    for ensemble, spec in zip(refs.ensembles, specs):
        assert ensemble.n_realisations == spec.n_realisations >= 12
        assert list(ensemble.seeds) == [realisation_seed("default", spec, i) for i in range(spec.n_realisations)]
    refs.verify()
    total_bytes = sum((DEFAULT_DIR / path).stat().st_size for path in refs.manifest["files"])
    assert total_bytes < 25e6


def test_default_set_clusters_hold_arrival_orders_one_to_n():
    refs = load_reference_set(DEFAULT_DIR)
    for ensemble in refs.ensembles:
        for lattice in refs.arrival_orders(ensemble):
            h, w = lattice.shape
            assert lattice[h // 2, w // 2] == 1
            assert np.array_equal(np.sort(lattice[lattice > 0]), np.arange(1, ensemble.n_particles + 1))
