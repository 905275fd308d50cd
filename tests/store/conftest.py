"""Stores under test: SQLite always, PostgreSQL when RAMIFORM_TEST_DATABASE_URL is set."""

from __future__ import annotations

import pytest

from service.store import Store
from tests.postgres import PG_URL, postgres_schema


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store(request, tmp_path):
    """A fresh store; on PostgreSQL in a schema of its own, dropped afterwards."""
    if request.param == "sqlite":
        s = Store.open(f"sqlite:///{tmp_path / 'store.db'}", tmp_path / "data")
        yield s
        s.close()
        return
    with postgres_schema("ramiform_test") as schema:
        s = Store.open(PG_URL, tmp_path / "data", connect_args={"options": f"-csearch_path={schema}"})
        try:
            yield s
        finally:
            s.close()
