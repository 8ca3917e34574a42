"""Slowing down guesses of the group access key, and where a client's address comes from.

Wrong keys (typed on the login page or sent in the ``X-Recinet-Key`` header) are counted
per client address with Flask-Limiter's storage: in Redis when the app has one
(``RECINET_CELERY_BROKER``), so every gunicorn worker and machine sees the same counts;
in this process's memory otherwise (then each worker counts for itself). After
:data:`WRONG_KEYS_PER_MINUTE` wrong keys in a minute an address is refused, right key or
not, until the minute is over.

The client address is the connection's, unless ``RECINET_BEHIND_PROXY`` says how many
reverse proxies stand in front: then it is read from their ``X-Forwarded-For`` (werkzeug's
ProxyFix). Without that setting the header is ignored, since any client can write it.
"""

from __future__ import annotations

import logging
import math
import time

from flask import Flask, request
from flask_limiter import Limiter
from limits import parse
from werkzeug.middleware.proxy_fix import ProxyFix

from . import runtime
from .settings import Settings

__all__ = ["WRONG_KEYS_PER_MINUTE", "KeyGuessLimit", "storage_uri"]

# A person mistyping needs a few tries; a guessing script needs millions (common practice).
WRONG_KEYS_PER_MINUTE = 5

_log = logging.getLogger("recinet.webapp")


def storage_uri(settings: Settings) -> str:
    """Where the counts live: the Redis of the settings when there is one, else memory.

    >>> from pathlib import Path
    >>> s = Settings(Path("."), "sqlite://", Path("."), None, 1, "redis://127.0.0.1:6379/0")
    >>> storage_uri(s), storage_uri(Settings(Path("."), "sqlite://", Path("."), None, 1, None))
    ('redis://127.0.0.1:6379/0', 'memory://')

    Parameters
    ----------
    settings : Settings
        The app's settings (:func:`webapp.settings.load_settings`).

    Returns
    -------
    str
        A ``limits`` storage URI.
    """
    broker = settings.celery_broker or ""
    return broker if broker.startswith(("redis://", "rediss://", "unix://")) else "memory://"


class _ProxyFixWhenTold:
    """ProxyFix for the number of proxies the settings name (read per request), else nothing."""

    def __init__(self, app):
        self.app = app
        self._fixed: dict[int, ProxyFix] = {}

    def __call__(self, environ, start_response):
        n = runtime.get_settings().behind_proxies
        if not n:
            return self.app(environ, start_response)
        if n not in self._fixed:
            self._fixed[n] = ProxyFix(self.app, x_for=n, x_proto=n)
        return self._fixed[n](environ, start_response)


def _client_address() -> str:
    return request.remote_addr or "unknown"


class KeyGuessLimit:
    """Counts wrong access keys per client address on `server` (see the module's text)."""

    def __init__(self, server: Flask, settings: Settings):
        server.wsgi_app = _ProxyFixWhenTold(server.wsgi_app)
        self.storage_uri = storage_uri(settings)
        self.ext = Limiter(_client_address, app=server, storage_uri=self.storage_uri, default_limits=[],
                           key_prefix="recinet", headers_enabled=False)
        self.item = parse(f"{WRONG_KEYS_PER_MINUTE}/minute")

    def wait_s(self) -> int:
        """Seconds this request's address must wait before its next try; 0 when it may try now.

        Returns
        -------
        int
            Seconds.
        """
        addr = _client_address()
        try:
            if self.ext.limiter.test(self.item, "access-key", addr):
                return 0
            reset_at = self.ext.limiter.get_window_stats(self.item, "access-key", addr).reset_time
        except Exception as err:  # noqa: BLE001 - a counter that cannot be read must not lock the group out
            _log.warning("the access-key counter is unavailable (%s); not limiting", err)
            return 0
        return max(1, math.ceil(reset_at - time.time()))

    def count_wrong(self) -> None:
        """Count one wrong key from this request's address."""
        try:
            self.ext.limiter.hit(self.item, "access-key", _client_address())
        except Exception as err:  # noqa: BLE001
            _log.warning("the access-key counter is unavailable (%s); not counting", err)

    @staticmethod
    def message(wait_s: int) -> str:
        """What a refused visitor reads.

        Parameters
        ----------
        wait_s : int
            Seconds to wait.

        Returns
        -------
        str
            One line.
        """
        return (f"Too many wrong access keys from your address ({WRONG_KEYS_PER_MINUTE} a minute are allowed): "
                f"try again in {wait_s} s.")

    def reset(self) -> None:
        """Forget every count (tests)."""
        self.ext.reset()
