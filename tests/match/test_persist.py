"""The stored reference model: read back bit for bit, refitted whenever its key no longer holds."""

from __future__ import annotations

import dataclasses
import json
import logging
import shutil

import numpy as np
import pytest

from service.library import load_reference_set
from service.library.load import DEFAULT_DIR
from service.match import persist
from service.match.cache import CACHE_NAME, ReferenceTable, _write
from service.match.persist import MODEL_NAME, decode, encode, is_fresh, load_model, load_or_fit, store_model
from service.match.ranking import fit_reference_model
from tests.match.subsets import smallest_of_three_regimes, write_subset


def _same(a, b, where="model", rtol=0.0, atol=0.0):
    """Equal in type and value all the way down; arrays equal in dtype, shape and every bit
    (floats within ``rtol`` of each other, or ``atol`` apart, when ``rtol`` is given)."""
    assert type(a) is type(b), f"{where}: {type(a).__name__} != {type(b).__name__}"
    if isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and a.shape == b.shape, where
        if rtol and a.dtype.kind in "fc":
            np.testing.assert_allclose(a, b, rtol=rtol, atol=atol, err_msg=where)
        else:
            assert a.tobytes() == b.tobytes(), where
    elif dataclasses.is_dataclass(a):
        for f in dataclasses.fields(a):
            _same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}", rtol, atol)
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{where}[{i}]", rtol, atol)
    elif isinstance(a, dict):
        assert list(a) == list(b), where
        for k in a:
            _same(a[k], b[k], f"{where}[{k!r}]", rtol, atol)
    elif isinstance(a, float) and np.isnan(a):
        assert np.isnan(b), where
    elif rtol and isinstance(a, float):
        assert a == pytest.approx(b, rel=rtol, abs=atol), where
    else:
        assert a == b, where


@pytest.fixture
def small_set(reference_set, table, tmp_path):
    """Three small ensembles of the bundled set, with their rows of the bundled feature cache."""
    chosen = smallest_of_three_regimes(reference_set)
    subset = load_reference_set(write_subset(reference_set, chosen, tmp_path / "set"))
    index = {e.id: i for i, e in enumerate(reference_set.ensembles)}
    per_ensemble = [np.flatnonzero(table.ensemble == index[e.id]) for e in subset.ensembles]
    rows = np.concatenate(per_ensemble)
    columns = table.arrays()
    # One row per drawing of each cluster (every drawing style of the nuisance grid).
    columns["ensemble"] = np.repeat(np.arange(len(subset.ensembles)), [len(r) for r in per_ensemble])
    columns.update({k: v[rows] for k, v in columns.items() if k != "ensemble"})
    _write(subset, ReferenceTable(**columns), 0.0)
    return subset


@pytest.fixture
def storing(monkeypatch):
    monkeypatch.setenv(persist.STORE_ENV, "1")


def test_stored_model_is_the_fitted_one_bit_for_bit(small_set):
    fitted = fit_reference_model(small_set)
    path = store_model(small_set, fitted)
    assert path == small_set.path / "cache" / f"{MODEL_NAME}.npz"
    loaded = load_model(small_set)
    _same(fitted, loaded)
    values = fitted.statistics.families[0].means[0] + 0.1
    a, b = fitted.evaluate(values, 6.0), loaded.evaluate(values, 6.0)
    assert a.d2.tobytes() == b.d2.tobytes() and a.loglik.tobytes() == b.loglik.tobytes()


def test_load_or_fit_fits_once_then_reads(small_set, storing):
    calls = []

    def fit():
        calls.append(1)
        return fit_reference_model(small_set)

    first = load_or_fit(small_set, fit)
    second = load_or_fit(load_reference_set(small_set.path), fit)  # as a new process would
    assert len(calls) == 1
    _same(first, second)
    assert is_fresh(small_set)


def test_storing_can_be_switched_off(small_set, monkeypatch):
    monkeypatch.setenv(persist.STORE_ENV, "0")
    load_or_fit(small_set, lambda: fit_reference_model(small_set))
    assert not (small_set.path / "cache" / f"{MODEL_NAME}.npz").exists()


def test_a_folder_that_cannot_be_written_still_ranks(small_set, storing, monkeypatch, caplog):
    def read_only(name, data):
        raise PermissionError(13, "Read-only file system", str(small_set.path / "cache"))

    monkeypatch.setattr(small_set, "write_cache", read_only)
    with caplog.at_level(logging.WARNING, logger="ramiform.match"):
        model = load_or_fit(small_set, lambda: fit_reference_model(small_set))
    assert model.families and "could not be stored" in caplog.text
    assert not (small_set.path / "cache" / f"{MODEL_NAME}.npz").exists()


def test_a_model_holding_unknown_objects_is_still_returned(small_set, storing, caplog):
    fitted = fit_reference_model(small_set)
    odd = dataclasses.replace(fitted, calibration={**fitted.calibration, "callback": print})
    with caplog.at_level(logging.WARNING, logger="ramiform.match"):
        assert load_or_fit(small_set, lambda: odd) is odd
    assert "cannot be stored" in caplog.text
    assert load_model(small_set) is None


def test_new_feature_vectors_invalidate_the_stored_model(small_set, table):
    store_model(small_set, fit_reference_model(small_set))
    assert is_fresh(small_set)
    cached = small_set.read_cache(CACHE_NAME)
    cached["values"] = cached["values"] * (1 + 1e-12)
    small_set.write_cache(CACHE_NAME, cached)
    assert not is_fresh(small_set)


def test_other_code_invalidates_the_stored_model(small_set, monkeypatch):
    store_model(small_set, fit_reference_model(small_set))
    monkeypatch.setattr(persist, "code_version", lambda: "0" * 64)
    assert load_model(small_set) is None


def test_code_version_follows_every_byte_of_the_matcher(tmp_path, monkeypatch):
    for folder in (*persist.CODE_FOLDERS, "service/library"):
        shutil.copytree(persist._SOURCE_ROOT / folder, tmp_path / folder)
    monkeypatch.setattr(persist, "_SOURCE_ROOT", tmp_path)
    version = persist.code_version.__wrapped__
    before = version()
    assert version() == before
    model_py = tmp_path / "service/match/model.py"
    model_py.write_text(model_py.read_text() + "\n")
    assert version() != before


def test_other_ensembles_invalidate_the_stored_model(small_set):
    store_model(small_set, fit_reference_model(small_set))
    manifest_path = small_set.path / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    manifest["ensembles"][0]["parameters"] = {**manifest["ensembles"][0]["parameters"], "renamed": 1}
    manifest_path.write_text(json.dumps(manifest))
    # Same clusters (same fingerprint), other families: the model must be refitted.
    assert load_model(load_reference_set(small_set.path)) is None


def test_a_damaged_model_file_is_refitted(small_set, storing):
    path = small_set.path / "cache" / f"{MODEL_NAME}.npz"
    path.parent.mkdir(exist_ok=True)
    path.write_bytes(b"PK\x03\x04 not a model")
    assert load_model(small_set) is None
    model = load_or_fit(small_set, lambda: fit_reference_model(small_set))
    _same(model, load_model(load_reference_set(small_set.path)))


def test_round_trip_of_the_supported_values():
    value = {
        "floats": [0.1, -0.0, float("inf"), float("nan"), 1e-310],
        "numpy": (np.float64(0.1), np.int64(-7), np.bool_(True), np.float32(1.5)),
        "arrays": [np.arange(6, dtype=np.int16).reshape(2, 3), np.array(["a", "bc"]), np.zeros((0, 4))],
        "text": "d\u00e9j\u00e0",
        "none": None,
        "flags": [True, False],
        "big": 2**70,
        "__dunder_key": 1,
        (1, "tuple key"): {"nested": ()},
    }
    structure, arrays = encode(value)
    json.dumps(structure)  # plain JSON
    _same(value, decode(json.loads(json.dumps(structure)), arrays), "value")


def test_only_plain_data_is_stored():
    with pytest.raises(TypeError, match="cannot store"):
        encode({"f": lambda: 1})
    with pytest.raises(TypeError, match="objects"):
        encode(np.array([object()]))
    with pytest.raises(TypeError, match="cannot store"):
        encode({1, 2})


@pytest.mark.parametrize("name", ["os:system", "service.errors:RamiformError", "builtins:dict"])
def test_no_class_outside_the_matcher_is_built(name):
    with pytest.raises(TypeError, match="outside"):
        decode({"__dataclass__": name, "fields": {}}, {})


def test_a_matcher_class_must_be_a_dataclass_with_the_stored_fields():
    with pytest.raises(TypeError, match="not a dataclass"):
        decode({"__dataclass__": "service.match.model:fit_model", "fields": {}}, {})
    with pytest.raises(TypeError, match="other fields"):
        decode({"__dataclass__": "service.match.model:Family", "fields": {"regime": "dla"}}, {})


def test_the_bundled_stored_model_is_fresh():
    # Fails after any change to the matcher or feature code, the features or the set: then
    # run `ramiform library refit` (or `python -m service.cli library refit`) and commit
    # reference_sets/default/cache/match-model.npz, so no user waits for a refit.
    bundled = load_reference_set(DEFAULT_DIR)
    assert (DEFAULT_DIR / "cache" / f"{MODEL_NAME}.npz").is_file()
    assert is_fresh(bundled), "the stored model of the bundled set is stale: run `ramiform library refit`"


def test_the_bundled_stored_model_matches_a_fresh_fit(reference_set):
    if not is_fresh(reference_set):
        pytest.skip("stale stored model (reported by test_the_bundled_stored_model_is_fresh)")
    # The stored model was fitted on another machine: numpy's sums take other SIMD paths on
    # other CPUs (with AVX-512 or without), so a fresh fit may differ in the last bits. Values
    # that are themselves rounding (the cache's discrepancy from a fresh measurement: 1e-12 on
    # one machine, 2e-13 on another) may differ by more than rtol; 1e-9 apart is the same.
    _same(fit_reference_model(reference_set), load_model(reference_set), rtol=1e-9, atol=1e-9)
