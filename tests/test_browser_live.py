"""The live page end to end in headless Chromium: a folder under the watch root fills frame by
frame during the test; the page shows each frame, the family curves, the segments and exports.

Needs Debian's ``chromium`` at /usr/bin/chromium and the Python ``playwright`` package
(never ``playwright install``); skips with the reason otherwise. Screenshots go to
$RECINET_SHOTS (default /tmp/recinet-shots).
"""

from __future__ import annotations

import dataclasses
import io
import os
from pathlib import Path

import numpy as np
import pytest
import tifffile

pytestmark = [pytest.mark.browser, pytest.mark.slow]

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
WAIT_MS = 120_000  # indexing the first frame on a busy 2-core machine


@pytest.fixture
def watch_root(webapp_env, tmp_path):
    from webapp import runtime

    base = runtime.get_settings()
    root = tmp_path / "root"
    (root / "anneal").mkdir(parents=True)
    runtime.reset(dataclasses.replace(base, data_dir=tmp_path / "data", watch_root=root.resolve()))
    yield root
    runtime.reset(base)


def _frames():
    from analysis.nets import parse_substrate
    from analysis.optics import ScreenGeometry
    from analysis.simulate.parameter_series import ExposureModel, render_parameter_series
    from analysis.superstructure import parse_wood

    pt = parse_substrate("Pt(111)")
    geom = ScreenGeometry(129.0, 126.0, 115.0, distortion=0.1, rotation_deg=4.0)
    dose = [2.5, 3.2, 4.0, 6.5, 8.0, 10.0]  # ExposureModel: p(2×2) up to θ ≈ 0.29, then (√3×√3)R30°
    out = []
    for d, im in render_parameter_series(pt, [[[2, 0], [0, 2]], parse_wood("(√3×√3)R30°", pt)], dose,
                                         model=ExposureModel(), energy_eV=200.0, geometry=geom,
                                         rng=np.random.default_rng(5)):
        buf = io.BytesIO()
        tifffile.imwrite(buf, im.image)
        out.append((f"dose_{d:.1f}L.tif", buf.getvalue()))
    return out


def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)


def test_live_page_follows_a_folder_as_it_fills(page, live_server, watch_root):
    page.goto(live_server + "/live")
    page.wait_for_selector("#live-energy")  # the layout is drawn by the browser after the page loads
    assert page.locator("#nav a[href='/live']").count() == 1
    page.fill("#live-energy", "200")
    page.fill("#live-substrate", "Pt(111)")
    page.fill("#live-param-name", "exposure")
    page.fill("#live-unit", "L")
    page.fill("#live-folder", "../outside")
    page.click("#live-watch")
    page.wait_for_function("() => document.querySelector('#live-message')?.innerText?.includes('inside the watched')")
    page.fill("#live-folder", "anneal")
    page.click("#live-watch")
    page.wait_for_function("() => document.querySelector('#live-message')?.innerText?.includes('Started')")
    folder = watch_root / "anneal"
    frames = _frames()
    for i, (name, raw) in enumerate(frames):  # the camera writes under a temporary name, then renames
        tmp = folder / (name + ".part")
        tmp.write_bytes(raw)
        tmp.replace(folder / name)
        page.wait_for_function(f"() => document.querySelector('#live-status')?.innerText?.includes('{i + 1} frames')",
                               timeout=WAIT_MS)
        if i == 2:
            _shot(page, "live-running.png")
    page.wait_for_function("() => document.querySelector('#live-segments')?.innerText?.includes('√3')",
                           timeout=WAIT_MS)
    seg_text = page.inner_text("#live-segments")
    assert "p(2×2)" in seg_text and "(√3×√3)R30°" in seg_text
    assert page.locator("#live-curves .scatterlayer .trace").count() >= 3  # two families and the integer beams
    # beside the sums: each beam, each family's order parameter and spot widths, the switch marked
    page.wait_for_function("() => document.querySelector('#live-beams')?.innerText?.includes('switch')",
                           timeout=WAIT_MS)
    beams_text = page.inner_text("#live-beams")
    assert "order parameter" in beams_text and "σ radial" in beams_text and "(1/2,0) beams" in beams_text
    assert page.locator("#live-beams .scatterlayer .trace").count() >= 12  # the beams of two families, per panel
    assert "switch at exposure" in seg_text and "→ (√3×√3)R30°" in seg_text
    page.wait_for_selector("#live-frame .imagelayer image", state="attached")
    log = page.inner_text("#live-log")
    for name, _ in frames:  # each frame once
        assert log.count(name) == 1
    _shot(page, "live-segments.png")
    page.locator("#live-beams").screenshot(path=str(SHOTS / "live-beams.png"))
    with page.expect_download() as dl:
        page.click("#live-export-csv")
    text = Path(dl.value.path()).read_text()
    assert text.splitlines()[0].startswith("frame,name,exposure (L),beam")
    assert {ln.split(",")[1] for ln in text.splitlines()[1:]} == {n for n, _ in frames}
    link = page.get_attribute("#live-link a", "href")
    page.click("#live-stop")
    page.wait_for_function("() => document.querySelector('#live-status')?.innerText?.startsWith('stopped')",
                           timeout=WAIT_MS)
    # the link shows the same series in a fresh page
    page.goto(live_server + link)
    page.wait_for_function("() => document.querySelector('#live-status')?.innerText?.includes('6 frames')")
