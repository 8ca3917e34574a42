"""The Dash shell: pages, the group access key, a small JSON API, thumbnails, limits.

``recinet serve`` calls :func:`run`; ``gunicorn -w 2 webapp.app:server`` serves
the same app to a group. Settings come from the environment (see
:mod:`webapp.settings`) when this module is first imported.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import threading
from html import escape
from pathlib import Path
from urllib.parse import quote

import dash
from dash import Dash, dcc, html
from flask import Response, redirect, request

from analysis.errors import RecinetError

from . import ids, jobs, runtime, service
from .figures import thumbnail_png
from .key_limit import KeyGuessLimit

__all__ = ["app", "server", "celery_app", "run", "save_bundle"]

_HERE = Path(__file__).resolve().parent
_log = logging.getLogger("recinet.webapp")

settings = runtime.get_settings()
_manager, celery_app = jobs.make_manager(settings)

app = Dash(
    __name__,
    use_pages=True,
    pages_folder=str(_HERE / "pages"),
    assets_folder=str(_HERE.parent / "assets"),
    background_callback_manager=_manager,
    suppress_callback_exceptions=True,
    title="recinet",
    update_title=None,
)
server = app.server
_SETUP_LOCK = threading.Lock()


def _setup_before_first_request() -> None:
    """Dash completes its set-up (callback map, scripts) in its first request's hook, and marks it done
    before doing it: requests arriving together on a fresh server either failed ('dictionary changed size
    during iteration', a 500 for one of eight clients) or read half a callback map. This hook runs first
    and lets one request do the set-up while the others wait for it to finish."""
    with _SETUP_LOCK:
        app._setup_server()


server.before_request_funcs.setdefault(None, []).insert(0, _setup_before_first_request)
server.config["MAX_CONTENT_LENGTH"] = settings.max_request_bytes
server.config["RECINET_MAX_UPLOAD_BYTES"] = settings.max_upload_bytes


def nav_links() -> list:
    """A link to every registered page that gave an `order`, in that order (pages without one,
    such as a saved analysis or the 404 page, are reached by their links only).

    Returns
    -------
    list
        Dash link components.
    """
    pages = [p for p in dash.page_registry.values() if p.get("supplied_order") is not None]
    pages.sort(key=lambda p: (p["supplied_order"], p["module"]))
    return [html.A(p["name"], href=p["relative_path"]) for p in pages]


app.layout = html.Div(className="shell", children=[
    dcc.Location(id=ids.URL),
    html.Header(className="topbar", children=[
        html.A("recinet", href="/", className="brand"),
        html.Nav(id=ids.NAV, children=nav_links()),
        html.Span(f"uploads up to {settings.max_upload_bytes / 1e6:.0f} MB", className="limit",
                  **{"data-max-bytes": str(settings.max_upload_bytes)}),
    ]),
    dash.page_container,
])

# ---------------------------------------------------------------- group access key
_COOKIE = "recinet_access"
_OPEN_PATHS = ("/login",)
key_limit = KeyGuessLimit(server, settings)  # wrong keys per client address, shared through Redis when set


def _key_digest(key: str) -> str:
    return hashlib.sha256(("recinet-access\0" + key).encode()).hexdigest()


def _allowed() -> bool:
    key = runtime.get_settings().access_key
    if not key:
        return True
    good = _key_digest(key)
    if hmac.compare_digest(request.cookies.get(_COOKIE, ""), good):
        return True
    given = request.headers.get("X-Recinet-Key", "")
    if not given or key_limit.wait_s():
        return False
    if hmac.compare_digest(_key_digest(given), good):
        return True
    key_limit.count_wrong()
    return False


def _safe_next(target: str | None) -> str:
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    return target


@server.before_request
def _guard():
    if request.path in _OPEN_PATHS or _allowed():
        return None
    wait = key_limit.wait_s() if request.headers.get("X-Recinet-Key") else 0
    if wait:
        return Response(key_limit.message(wait), 429, {"Retry-After": str(wait)}, mimetype="text/plain")
    if request.path.startswith(("/_dash", "/api/", "/thumb/", "/assets/", "/_reload", "/_favicon")):
        return Response("This recinet server needs the group access key.", 401, mimetype="text/plain")
    return redirect("/login?next=" + quote(request.full_path.rstrip("?")))


_LOGIN = """<!doctype html><html><head><meta charset="utf-8"><title>recinet: access key</title>
<style>body{{font-family:system-ui,sans-serif;max-width:26rem;margin:15vh auto;color:#222}}
input{{font-size:1rem;padding:.4rem;width:100%;box-sizing:border-box}}button{{margin-top:.8rem;padding:.4rem 1rem}}
.err{{color:#a33}}</style></head><body><h1>recinet</h1><p>This server is shared by a group. Enter its access key.</p>
<form method="post" action="/login"><input type="hidden" name="next" value="{next}">
<input type="password" name="key" autofocus aria-label="access key"><p class="err">{error}</p>
<button type="submit">Enter</button></form></body></html>"""


@server.route("/login", methods=["GET", "POST"])
def _login():
    key = runtime.get_settings().access_key
    nxt = _safe_next(request.values.get("next"))
    if not key:
        return redirect(nxt)
    if request.method == "POST":
        wait = key_limit.wait_s()
        if wait:
            return Response(_LOGIN.format(next=escape(nxt), error=escape(key_limit.message(wait))), 429,
                            {"Retry-After": str(wait)}, mimetype="text/html")
        given = request.form.get("key", "")
        if given and hmac.compare_digest(_key_digest(given), _key_digest(key)):
            resp = redirect(nxt)
            resp.set_cookie(_COOKIE, _key_digest(key), httponly=True, samesite="Lax", max_age=30 * 86400,
                            secure=runtime.get_settings().https)
            return resp
        key_limit.count_wrong()
        return Response(_LOGIN.format(next=escape(nxt), error="That key is not right."), 403, mimetype="text/html")
    return Response(_LOGIN.format(next=escape(nxt), error=""), mimetype="text/html")


# ---------------------------------------------------------------- JSON API and thumbnails

def _json(obj, status=200):
    return Response(json.dumps(obj), status, mimetype="application/json")


def save_bundle(doc: dict, *, copied_from: str | None = None):
    """Store the image and a new analysis from a checked export document; return the SavedAnalysis.

    Parameters
    ----------
    doc : dict
        An export document checked by :func:`webapp.service.read_bundle`.
    copied_from : str, optional, keyword-only
        Share token of the analysis it was copied from.

    Returns
    -------
    SavedAnalysis
        The new row.
    """
    im = service.read_image(doc["image"]["data"], name=doc["image"]["filename"])
    store = runtime.get_store()
    sha = store.put_image(doc["image"]["data"], filename=doc["image"]["filename"], width=im.data.shape[1],
                          height=im.data.shape[0], thumbnail_png=thumbnail_png(im.data))
    return store.save_analysis(image_sha256=sha, parameters=doc.get("parameters") or {},
                               edits=service.clean_edits(doc.get("edits")), result=doc.get("result"),
                               sample_name=doc.get("sample_name", ""), notes=doc.get("notes", ""),
                               summary=service.summary_of(doc.get("result")), copied_from=copied_from)


@server.route("/api/analyses", methods=["POST"])
def _api_save():
    """Save an analysis export (the JSON the page exports); answers ``{"token", "url"}``."""
    try:
        doc = service.read_bundle(request.get_data(cache=False), max_bytes=runtime.get_settings().max_upload_bytes)
        saved = save_bundle(doc)
    except RecinetError as err:
        return _json({"error": str(err)}, 400)
    return _json({"token": saved.token, "url": f"/analysis/{saved.token}"}, 201)


@server.route("/api/analyses/<token>", methods=["GET"])
def _api_get(token: str):
    store = runtime.get_store()
    a = store.get_analysis(token)
    if a is None:
        return _json({"error": "No saved analysis has this link."}, 404)
    doc = service.export_bundle(image_bytes=store.image_bytes(a.image_sha256), filename=a.image_filename,
                                parameters=a.parameters, edits=a.edits, result=a.result,
                                sample_name=a.sample_name, notes=a.notes, token=a.token)
    doc["created_at"] = a.created_at.isoformat(timespec="seconds")
    return _json(doc)


@server.route("/thumb/<sha>.png")
def _thumb(sha: str):
    data = runtime.get_store().thumbnail(sha)
    if data is None:
        return Response("not found", 404, mimetype="text/plain")
    resp = Response(data, mimetype="image/png")
    resp.headers["Cache-Control"] = "private, max-age=86400"
    return resp


@server.errorhandler(413)
def _too_large(_err):
    mb = runtime.get_settings().max_upload_bytes / 1e6
    return Response(f"The upload is larger than the limit of {mb:.0f} MB.", 413, mimetype="text/plain")


@server.errorhandler(500)
def _internal(_err):
    return Response("Something went wrong on the server; the error was logged.", 500, mimetype="text/plain")


@server.after_request
def _headers(resp):
    resp.headers.setdefault("X-Content-Type-Options", "nosniff")
    resp.headers.setdefault("Referrer-Policy", "same-origin")
    return resp


def run(host: str = "127.0.0.1", port: int = 8050, debug: bool = False) -> None:
    """Serve the app (``recinet serve``); SQLite and the job cache live in the data folder.

    Parameters
    ----------
    host : str
        Address to listen on.
    port : int
        Port to listen on.
    debug : bool
        Dash's debug mode (reloads and error pages).
    """
    s = runtime.get_settings()
    where = s.database_url if not s.database_url.startswith("sqlite") else str(s.data_dir)
    print(f"recinet: serving http://{host}:{port}/  (data: {where})", flush=True)
    app.run(host=host, port=port, debug=debug)
