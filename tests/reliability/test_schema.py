"""Schemathesis against the app's own OpenAPI schema: no generated request gets a 5xx.

Requests are generated from the schema (valid and invalid parameters, random multipart
bodies for the upload) and sent to the app in process, on SQLite and, when a server is
given, on PostgreSQL; every answer must be a success or a client error with a reason, never
a server error. The examples per operation are bounded.
"""

from __future__ import annotations

import contextlib
import shutil
import tempfile
from pathlib import Path

import pytest
import schemathesis
from hypothesis import HealthCheck, settings

from service.web.app import create_app
from tests.postgres import PG_SKIP, PG_URL
from tests.reliability.conftest import ROOT, database_url, make_settings

# The schemas are needed when the module is collected, so their data folders (and the
# PostgreSQL schema) are made here and removed when the module's tests end.
_DATA = Path(tempfile.mkdtemp(prefix="ramiform-schemathesis-"))
_CLEANUP = contextlib.ExitStack()
_LIBRARY_BUILT = (ROOT / "reference_sets" / "default" / "manifest.json").is_file()
_HYPOTHESIS = settings(max_examples=30, deadline=None, derandomize=True,
                       suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])

sqlite_schema = schemathesis.openapi.from_asgi("/openapi.json", create_app(make_settings(_DATA / "sqlite")))
if PG_URL:
    _pg_url = _CLEANUP.enter_context(database_url("postgresql"))
    postgres_schema = schemathesis.openapi.from_asgi(
        "/openapi.json", create_app(make_settings(_DATA / "postgresql", database_url=_pg_url)))


@pytest.fixture(scope="module", autouse=True)
def _remove_data():
    yield
    _CLEANUP.close()
    shutil.rmtree(_DATA, ignore_errors=True)


def _check(case) -> None:
    if case.path.startswith("/api/references") and not _LIBRARY_BUILT:
        pytest.skip("no bundled reference set yet (make library): /api/references answers 500 by design")
    response = case.call()
    assert response.status_code < 500, f"{case.method} {case.formatted_path}: {response.status_code} {response.text[:300]}"
    if response.status_code >= 400:
        assert isinstance(response.json().get("detail"), str), response.text[:300]


@sqlite_schema.parametrize()
@_HYPOTHESIS
def test_no_server_errors_on_sqlite(case):
    _check(case)


if PG_URL:
    @postgres_schema.parametrize()
    @_HYPOTHESIS
    @pytest.mark.postgres
    def test_no_server_errors_on_postgresql(case):
        _check(case)
else:
    @pytest.mark.postgres
    def test_no_server_errors_on_postgresql():
        pytest.skip(PG_SKIP)
