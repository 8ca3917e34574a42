"""The energy-series page end to end in headless Chromium: upload a stack and its energies, follow
the beams, move through the frames, pick a beam by a click; bad files show their message.

Needs Debian's ``chromium`` at /usr/bin/chromium and the Python ``playwright`` package
(never ``playwright install``); skips with the reason otherwise. Screenshots go to
$RECINET_SHOTS (default /tmp/recinet-shots).
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from test_webapp_series import ENERGIES, write_series

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))
WAIT_MS = 120_000  # indexing one frame and following 30 on a busy 2-core machine






def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)


def _open(page, base):
    page.goto(base + "/series")
    page.wait_for_selector("#series-upload input[type=file]", state="attached")


def _frame_shown(page) -> int:
    return int(page.get_attribute("#series-frame-text", "data-frame"))


def test_upload_follow_the_beams_slide_and_pick(page, live_server, tmp_path):
    stack, side = write_series(tmp_path)
    _open(page, live_server)
    assert page.locator("#nav a[href='/series']").count() == 1
    page.set_input_files("#series-upload input[type=file]", str(stack))
    note = page.wait_for_selector("#series-upload-note .note-ok")
    assert "256×256 px" in note.inner_text()
    page.wait_for_selector("#series-frame .imagelayer image", state="attached")  # the first frame at once
    page.set_input_files("#series-energy-upload input[type=file]", str(side))
    assert "30 energies, 130–188 eV" in page.wait_for_selector("#series-energy-note .note-ok").inner_text()
    page.fill("#series-substrate", "Cu(100)")
    page.press("#series-substrate", "Enter")
    page.fill("#series-overlayer", "c(2x2)")
    page.press("#series-overlayer", "Enter")
    page.click("#series-run")
    page.wait_for_selector("#series-progress", state="visible")  # indexing alone takes seconds
    _shot(page, "series-running.png")
    page.wait_for_selector("#series-facts", timeout=WAIT_MS)
    page.wait_for_selector("#series-iv .scatterlayer .trace", state="attached")
    assert f"through {len(ENERGIES)} frames" in page.inner_text("#series-message")
    assert not page.is_visible("#series-progress")  # hidden again once the run is over
    assert "R_P" in page.inner_text("#series-groups")
    page.wait_for_selector("#series-frame-text")
    assert _frame_shown(page) == 0
    href0 = page.get_attribute("#series-frame .imagelayer image", "href")

    # the slider moves: one step with the button, one with the keyboard on the slider itself
    page.click("#series-next")
    page.wait_for_function("() => document.querySelector('#series-frame-text')?.dataset.frame === '1'")
    assert "132 eV" in page.inner_text("#series-frame-label")
    page.wait_for_function(
        "s => document.querySelector('#series-frame .imagelayer image')?.getAttribute('href') !== s", arg=href0)
    page.locator("#series-slider [role=slider]").first.focus()
    page.keyboard.press("ArrowRight")
    page.wait_for_function("() => document.querySelector('#series-frame-text')?.dataset.frame === '2'")

    # a click on a spot that is not yet in the plot adds its beam to the plot
    target = page.evaluate("""() => {
        const gd = document.querySelector('#series-frame .js-plotly-plot');
        const t = gd._fullData.find(d => d.name === 'Integrated' && d._length > 0);
        const i = t.customdata.findIndex(c => c[1] !== '(0,0)');  // not the bright specular beam
        const xa = gd._fullLayout.xaxis, ya = gd._fullLayout.yaxis, r = gd.getBoundingClientRect();
        return {label: t.customdata[i][1], x: r.left + xa._offset + xa.l2p(t.x[i]),
                y: r.top + ya._offset + ya.l2p(t.y[i])};
    }""")
    before = page.locator("#series-iv .scatterlayer .trace").count()
    page.mouse.click(target["x"], target["y"])
    page.wait_for_function(
        "n => document.querySelectorAll('#series-iv .scatterlayer .trace').length > n", arg=before)
    assert target["label"] in page.inner_text("#series-beams")
    assert target["label"] in page.locator("#series-iv .legend").text_content()  # SVG: text, not innerText
    _shot(page, "series-picked.png")

    # a group of equivalent beams: its members and their average, with the group's R-factor
    page.click("#series-group")
    page.get_by_role("option").filter(has_text="(1,1)").first.click()
    page.wait_for_function("() => document.querySelector('#series-iv .legend')?.textContent.includes('average')")
    legend = page.locator("#series-iv .legend").text_content()
    assert "(1,1) average (4 beams, R_P" in legend and "(-1,-1)" in legend
    _shot(page, "series-result.png")

    with page.expect_download() as dl:
        page.click("#series-export-csv")
    first = Path(dl.value.path()).read_text().splitlines()[0]
    assert first.startswith("energy_eV,") and target["label"] in first
    assert "Traceback" not in page.content()


def test_bad_files_show_their_message(page, live_server, tmp_path, webapp_env):
    _open(page, live_server)
    broken = tmp_path / "broken.tif"
    broken.write_bytes(b"II*\x00" + b"\x00" * 60)
    page.set_input_files("#series-upload input[type=file]", str(broken))
    err = page.wait_for_selector("#series-upload-note .note-error")
    assert err.inner_text().startswith("broken.tif: ")
    energies = tmp_path / "volts.csv"
    energies.write_text("volts\n1\n2\n")
    page.set_input_files("#series-energy-upload input[type=file]", str(energies))
    err = page.wait_for_selector("#series-energy-note .note-error")
    assert "no energy column" in err.inner_text()
    page.click("#series-run")
    page.wait_for_function("() => document.querySelector('#series-message')?.innerText.includes('Drop an energy "
                           "series first')", timeout=WAIT_MS)
    limit = webapp_env.runtime.get_settings().max_upload_bytes
    big = tmp_path / "huge.tif"
    with open(big, "wb") as f:  # sparse: one byte past the limit
        f.seek(limit)
        f.write(b"\0")
    page.set_input_files("#series-upload input[type=file]", str(big))
    page.wait_for_function("() => document.querySelector('#series-upload-note')?.innerText.includes("
                           "'huge.tif: the file is')", timeout=60_000)
    one_past = f"{limit + 1:,} bytes; the limit is {limit:,} bytes." if limit % 100_000 == 0 else "; the limit is"
    assert one_past in page.inner_text("#series-upload-note")
    assert "broken.tif" not in page.inner_text("#series-upload-note")  # one note at a time
    _shot(page, "series-bad-files.png")
    assert "Traceback" not in page.content()
