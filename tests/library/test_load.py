"""Opening reference sets: lazy loading, refusal of damaged or unknown ones, the feature cache."""

import json
import shutil

import numpy as np
import pytest

from service.errors import LibraryError
from service.library import Ensemble, load_reference_set
from service.library.load import LIBRARY_DIR_ENV, default_library_dir
from service.library.storage import SCHEMA_VERSIONS, sites_from_lattice, write_reference_set
from service.simulate import grow


@pytest.fixture(scope="module")
def small_set(tmp_path_factory):
    """Two ensembles of real Eden clusters, written without Dask (the build test covers Dask)."""
    folder = tmp_path_factory.mktemp("refs") / "small"
    ensembles = [
        Ensemble("eden", {}, n, 3, seeds=(n, n + 1, n + 2), clusters=f"clusters/eden_n{n}.npz",
                 thumbnail=f"thumbnails/eden_n{n}.png")
        for n in (40, 90)
    ]
    sites = [sites_from_lattice(grow("eden", e.n_particles, seed=s)) for e in ensembles for s in e.seeds]
    write_reference_set(folder, preset="test", ensembles=ensembles, sites=sites,
                        seed_rule="listed by hand", build={})
    return folder


@pytest.fixture
def copy_of(small_set, tmp_path):
    target = tmp_path / "copy"
    shutil.copytree(small_set, target)
    return target


def test_clusters_come_back_as_grown(small_set):
    refs = load_reference_set(small_set)
    assert [e.id for e in refs.ensembles] == ["eden_n40", "eden_n90"]
    for ensemble in refs.ensembles:
        for index, seed in enumerate(ensemble.seeds):
            grown = grow("eden", ensemble.n_particles, seed=seed)
            stored = refs.arrival_order(ensemble, index, margin=0)
            # Same cluster up to the crop: compare both cut to their occupied bounding boxes.
            rows, cols = np.nonzero(grown)
            assert np.array_equal(grown[rows.min() : rows.max() + 1, cols.min() : cols.max() + 1],
                                  stored[np.ix_(stored.any(1), stored.any(0))])
    assert refs.mask("eden_n40", 0).dtype == bool
    refs.verify()


def test_loading_reads_only_the_manifest(copy_of):
    for npz in (copy_of / "clusters").iterdir():
        npz.write_bytes(b"not read yet")
    refs = load_reference_set(copy_of)
    assert len(refs.ensembles) == 2
    with pytest.raises(LibraryError, match="damaged"):
        refs.sites("eden_n40")
    with pytest.raises(LibraryError, match="damaged"):
        refs.verify()


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda m: m.update(schema_version=max(SCHEMA_VERSIONS) + 1), "schema version"),
        (lambda m: m.pop("schema_version"), "schema version"),
        (lambda m: m.update(format="something else"), "not a Ramiform reference-set manifest"),
        (lambda m: m.pop("ensembles"), "ensembles"),
        (lambda m: m["ensembles"][0].pop("seeds"), "malformed"),
        (lambda m: m["ensembles"][0]["seeds"].pop(), "seeds for"),
    ],
    ids=["future schema", "no schema", "foreign format", "no ensembles", "no seeds", "seed missing"],
)
def test_unknown_or_damaged_manifest_is_refused(copy_of, change, message):
    manifest = json.loads((copy_of / "manifest.json").read_text())
    change(manifest)
    (copy_of / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(LibraryError, match=message):
        load_reference_set(copy_of)


def test_truncated_or_missing_manifest_is_refused(copy_of, tmp_path):
    text = (copy_of / "manifest.json").read_text()
    (copy_of / "manifest.json").write_text(text[: len(text) // 2])
    with pytest.raises(LibraryError, match="not valid JSON"):
        load_reference_set(copy_of)
    with pytest.raises(LibraryError, match="missing"):
        load_reference_set(tmp_path / "nowhere")


def test_unknown_ensemble_is_a_library_error(small_set):
    with pytest.raises(LibraryError, match="no ensemble"):
        load_reference_set(small_set).sites("dla_n1")


def test_default_folder_follows_the_environment(monkeypatch, small_set):
    monkeypatch.setenv(LIBRARY_DIR_ENV, str(small_set))
    assert default_library_dir() == small_set
    assert load_reference_set().preset == "test"
    monkeypatch.delenv(LIBRARY_DIR_ENV)
    assert default_library_dir().parts[-2:] == ("reference_sets", "default")


def test_cache_round_trip_and_staleness(copy_of):
    refs = load_reference_set(copy_of)
    assert refs.read_cache("features-v1") is None
    arrays = {"box_dimension": np.linspace(1.0, 2.0, 6), "ensemble": np.array(["eden_n40"] * 3 + ["eden_n90"] * 3)}
    refs.write_cache("features-v1", arrays)
    cached = load_reference_set(copy_of).read_cache("features-v1")
    assert cached.keys() == arrays.keys()
    assert all(np.array_equal(cached[k], arrays[k]) for k in arrays)
    refs.write_cache("summary", {"eden_n40": [1.9, 0.05]})
    assert refs.read_cache("summary") == {"eden_n40": [1.9, 0.05]}
    with pytest.raises(ValueError, match="cache name"):
        refs.write_cache("../outside", {})
    with pytest.raises(ValueError, match="JSON"):
        refs.write_cache("bad", {"x": object()})

    # A rebuilt set with other clusters must not serve features of the old ones.
    manifest = json.loads((copy_of / "manifest.json").read_text())
    manifest["files"]["clusters/eden_n40.npz"] = "0" * 64
    (copy_of / "manifest.json").write_text(json.dumps(manifest))
    rebuilt = load_reference_set(copy_of)
    assert rebuilt.read_cache("features-v1") is None
    assert rebuilt.read_cache("summary") is None


def test_ensembles_can_key_a_dict(small_set):
    refs = load_reference_set(small_set)
    by_ensemble = {e: e.n_particles for e in refs.ensembles}
    assert by_ensemble[load_reference_set(small_set).ensemble("eden_n90")] == 90


def test_manifest_cannot_point_outside_the_set(copy_of):
    manifest = json.loads((copy_of / "manifest.json").read_text())
    entry = manifest["ensembles"][0]
    manifest["files"]["../elsewhere.npz"] = manifest["files"].pop(entry["clusters"])
    entry["clusters"] = "../elsewhere.npz"
    (copy_of / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(LibraryError, match="outside the set"):
        load_reference_set(copy_of).sites(entry["id"])
