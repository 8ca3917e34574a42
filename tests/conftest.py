"""Shared fixtures: a store on SQLite (always) and on PostgreSQL (when RECINET_TEST_PG_URL is set)."""

from __future__ import annotations

import os
import secrets

import pytest


def _pg_database(base_url: str):
    """Create a throwaway database on the test server; yield its URL; drop it."""
    import sqlalchemy as sa

    name = "recinet_t_" + secrets.token_hex(6)
    admin = sa.create_engine(base_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as c:
        c.exec_driver_sql(f'CREATE DATABASE "{name}"')
    url = sa.engine.make_url(base_url).set(database=name).render_as_string(hide_password=False)
    try:
        yield url
    finally:
        with admin.connect() as c:
            c.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store_url(request, tmp_path):
    """A fresh, empty database URL for each test: a SQLite file, or a new PostgreSQL database."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'store.sqlite3'}"
        return
    base = os.environ.get("RECINET_TEST_PG_URL")
    if not base:
        pytest.skip("RECINET_TEST_PG_URL is not set (e.g. postgresql+psycopg://pgtest@127.0.0.1:55432/postgres)")
    pytest.importorskip("psycopg", reason="psycopg is not installed: pip install 'psycopg[binary]'")
    yield from _pg_database(base)
