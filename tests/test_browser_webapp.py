"""End to end in headless Chromium: upload, analyse, edit by hand, save, share, bad files.

Needs Debian's ``chromium`` at /usr/bin/chromium and the Python ``playwright``
package (never ``playwright install``); skips with the reason otherwise.
Screenshots go to $RECINET_SHOTS (default /tmp/recinet-shots).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from dash_helpers import click_drawn_pattern

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_images"
WAIT_MS = 120_000  # an analysis of a 1024² demo image on a busy 2-core machine






def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)


def _open(page, base):
    page.goto(base + "/")
    page.wait_for_selector("#upload input[type=file]", state="attached")


def _wait_image(page):
    page.wait_for_selector("#graph .imagelayer image", state="attached", timeout=30_000)


def _demo_truth(name):
    return json.loads((DEMO / name).with_suffix(".json").read_text())


def _demo_or_skip(name):
    if not (DEMO / name).exists():
        pytest.skip(f"demo image {name} is missing")
    return DEMO / name


def test_corrupt_and_non_image_uploads_show_the_error(page, live_server, tmp_path):
    _open(page, live_server)
    bad = tmp_path / "broken.png"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 64)
    page.set_input_files("#upload input[type=file]", str(bad))
    note = page.wait_for_selector("#upload-note .note-error")
    assert note.inner_text().startswith("broken.png: ")
    text = tmp_path / "notes.txt"
    text.write_text("these are lab notes, not an image")
    page.set_input_files("#upload input[type=file]", str(text))
    page.wait_for_function("document.querySelector('#upload-note').innerText.includes('notes.txt: not an image')")
    _shot(page, "corrupt-upload.png")
    assert "Traceback" not in page.content()


def test_oversize_file_is_refused_in_the_page(page, live_server, tmp_path, webapp_env):
    _open(page, live_server)
    limit = webapp_env.runtime.get_settings().max_upload_bytes
    big = tmp_path / "huge.tif"
    with open(big, "wb") as f:  # sparse: one byte past the limit
        f.seek(limit)
        f.write(b"\0")
    page.set_input_files("#upload input[type=file]", str(big))
    page.wait_for_function("document.querySelector('#upload-note').innerText.includes('huge.tif: the file is')")
    assert "the limit is" in page.inner_text("#upload-note")


def test_demo_image_shows_with_contrast_controls(page, live_server):
    _demo_or_skip("pt111_PX-7_oxygen_p2x2.png")
    _open(page, live_server)
    page.click("#demo-pick")
    page.get_by_text("pt111 PX-7 oxygen p2x2", exact=True).click()
    _wait_image(page)
    assert page.input_value("#energy") == "96"
    assert page.input_value("#substrate") == "Pt(111)"
    src0 = page.get_attribute("#graph .imagelayer image", "href")
    page.locator("#scale").get_by_text("Gamma", exact=True).click()
    page.wait_for_function(
        "s => { const i = document.querySelector('#graph .imagelayer image'); return i && i.getAttribute('href') !== s; }",
        arg=src0)
    _shot(page, "demo-gamma.png")


def _analyse_demo(page, base, name):
    _open(page, base)
    page.click("#demo-pick")
    page.get_by_text(name.rsplit(".", 1)[0].replace("_", " "), exact=True).click()
    _wait_image(page)
    page.click("#run")
    page.wait_for_selector("#wood", timeout=WAIT_MS)
    return _demo_truth(name)


def test_upload_demo_and_see_wood_notation_and_matrix(page, live_server):
    from analysis.nets import parse_substrate
    from analysis.superstructure import format_matrix, same_lattice

    path = _demo_or_skip("ru0001_RX-2_sqrt3.png")
    _open(page, live_server)
    page.set_input_files("#upload input[type=file]", str(path))
    _wait_image(page)
    truth = _demo_truth(path.name)
    page.fill("#energy", str(truth["energy_eV"]))
    page.fill("#substrate", truth["substrate_label"])
    page.press("#substrate", "Enter")
    page.click("#run")
    page.wait_for_selector("#wood", timeout=WAIT_MS)
    _shot(page, "demo-result.png")
    # truth from our own renderer: the demo's scenario names its Wood notation and matrix
    assert page.inner_text("#wood").strip() == truth["scenario"]["wood_notation"]
    shown = page.get_attribute("#matrix", "data-matrix")
    want = truth["scenario"]["matrix"]
    sub = parse_substrate(truth["substrate_label"])
    from analysis.superstructure import parse_matrix

    assert same_lattice(parse_matrix(shown), want), (shown, format_matrix(want), sub)


def test_click_adds_a_spot_and_the_count_changes(page, live_server):
    _demo_or_skip("pt111_PX-7_oxygen_p2x2.png")
    _analyse_demo(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    before = int(page.get_attribute("#spot-count", "data-count"))
    box = page.locator("#graph .nsewdrag").first.bounding_box()
    # a dark place near the corner of the screen: far from every spot
    click_drawn_pattern(page, box["x"] + box["width"] * 0.2, box["y"] + box["height"] * 0.5, added=0,
                        timeout_ms=WAIT_MS)
    page.wait_for_function(f"() => {{ const e = document.querySelector('#spot-count');"
                           f" return e && parseInt(e.dataset.count) === {before + 1}; }}", timeout=WAIT_MS)
    assert "1 added" in page.inner_text("#edit-summary")
    _shot(page, "spot-added.png")


def test_save_and_open_the_share_link_in_a_fresh_context(page, browser, live_server):
    _demo_or_skip("pt111_PX-7_oxygen_p2x2.png")
    _analyse_demo(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    wood = page.inner_text("#wood")
    matrix = page.get_attribute("#matrix", "data-matrix")
    page.fill("#sample-name", "<i>PX-7</i> after O₂")
    page.click("#save")
    href = page.wait_for_selector("#share-href").get_attribute("href")
    other = browser.new_context(viewport={"width": 1500, "height": 1000})
    try:
        p2 = other.new_page()
        p2.goto(live_server + href)
        p2.wait_for_selector("#wood")
        _wait_image(p2)
        assert p2.inner_text("#wood") == wood and p2.get_attribute("#matrix", "data-matrix") == matrix
        assert p2.inner_text("#shared-title") == "<i>PX-7</i> after O₂"  # shown as text, not markup
        assert p2.locator("#shared-title i").count() == 0
        assert not p2.is_visible("#run") and p2.is_visible("#copy-to-edit")
        _shot(p2, "shared-view.png")
        p2.click("#copy-to-edit")
        p2.wait_for_selector("#run")
        assert p2.is_visible("#run") and p2.inner_text("#wood") == wood
    finally:
        other.close()


def test_saved_analysis_in_the_list_and_read_only_view(page, live_server, webapp_env, tmp_path):
    """A saved analysis (made through the JSON API) opens read-only from the list of saved analyses."""
    import io

    import numpy as np
    from PIL import Image

    from webapp import service

    buf = io.BytesIO()
    Image.fromarray((np.random.default_rng(3).random((200, 240)) * 255).astype(np.uint8)).save(buf, format="PNG")
    result = {"center_px": [120.0, 100.0], "spots": [{"x": 150.0, "y": 100.0, "h": 1, "k": 0, "intensity": 5.0, "snr": 9.0}],
              "substrate": {"net": "Cu(100)", "a_star_px": [[30.0, 0.0], [0.0, 30.0]], "a_angstrom": 2.556,
                            "b_angstrom": 2.556, "gamma_deg": 90.0},
              "overlayer": {"kind": "commensurate", "matrix": [[2, 0], [0, 2]], "domains": [[[2, 0], [0, 2]]],
                            "wood": "p(2×2)", "coverage": 0.25}}
    doc = service.export_bundle(image_bytes=buf.getvalue(), filename="hand.png", parameters={"energy_eV": 64.0,
                                "substrate": "Cu(100)"}, edits={}, result=result,
                                sample_name="<script>alert(1)</script> list sample", notes="two\nlines")
    r = webapp_env.server.test_client().post("/api/analyses", data=json.dumps(doc), content_type="application/json")
    token = r.get_json()["token"]
    page.goto(live_server + "/recent")
    card = page.wait_for_selector(f"a.card[href='/analysis/{token}']")
    assert "<script>alert(1)</script> list sample" in card.inner_text()
    _shot(page, "recent.png")
    card.click()
    page.wait_for_selector("#wood")
    _wait_image(page)
    assert page.inner_text("#wood") == "p(2×2)" and page.get_attribute("#matrix", "data-matrix") == "(2 0 / 0 2)"
    _shot(page, "read-only.png")


def test_analyse_try_a_model_pick_a_candidate_then_analyse_another_image(page, live_server):
    """Every step finishes: trying a model and picking a candidate must leave nothing behind
    that a later background job (a forked process) would wait on forever."""
    _demo_or_skip("pt111_PX-7_oxygen_p2x2.png")
    _demo_or_skip("cu100_CX-3_c2x2.png")
    _analyse_demo(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    page.fill("#model-text", "2 0 / 0 2")
    page.click("#model-try")
    page.wait_for_selector("#model-counts", timeout=WAIT_MS)
    options = page.locator("#candidate-pick input[type=radio]")
    assert options.count() >= 2
    options.nth(1).check()
    page.wait_for_function("document.querySelector('#candidate-pick input:checked') !== null")
    # another image: the tried model is forgotten and a new analysis finishes in time
    page.click("#demo-pick")
    page.get_by_text("cu100 CX-3 c2x2", exact=True).click()
    page.wait_for_function("document.querySelector('#model-counts') === null", timeout=30_000)
    page.wait_for_function("document.querySelector('#candidate-pick input:checked') === null", timeout=30_000)
    page.wait_for_function("document.querySelector('#message').innerText.trim() === ''", timeout=30_000)
    page.click("#run")
    page.wait_for_function("document.querySelector('#message').innerText.includes('Analysed')", timeout=WAIT_MS)
    truth = _demo_truth("cu100_CX-3_c2x2.png")
    page.wait_for_selector("#wood", timeout=WAIT_MS)
    assert page.inner_text("#wood").strip() == truth["scenario"]["wood_notation"]
    _shot(page, "after-try-and-pick.png")
    # a second analysis of the same image after a model was tried also finishes
    page.fill("#model-text", "c(2x2)")
    page.click("#model-try")
    page.wait_for_selector("#model-counts", timeout=WAIT_MS)
    page.fill("#energy", str(truth["energy_eV"] + 1))
    page.click("#run")
    page.wait_for_function(f"document.querySelector('#message').innerText.includes('Analysed')", timeout=WAIT_MS)


def test_stop_clears_the_message_and_result(page, live_server):
    _demo_or_skip("pt111_PX-7_oxygen_p2x2.png")
    _analyse_demo(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    assert "Analysed" in page.inner_text("#message")
    page.fill("#energy", "97")
    page.click("#run")
    page.wait_for_selector("#cancel:not([disabled])", timeout=30_000)
    page.click("#cancel")
    page.wait_for_function("document.querySelector('#message').innerText.includes('Stopped')", timeout=30_000)
    assert "Analysed" not in page.inner_text("#message")
    page.wait_for_function("document.querySelector('#wood') === null", timeout=30_000)
