"""The analyse page's line profile, spot widths, domain size and spot table, callbacks called as plain
functions on a render whose domain size is known (analysis.simulate.domain_spots)."""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest
from dash.exceptions import PreventUpdate
from PIL import Image

from dash_helpers import call_callback as _call
from dash_helpers import data_url
from dash_helpers import text_of as _text

ENERGY = 90.0


def _png(arr) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture(scope="module")
def domain_frame():
    from analysis.nets import parse_substrate
    from analysis.optics import ScreenGeometry
    from analysis.simulate import forward_pattern
    from analysis.simulate.domain_spots import render_domain_image

    geom = ScreenGeometry(256.0, 256.0, 300.0, distortion=0.2)
    p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=ENERGY, geometry=geom)
    return render_domain_image(p, cells=(8, 8), rng=np.random.default_rng(1), shape=(512, 512), spot_sigma_px=1.5)


@pytest.fixture
def analysed(webapp_env, fresh_store, domain_frame):
    from webapp.pages import analyse

    out = _call(analyse.on_upload, "upload.contents", data_url(_png(domain_frame.image), "image/png"), None,
                "domains.png", ENERGY, "Cu(100)")
    image = out[0]
    record, msg = _call(analyse.run_job, "run.n_clicks", lambda p: None, 1, None, image, ENERGY, "Cu(100)",
                        {"readonly": False})
    assert record and record["result"]["overlayer"]["wood"] == "p(2×2)", _text(msg)
    return image, record


def test_widths_summary_and_table_show_the_domain_size(analysed, domain_frame):
    # truth: the renderer's antiphase domains of 8 × 8 cells, 40.9 Å (tolerance as tests/test_domain_size.py)
    from webapp.pages.analyse import spot_tools

    image, record = analysed
    summary, rows = spot_tools.show_widths(record, image)
    text = _text(summary)
    truth = domain_frame.truth["domain_size"]["size_A"][0][0]
    size = float(text.split("≈ ")[1].split(" Å")[0])
    assert abs(size / truth - 1.0) < 0.15, text
    assert "Instrument response" in text and "Scherrer" in text
    # square 8 × 8-cell domains: the same extent along both net vectors (40.9 Å, 15 %)
    along = text.split("domain 1: ")[1]
    b1, b2 = float(along.split(" Å along b1")[0]), float(along.split(", ")[1].split(" Å along b2")[0])
    assert abs(b1 / truth - 1) < 0.15 and abs(b2 / truth - 1) < 0.15, along
    assert len(rows) == len(record["result"]["spots"])
    frac = [r for r in rows if r["kind"] == "fractional" and r["domain_size_A"]]
    assert len(frac) >= 5 and all(r["fwhm_radial_bz_percent"] > 0 for r in frac)
    keys = {k for k, _ in spot_tools.TABLE_COLUMNS}
    assert keys <= set(rows[0])
    sent = _call(spot_tools.table_csv, "spot-table-csv.n_clicks", 1, record, image)
    assert sent["filename"] == "domains_spot_table.csv"
    lines = sent["content"].splitlines()
    assert lines[0].startswith("# Mean domain size")
    table = list(csv.DictReader(io.StringIO("\n".join(l for l in lines if not l.startswith("#")))))
    assert len(table) == len(rows) and table[0]["label"] == rows[0]["label"]


def test_profile_across_a_fractional_beam(analysed):
    # truth: the analysis's own (0,0) and fractional beam positions; the profile from the
    # centre to the (½ 0) beam is |a*|/2 long in momentum: 50 % of the Brillouin zone
    from webapp.pages.analyse import spot_tools

    image, record = analysed
    spots = record["result"]["spots"]
    s00 = next(s for s in spots if s["h"] == 0 and s["k"] == 0)
    half = next(s for s in spots if s["kind"] == "fractional" and abs(s["h"]) == 0.5 and s["k"] == 0)
    fig, note = spot_tools.show_profile(s00["x"], s00["y"], half["x"], half["y"], 3, "bz", image, record)
    assert "samples over" in _text(note)
    x, y = np.asarray(fig.data[0].x), np.asarray(fig.data[0].y)
    assert abs(x[-1] - 50.0) < 1.5  # the measured beam position, within its fit's accuracy
    n = len(y)
    assert y[0] > 5 * np.median(y)  # the line starts on the bright (0,0) beam...
    assert y[-1] > y[int(0.8 * n)] + 20  # ...and ends on the broad, faint (½ 0) beam: the profile rises to it
    fig_px, _ = spot_tools.show_profile(s00["x"], s00["y"], half["x"], half["y"], 3, "px", image, record, "log")
    assert fig_px.layout.yaxis.type == "log" and fig.layout.yaxis.type == "linear"
    assert abs(np.asarray(fig_px.data[0].x)[-1] - np.hypot(half["x"] - s00["x"], half["y"] - s00["y"])) < 1e-6
    sent, msg = _call(spot_tools.profile_csv, "profile-csv.n_clicks", 1, s00["x"], s00["y"], half["x"], half["y"],
                      3, image, record)
    assert sent["filename"] == "domains_profile.csv" and sent["content"].startswith("x,y,distance_px")


def test_profile_before_an_analysis_and_bad_lines(webapp_env, fresh_store):
    from webapp.pages import analyse
    from webapp.pages.analyse import spot_tools

    arr = (np.random.default_rng(2).random((64, 80)) * 1000).astype(np.uint16)
    image = _call(analyse.on_upload, "upload.contents", data_url(_png(arr), "image/png"), None, "n.png", 80,
                  "Pt(111)")[0]
    fig, note = spot_tools.show_profile(1, 2, 40, 30, 1, "invA", image, None)
    assert len(fig.data) == 1 and "need an analysis" in _text(note)
    fig, note = spot_tools.show_profile(5, 5, 5, 5, 1, "px", image, None)
    assert len(fig.data) == 0 and "no length" in _text(note)
    fig, note = spot_tools.show_profile(5, 5, 9, 9, 0, "px", image, None)
    assert "width_px" in _text(note) or "between 1 and 200" in _text(note)
    fig, note = spot_tools.show_profile("12,5", "abc", 9, 9, 1, "px", image, None)
    assert "start y must be a number, got 'abc'" in _text(note)
    fig, note = spot_tools.show_profile("12,5", "7", "40", "30", "2", "px", image, None)  # text boxes, decimal comma
    assert "averaged across 2 px" in _text(note)
    summary, rows = spot_tools.show_widths(None, image)
    assert rows == [] and "after an analysis" in _text(summary)


def test_a_drawn_line_fills_the_ends():
    from webapp.pages.analyse import spot_tools

    relayout = {"shapes": [{"type": "circle", "x0": 1, "y0": 1, "x1": 3, "y1": 3},
                           {"type": "line", "x0": 10.123, "y0": 20.0, "x1": 30.0, "y1": 40.5}]}
    assert spot_tools.line_from_relayout(relayout) == (10.12, 20.0, 30.0, 40.5)
    moved = {f"shapes[1].{k}": v for k, v in (("x0", 1.0), ("y0", 2.0), ("x1", 3.0), ("y1", 4.0))}
    assert spot_tools.line_from_relayout(moved) == (1.0, 2.0, 3.0, 4.0)  # a drawn line dragged afterwards
    centre = {f"shapes[0].{k}": 5.0 for k in ("x0", "y0", "x1", "y1")}  # the centre circle moved: not ours
    for bad in ({"shapes[0].x0": 3}, {"shapes": [{"type": "circle", "x0": 1}]}, None, centre,
                {"shapes[2].x0": 1.0}):
        with pytest.raises(PreventUpdate):
            spot_tools.line_from_relayout(bad)
    patch = spot_tools.on_draw_line(1)
    assert "drawline" in str(patch.to_plotly_json())
