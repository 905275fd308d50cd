"""A real PostgreSQL server for the store's tests, when RAMIFORM_TEST_DATABASE_URL names one.

Each test gets a schema of its own, dropped afterwards, so runs never see each other's rows.
"""

from __future__ import annotations

import contextlib
import os
import secrets
from collections.abc import Iterator

import pytest
from sqlalchemy import text

from service.store import make_engine

PG_URL = os.environ.get("RAMIFORM_TEST_DATABASE_URL")
PG_SKIP = (
    "RAMIFORM_TEST_DATABASE_URL is not set: the checks against a real PostgreSQL server are "
    "skipped (e.g. postgresql+psycopg://postgres@127.0.0.1:5432/test)"
)


@contextlib.contextmanager
def postgres_schema(prefix: str) -> Iterator[str]:
    """A fresh schema named ``<prefix>_<random>`` on the test server (skips without one)."""
    if not PG_URL:
        pytest.skip(PG_SKIP)
    schema = f"{prefix}_{secrets.token_hex(6)}"
    admin = make_engine(PG_URL)
    with admin.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    try:
        yield schema
    finally:
        with admin.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


def url_in_schema(schema: str) -> str:
    """The test server's URL with ``schema`` first on the search path."""
    separator = "&" if "?" in PG_URL else "?"
    return f"{PG_URL}{separator}options=-csearch_path%3D{schema}"
