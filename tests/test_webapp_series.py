"""The energy-series page: its callbacks called as plain functions, on a synthetic series with known truth.

The reference is exact truth from our own renderer (analysis.simulate): a Cu(100)
c(2×2) series whose screen geometry is known and whose beams follow known I(V)
curves (sums of Lorentzian peaks fixed by |g|, so symmetry-equivalent beams share
their curve). Bad input (energies, frame sizes, unreadable frames, oversize uploads)
must come back as one line in the page.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import zipfile

import numpy as np
import pytest
from dash.exceptions import PreventUpdate

from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.rfactor import pendry_r

from dash_helpers import call_callback as _call
from dash_helpers import data_url as _data_url
from dash_helpers import text_of as _text


N_PX = 256
ENERGIES = np.arange(130.0, 190.0, 2.0)  # 30 frames
SUBSTRATE = "Cu(100)"
# a slightly off-centre camera, distortion and turn as in the demo optics, scaled to 256 px
TRUTH = ScreenGeometry(129.3, 125.9, 160.0, distortion=0.22, rotation_deg=4.5)
PHOTONS = 1e5
# The 256 px frames carry no gun shadow: at this size its edges read as spots and the
# first frame would not index; tracking past the gun is tested in tests/test_series.py.
RENDER_KW = dict(gun=None, background_photons=150.0)


def true_curve(hk, e):
    """Known I(V) of a beam: four Lorentzians (half-width 6 eV) on a 0.05 floor, fixed by h² + k².

    On the square net |g|² ∝ h² + k², so symmetry-equivalent beams share the curve
    (and a basis turned by 90° does not change it).
    """
    h, k = float(hk[0]), float(hk[1])
    rng = np.random.default_rng(int(round(4 * (h * h + k * k))))
    peaks, amps = rng.uniform(110.0, 210.0, 4), rng.uniform(0.3, 1.0, 4)
    e = np.asarray(e, dtype=float)
    return 0.05 + sum(a * 36.0 / ((e - p) ** 2 + 36.0) for p, a in zip(peaks, amps))


def render_frames(energies=ENERGIES, shape=(N_PX, N_PX), seed=3):
    """The frames (uint16) of the synthetic series."""
    from analysis.simulate import render_series
    from analysis.superstructure import domains, parse_wood

    sub = parse_substrate(SUBSTRATE)
    mats = [d.matrix for d in domains(sub, parse_wood("c(2x2)", sub))]

    def photons(pattern):
        scale = np.where(pattern.integer, 1.0, 0.35)  # overlayer beams weaker, as on a real surface
        return PHOTONS * scale * np.array([true_curve(q, pattern.energy_eV) for q in pattern.hk])

    return [im.image for _, im in render_series(sub, mats, energies, geometry=TRUTH, rng=np.random.default_rng(seed),
                                                shape=shape, intensity_fn=photons, **RENDER_KW)]


def write_series(folder, energies=ENERGIES):
    """A multi-page TIFF of the series and its energy CSV in `folder`; returns both paths."""
    import tifffile

    stack = folder / "cu100_c2x2_series.tif"
    tifffile.imwrite(stack, np.stack(render_frames(energies)), photometric="minisblack")
    side = folder / "cu100_c2x2_energies.csv"
    side.write_text("frame,energy_eV\n" + "".join(f"{i},{e:g}\n" for i, e in enumerate(energies)))
    return stack, side





def _csv(energies, name="energies.csv") -> str:
    return _data_url(("energy_eV\n" + "".join(f"{e:g}\n" for e in energies)).encode(), "text/csv")


@pytest.fixture(scope="module")
def page(webapp_env):
    """The series page package (its modules register their callbacks once, when first imported)."""
    from webapp.pages import series

    return series


@pytest.fixture(scope="module")
def series_files(tmp_path_factory):
    return write_series(tmp_path_factory.mktemp("series"))


@pytest.fixture(scope="module")
def uploaded(page, series_files):
    stack, side = series_files
    meta, note, reset, contents = page.on_series_upload({"contents": _data_url(stack.read_bytes()),
                                                         "filename": stack.name})
    assert "256×256 px" in _text(note) and reset is None and contents is None
    table, enote, mode, econtents = page.on_energy_upload(_data_url(side.read_bytes()), side.name)
    assert mode == "file" and econtents is None
    assert "30 energies, 130–188 eV" in _text(enote)
    return meta, table


@pytest.fixture(scope="module")
def run(page, uploaded):
    meta, table = uploaded
    seen = []
    summary, message = page.run_series_job(seen.append, 1, meta, table, "file", None, None, None, SUBSTRATE, 0,
                                           "c(2x2)")
    assert isinstance(summary, dict), _text(message)
    return summary, message, seen


def _job(page, meta, table=None, mode="file", start=None, step=None, pattern=None, substrate=SUBSTRATE,
         frame=0, overlayer="c(2x2)"):
    return page.run_series_job(lambda _v: None, 1, meta, table, mode, start, step, pattern, substrate, frame,
                               overlayer)


# --------------------------------------------------------------------------- a good series

def test_layout_has_the_controls(page):
    from webapp import ids

    text = str(page.layout())
    for cid in (ids.SERIES_UPLOAD, ids.SERIES_ENERGY_UPLOAD, ids.SERIES_RUN, ids.SERIES_PROGRESS, ids.SERIES_SLIDER,
                ids.SERIES_IV_GRAPH, ids.SERIES_BEAMS, ids.SERIES_GROUPS, ids.SERIES_EXPORT_CSV):
        assert f"'{cid}'" in text


def test_good_series_gives_curves_that_match_the_truth(page, run):
    from webapp import series_service

    summary, message, seen = run
    assert summary["n_frames"] == len(ENERGIES)
    assert f"through {len(ENERGIES)} frames" in _text(message)
    assert seen[-1] == ("100", "100") and len(seen) >= len(ENERGIES)  # the bar moved frame by frame
    res = series_service.load_result(summary["key"])
    rs = {}
    for j, lab in enumerate(res.beams.labels):
        e, i, _ = res.curve(j)
        ok = np.isfinite(i)
        if ok.sum() >= 15 and lab != "(0,0)":
            rs[lab] = pendry_r(e, i, np.where(ok, true_curve(res.beams.hk[j], e), np.nan), v0i_eV=4.0)
    assert {"(1,0)", "(1,1)", "(1/2,1/2)"} <= set(rs) or {"(0,1)", "(1,1)", "(1/2,1/2)"} <= set(rs)
    # issue acceptance for recovered curves: R_P ≤ 0.05 against the truth, every beam
    assert max(rs.values()) <= 0.05, rs


def test_calibration_from_the_series_finds_the_true_screen(run):
    summary, _, _ = run
    g = summary["calibration"]["geometry"]
    # Tolerances: 30 frames × ~20 beams of 10⁴–10⁵ photons locate the centre to a few
    # hundredths of a pixel (tests/test_series.py holds 0.05 px on 100 frames); 0.2 px and
    # 1 % leave room for the shorter series.
    assert abs(g["center_x_px"] - TRUTH.center_x_px) < 0.2
    assert abs(g["center_y_px"] - TRUTH.center_y_px) < 0.2
    assert abs(g["scale_px"] / TRUTH.scale_px - 1) < 0.01
    unc = summary["calibration"]["uncertainty"]
    assert 0 < unc["center_x_px"] < 0.2


def test_equivalent_groups_agree(page, run):
    summary, _, _ = run
    groups = {g["label"]: g for g in summary["groups"]}
    fam = next(g for g in summary["groups"] if set(g["members"]) == {"(1,0)", "(0,1)", "(-1,0)", "(0,-1)"})
    # the four first-order beams share one true curve, so they must agree
    assert len(fam["members"]) == 4 and fam["r_pendry"] < 0.05
    assert fam["overlap_eV"] > 40
    assert summary["default_beams"] and set(summary["default_beams"]) <= {
        b for g in groups.values() for b in g["members"]}


def test_result_fills_the_slider_lists_and_panels(page, run):
    summary, _, _ = run
    mx, marks, disabled, options, groups, group_value, facts, table = page.on_result(summary)
    assert mx == len(ENERGIES) - 1 and not disabled and marks[0] == "130" and marks[29] == "188 eV"
    labels = {o["value"] for o in options}
    assert {"(1,0)", "(1/2,1/2)"} <= labels
    assert len(groups) == len(summary["groups"]) and group_value is None
    assert "30 frames, 130–188 eV, 256×256 px" in _text(facts)
    assert "c(2×2) as typed" in _text(facts)
    assert "R_P" in _text(table) and "(1/2,1/2)" in _text(table)


def test_iv_plot_shows_the_picked_beams_and_a_group_average(page, run):
    summary, _, _ = run
    fig = page.render_iv(summary, ["(1,0)", "(1/2,1/2)"], None, 3)
    names = [t.name for t in fig.data]
    assert names == ["(1,0)", "(1/2,1/2)"]
    assert np.isfinite(np.asarray(fig.data[0].y, dtype=float)).sum() >= 20
    assert fig.layout.shapes[0].x0 == ENERGIES[3]  # the frame on the slider is marked
    gi = next(i for i, g in enumerate(summary["groups"]) if "(1,0)" in g["members"])
    fig = page.render_iv(summary, ["(1,0)"], gi, 0)
    assert fig.data[-1].name.startswith(summary["groups"][gi]["label"] + " average (4 beams, R_P ")
    empty = page.render_iv(summary, [], None, 0)
    assert "Pick beams" in empty.layout.annotations[0].text


def test_frame_view_draws_the_beams_where_they_were_followed(page, run):
    from webapp import series_service

    summary, _, _ = run
    res = series_service.load_result(summary["key"])
    fig, label = page.render_frame({"sha": summary["sha"]}, summary, 5, ["(1,0)"])
    assert fig.data[0].type == "image" and fig.data[0].source.startswith("data:image/png;base64,")
    picked = next(t for t in fig.data if t.name == "(1,0)")
    j = res.beams.index("(1,0)")
    assert picked.x[0] == pytest.approx(res.xy_px[5, j, 0]) and picked.y[0] == pytest.approx(res.xy_px[5, j, 1])
    assert "Frame 5 (of 0–29)" in _text(label) and "140 eV" in _text(label)


def test_picking_beams_by_list_group_and_click(page, run):
    from webapp import ids, series_service

    summary, _, _ = run
    res = series_service.load_result(summary["key"])
    assert _call(page.pick_beams, f"{ids.SERIES_RESULT}.data", None, None, summary, 0, []) == \
        summary["default_beams"]
    gi = next(i for i, g in enumerate(summary["groups"]) if g["label"] == "(1,1)" or "(1,1)" in g["members"])
    members = _call(page.pick_beams, f"{ids.SERIES_GROUP}.value", None, gi, summary, 0, ["(1,0)"])
    assert set(members) == set(summary["groups"][gi]["members"])
    # a click on a marker names its beam
    click = {"points": [{"curveNumber": 1, "x": 10, "y": 10, "customdata": ["beam", "(1/2,1/2)"]}]}
    assert _call(page.pick_beams, f"{ids.SERIES_FRAME_GRAPH}.clickData", click, None, summary, 0, ["(1,0)"]) == \
        ["(1,0)", "(1/2,1/2)"]
    # a click on the image next to a spot picks the nearest beam
    j = res.beams.index("(1,1)")
    x, y = res.xy_px[7, j]
    click = {"points": [{"curveNumber": 0, "x": float(x) + 2, "y": float(y) - 1}]}
    assert _call(page.pick_beams, f"{ids.SERIES_FRAME_GRAPH}.clickData", click, None, summary, 7, []) == ["(1,1)"]
    far = {"points": [{"curveNumber": 0, "x": 2.0, "y": 2.0}]}
    with pytest.raises(PreventUpdate):
        _call(page.pick_beams, f"{ids.SERIES_FRAME_GRAPH}.clickData", far, None, summary, 7, [])


def test_frame_steps_and_clicks_on_the_plot(page, run):
    from webapp import ids

    summary, _, _ = run
    assert _call(page.move_frame, f"{ids.SERIES_NEXT}.n_clicks", None, 1, None, summary, 4) == 5
    assert _call(page.move_frame, f"{ids.SERIES_PREV}.n_clicks", 1, None, None, summary, 0) == 0
    assert _call(page.move_frame, f"{ids.SERIES_NEXT}.n_clicks", None, 1, None, summary, 29) == 29
    click = {"points": [{"x": 151.2, "y": 3.0}]}
    assert _call(page.move_frame, f"{ids.SERIES_IV_GRAPH}.clickData", None, None, click, summary, 0) == 11  # 152 eV
    assert _call(page.move_frame, f"{ids.SERIES_RESULT}.data", None, None, None, summary, 12) == 0


def test_a_new_upload_clears_the_last_run(page):
    from webapp import ids

    mx, marks, disabled, options, groups, group, facts, table = page.on_result(None)
    assert (mx, marks, disabled, options, groups, group) == (1, None, True, [], [], None)
    assert _text(facts) == "No series followed yet."
    assert _call(page.pick_beams, f"{ids.SERIES_RESULT}.data", None, None, None, 3, ["(1,0)"]) == []
    assert _call(page.move_frame, f"{ids.SERIES_RESULT}.data", None, None, None, None, 3) == 0


def test_typing_energies_chooses_their_source(page):
    from webapp import ids

    assert _call(page.mode_from_typing, f"{ids.SERIES_STEP}.value", 40, 2, None) == "step"
    assert _call(page.mode_from_typing, f"{ids.SERIES_NAME_PATTERN}.value", None, None, r"E(\d+)") == "names"
    with pytest.raises(PreventUpdate):
        _call(page.mode_from_typing, f"{ids.SERIES_START}.value", 40, None, None)


def test_exports_are_the_series_csv_and_json(page, run):
    from webapp import ids

    summary, _, _ = run
    out = _call(page.on_export, f"{ids.SERIES_EXPORT_CSV}.n_clicks", 1, None, None, summary)
    rows = list(csv.reader(io.StringIO(out["content"])))
    assert out["filename"] == "cu100_c2x2_series-iv.csv"
    assert rows[0][0] == "energy_eV" and "(1,0)" in rows[0] and "(1/2,1/2)" in rows[0]
    assert [float(r[0]) for r in rows[1:]] == ENERGIES.tolist()
    avg = _call(page.on_export, f"{ids.SERIES_EXPORT_AVG}.n_clicks", None, 1, None, summary)
    head = next(csv.reader(io.StringIO(avg["content"])))
    assert len(head) - 1 == len(summary["groups"])
    js = _call(page.on_export, f"{ids.SERIES_EXPORT_JSON}.n_clicks", None, None, 1, summary)
    doc = json.loads(js["content"])
    assert doc["n_frames"] == len(ENERGIES) and doc["energy_eV"] == ENERGIES.tolist()
    assert {g["label"] for g in doc["groups"]} == {g["label"] for g in summary["groups"]}


def test_start_and_step_give_the_same_curves(page, run, uploaded):
    from webapp import series_service

    meta, _ = uploaded
    summary, _, _ = run
    stepped, msg = _job(page, meta, mode="step", start=130, step=2)
    assert isinstance(stepped, dict), _text(msg)
    assert stepped["energy_eV"] == ENERGIES.tolist()
    a, b = series_service.load_result(summary["key"]), series_service.load_result(stepped["key"])
    np.testing.assert_allclose(a.intensity, b.intensity, equal_nan=True)


# --------------------------------------------------------------------------- bad input

def test_wrong_energies_give_a_message(page, uploaded, series_files):
    meta, _ = uploaded
    short, _, _, _ = page.on_energy_upload(_csv(ENERGIES[:29]), "short.csv")
    out, msg = _job(page, meta, short)
    # the one series pipeline (analysis.series.pipeline.run_iv) says it, as `recinet iv` does
    assert out is not None and _text(msg) == ("Frame 29 (cu100_c2x2_series.tif#29) has no energy: short.csv lists "
                                              "only 29 energies.")
    bad = ENERGIES.copy()
    bad[5] = bad[3]
    table, note, mode, _ = page.on_energy_upload(_csv(bad), "bad.csv")
    assert table is None and _text(note) == ("bad.csv: Energy of frame 5 is 136 eV after 138 eV: "
                                             "the energies must increase steadily (not monotonic).")
    _, note, _, _ = page.on_energy_upload(_data_url(b"volts\n1\n2\n"), "volts.csv")
    assert "volts.csv: no energy column; name it 'energy_eV' or 'energy'" in _text(note)
    _, msg = _job(page, meta, None)
    assert "Drop an energy file (CSV or JSON) first" in _text(msg)
    _, msg = _job(page, meta, mode="step", start=130, step=0)
    assert _text(msg) == "The energy step must not be 0: energies must not repeat."
    _, msg = _job(page, meta, mode="step", start=None, step=2)
    assert _text(msg) == "Give the energy of the first frame (start, eV)."
    _, msg = _job(page, meta, mode="names")  # every page of one TIFF has the file's name: "c2x2" -> 2 eV
    assert _text(msg) == ("Frame 0 (cu100_c2x2_series.tif#0) and frame 1 (cu100_c2x2_series.tif#1) both have "
                          "2 eV: energies must not repeat.")


def _zip(members) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        for name, arr in members:
            if isinstance(arr, bytes):
                z.writestr(name, arr)
            else:
                png = io.BytesIO()
                Image.fromarray(arr).save(png, format="PNG")
                z.writestr(name, png.getvalue())
    return buf.getvalue()


@pytest.fixture(scope="module")
def few_frames():
    return render_frames(ENERGIES[:4], shape=(96, 96))


def test_frames_of_different_sizes_give_a_message(page, few_frames):
    members = [(f"f{i:02d}.png", f) for i, f in enumerate(few_frames)]
    members[2] = ("f02.png", few_frames[2][:80])
    meta, note, _, _ = page.on_series_upload({"contents": _data_url(_zip(members)), "filename": "scan.zip"})
    assert "96×96 px" in _text(note)
    _, msg = _job(page, meta, mode="step", start=130, step=2)
    assert _text(msg) == ("Frame 2 (f02.png) is 96×80 px but frame 0 (f00.png) is 96×96 px: "
                          "all frames must have one size.")


def test_unreadable_frame_gives_a_message(page, few_frames):
    members = [(f"f{i:02d}.png", f) for i, f in enumerate(few_frames)]
    members[3] = ("f03.png", b"\x89PNG\r\n\x1a\n" + b"\x00" * 40)
    meta, _, _, _ = page.on_series_upload({"contents": _data_url(_zip(members)), "filename": "scan.zip"})
    _, msg = _job(page, meta, mode="step", start=130, step=2)
    assert _text(msg).startswith("Cannot read frame 3 (after f02.png): f03.png: ")
    assert "Traceback" not in _text(msg)


def test_not_a_series_and_oversize_uploads_give_a_message(page, webapp_env):
    from webapp import runtime

    meta, note, _, _ = page.on_series_upload({"contents": _data_url(b"lab notes, not frames"),
                                              "filename": "notes.tif"})
    assert meta is not None and "notes.tif: not an image" in _text(note)  # meta untouched (no_update)
    base = runtime.get_settings()
    runtime.reset(dataclasses.replace(base, max_upload_bytes=1_000_000))
    try:  # the size is judged from the base64 text before anything is decoded
        huge = "data:image/tiff;base64," + "A" * 4_000_000
        _, note, _, _ = page.on_series_upload({"contents": huge, "filename": "huge.tif"})
    finally:
        runtime.reset(base)
    assert _text(note) == "huge.tif: the file is 3.0 MB; the limit is 1.0 MB."


def test_bad_parameters_give_a_message(page, uploaded):
    meta, table = uploaded
    _, msg = _job(page, meta, table, frame=40)
    assert _text(msg) == "Frame 40 to index is beyond the last frame (the series has 30 frames, 0 to 29)."
    _, msg = _job(page, meta, table, substrate="Xx(999)")
    assert "Xx(999)" in _text(msg)
    _, msg = _job(page, meta, table, overlayer="2 0 / 0")
    assert "2 0 / 0" in _text(msg)
    _, msg = _job(page, None, table)
    assert _text(msg) == "Drop an energy series first (a multi-page TIFF or a zip of images)."
    _, msg = _job(page, {"sha": "0" * 64, "filename": "gone.tif"}, table)
    assert _text(msg) == "The uploaded series is no longer on the server; drop it again."


def test_a_frame_that_cannot_be_indexed_says_so(page):
    rng = np.random.default_rng(1)
    noise = [(f"n{i}.png", (100 + rng.poisson(20.0, (64, 64))).astype(np.uint16)) for i in range(3)]
    meta, _, _, _ = page.on_series_upload({"contents": _data_url(_zip(noise)), "filename": "noise.zip"})
    _, msg = _job(page, meta, mode="step", start=100, step=2)
    assert _text(msg).startswith("Could not index frame 0 (n0.png) at 100 eV: ")
    assert _text(msg).endswith("Try indexing another frame.")


def test_blank_frame_to_index_lets_several_frames_vote(page, uploaded):
    # truth: the renderer's c(2×2) on Cu(100) in every frame; with the frame left blank several
    # frames are indexed, all agree, and the summary says so
    meta, table = uploaded
    summary, message = _job(page, meta, table, frame=None, overlayer="")
    assert isinstance(summary, dict), _text(message)
    ix = summary["index"]
    assert len(ix["votes"]) >= 3 and ix["frame"] in [v["frame"] for v in ix["votes"]]
    # frames indexed together (run_iv's joint indexing): each frame's own reading agrees with the joint one
    assert all(v["agrees"] for v in ix["votes"])
    assert (ix["wood"], ix["kind"], ix["source"]) == ("c(2×2)", "commensurate", "indexed")
    panel = _text(page.summary_panel(summary))
    assert f"{len(ix['votes'])} of {len(ix['votes'])} agree" in panel
