"""Named calibrations in headless Chromium: fit on a reference image, save under a name, see its
provenance, pick it by name for the next analysis (which then uses it).

Skips without Debian's chromium or the playwright package (see tests/conftest.py).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
DEMO = Path(__file__).resolve().parent.parent / "demo_images"
WAIT_MS = 120_000  # an analysis of a 1024² demo image on a busy 2-core machine


def _pick(page, dropdown, text):
    page.click(f"#{dropdown}")
    page.get_by_text(text, exact=True).click()


def test_save_a_named_calibration_see_where_it_came_from_and_use_it(page, live_server, fresh_store):
    from analysis.optics import ScreenGeometry
    from webapp import calibrations

    for name in ("cu100_CX-3_c2x2.png", "cu100_CX-3_clean_reference.png"):
        if not (DEMO / name).exists():
            pytest.skip(f"demo image {name} is missing")
    ref_truth = json.loads((DEMO / "cu100_CX-3_clean_reference.json").read_text())
    truth = json.loads((DEMO / "cu100_CX-3_c2x2.json").read_text())
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.goto(live_server + "/")
    _pick(page, "demo-pick", "cu100 CX-3 c2x2")
    page.wait_for_selector("#graph .imagelayer image", state="attached")
    page.get_by_text("Reference image and calibration (optional)").click()
    _pick(page, "ref-demo", "cu100 CX-3 clean reference")
    page.wait_for_function("document.querySelector('#ref-energy').value === '175'")
    page.click("#run")
    page.wait_for_selector("#wood", timeout=WAIT_MS)

    # bad input first: one line, nothing saved
    page.click("#calibration-save")
    page.wait_for_function("document.querySelector('#calibration-note').innerText.includes('Give the calibration a name')")
    page.fill("#calibration-name", "Chamber B <b>MCP</b>")
    page.fill("#calibration-camera", "CCD 2")
    page.fill("#calibration-e-lo", "100")
    page.fill("#calibration-e-hi", "250")
    page.click("#calibration-save")
    page.wait_for_selector("#calibration-note .note-ok")
    facts = page.wait_for_selector("#calibration-facts").inner_text()
    assert "Chamber B <b>MCP</b>" in facts and page.locator("#calibration-facts b").count() == 0  # text, not markup
    for want in ("cu100_CX-3_clean_reference.png", "175 eV", "Cu(100)", "a reference image", "100–250 eV", "CCD 2"):
        assert want in facts, want
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / "calibration-saved.png"), full_page=True)

    [cal] = calibrations.list_calibrations(fresh_store)
    geom = ScreenGeometry.from_dict(cal.geometry)
    # truth given to the renderer of the reference demo (demo_images/cu100_CX-3_clean_reference.json)
    g0 = ref_truth["geometry"]
    assert abs(geom.scale_px - g0["scale_px"]) < 0.03 * g0["scale_px"]
    assert abs(geom.center_x_px - g0["center_x_px"]) < 3 and abs(geom.center_y_px - g0["center_y_px"]) < 3
    assert f"{cal.provenance['residual_px']:.3g} px" in facts

    # a fresh page: pick it by name, analyse without the reference, save; the analysis used it
    page.goto(live_server + "/")
    _pick(page, "demo-pick", "cu100 CX-3 c2x2")
    page.wait_for_selector("#graph .imagelayer image", state="attached")
    page.get_by_text("Reference image and calibration (optional)").click()
    _pick(page, "calibration-pick", cal.label())
    page.wait_for_selector("#calibration-facts")
    page.click("#run")
    page.wait_for_selector("#wood", timeout=WAIT_MS)
    assert page.inner_text("#wood").strip() == truth["scenario"]["wood_notation"]
    page.click("#save")
    href = page.wait_for_selector("#share-href").get_attribute("href")
    saved = fresh_store.get_analysis(href.rsplit("/", 1)[-1])
    assert saved.parameters["calibration_from"] == cal.value
    assert saved.result["calibration_source"] == "calibration"
    page.screenshot(path=str(SHOTS / "calibration-picked.png"), full_page=True)
    assert not errors, errors


def test_rename_delete_and_restore_a_named_calibration(page, live_server, fresh_store):
    from analysis.optics import ScreenGeometry
    from webapp import calibrations

    geom = ScreenGeometry(512.0, 500.0, 600.0, distortion=0.2).to_dict()
    a = calibrations.save_calibration(fresh_store, name="Chamber A", camera="CCD 1", energy_range_eV=(60, 200),
                                      geometry=geom, provenance={"source": "reference"})
    calibrations.save_calibration(fresh_store, name="Chamber B", energy_range_eV=(60, 200), geometry=geom,
                                  provenance={})
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.goto(live_server + "/")
    page.wait_for_selector("#upload input[type=file]", state="attached")
    page.get_by_text("Reference image and calibration (optional)").click()

    def note_says(text):
        page.wait_for_function("t => (document.querySelector('#calibration-note') || {}).innerText?.includes(t)",
                               arg=text)

    # nothing picked: one line, nothing changed
    page.click("#calibration-rename")
    note_says("Pick a named calibration above first")
    _pick(page, "calibration-pick", a.label())
    page.wait_for_selector("#calibration-facts")
    # bad names: empty, then one another calibration has
    page.click("#calibration-rename")
    note_says("Type the new name")
    page.fill("#calibration-new-name", "Chamber B")
    page.click("#calibration-rename")
    note_says("exists already")
    assert {c.name for c in calibrations.list_calibrations(fresh_store)} == {"Chamber A", "Chamber B"}
    page.fill("#calibration-new-name", "Chamber A (MCP 2)")
    page.click("#calibration-rename")
    note_says("Renamed 'Chamber A' to 'Chamber A (MCP 2)'")
    page.wait_for_function("document.querySelector('#calibration-facts').innerText.includes('Chamber A (MCP 2)')")
    assert "Chamber A (MCP 2)" in page.inner_text("#calibration-pick")  # the dropdown shows the new label
    assert calibrations.get_calibration(fresh_store, a.value).name == "Chamber A (MCP 2)"

    # Delete asks first; cancelling keeps it
    dialogs = []
    page.once("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
    page.click("#calibration-delete")
    page.wait_for_timeout(800)
    assert dialogs and "Chamber A (MCP 2)" in dialogs[0] and "30 days" in dialogs[0]
    assert calibrations.get_calibration(fresh_store, a.value) is not None
    page.once("dialog", lambda d: d.accept())
    page.click("#calibration-delete")
    note_says("Deleted the calibration")
    assert calibrations.get_calibration(fresh_store, a.value) is None
    page.get_by_text("Recently deleted calibrations (restorable for 30 days)").click()
    row = page.locator("#calibration-deleted-list .deleted-row:has-text('Chamber A (MCP 2)')")
    assert "kept until" in row.inner_text()
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / "calibration-deleted.png"), full_page=True)
    row.locator("button").click()
    note_says("Restored")
    restored = calibrations.get_calibration(fresh_store, a.value)
    assert restored.name == "Chamber A (MCP 2)" and restored.geometry == geom  # nothing lost
    _pick(page, "calibration-pick", restored.label())
    page.wait_for_selector("#calibration-facts")
    assert not errors, errors
