"""Ensembles kept as seeds and digests: regrown on demand, bit for bit, or refused.

The largest clusters of the bundled set are not stored (issue 11: the set stays under 25 MB);
their sites are regrown from the recorded seeds and must equal the sites the simulator grew,
which the manifest pins with a SHA-256 per realisation (format: ``service.library.storage``).
"""

import hashlib
import json
import shutil

import numpy as np
import pytest

from service.errors import LibraryError
from service.library import Ensemble, load_reference_set
from service.library.storage import sites_from_lattice, write_reference_set
from service.simulate import grow


def _offsets_in_arrival_order(lattice):
    """Seed offsets of an arrival-order lattice, computed here from the simulator's output."""
    rows, cols = np.nonzero(lattice)
    order = np.argsort(lattice[rows, cols])
    rows, cols = rows[order], cols[order]
    return np.stack([rows - rows[0], cols - cols[0]], axis=1)


@pytest.fixture(scope="module")
def mixed_set(tmp_path_factory):
    """Eden at 60 sites stored; Eden at 400 and ballistic at 300 regrown."""
    folder = tmp_path_factory.mktemp("refs") / "mixed"
    ensembles = [
        Ensemble("eden", {}, 60, 2, seeds=(5, 6), clusters="clusters/eden_n60.npz", thumbnail="thumbnails/eden_n60.png"),
        Ensemble("eden", {}, 400, 3, seeds=(7, 8, 9), thumbnail="thumbnails/eden_n400.png", sites_stored=False),
        Ensemble("ballistic", {}, 300, 2, seeds=(11, 12), thumbnail="thumbnails/ballistic_n300.png", sites_stored=False),
    ]
    sites = [sites_from_lattice(grow(e.regime, e.n_particles, seed=s)) for e in ensembles for s in e.seeds]
    write_reference_set(folder, preset="test", ensembles=ensembles, sites=sites, seed_rule="listed by hand", build={})
    return folder


@pytest.fixture
def copy_of(mixed_set, tmp_path):
    target = tmp_path / "copy"
    shutil.copytree(mixed_set, target)
    return target


def _edit_manifest(folder, change):
    manifest = json.loads((folder / "manifest.json").read_text())
    change(manifest)
    (folder / "manifest.json").write_text(json.dumps(manifest))


def test_regrown_ensembles_come_back_bit_for_bit_as_the_simulator_grew_them(mixed_set):
    refs = load_reference_set(mixed_set)
    manifest = refs.manifest
    assert manifest["schema_version"] == 2
    assert sorted(manifest["files"]) == [
        "clusters/eden_n60.npz", "thumbnails/ballistic_n300.png", "thumbnails/eden_n400.png", "thumbnails/eden_n60.png"
    ]
    assert sorted(p.name for p in (mixed_set / "clusters").iterdir()) == ["eden_n60.npz"]
    for entry, ensemble in zip(manifest["ensembles"], refs.ensembles):
        assert entry["sites_stored"] is ensemble.sites_stored
        for index, seed in enumerate(ensemble.seeds):
            expected = _offsets_in_arrival_order(grow(ensemble.regime, ensemble.n_particles, seed=seed))
            assert np.array_equal(refs.sites(ensemble)[index], expected)
            assert np.array_equal(refs.arrival_order(ensemble, index) > 0, refs.mask(ensemble, index))
            if not ensemble.sites_stored:
                # The digest the format documents: SHA-256 of the little-endian int16 (n, 2) rows.
                assert entry["sites_sha256"][index] == hashlib.sha256(expected.astype("<i2").tobytes()).hexdigest()
    refs.verify()


def test_thumbnails_of_regrown_ensembles_are_stored(mixed_set):
    from PIL import Image

    refs = load_reference_set(mixed_set)
    for ensemble in refs.ensembles:
        image = Image.open(refs.thumbnail_path(ensemble))
        assert image.format == "PNG" and image.size == (96, 96)


@pytest.mark.parametrize(
    "change",
    [
        lambda e: e["sites_sha256"].__setitem__(1, "0" * 64),
        lambda e: e["seeds"].__setitem__(1, e["seeds"][1] + 1),
    ],
    ids=["digest tampered", "seed tampered"],
)
def test_a_regrowth_that_differs_from_the_manifest_is_refused(copy_of, change):
    _edit_manifest(copy_of, lambda m: change(m["ensembles"][1]))
    refs = load_reference_set(copy_of)
    assert np.array_equal(refs.arrival_order("eden_n400", 0) > 0, refs.mask("eden_n400", 0))  # untouched realisation
    with pytest.raises(LibraryError, match="differ"):
        refs.arrival_order("eden_n400", 1)
    with pytest.raises(LibraryError, match="differ"):
        refs.sites("eden_n400")


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda e: e.pop("sites_sha256"), "malformed"),
        (lambda e: e["sites_sha256"].pop(), "one SHA-256 digest per realisation"),
        (lambda e: e["sites_sha256"].__setitem__(0, "not a digest"), "one SHA-256 digest per realisation"),
        (lambda e: e.update(sites_stored="no"), "malformed"),
    ],
    ids=["no digests", "digest missing", "not a digest", "not a boolean"],
)
def test_damaged_regrowth_entries_are_refused_on_opening(copy_of, change, message):
    _edit_manifest(copy_of, lambda m: change(m["ensembles"][1]))
    with pytest.raises(LibraryError, match=message):
        load_reference_set(copy_of)


def test_a_reader_of_schema_1_sets_keeps_reading_them(copy_of):
    # Schema 1 (every set built before regrown ensembles existed) stores every ensemble and
    # has no ``sites_stored``; its fingerprint was SHA-256 over the JSON of the sorted
    # (cluster file, checksum) pairs, and must stay so, or the feature caches and stored
    # models of such sets would all be taken for stale.
    def to_schema_1(manifest):
        manifest["schema_version"] = 1
        manifest["ensembles"] = manifest["ensembles"][:1]
        del manifest["ensembles"][0]["sites_stored"]
        manifest["files"] = {k: v for k, v in manifest["files"].items() if "eden_n60" in k}

    _edit_manifest(copy_of, to_schema_1)
    refs = load_reference_set(copy_of)
    (ensemble,) = refs.ensembles
    assert ensemble.sites_stored
    assert np.array_equal(refs.sites(ensemble)[1], _offsets_in_arrival_order(grow("eden", 60, seed=6)))
    pairs = [["clusters/eden_n60.npz", refs.manifest["files"]["clusters/eden_n60.npz"]]]
    assert refs.fingerprint == hashlib.sha256(json.dumps(pairs).encode()).hexdigest()


def test_the_fingerprint_follows_the_regrown_sites(copy_of):
    before = load_reference_set(copy_of).fingerprint
    _edit_manifest(copy_of, lambda m: m["ensembles"][2]["sites_sha256"].__setitem__(0, "f" * 64))
    assert load_reference_set(copy_of).fingerprint != before
