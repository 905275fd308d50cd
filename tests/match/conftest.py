"""The reference set the matcher's tests rank against: the bundled one (or
``$RAMIFORM_LIBRARY_DIR``), with its feature cache."""

from __future__ import annotations

import pytest

from service.library import load_reference_set
from service.match import reference_model
from service.match.cache import load_reference_table


@pytest.fixture(scope="session")
def reference_set():
    return load_reference_set()


@pytest.fixture(scope="session")
def model(reference_set):
    return reference_model(reference_set)


@pytest.fixture(scope="session")
def table(reference_set):
    return load_reference_table(reference_set)
