"""In headless Chromium: a line drawn on the pattern gives its profile; the spot widths, the domain
size and the sortable, downloadable spot table of an analysed render whose domain size is known.

Needs Debian's ``chromium`` and the ``playwright`` package (skips otherwise). Screenshots go
to $RECINET_SHOTS (default /tmp/recinet-shots).
"""

from __future__ import annotations

import csv
import io
import os
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
WAIT_MS = 120_000
ENERGY = 90.0


def _frame():
    from analysis.nets import parse_substrate
    from analysis.optics import ScreenGeometry
    from analysis.simulate import forward_pattern
    from analysis.simulate.domain_spots import render_domain_image

    geom = ScreenGeometry(256.0, 256.0, 300.0, distortion=0.2)
    p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=ENERGY, geometry=geom)
    return render_domain_image(p, cells=(8, 8), rng=np.random.default_rng(1), shape=(512, 512), spot_sigma_px=1.5)


def _screen_xy(box, x, y, width, height):
    """Page coordinates of image pixel (x, y) on the pattern (axes span −½ … size − ½, y down)."""
    return box["x"] + (x + 0.5) / width * box["width"], box["y"] + (y + 0.5) / height * box["height"]


def test_line_profile_widths_domain_size_and_spot_table(page, live_server, tmp_path):
    from PIL import Image

    im = _frame()
    path = tmp_path / "domains.png"
    Image.fromarray(im.image).save(path)
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
    page.wait_for_function("document.querySelector('#widths-summary').innerText.includes('Mean domain size')",
                           timeout=WAIT_MS)

    # domain size: truth from the renderer (8 × 8 cells of p(2×2) on Cu(100): 40.9 Å), 15 % as in test_domain_size
    text = page.inner_text("#widths-summary")
    truth = im.truth["domain_size"]["size_A"][0][0]
    size = float(text.split("≈ ")[1].split(" Å")[0])
    assert abs(size / truth - 1.0) < 0.15, text

    # the table sorts by a width column and downloads as CSV
    col = "fwhm_radial_px"
    page.click(f'#spot-table th[data-dash-column="{col}"] .column-header--sort')
    page.wait_for_timeout(300)
    cells = [c.inner_text() for c in page.locator(f'#spot-table td[data-dash-column="{col}"]').all()]
    vals = [float(c) for c in cells if c.strip()]
    assert len(vals) >= 10
    assert vals == sorted(vals) or vals == sorted(vals, reverse=True)
    with page.expect_download() as dl:
        page.click("#spot-table-csv")
    body = Path(dl.value.path()).read_text()
    assert body.startswith("# Mean domain size")
    rows = list(csv.DictReader(io.StringIO("\n".join(l for l in body.splitlines() if not l.startswith("#")))))
    assert len(rows) >= 20 and {"label", "fwhm_radial_px", "domain_size_A", "flags"} <= set(rows[0])

    # draw a line from the (−1 0) beam across (−½ 0), (0 0) and (½ 0) to the (1 0) beam (truth positions
    # from the renderer); the drag starts away from the centre circle, which a drag would move
    spots = im.truth["spots"]
    beam = {(s["h"], s["k"]): s for s in spots}
    a_s, b_s = beam[(-1.0, 0.0)], beam[(1.0, 0.0)]
    page.click("#profile-draw")
    page.locator("#graph").scroll_into_view_if_needed()
    page.wait_for_timeout(300)
    box = page.locator("#graph .nsewdrag").first.bounding_box()
    a = _screen_xy(box, a_s["x"], a_s["y"], 512, 512)
    b = _screen_xy(box, b_s["x"], b_s["y"], 512, 512)
    page.mouse.move(*a)
    page.mouse.down()
    page.mouse.move(*b, steps=15)
    page.mouse.up()
    page.wait_for_function("document.querySelector('#profile-x0').value !== ''")
    ends = [float(page.input_value(f"#profile-{k}")) for k in ("x0", "y0", "x1", "y1")]
    tol = 2.0 * 512 / box["width"] + 0.5  # two screen pixels of the drag, in image pixels
    assert np.allclose(ends, [a_s["x"], a_s["y"], b_s["x"], b_s["y"]], atol=tol), ends
    page.wait_for_selector("#profile-graph .scatterlayer .trace", state="attached")
    page.locator("#profile-unit").get_by_text("% BZ", exact=True).click()
    page.wait_for_function("document.querySelector('#profile-graph').innerText.includes('% of |a*|')")
    page.locator("#profile-scale").get_by_text("log", exact=True).click()
    page.wait_for_function("document.querySelector('#profile-graph .js-plotly-plot').layout.yaxis.type === 'log'")
    # the profile runs over two Brillouin zones: from (−1 0) to (1 0) is 2 |a*| (truth: the beams' indices)
    x_end = page.evaluate(
        "(x => x[x.length - 1])(document.querySelector('#profile-graph .js-plotly-plot')._fullData[0].x)")
    assert abs(x_end - 200.0) < 2.0, x_end
    page.wait_for_timeout(500)
    # the drawn line stays on the pattern
    shapes = page.evaluate("document.querySelector('#graph .js-plotly-plot').layout.shapes.map(s => s.type)")
    assert "line" in shapes, shapes
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.locator("#graph").screenshot(path=str(SHOTS / "profile-line-on-pattern.png"))
    page.locator("#profile-panel").screenshot(path=str(SHOTS / "line-profile.png"))
    page.locator("#widths-panel").screenshot(path=str(SHOTS / "spot-table.png"))
    page.screenshot(path=str(SHOTS / "profile-page.png"), full_page=True)
    assert "samples over" in page.inner_text("#profile-note")
    assert "Traceback" not in page.content()
    assert not errors, errors
