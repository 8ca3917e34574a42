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


@pytest.fixture(scope="session")
def webapp_env(tmp_path_factory):
    """Import the web app once per session with its data folder in a temporary directory.

    Returns the ``webapp.app`` module; tests that need a fresh store call ``fresh_store``.
    """
    data = tmp_path_factory.mktemp("recinet-data")
    old = {k: os.environ.get(k) for k in ("RECINET_DATA_DIR", "RECINET_DATABASE_URL", "RECINET_ACCESS_KEY")}
    os.environ["RECINET_DATA_DIR"] = str(data)
    os.environ.pop("RECINET_DATABASE_URL", None)
    os.environ.pop("RECINET_ACCESS_KEY", None)
    import webapp.app as web

    yield web
    for k, v in old.items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v


@pytest.fixture
def fresh_store(webapp_env, tmp_path):
    """Point the running app at an empty SQLite store in `tmp_path` for one test; return the Store."""
    import dataclasses

    from webapp import runtime

    base = runtime.get_settings()
    runtime.reset(dataclasses.replace(base, data_dir=tmp_path, database_url=f"sqlite:///{tmp_path / 'app.sqlite3'}"))
    yield runtime.get_store()
    runtime.reset(base)
