"""Where the web app keeps its data, read once from the environment.

Environment variables
---------------------
RECINET_DATA_DIR       data folder (default ``./recinet-data``): SQLite file, job cache
RECINET_DATABASE_URL   SQLAlchemy URL, e.g. ``postgresql+psycopg://user@host/db``
RECINET_ACCESS_KEY     when set, every page and API asks for this group key
RECINET_MAX_UPLOAD_MB  largest accepted upload in MB of 10⁶ bytes (default 64)
RECINET_CELERY_BROKER  Redis URL; when set, long work runs on Celery workers
RECINET_JOB_TIME_LIMIT_S  longest a background job (an analysis, a series) may run (default 300 s)
RECINET_BEHIND_PROXY   number of reverse proxies in front (default 0): client addresses are then read
                       from their X-Forwarded-For, and the scheme from X-Forwarded-Proto
RECINET_WATCH_ROOT     a folder on the server under which the live page may watch folders (default: none,
                       frames are then only uploaded)
RECINET_HTTPS          1 when visitors reach the server by HTTPS (a proxy in front): the access-key
                       cookie is then sent with the Secure flag (never over plain HTTP)
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from analysis.errors import ParameterError

__all__ = ["Settings", "load_settings"]


@dataclass(frozen=True)
class Settings:
    data_dir: Path
    database_url: str
    cache_dir: Path
    access_key: str | None
    max_upload_bytes: int
    celery_broker: str | None
    job_time_limit_s: float = 300.0
    behind_proxies: int = 0
    https: bool = False
    watch_root: Path | None = None

    @property
    def max_request_bytes(self) -> int:
        """Flask's MAX_CONTENT_LENGTH: a base64 upload is 4/3 of the file, plus the JSON around it."""
        return self.max_upload_bytes * 4 // 3 + 1_000_000


def load_settings(env: dict | None = None) -> Settings:
    """Settings from `env` (default ``os.environ``); creates the data folder when SQLite is used.

    Parameters
    ----------
    env : dict, optional
        The environment variables (``RECINET_*``).

    Returns
    -------
    Settings
        The settings.
    """
    env = os.environ if env is None else env
    data_dir = Path(env.get("RECINET_DATA_DIR") or "recinet-data").expanduser().resolve()
    url = env.get("RECINET_DATABASE_URL") or ""
    if not url:
        data_dir.mkdir(parents=True, exist_ok=True)
        url = f"sqlite:///{data_dir / 'recinet.sqlite3'}"
    raw_mb = env.get("RECINET_MAX_UPLOAD_MB") or "64"
    try:
        mb = float(raw_mb)
    except ValueError:
        raise ParameterError(f"RECINET_MAX_UPLOAD_MB must be a number of MB, got {raw_mb!r}.") from None
    if not (0 < mb <= 1024):
        raise ParameterError(f"RECINET_MAX_UPLOAD_MB must lie in (0, 1024], got {raw_mb!r}.")
    raw_limit = env.get("RECINET_JOB_TIME_LIMIT_S") or "300"
    try:
        limit = float(raw_limit)
    except ValueError:
        raise ParameterError(f"RECINET_JOB_TIME_LIMIT_S must be a number of seconds, got {raw_limit!r}.") from None
    if not (5 <= limit <= 86400):
        raise ParameterError(f"RECINET_JOB_TIME_LIMIT_S must lie in [5, 86400] s, got {raw_limit!r}.")
    raw_proxies = (env.get("RECINET_BEHIND_PROXY") or "0").strip()
    if not (raw_proxies.isdigit() and int(raw_proxies) <= 5):
        raise ParameterError(f"RECINET_BEHIND_PROXY must be the number of reverse proxies in front, 0 to 5, "
                             f"got {raw_proxies!r}.")
    raw_https = (env.get("RECINET_HTTPS") or "0").strip().lower()
    if raw_https not in _FLAGS:
        raise ParameterError(f"RECINET_HTTPS must be 1 or 0 (yes/no, true/false), got {raw_https!r}.")
    watch_root = None
    raw_root = (env.get("RECINET_WATCH_ROOT") or "").strip()
    if raw_root:
        watch_root = Path(raw_root).expanduser().resolve()
        if not watch_root.is_dir():
            raise ParameterError(f"RECINET_WATCH_ROOT must be an existing folder, got {raw_root!r}.")
    return Settings(
        data_dir=data_dir,
        database_url=url,
        cache_dir=data_dir / "job-cache",
        access_key=env.get("RECINET_ACCESS_KEY") or None,
        max_upload_bytes=int(mb * 1_000_000),
        celery_broker=env.get("RECINET_CELERY_BROKER") or None,
        job_time_limit_s=limit,
        behind_proxies=int(raw_proxies),
        https=_FLAGS[raw_https],
        watch_root=watch_root,
    )


_FLAGS = {"1": True, "yes": True, "true": True, "on": True, "0": False, "no": False, "false": False, "off": False}
