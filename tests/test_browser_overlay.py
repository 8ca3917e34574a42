"""In headless Chromium: the pattern drawn as reciprocal nets, and the faults issue 15 lists.

Each domain is its reciprocal net (thin lines through its lattice points), measured
spots are tinted by the domain that explains them, predicted beams without a spot are
faint ticks, and a domain picked in the result panel comes forward. Truth: the demo
images' JSON (our renderer's scenario). Screenshots go to $RECINET_SHOTS.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from dash_helpers import click_drawn_pattern

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
DEMO = Path(__file__).resolve().parent.parent / "demo_images"
WAIT_MS = 120_000  # an analysis of a 1024² demo image on a busy 2-core machine
TWO_DOMAINS = "pt111_PX-9_sqrt7_two_domains.png"


def _analyse(page, base, name):
    if not (DEMO / name).exists():
        pytest.skip(f"demo image {name} is missing")
    page.goto(base + "/")
    page.wait_for_selector("#upload input[type=file]", state="attached")
    page.click("#demo-pick")
    page.get_by_text(name.rsplit(".", 1)[0].replace("_", " "), exact=True).click()
    page.wait_for_selector("#graph .imagelayer image", state="attached", timeout=30_000)
    page.click("#run")
    page.wait_for_selector("#wood", timeout=WAIT_MS)
    return json.loads((DEMO / name).with_suffix(".json").read_text())


def _traces(page) -> list[dict]:
    """Name, line width and opacity of every trace of the pattern figure, bottom to top."""
    return page.evaluate("""() => document.querySelector('#graph .js-plotly-plot').data.map(t => ({
        name: t.name || '', width: (t.line || {}).width || null, opacity: t.opacity === undefined ? 1 : t.opacity,
        colours: (t.marker && Array.isArray(t.marker.color)) ? t.marker.color : null}))""")


def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)


def test_two_domains_are_drawn_as_nets_and_one_comes_forward(page, live_server):
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    truth = _analyse(page, live_server, TWO_DOMAINS)
    # truth: the renderer drew two mirror domains of (√7×√7)R19.1° on Pt(111)
    n_dom = len(truth["scenario"]["domains"])
    names = [t["name"] for t in _traces(page)]
    nets = [n for n in names if n.endswith(" net") and n.startswith("Domain")]
    assert len(nets) == n_dom and "Substrate net" in names
    spots = next(t for t in _traces(page) if t["name"] == "Detected spots")
    assert len({c for c in spots["colours"]}) >= n_dom + 1  # integer grey + one tint per domain
    _shot(page, "overlay-two-domains.png")
    opacity_of_1 = """() => document.querySelector('#graph .js-plotly-plot').data
        .find(t => t.name === 'Domain 1 net').opacity"""
    page.locator(".domain-button").nth(1).hover()  # hovering: in the browser, no round trip
    page.wait_for_function(f"({opacity_of_1})() < 0.2", timeout=10_000)
    page.mouse.move(2, 2)
    page.wait_for_function(f"({opacity_of_1})() > 0.5", timeout=10_000)
    page.locator(".domain-button").nth(1).click()
    page.wait_for_function("""() => { const d = document.querySelector('#graph .js-plotly-plot').data;
        const nets = d.filter(t => (t.name || '').startsWith('Domain') && (t.name || '').endsWith(' net'));
        return nets.length && nets[nets.length - 1].name === 'Domain 2 net' && nets[nets.length - 1].line.width > 2; }""",
                           timeout=30_000)
    traces = _traces(page)
    first = next(t for t in traces if t["name"] == "Domain 1 net")
    assert first["opacity"] < 0.3  # the other domain is dimmed
    _shot(page, "overlay-domain-2-forward.png")
    page.locator(".domain-button").nth(1).click()  # again: all alike
    page.wait_for_function("""() => document.querySelector('#graph .js-plotly-plot').data
        .filter(t => (t.name || '').endsWith(' net') && (t.name || '').startsWith('Domain'))
        .every(t => t.line.width < 2)""", timeout=30_000)
    assert errors == []


def test_basis_labels_sit_beyond_their_arrows(page, live_server):
    _analyse(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    boxes = [page.get_by_text(lab, exact=True).first.bounding_box() for lab in ("a1*", "a2*")]
    (x1, y1), (x2, y2) = [(b["x"] + b["width"] / 2, b["y"] + b["height"] / 2) for b in boxes]
    # the first-order beams of Pt(111) are 60° apart on the screen, a* ≈ 150 px: the labels are far apart
    assert ((x1 - x2) ** 2 + (y1 - y2) ** 2) ** 0.5 > 40


def test_a_huge_model_and_a_picked_candidate_say_so(page, live_server):
    _analyse(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    page.fill("#model-text", "1e308 0 / 0 1e308")
    page.click("#model-try")
    page.wait_for_selector("#model-note .note-error", timeout=30_000)
    text = page.inner_text("#model-note")
    assert "too large" in text and "Something went wrong" not in text
    assert "for one adsorbate per cell" in page.inner_text("#result-panel")
    page.locator("#candidate-pick input[type=radio]").nth(1).check()
    page.wait_for_selector("#shown-note", timeout=30_000)
    assert "The pattern shows candidate 2" in page.inner_text("#shown-note")
    _shot(page, "candidate-shown.png")
    page.click("#show-best")
    page.wait_for_selector("#shown-note", state="detached", timeout=30_000)
    assert page.locator("#candidate-pick input:checked").count() == 0


def test_undo_last_edit_takes_back_one_click(page, live_server):
    _analyse(page, live_server, "pt111_PX-7_oxygen_p2x2.png")
    before = int(page.get_attribute("#spot-count", "data-count"))
    for i, fx in enumerate((0.2, 0.25)):  # dark places near the edge of the screen, far from every spot
        n = int(page.get_attribute("#spot-count", "data-count"))
        box = page.locator("#graph .nsewdrag").first.bounding_box()
        click_drawn_pattern(page, box["x"] + box["width"] * fx, box["y"] + box["height"] * 0.5, added=i,
                            timeout_ms=WAIT_MS)
        page.wait_for_function(f"() => {{ const e = document.querySelector('#spot-count');"
                               f" return e && parseInt(e.dataset.count) === {n + 1}; }}", timeout=WAIT_MS)
    assert "2 added" in page.inner_text("#edit-summary")
    page.click("#undo-last")
    page.wait_for_function(f"() => {{ const e = document.querySelector('#spot-count');"
                           f" return e && parseInt(e.dataset.count) === {before + 1}; }}", timeout=WAIT_MS)
    assert "1 added" in page.inner_text("#edit-summary")


def test_masks_and_domains_keep_their_own_styles_on_si100(page, live_server):
    truth = _analyse(page, live_server, "si100_SX-1_2x1_two_domains.png")
    page.locator("#overlays").get_by_text("Screen and gun masks", exact=True).click()
    page.wait_for_function("""() => document.querySelector('#graph .js-plotly-plot').data
        .some(t => t.name === 'Gun shadow')""", timeout=30_000)
    styles = page.evaluate("""() => Object.fromEntries(document.querySelector('#graph .js-plotly-plot').data
        .filter(t => t.mode === 'lines').map(t => [t.name, [t.line.color, t.line.dash || 'solid']]))""")
    assert styles["Screen edge"] != styles["Gun shadow"]
    nets = [n for n in styles if n.startswith("Domain") and n.endswith(" net")]
    # truth: the renderer drew the two rotational domains of (2×1) on Si(100)
    assert len(nets) == len(truth["scenario"]["domains"]) == 2
    colours = {styles[n][0] for n in nets}
    assert len(colours) == 2 and not colours & {styles["Screen edge"][0], styles["Gun shadow"][0]}
    _shot(page, "overlay-si100-masks.png")
