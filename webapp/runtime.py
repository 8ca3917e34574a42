"""Per-process singletons: the settings and the store (created on first use, re-created after a fork)."""

from __future__ import annotations

import os
import threading

from .settings import Settings, load_settings
from .store import Store

__all__ = ["get_settings", "get_store", "reset"]

_lock = threading.Lock()
_settings: Settings | None = None
_store: Store | None = None


def _after_fork_in_child() -> None:
    """A forked job must not inherit a lock held by another thread of the parent."""
    global _lock
    _lock = threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_after_fork_in_child)


def get_settings() -> Settings:
    """The app's settings, read from the environment once per process.

    Returns
    -------
    Settings
        The settings.
    """
    global _settings
    with _lock:
        if _settings is None:
            _settings = load_settings()
        return _settings


def get_store() -> Store:
    """The store of saved analyses, opened once per database URL.

    Returns
    -------
    Store
        The store.
    """
    global _store
    s = get_settings()
    with _lock:
        if _store is None or _store.url != s.database_url:
            _store = Store(s.database_url)
            _store.purge_deleted()  # on start-up: deleted analyses past their keeping time go for good
        return _store


def reset(settings: Settings | None = None) -> None:
    """Forget the singletons (tests point the app at a fresh data folder this way).

    Parameters
    ----------
    settings : Settings, optional
        Settings to use from now on; None reads them again when next asked.
    """
    global _settings, _store
    with _lock:
        if _store is not None:
            _store.close()
        _settings, _store = settings, None
