"""Where the app keeps its data, and how the environment changes it."""

from __future__ import annotations

import pytest

from analysis.errors import ParameterError
from webapp.settings import load_settings


def test_defaults_are_a_local_data_folder_with_sqlite(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    s = load_settings({})
    assert s.data_dir == tmp_path / "recinet-data" and s.data_dir.is_dir()
    assert s.database_url == f"sqlite:///{tmp_path / 'recinet-data' / 'recinet.sqlite3'}"
    assert s.cache_dir == tmp_path / "recinet-data" / "job-cache"  # one fixed folder for every worker
    assert s.access_key is None and s.celery_broker is None
    assert s.max_upload_bytes == 64_000_000


def test_environment_overrides(tmp_path):
    s = load_settings({"RECINET_DATA_DIR": str(tmp_path / "d"), "RECINET_DATABASE_URL": "postgresql+psycopg://u@h/db",
                       "RECINET_ACCESS_KEY": "k", "RECINET_MAX_UPLOAD_MB": "5", "RECINET_CELERY_BROKER": "redis://x"})
    assert s.database_url == "postgresql+psycopg://u@h/db" and not (tmp_path / "d").exists()
    assert (s.access_key, s.max_upload_bytes, s.celery_broker) == ("k", 5_000_000, "redis://x")


@pytest.mark.parametrize("value, message", [("lots", "must be a number of MB, got 'lots'"),
                                            ("-1", r"must lie in \(0, 1024\], got '-1'")])
def test_bad_upload_limit(tmp_path, value, message):
    with pytest.raises(ParameterError, match=message):
        load_settings({"RECINET_DATA_DIR": str(tmp_path), "RECINET_MAX_UPLOAD_MB": value})


def test_job_manager_is_diskcache_in_the_data_folder(tmp_path):
    from dash import DiskcacheManager

    from webapp.jobs import make_manager

    s = load_settings({"RECINET_DATA_DIR": str(tmp_path)})
    manager, celery_app = make_manager(s)
    assert isinstance(manager, DiskcacheManager) and celery_app is None
    assert (tmp_path / "job-cache").is_dir()
