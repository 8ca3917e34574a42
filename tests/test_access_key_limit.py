"""The group access key: wrong keys are slowed down per client address, the address is taken
from a proxy only when the settings say one stands in front, and the cookie carries the
Secure flag only when the settings say visitors come by HTTPS.

The expected behaviour is the settings' own text (webapp/settings.py, webapp/key_limit.py);
five wrong keys a minute is a rule of thumb (common practice), read from the module here.
"""

from __future__ import annotations

import dataclasses
import os
import secrets

import pytest

from analysis.errors import ParameterError

KEY = "a long shared phrase for the group"


@pytest.fixture
def guarded(webapp_env, fresh_store):
    """The app with an access key and fresh counts; yields (module, set(**settings changes))."""
    from webapp import runtime

    web = webapp_env
    base = runtime.get_settings()

    def set_(**changes):
        runtime.reset(dataclasses.replace(base, access_key=KEY, **changes))

    set_()
    web.key_limit.reset()
    yield web, set_
    web.key_limit.reset()
    runtime.reset(base)


def _login(client, key, addr, **headers):
    return client.post("/login", data={"key": key, "next": "/recent"}, environ_base={"REMOTE_ADDR": addr},
                       headers=headers)


def test_wrong_keys_on_the_login_page_are_slowed_down_per_address(guarded):
    from webapp.key_limit import WRONG_KEYS_PER_MINUTE

    web, _ = guarded
    client = web.server.test_client()
    for _ in range(WRONG_KEYS_PER_MINUTE):
        assert _login(client, "guess", "10.0.0.1").status_code == 403
    r = _login(client, "guess", "10.0.0.1")
    assert r.status_code == 429
    assert 1 <= int(r.headers["Retry-After"]) <= 60
    assert "Too many wrong access keys from your address" in r.get_data(as_text=True)
    # the right key from that address waits too (no cookie is handed out) ...
    r = _login(client, KEY, "10.0.0.1")
    assert r.status_code == 429 and "Set-Cookie" not in r.headers
    # ... while another address is not held up
    r = _login(client, KEY, "10.0.0.2")
    assert r.status_code == 302 and r.headers["Location"] == "/recent" and "recinet_access=" in r.headers["Set-Cookie"]


def test_wrong_keys_in_the_api_header_count_too(guarded):
    from webapp.key_limit import WRONG_KEYS_PER_MINUTE

    web, _ = guarded
    client = web.server.test_client()
    url = "/api/analyses/" + "a" * 22
    env = {"REMOTE_ADDR": "10.0.0.3"}
    assert client.get(url, headers={"X-Recinet-Key": KEY}, environ_base=env).status_code == 404  # let in: no such
    codes = [client.get(url, headers={"X-Recinet-Key": f"guess {i}"}, environ_base=env).status_code
             for i in range(WRONG_KEYS_PER_MINUTE + 1)]
    assert codes[:WRONG_KEYS_PER_MINUTE - 1] == [401] * (WRONG_KEYS_PER_MINUTE - 1) and codes[-1] == 429
    r = client.get(url, headers={"X-Recinet-Key": KEY}, environ_base=env)
    assert r.status_code == 429 and "try again in" in r.get_data(as_text=True)
    # a request without a key is told that it needs one, as before
    assert client.get(url, environ_base=env).status_code == 401


def test_the_forwarded_address_is_used_only_behind_a_proxy(guarded):
    from webapp.key_limit import WRONG_KEYS_PER_MINUTE

    web, set_ = guarded
    client = web.server.test_client()
    # No proxy named: X-Forwarded-For is the client's own text, so a new one each try escapes nothing.
    for i in range(WRONG_KEYS_PER_MINUTE):
        _login(client, "guess", "10.0.0.4", **{"X-Forwarded-For": f"192.0.2.{i}"})
    assert _login(client, "guess", "10.0.0.4", **{"X-Forwarded-For": "192.0.2.99"}).status_code == 429

    # One proxy in front (at 10.0.0.5): each visitor is counted by the address the proxy forwards.
    set_(behind_proxies=1)
    for _ in range(WRONG_KEYS_PER_MINUTE):
        _login(client, "guess", "10.0.0.5", **{"X-Forwarded-For": "198.51.100.7"})
    assert _login(client, "guess", "10.0.0.5", **{"X-Forwarded-For": "198.51.100.7"}).status_code == 429
    assert _login(client, "guess", "10.0.0.5", **{"X-Forwarded-For": "198.51.100.8"}).status_code == 403
    r = _login(client, KEY, "10.0.0.5", **{"X-Forwarded-For": "198.51.100.8"})
    assert r.status_code == 302


@pytest.mark.parametrize("https", [False, True])
def test_the_cookie_is_secure_only_when_told_https(guarded, https):
    web, set_ = guarded
    set_(https=https)
    r = _login(web.server.test_client(), KEY, "10.0.0.6")
    assert r.status_code == 302
    attrs = [a.strip().lower() for a in r.headers["Set-Cookie"].split(";")]
    assert ("secure" in attrs) is https
    assert "httponly" in attrs and "samesite=lax" in attrs


def test_counts_are_shared_through_redis():
    """Two apps (as two gunicorn workers) on one Redis see each other's wrong keys."""
    url = os.environ.get("RECINET_TEST_REDIS_URL")
    if not url:
        pytest.skip("RECINET_TEST_REDIS_URL is not set (.ci/run starts Redis and sets it)")
    from pathlib import Path

    from flask import Flask

    from webapp.key_limit import WRONG_KEYS_PER_MINUTE, KeyGuessLimit
    from webapp.settings import Settings

    s = Settings(Path("."), "sqlite://", Path("."), None, 1, url)
    a, b = Flask("worker_a"), Flask("worker_b")
    limit_a, limit_b = KeyGuessLimit(a, s), KeyGuessLimit(b, s)
    assert limit_a.storage_uri == url
    addr = f"10.{secrets.randbelow(250)}.{secrets.randbelow(250)}.{secrets.randbelow(250) + 1}"  # fresh counts
    env = {"REMOTE_ADDR": addr}
    with b.test_request_context(environ_base=env):
        assert limit_b.wait_s() == 0
    with a.test_request_context(environ_base=env):
        for _ in range(WRONG_KEYS_PER_MINUTE):
            limit_a.count_wrong()
        assert limit_a.wait_s() > 0
    with b.test_request_context(environ_base=env):
        assert 1 <= limit_b.wait_s() <= 60
    with b.test_request_context(environ_base={"REMOTE_ADDR": "10.255.255.254"}):
        assert limit_b.wait_s() == 0


def test_memory_counts_without_redis():
    from pathlib import Path

    from webapp.key_limit import storage_uri
    from webapp.settings import Settings

    assert storage_uri(Settings(Path("."), "sqlite://", Path("."), None, 1, None)) == "memory://"


@pytest.mark.parametrize("env, message", [
    ({"RECINET_BEHIND_PROXY": "yes"}, "RECINET_BEHIND_PROXY must be the number of reverse proxies in front, 0 to 5, "
                                      "got 'yes'"),
    ({"RECINET_BEHIND_PROXY": "9"}, "0 to 5, got '9'"),
    ({"RECINET_HTTPS": "maybe"}, r"RECINET_HTTPS must be 1 or 0 \(yes/no, true/false\), got 'maybe'"),
])
def test_bad_proxy_and_https_settings(tmp_path, env, message):
    from webapp.settings import load_settings

    with pytest.raises(ParameterError, match=message):
        load_settings({"RECINET_DATA_DIR": str(tmp_path), **env})


def test_proxy_and_https_settings(tmp_path):
    from webapp.settings import load_settings

    s = load_settings({"RECINET_DATA_DIR": str(tmp_path), "RECINET_BEHIND_PROXY": "1", "RECINET_HTTPS": "true"})
    assert (s.behind_proxies, s.https) == (1, True)
    s = load_settings({"RECINET_DATA_DIR": str(tmp_path)})
    assert (s.behind_proxies, s.https) == (0, False)
