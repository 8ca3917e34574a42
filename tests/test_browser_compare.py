"""/compare in headless Chromium: two saved analyses side by side, what differs highlighted.

The analyses are of two demo renders; the expected Wood notations, domain counts and
overlayer cell lengths are the truth given to the renderer (demo_images/*.json).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
DEMO = Path(__file__).resolve().parent.parent / "demo_images"


def _save_demo(store, name):
    from webapp import figures, service

    raw = (DEMO / f"{name}.png").read_bytes()
    truth = json.loads((DEMO / f"{name}.json").read_text())
    im = service.read_image(raw, name=name)
    sha = store.put_image(raw, filename=f"{name}.png", width=im.shape[1], height=im.shape[0],
                          thumbnail_png=figures.thumbnail_png(im.data))
    params = {"energy_eV": truth["energy_eV"], "substrate": truth["substrate_label"]}
    result = service.analyze(im.data, **{"energy_eV": truth["energy_eV"], "substrate": truth["substrate_label"]})
    saved = store.save_analysis(image_sha256=sha, parameters=params, edits={}, result=result,
                                sample_name=name, summary=service.summary_of(result))
    return saved, truth


def _rows(page) -> dict:
    return page.evaluate("""() => Object.fromEntries([...document.querySelectorAll('#compare-table tbody tr')].map(
        tr => [tr.dataset.label, {a: tr.cells[1].innerText, b: tr.cells[2].innerText,
                                  differs: tr.classList.contains('differs')}]))""")


def _cell_length(truth, row):
    """|row of the matrix · substrate vectors|: the overlayer cell length the renderer used, Å."""
    m = np.asarray(truth["scenario"]["matrix"], float)
    return float(np.linalg.norm(m[row] @ np.asarray(truth["substrate_vectors_A"], float)))


def test_compare_two_saved_analyses(page, live_server, fresh_store):
    for n in ("pt111_PX-7_oxygen_p2x2", "pt111_PX-9_sqrt7_two_domains"):
        if not (DEMO / f"{n}.png").exists():
            pytest.skip(f"demo image {n} is missing")
    a, ta = _save_demo(fresh_store, "pt111_PX-7_oxygen_p2x2")
    b, tb = _save_demo(fresh_store, "pt111_PX-9_sqrt7_two_domains")
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)

    page.goto(live_server + "/")
    page.wait_for_selector("#nav a[href='/compare']")  # the nav lists the page

    page.goto(f"{live_server}/compare?a={a.token}&b={b.token}")
    page.wait_for_selector("#compare-table")
    page.wait_for_selector("#compare-side-a .imagelayer image", state="attached")
    page.wait_for_selector("#compare-side-b .imagelayer image", state="attached")
    rows = _rows(page)
    assert rows["Wood notation"] == {"a": ta["scenario"]["wood_notation"], "b": tb["scenario"]["wood_notation"],
                                     "differs": True}
    assert rows["Matrix"]["differs"] and rows["Domains"]["differs"]
    assert rows["Domains"]["a"].startswith(f"{len(ta['scenario']['domains'])}:")
    assert rows["Domains"]["b"].startswith(f"{len(tb['scenario']['domains'])}:")
    assert not rows["Substrate"]["differs"] and not rows["Kind"]["differs"]  # both commensurate on Pt(111)
    for side, truth in (("a", ta), ("b", tb)):
        shown = float(rows["Overlayer a"][side].split()[0])
        assert abs(shown - _cell_length(truth, 0)) < 0.01 * _cell_length(truth, 0), (side, shown)
    assert rows["Overlayer a"]["differs"]
    # both sides drawn the same size
    box_a = page.locator("#compare-side-a .imagelayer image").first.bounding_box()
    box_b = page.locator("#compare-side-b .imagelayer image").first.bounding_box()
    assert abs(box_a["width"] - box_b["width"]) < 2 and abs(box_a["height"] - box_b["height"]) < 2
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / "compare.png"), full_page=True)

    # from the read-only view of A: "Compare with another", then B picked by hand
    page.goto(f"{live_server}/analysis/{a.token}")
    page.click("#compare-from")
    page.wait_for_selector("#compare-a")
    page.click("#compare-b")
    page.get_by_text("pt111_PX-9_sqrt7_two_domains · (√7×√7)R19.1°", exact=False).last.click()
    page.wait_for_selector("#compare-table")
    assert _rows(page)["Wood notation"]["b"] == tb["scenario"]["wood_notation"]
    assert page.get_attribute("#compare-link", "href") == f"/compare?a={a.token}&b={b.token}"

    # the same analysis on both sides: nothing differs
    page.goto(f"{live_server}/compare?a={a.token}&b={a.token}")
    page.wait_for_selector("#compare-table")
    assert not any(r["differs"] for r in _rows(page).values())

    # a link to nothing: one line, no traceback
    page.goto(f"{live_server}/compare?a={a.token}&b=notAtokenAtAllButLongEnough")
    page.wait_for_selector(".note-error")
    assert "No saved analysis has the link given for B;" in page.inner_text(".note-error")
    assert "Traceback" not in page.content()
    assert not errors, errors
