"""Shared fixtures: a store on SQLite (always) and on PostgreSQL (when RECINET_TEST_PG_URL is set)."""

from __future__ import annotations

import os
import secrets

import pytest
from hypothesis import settings as _hypothesis_settings

# Property tests: random draws locally (new examples keep turning up), the same draws in CI
# (`.ci/run` sets HYPOTHESIS_PROFILE=ci) so a run cannot pass or fail by luck. Every failing
# example hypothesis has found is pinned with @example beside its test.
_hypothesis_settings.register_profile("ci", derandomize=True, print_blob=True)
_hypothesis_settings.register_profile("dev")
_hypothesis_settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "dev"))


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


# --------------------------------------------------------------------------- browser tests

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-dev-shm-usage"]


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="session")
def live_server(webapp_env):
    """The web app served on loopback in a thread for the whole session."""
    import threading

    from werkzeug.serving import make_server

    srv = make_server("127.0.0.1", free_port(), webapp_env.server, threaded=True)
    threading.Thread(target=srv.serve_forever, daemon=True).start()
    yield f"http://127.0.0.1:{srv.server_port}"
    srv.shutdown()


@pytest.fixture(scope="session")
def browser():
    """Debian's Chromium through Playwright (never `playwright install`); skips with the reason."""
    import shutil

    if not (os.path.exists(CHROMIUM) or shutil.which("chromium")):
        pytest.skip("Debian chromium is not installed (apt-get install chromium); browser tests skip")
    sync_api = pytest.importorskip("playwright.sync_api", reason="the playwright package is not installed")
    exe = CHROMIUM if os.path.exists(CHROMIUM) else shutil.which("chromium")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=exe, headless=True, args=CHROMIUM_ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser):
    ctx = browser.new_context(viewport={"width": 1500, "height": 1100}, accept_downloads=True)
    pg = ctx.new_page()
    pg.set_default_timeout(30_000)
    yield pg
    ctx.close()
