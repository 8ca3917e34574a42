"""In headless Chromium: the saved-analyses list searched by sample name, notes and Wood notation;
a deletion asked for, cancelled, confirmed, then undone from 'Recently deleted'.

Needs Debian's ``chromium`` and the ``playwright`` package (skips otherwise). Screenshots go
to $RECINET_SHOTS (default /tmp/recinet-shots).
"""

from __future__ import annotations

import io
import json
import os
import secrets
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))


def _save(server, tag, name, notes, wood, seed):
    from PIL import Image

    from webapp import service

    buf = io.BytesIO()
    Image.fromarray((np.random.default_rng(seed).random((120, 140)) * 255).astype(np.uint8)).save(buf, format="PNG")
    result = {"center_px": [70.0, 60.0], "spots": [],
              "substrate": {"net": "Pt(111)", "a_star_px": [[30.0, 0.0], [-15.0, 26.0]]},
              "overlayer": {"kind": "commensurate", "wood": wood}}
    doc = service.export_bundle(image_bytes=buf.getvalue(), filename=f"{tag}.png",
                                parameters={"energy_eV": 70.0, "substrate": "Pt(111)"}, edits={}, result=result,
                                sample_name=f"{name} {tag}", notes=notes)
    r = server.test_client().post("/api/analyses", data=json.dumps(doc), content_type="application/json")
    return r.get_json()["token"]


def _cards(page):
    return sorted(a.get_attribute("href").rsplit("/", 1)[1] for a in page.locator("#recent-list a.card").all())


def _search(page, text):
    old = page.inner_text("#recent-count")
    page.fill("#recent-search", text)
    page.press("#recent-search", "Enter")
    page.wait_for_function("s => document.querySelector('#recent-count').innerText !== s", arg=old)


def test_search_delete_confirm_and_restore(page, live_server, webapp_env):
    tag = secrets.token_hex(4)  # the session's store is shared with other tests: our rows carry a tag
    ox = _save(webapp_env.server, tag, "Pt(111) oxygen", "dose 3 L at 300 K", "p(2×2)", 1)
    ru = _save(webapp_env.server, tag, "Ru(0001) run", "after anneal at 900 K", "(√3×√3)R30°", 2)
    co = _save(webapp_env.server, tag, "Pt(111) CO", "CO exposure", "c(4×2)", 3)
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.goto(live_server + "/recent")
    page.wait_for_selector(f"a.card[href='/analysis/{ru}']")

    _search(page, tag)
    assert _cards(page) == sorted([ox, ru, co])
    _search(page, f"{tag} sqrt3xsqrt3")  # Wood notation as typed on a keyboard
    assert _cards(page) == [ru] and "1 saved analysis matches" in page.inner_text("#recent-count")
    _search(page, f"{tag} ANNEAL")  # notes, any case
    assert _cards(page) == [ru]
    _search(page, f"{tag} pt(111) 2x2")  # sample name and Wood notation together
    assert _cards(page) == [ox]
    _search(page, f"{tag} nothing-like-this")
    assert _cards(page) == [] and "0 saved analyses match" in page.inner_text("#recent-count")
    _search(page, tag)
    _shot(page, "recent-search.png")

    # Delete asks first; cancelling keeps the analysis
    dialogs = []
    page.once("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
    page.locator(f"div.card-wrap:has(a.card[href='/analysis/{ru}']) button").click()
    page.wait_for_timeout(800)
    assert dialogs and "Ru(0001) run" in dialogs[0] and "30 days" in dialogs[0]
    assert ru in _cards(page)
    # confirmed: it leaves the list and its link, and shows under 'Recently deleted'
    page.once("dialog", lambda d: d.accept())
    page.locator(f"div.card-wrap:has(a.card[href='/analysis/{ru}']) button").click()
    page.wait_for_function("document.querySelector('#recent-note').innerText.startsWith('Deleted')")
    page.wait_for_function(f"!document.querySelector(\"#recent-list a.card[href='/analysis/{ru}']\")")
    assert _cards(page) == sorted([ox, co])
    assert webapp_env.server.test_client().get(f"/api/analyses/{ru}").status_code == 404
    page.click("#recent-deleted-view summary")
    row = page.locator(f"#recent-deleted-list .deleted-row:has-text('Ru(0001) run {tag}')")
    assert "kept until" in row.inner_text()
    _shot(page, "recent-deleted.png")
    row.locator("button").click()
    page.wait_for_function("document.querySelector('#recent-note').innerText.startsWith('Restored')")
    page.wait_for_selector(f"#recent-list a.card[href='/analysis/{ru}']")
    assert _cards(page) == sorted([ox, ru, co])
    assert webapp_env.server.test_client().get(f"/api/analyses/{ru}").status_code == 200
    assert not [e for e in errors if "favicon" not in e]


def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)
