"""The reference library: opened lazily, its model loaded once, passed in rather than cached."""

from __future__ import annotations

import pickle

import pytest

from service.errors import LibraryError
from service.match import library as library_module
from service.match.library import (ReferenceLibrary, default_library, library_of, process_library,
                                   start_process_library)


def test_the_model_is_loaded_once_per_library(monkeypatch):
    calls = []

    def fake_load_or_fit(reference_set, fit):
        calls.append(reference_set)
        return object()

    monkeypatch.setattr("service.match.persist.load_or_fit", fake_load_or_fit)
    library = ReferenceLibrary(None)
    first = library.model
    assert library.model is first and len(calls) == 1
    assert calls[0] is library.reference_set
    # Another library of the same folder is another object with its own model: nothing hidden is shared.
    assert ReferenceLibrary(None).model is not first and len(calls) == 2
    # A caller holding an open set gets that set's one library at every call.
    reference_set = library.reference_set
    assert library_of(reference_set) is library_of(reference_set)
    library_of(reference_set).model  # noqa: B018
    library_of(reference_set).model  # noqa: B018
    assert len(calls) == 3


def test_a_missing_set_fails_at_use_not_at_construction(tmp_path):
    library = ReferenceLibrary(tmp_path / "nowhere")
    with pytest.raises(LibraryError):
        library.reference_set  # noqa: B018
    reason = library.warm()
    assert reason is not None and "nowhere" in reason
    with pytest.raises(LibraryError):
        ReferenceLibrary.open(tmp_path / "nowhere")


def test_a_library_travels_to_another_process_as_its_folder(tmp_path):
    library = ReferenceLibrary(str(tmp_path / "set"))
    again = pickle.loads(pickle.dumps(library))
    assert isinstance(again, ReferenceLibrary) and again.directory == library.directory and again._model is None


def test_library_of_passes_a_library_through_and_defaults_to_the_bundled_one(tmp_path):
    library = ReferenceLibrary(str(tmp_path))
    assert library_of(library) is library
    assert library_of(None) is default_library() is default_library()
    assert library_of(str(tmp_path)).directory == str(tmp_path)


def test_a_worker_process_keeps_the_library_its_initializer_opened(tmp_path, monkeypatch):
    monkeypatch.setattr(library_module, "_PROCESS", [])
    opened = start_process_library(str(tmp_path / "nowhere"))  # must not raise: the worker must start
    assert process_library(str(tmp_path / "nowhere")) is opened
    other = process_library(None)
    assert other is not opened and process_library(None) is other


def test_the_bundled_library_is_kept_once_its_set_is_open(monkeypatch):
    # Once open, a library names the folder it found; asked again for the bundled set (None),
    # the process must hand back the same library, not open and load it anew for every job.
    monkeypatch.setattr(library_module, "_PROCESS", [])
    first = process_library(None)
    first.reference_set  # noqa: B018 - opening the set is the point
    assert process_library(None) is first
