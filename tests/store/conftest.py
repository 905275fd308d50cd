"""Stores under test: SQLite always, PostgreSQL when RAMIFORM_TEST_DATABASE_URL is set."""

from __future__ import annotations

import os
import secrets

import pytest
from sqlalchemy import text

from service.store import Store, make_engine

PG_URL = os.environ.get("RAMIFORM_TEST_DATABASE_URL")
PG_SKIP = (
    "RAMIFORM_TEST_DATABASE_URL is not set: the store round trip against a real PostgreSQL "
    "server is skipped (e.g. postgresql+psycopg://postgres@127.0.0.1:5432/test)"
)


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store(request, tmp_path):
    """A fresh store; on PostgreSQL in a schema of its own, dropped afterwards."""
    if request.param == "sqlite":
        s = Store.open(f"sqlite:///{tmp_path / 'store.db'}", tmp_path / "data")
        yield s
        s.close()
        return
    if not PG_URL:
        pytest.skip(PG_SKIP)
    schema = f"ramiform_test_{secrets.token_hex(6)}"
    admin = make_engine(PG_URL)
    with admin.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    s = Store.open(PG_URL, tmp_path / "data", connect_args={"options": f"-csearch_path={schema}"})
    try:
        yield s
    finally:
        s.close()
        with admin.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()
