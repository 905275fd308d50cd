"""Schemathesis against the app's own OpenAPI schema: no generated request gets a 5xx.

Requests are generated from the schema (valid and invalid parameters, random multipart
bodies for the upload) and sent to the app in process; every answer must be a success or
a client error, never a server error. The examples per operation are bounded.
"""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

import pytest
import schemathesis
from hypothesis import HealthCheck, settings

from service.web.app import create_app
from tests.reliability.conftest import ROOT, make_settings

# The schema is needed when the module is collected, so its data folder is made here
# and removed when the module's tests end.
_DATA = Path(tempfile.mkdtemp(prefix="ramiform-schemathesis-"))
_LIBRARY_BUILT = (ROOT / "reference_sets" / "default" / "manifest.json").is_file()
schema = schemathesis.openapi.from_asgi("/openapi.json", create_app(make_settings(_DATA)))


@pytest.fixture(scope="module", autouse=True)
def _remove_data_folder():
    yield
    shutil.rmtree(_DATA, ignore_errors=True)


@schema.parametrize()
@settings(max_examples=30, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
def test_no_server_errors(case):
    if case.path.startswith("/api/references") and not _LIBRARY_BUILT:
        pytest.skip("no bundled reference set yet (make library): /api/references answers 500 by design")
    response = case.call()
    assert response.status_code < 500, f"{case.method} {case.formatted_path}: {response.status_code} {response.text[:300]}"
    if response.status_code >= 400:
        assert isinstance(response.json().get("detail"), str), response.text[:300]
