"""In headless Chromium: the pattern turned and mirrored for display only (markers follow, clicks
and the spot table stay in camera pixels), and the view of the image minus its estimated background.

Needs Debian's ``chromium`` and the ``playwright`` package (skips otherwise). Screenshots go
to $RECINET_SHOTS (default /tmp/recinet-shots).
"""

from __future__ import annotations

import base64
import io
import os
import re
from pathlib import Path

import numpy as np
import pytest
from dash_helpers import click_drawn_pattern

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
WAIT_MS = 120_000
ENERGY = 90.0
W, H = 640, 480  # camera frame, off-centre pattern: a turn or mirror moves every spot
RAMP_ADU = 1500.0  # a background ramp along camera x, the truth the background view must remove


def _frame():
    from analysis.nets import parse_substrate
    from analysis.optics import ScreenGeometry
    from analysis.simulate import forward_pattern
    from analysis.simulate.domain_spots import render_domain_image

    geom = ScreenGeometry(330.0, 230.0, 300.0, distortion=0.2)
    p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=ENERGY, geometry=geom)
    im = render_domain_image(p, cells=(8, 8), rng=np.random.default_rng(1), shape=(H, W), spot_sigma_px=1.5)
    ramp = np.broadcast_to(RAMP_ADU * np.arange(W) / (W - 1), (H, W))
    return im, np.clip(im.image + ramp, 0, 65535).astype(np.uint16), ramp


def _as_displayed(a):
    """Camera array as the view shows it with mirror + 90° clockwise, written with numpy's own
    flips: fliplr mirrors columns; rot90(k=-1) turns from the second axis to the first, which with
    rows drawn downwards is clockwise on screen."""
    return np.rot90(np.fliplr(a), k=-1)


def _display_xy(x, y):
    """Camera pixel -> display pixel for mirror + 90° clockwise (worked by hand on the corners:
    camera top-left (0, 0) -> mirrored top-right (W-1, 0) -> turned bottom-right (H-1, W-1))."""
    xm = (W - 1) - x
    return (H - 1) - y, xm


def _shown_levels(page):
    href = page.get_attribute("#graph .imagelayer image", "href")
    from PIL import Image

    return np.asarray(Image.open(io.BytesIO(base64.b64decode(href.split(",", 1)[1]))).convert("L"), dtype=float)


def _spot_markers(page):
    return page.evaluate("""() => {
        const g = document.querySelector('#graph .js-plotly-plot');
        const t = g.data.find(t => t.name === 'Detected spots');
        return t ? [Array.from(t.x), Array.from(t.y), g.layout.xaxis.range, g.layout.yaxis.range] : null; }""")


def _wait_new_image(page, old):
    page.wait_for_function(
        "s => { const i = document.querySelector('#graph .imagelayer image'); return i && i.getAttribute('href') !== s; }",
        arg=old, timeout=60_000)


def _ramp_corr(levels, ramp_shown, keep):
    return float(np.corrcoef(levels[keep], ramp_shown[keep])[0, 1])


def test_turned_mirrored_view_and_background_view(page, live_server, tmp_path):
    from PIL import Image

    im, frame, ramp = _frame()
    path = tmp_path / "offcentre.png"
    Image.fromarray(frame).save(path)
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.goto(live_server + "/")
    page.wait_for_selector("#upload input[type=file]", state="attached")
    page.set_input_files("#upload input[type=file]", str(path))
    page.wait_for_selector("#graph .imagelayer image", state="attached", timeout=30_000)
    page.fill("#energy", str(ENERGY))
    page.fill("#substrate", "Cu(100)")
    page.press("#substrate", "Enter")
    page.click("#run")
    page.wait_for_selector("#wood", timeout=WAIT_MS)
    page.wait_for_function("document.querySelector('#spot-table td[data-dash-column=\"x\"]') !== null",
                           timeout=WAIT_MS)
    table_x = [c.inner_text() for c in page.locator('#spot-table td[data-dash-column="x"]').all()][:8]

    # turn 90° clockwise and mirror: the picture, the axes and the markers all change
    src0 = page.get_attribute("#graph .imagelayer image", "href")
    page.locator("#display-rotate").get_by_text("90°", exact=True).click()
    page.locator("#display-view").get_by_text("mirror left–right", exact=True).click()
    _wait_new_image(page, src0)
    page.wait_for_function("""() => { const g = document.querySelector('#graph .js-plotly-plot');
        return g && g.layout.yaxis.range[0] > 600; }""")
    levels = _shown_levels(page)
    assert levels.shape == (W, H)  # display rows = camera columns
    # the picture: truth from the renderer's frame turned with numpy's flips (linear contrast: a
    # monotone map of the camera values, so the rank correlation is close to 1)
    shown_truth = _as_displayed(frame.astype(float))
    rank = lambda a: np.argsort(np.argsort(a.ravel()))  # noqa: E731
    assert np.corrcoef(rank(levels), rank(shown_truth))[0, 1] > 0.95
    xs, ys, xr, yr = _spot_markers(page)
    # the axes span the turned display (W tall), centred in a square box (see orient_figure)
    assert yr == pytest.approx([W - 0.5, -0.5]) and xr == pytest.approx([-0.5 - (W - H) / 2, H - 0.5 + (W - H) / 2])
    # each marker sits where a rendered spot (renderer truth, camera pixels) lands on the display
    truth = np.array([_display_xy(s["x"], s["y"]) for s in im.truth["spots"]])
    mark = np.column_stack([xs, ys])
    d = np.min(np.hypot(*(mark[:, None, :] - truth[None, :, :]).transpose(2, 0, 1)), axis=1)
    # (the 25 rendered beams on the screen; markers left in camera pixels would match none)
    assert np.sum(d < 1.5) >= 20, d
    # the analysis stays in the camera's frame: the spot table is unchanged
    assert [c.inner_text() for c in page.locator('#spot-table td[data-dash-column="x"]').all()][:8] == table_x
    _shot(page, "view-turned-mirrored.png")

    # a click on the turned view sets the centre in camera pixels
    target = (40.0, 460.0)  # camera x, y: outside the screen, no spot or tick there
    dx, dy = _display_xy(*target)
    page.locator("#click-mode").get_by_text("sets the centre", exact=True).click()
    box = page.locator("#graph .nsewdrag").first.bounding_box()
    click_drawn_pattern(page, box["x"] + (dx - xr[0]) / (xr[1] - xr[0]) * box["width"],
                        box["y"] + (dy - yr[1]) / (yr[0] - yr[1]) * box["height"])
    page.wait_for_function("document.querySelector('#edit-summary').innerText.includes('centre set to')")
    got = [float(v) for v in re.search(r"centre set to \(([-\d.]+), ([-\d.]+)\)",
                                       page.inner_text("#edit-summary")).groups()]
    # a screen pixel is about one image pixel here; 2 px covers the click's rounding
    assert np.hypot(got[0] - target[0], got[1] - target[1]) < 2.0, got

    # minus the estimated background: the rendered ramp (truth given to the renderer) is gone
    yy, xx = np.mgrid[0:H, 0:W]
    sx, sy = im.truth["screen"]["center_px"]
    inside = np.hypot(xx - sx, yy - sy) < 0.9 * im.truth["screen"]["radius_px"]
    near = np.zeros((H, W), bool)
    for s in im.truth["spots"]:
        near |= np.hypot(xx - s["x"], yy - s["y"]) < 8
    keep = _as_displayed(inside & ~near)
    ramp_shown = _as_displayed(np.asarray(ramp))
    before = _ramp_corr(levels, ramp_shown, keep)
    src1 = page.get_attribute("#graph .imagelayer image", "href")
    page.locator("#display-view").get_by_text("minus the estimated background", exact=True).click()
    _wait_new_image(page, src1)
    after = _ramp_corr(_shown_levels(page), ramp_shown, keep)
    _shot(page, "view-minus-background.png")
    assert before > 0.8 and abs(after) < 0.3, (before, after)
    assert not [e for e in errors if "favicon" not in e]


def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)
