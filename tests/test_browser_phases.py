"""In headless Chromium: the phases found on the surface and the plane group read from the missing
beams, shown beside the answer on a saved analysis.

The patterns are our renders (analysis.simulate): the expected values are the truth given to the
renderer: which cells (Wood notation, E. A. Wood, J. Appl. Phys. 35, 1306 (1964)) sit side by side,
each phase's share of the rendered fractional photons, and which odd beams the glide lines remove.
Extinction rules of the plane groups (International Tables for Crystallography Vol. A, reflection
conditions, from memory): p2gg h0: h = 2n and 0k: k = 2n. The camera model is given as a calibration,
as a reference image would give it.
"""

from __future__ import annotations

import io
import os
import re
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.browser

SHOTS = Path(os.environ.get("RECINET_SHOTS", "/tmp/recinet-shots"))


def _geometry():
    from analysis.optics import ScreenGeometry

    return ScreenGeometry(517.5, 502.5, 640.0, distortion=0.22, rotation_deg=7.0)


def _save_render(store, name, spec, mats, energy, photons=None):
    """Render, analyse with the camera model given, save; return the share token."""
    from PIL import Image

    from analysis.nets import parse_substrate
    from analysis.simulate import forward_pattern
    from analysis.simulate.photograph import photograph
    from webapp import figures, service

    pat = forward_pattern(parse_substrate(spec), mats, energy_eV=energy, geometry=_geometry())
    ph = photograph(pat, rng=np.random.default_rng(0), effects=["channel_plate"], intensities=photons(pat)
                    if photons else None)
    img = np.asarray(ph.analysis_input, float)
    buf = io.BytesIO()
    Image.fromarray(np.clip(img / img.max() * 65535, 0, 65535).astype(np.uint16)).save(buf, format="PNG")
    raw = buf.getvalue()
    data = service.read_image(raw, name=name).data
    sha = store.put_image(raw, filename=f"{name}.png", width=img.shape[1], height=img.shape[0],
                          thumbnail_png=figures.thumbnail_png(data))
    result = service.analyze(data, energy_eV=energy, substrate=spec, calibration=_geometry().to_dict())
    saved = store.save_analysis(image_sha256=sha, parameters={"energy_eV": energy, "substrate": spec}, edits={},
                                result=result, sample_name=name, summary=service.summary_of(result))
    return saved.token, ph


def _open(page, base, token):
    errors = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.goto(f"{base}/analysis/{token}")
    page.wait_for_selector("#wood", timeout=60_000)
    return errors


def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)


@pytest.mark.slow
def test_two_phases_side_by_side_are_each_listed(page, live_server, fresh_store):
    from analysis.nets import parse_substrate
    from analysis.simulate.render import default_intensities
    from analysis.superstructure import domains, parse_wood

    sub = parse_substrate("Pt(111)")
    mats, owner = [], []
    for n, w in enumerate(["(sqrt3xsqrt3)R30", "p(2x2)"]):
        ds = [d.matrix for d in domains(sub, parse_wood(w, sub))]
        mats += ds
        owner += [n] * len(ds)
    owner = np.array(owner)
    token, ph = _save_render(fresh_store, "two phases", "Pt(111)", mats, 96.0,
                             photons=lambda p: default_intensities(p, np.random.default_rng(7)))
    # truth: each phase's share of the rendered photons in the fractional beams only it makes
    sums = np.zeros(2)
    for s in ph.truth["spots"]:
        of = {int(owner[i]) for i in s["domains"]}
        if not s["integer"] and len(of) == 1 and not s["hidden"]:
            sums[of.pop()] += s["photons"]
    share = dict(zip(["(√3×√3)R30°", "p(2×2)"], sums / sums.sum()))

    errors = _open(page, live_server, token)
    rows = page.evaluate("""() => [...document.querySelectorAll('#phases tr.phase-row')].map(
        tr => ({wood: tr.dataset.wood, share: parseFloat(tr.dataset.share), cells: [...tr.cells].map(c => c.innerText)}))""")
    assert sorted(r["wood"] for r in rows) == sorted(share)
    assert rows[0]["wood"] == page.inner_text("#wood").strip()  # the dominant phase is the answer
    for r in rows:
        # measured share against the rendered one: spot fits and shared beams, within 0.08 (as tests/test_phases.py)
        assert r["share"] == pytest.approx(share[r["wood"]], abs=0.08)
        assert r["cells"][1].split() == [r["wood"], "commensurate"]
        assert re.fullmatch(r"\d+\s%", r["cells"][5])
    cov = {r["wood"]: r["cells"][4] for r in rows}
    assert cov["(√3×√3)R30°"] == "0.333 ML" and cov["p(2×2)"] == "0.25 ML"  # one adsorbate per cell
    assert "2 phases side by side" in page.inner_text("#phases")
    # the second phase's spots are drawn as such on the pattern, not as unexplained
    traces = page.evaluate("""() => Object.fromEntries(document.querySelector('#graph .js-plotly-plot')._fullData
        .map(t => [t.name, t.x ? t.x.length : 0]))""")
    second = [r for r in rows if r["wood"] != rows[0]["wood"]][0]
    assert traces.get("Another phase") == int(second["cells"][6])
    assert traces.get("Phase 2 net", 0) > 0  # its net drawn through its spots
    assert f"{second['cells'][6]} of other phases" in page.inner_text("#spot-count")
    # neither cell is rectangular: the missing beams cannot tell the plane group, and the page says so
    assert "cannot tell" in page.inner_text("#plane-group-verdict")
    page.locator("#phases").scroll_into_view_if_needed()
    _shot(page, "phases-two.png")
    assert not errors, errors


@pytest.mark.slow
def test_glide_lines_and_their_missing_beams_are_shown(page, live_server, fresh_store):
    from analysis.simulate.extinction import glide_intensities

    token, _ = _save_render(fresh_store, "p2gg 2x2", "Cu(100)", [np.eye(2) * 2], 120.0,
                            photons=glide_intensities([[0, 1]], rng=np.random.default_rng(100), residual=0.0))
    errors = _open(page, live_server, token)
    verdict = page.locator("#plane-group-verdict")
    # p2gg on a square cell: glides along both axes; p4gm has the same absences
    assert set(verdict.get_attribute("data-groups").split()) == {"p2gg", "p4gm"}
    lines = page.locator("#plane-group li.glide-line").all_inner_texts()
    assert len(lines) == 2 and any("along 2a₁" in t for t in lines) and any("along 2a₂" in t for t in lines)
    text = " ".join(lines)
    for beam in ("(1/2, 0)", "(−1/2, 0)", "(0, 1/2)", "(0, −1/2)"):  # the odd beams the glides remove
        assert beam in text, beam
    assert "(1, 0)" not in text  # an integer beam is never evidence
    assert [r for r in page.locator("#phases tr.phase-row").all() if r.get_attribute("data-wood") == "p(2×2)"]
    page.locator("#plane-group").scroll_into_view_if_needed()
    _shot(page, "plane-group-p2gg.png")
    assert not errors, errors
