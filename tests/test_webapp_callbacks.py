"""Callbacks of the web app called as plain functions: uploads, edits, models, saving, export."""

from __future__ import annotations

import base64
import csv
import io
import json

import numpy as np
import pytest
from dash import no_update
from PIL import Image

from analysis.errors import ImageError, NetError, ParameterError

from dash_helpers import call_callback as _call
from dash_helpers import data_url
from dash_helpers import text_of as _text


def _data_url(raw: bytes, mime="image/png") -> str:
    return data_url(raw, mime)





def _png(arr) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture
def ws(webapp_env):
    from webapp.pages import analyse

    return analyse


@pytest.fixture
def noisy_png():
    rng = np.random.default_rng(5)
    return _png((rng.random((96, 128)) * 60000).astype(np.uint16))


def _page_layout(name: str):
    """The layout function of a registered page (Dash imports page files itself)."""
    import dash

    return next(p["layout"] for p in dash.page_registry.values() if p["module"].endswith("." + name))



# --------------------------------------------------------------------------- uploads

def test_upload_of_an_image_stores_it_once(ws, fresh_store, noisy_png):
    out = _call(ws.on_upload, "upload.contents", _data_url(noisy_png), None, "frame.png", 80, "Pt(111)")
    image, record, edits, note, contents = out[0], out[1], out[2], out[7], out[8]
    assert image["width"] == 128 and image["height"] == 96
    assert record is None and edits == {"sha": image["sha"], "rev": 0, "added": [], "removed": [], "center": None}
    assert "is ready" in _text(note) and contents is None  # cleared so the same file can be dropped again
    assert fresh_store.image_bytes(image["sha"]) == noisy_png
    again = _call(ws.on_upload, "upload.contents", _data_url(noisy_png), None, "copy.png", 80, "Pt(111)")
    assert again[0]["sha"] == image["sha"]


@pytest.mark.parametrize("raw, name, message", [
    (b"just some notes\n", "notes.txt", "notes.txt: not an image"),
    (b"", "empty.png", "empty.png: the file is empty"),
    (b"\x89PNG\r\n\x1a\n" + b"\0" * 40, "corrupt.png", "corrupt.png: "),
])
def test_bad_uploads_show_one_line_messages(ws, fresh_store, raw, name, message):
    contents = _data_url(raw) if raw else None
    if contents is None:  # an empty file arrives as a data URL with no payload
        contents = "data:image/png;base64,"
    out = _call(ws.on_upload, "upload.contents", contents, None, name, 80, "Pt(111)")
    text = _text(out[7])
    assert out[0] is no_update and message in text
    assert "Traceback" not in text and "\n" not in text.strip()
    assert fresh_store.count_analyses() == 0


def test_truncated_png_and_decompression_bomb_are_refused(ws, fresh_store):
    good = _png((np.random.default_rng(1).random((64, 64)) * 255).astype(np.uint8))
    out = _call(ws.on_upload, "upload.contents", _data_url(good[: len(good) // 2]), None, "cut.png", 80, "Pt(111)")
    assert "cut.png: truncated or corrupt" in _text(out[7])
    buf = io.BytesIO()
    Image.new("1", (9000, 9000)).save(buf, format="PNG")  # 10 kB on disk, 81 megapixels decoded
    out = _call(ws.on_upload, "upload.contents", _data_url(buf.getvalue()), None, "bomb.png", 80, "Pt(111)")
    assert "bomb.png: 9000×9000 = 81.0 megapixels is more than the 64-megapixel limit" in _text(out[7])


def test_oversize_upload_is_refused_before_decoding(webapp_env):
    from webapp import service

    payload = _data_url(b"x" * 3000)
    with pytest.raises(ImageError, match=r"big.tif: the file is 0.0 MB; the limit is 0.0 MB"):
        service.decode_upload(payload, "big.tif", max_bytes=1000)
    with pytest.raises(ImageError, match="not valid base64"):
        service.decode_upload("data:image/png;base64,@@@@", "x.png", max_bytes=1000)
    with pytest.raises(ImageError, match="did not arrive as a file"):
        service.decode_upload("hello", "x.png", max_bytes=1000)


def test_flask_request_limit_is_set(webapp_env):
    s = webapp_env.runtime.get_settings()
    assert webapp_env.server.config["MAX_CONTENT_LENGTH"] == s.max_request_bytes
    # base64 makes 3 bytes into 4 characters (RFC 4648 §4), so a file at the limit still fits
    assert s.max_request_bytes >= s.max_upload_bytes * 4 // 3


def test_demo_pick_fills_energy_substrate_and_sample(ws, fresh_store):
    from webapp import service

    choices = service.demo_choices()
    if not choices:
        pytest.skip("demo_images/ holds no demo images yet")
    name = choices[0]["value"]
    out = _call(ws.on_upload, "demo-pick.value", None, name, None, None, "")
    truth = json.loads((service.DEMO_DIR / name).with_suffix(".json").read_text())
    assert out[0]["filename"] == name
    assert out[3] == truth["energy_eV"] and out[4] == truth["substrate_label"]
    with pytest.raises(ParameterError, match="Unknown demo image '../../etc/passwd'"):
        service.demo_bytes("../../etc/passwd")


# --------------------------------------------------------------------------- parameters

def test_bad_parameters_get_clear_messages(webapp_env):
    from webapp import service

    with pytest.raises(ParameterError, match="energy must be a positive number of eV, got -5"):
        service.check_energy(-5)
    with pytest.raises(ParameterError, match="energy must be a number of eV, got 'abc'"):
        service.check_energy("abc")
    with pytest.raises(NetError, match="Unknown element 'Xx'"):
        service.check_substrate("Xx(111)")


def test_analysis_job_reports_bad_parameters_in_the_page(ws, fresh_store, noisy_png):
    image = _call(ws.on_upload, "upload.contents", _data_url(noisy_png), None, "f.png", 80, "Pt(111)")[0]
    seen = []
    record, note = _call(ws.run_job, "run.n_clicks", seen.append, 1, None, image, -20, "Pt(111)", {"readonly": False})
    assert record is no_update and "energy must be a positive number of eV, got -20" in _text(note)
    record, note = _call(ws.run_job, "run.n_clicks", seen.append, 1, None, image, 80, "Qq(100)", {"readonly": False})
    assert "Unknown element 'Qq'" in _text(note)


def test_analysis_job_does_not_start_on_a_fresh_image_or_read_only(ws, fresh_store, noisy_png):
    from dash.exceptions import PreventUpdate

    image = _call(ws.on_upload, "upload.contents", _data_url(noisy_png), None, "f.png", 80, "Pt(111)")[0]
    fresh = ws.state.empty_edits(image["sha"])
    with pytest.raises(PreventUpdate):
        _call(ws.run_job, "edits.data", print, None, fresh, image, 80, "Pt(111)", {"readonly": False})
    with pytest.raises(PreventUpdate):
        _call(ws.run_job, "run.n_clicks", print, 1, fresh, image, 80, "Pt(111)", {"readonly": True})


# --------------------------------------------------------------------------- edits by hand

def _image_meta():
    return {"sha": "a" * 64, "filename": "f.png", "width": 200, "height": 100}


def test_click_adds_then_drops_spots_and_sets_centre(ws):
    img = _image_meta()
    ed = ws.state.empty_edits(img["sha"])
    click = {"points": [{"x": 50.4, "y": 20.6, "curveNumber": 0}]}
    ed = _call(ws.on_graph_event, "graph.clickData", click, None, None, "spots", ed, img, {})
    assert ed["added"] == [[50.4, 20.6]] and ed["rev"] == 1
    on_detected = {"points": [{"x": 10, "y": 10, "customdata": ["spot", 7, False]}]}
    ed = _call(ws.on_graph_event, "graph.clickData", on_detected, None, None, "spots", ed, img, {})
    assert ed["removed"] == [[10.0, 10.0]] and ed["added"] == [[50.4, 20.6]]
    on_added = {"points": [{"x": 50.4, "y": 20.6, "customdata": ["added", 0]}]}
    ed = _call(ws.on_graph_event, "graph.clickData", on_added, None, None, "spots", ed, img, {})
    assert ed["added"] == [] and ed["rev"] == 3
    ed = _call(ws.on_graph_event, "graph.clickData", click, None, None, "center", ed, img, {})
    assert ed["center"] == [50.4, 20.6]
    drag = {"shapes[0].x0": 90.0, "shapes[0].x1": 110.0, "shapes[0].y0": 40.0, "shapes[0].y1": 60.0}
    ed = _call(ws.on_graph_event, "graph.relayoutData", None, drag, None, "spots", ed, img, {})
    assert ed["center"] == [100.0, 50.0]
    ed = _call(ws.on_graph_event, "undo-edits.n_clicks", None, None, 1, "spots", ed, img, {})
    assert ed["added"] == [] and ed["removed"] == [] and ed["center"] is None and ed["rev"] == 6


def test_undo_last_edit_steps_back_one_edit_at_a_time(ws):
    from dash.exceptions import PreventUpdate

    img = _image_meta()
    ed = ws.state.empty_edits(img["sha"])
    for x in (20.0, 40.0):
        ed = _call(ws.on_graph_event, "graph.clickData", {"points": [{"x": x, "y": 30.0}]}, None, None, "spots", ed,
                   img, {})
    on_detected = {"points": [{"x": 10, "y": 10, "customdata": ["spot", 7, False]}]}
    ed = _call(ws.on_graph_event, "graph.clickData", on_detected, None, None, "spots", ed, img, {})
    ed = _call(ws.on_graph_event, "undo-edits.n_clicks", None, None, 1, "spots", ed, img, {})
    assert ed["added"] == [] and ed["removed"] == []
    ed = ws.on_undo_last(1, ed, img, {})  # 'Undo all' undone: both spots and the dropped one are back
    assert ed["added"] == [[20.0, 30.0], [40.0, 30.0]] and ed["removed"] == [[10.0, 10.0]]
    ed = ws.on_undo_last(2, ed, img, {})
    assert ed["added"] == [[20.0, 30.0], [40.0, 30.0]] and ed["removed"] == []
    ed = ws.on_undo_last(3, ed, img, {})
    assert ed["added"] == [[20.0, 30.0]] and ed["rev"] == 7  # each undo is a new revision (the job reruns)
    ed = ws.on_undo_last(4, ed, img, {})
    assert ed["added"] == [] and ed["history"] == []
    with pytest.raises(PreventUpdate):  # nothing left to undo
        ws.on_undo_last(5, ed, img, {})
    with pytest.raises(PreventUpdate):
        ws.on_undo_last(1, ed, img, {"readonly": True})


def test_clicks_are_ignored_read_only_outside_or_in_zoom(ws):
    from dash.exceptions import PreventUpdate

    img = _image_meta()
    ed = ws.state.empty_edits(img["sha"])
    click = {"points": [{"x": 5, "y": 5}]}
    for args in [("spots", ed, img, {"readonly": True}), ("none", ed, img, {})]:
        with pytest.raises(PreventUpdate):
            _call(ws.on_graph_event, "graph.clickData", click, None, None, *args)
    with pytest.raises(PreventUpdate):  # beyond the image
        _call(ws.on_graph_event, "graph.clickData", {"points": [{"x": 500, "y": 5}]}, None, None, "spots", ed, img, {})
    with pytest.raises(PreventUpdate):  # a zoom, not a drag of the centre
        _call(ws.on_graph_event, "graph.relayoutData", None, {"xaxis.range[0]": 3}, None, "spots", ed, img, {})


def test_edits_from_the_browser_are_cleaned(webapp_env):
    from webapp import service

    got = service.clean_edits({"added": [[1, 2], ["x", 3], [float("nan"), 1], [4, 5, 6]], "removed": [3, [7, 8]],
                               "center": ["1", "2"], "junk": 1})
    assert got == {"added": [[1.0, 2.0]], "removed": [[7.0, 8.0]], "center": [1.0, 2.0]}


# --------------------------------------------------------------------------- figures

def _square_result():
    """A hand-made result on a square substrate: a* = 50 px along x, b* = 50 px along y, centre (256, 256).

    Spots sit on every half-order position of p(2×2) inside ±1, worked by hand:
    (h, k) with h, k ∈ {-1, -1/2, 0, 1/2, 1}, except (0, 0).
    """
    hk = [(h, k) for h in (-1, -0.5, 0, 0.5, 1) for k in (-1, -0.5, 0, 0.5, 1) if (h, k) != (0, 0)]
    spots = [{"x": 256 + 50 * h, "y": 256 + 50 * k, "h": h, "k": k, "intensity": 100.0, "snr": 20.0} for h, k in hk]
    return {"center_px": [256.0, 256.0], "spots": spots,
            "substrate": {"net": "Cu(100)", "a_star_px": [[50.0, 0.0], [0.0, 50.0]],
                          "a_angstrom": 2.556, "b_angstrom": 2.556, "gamma_deg": 90.0},
            "overlayer": {"kind": "commensurate", "matrix": [[2, 0], [0, 2]], "domains": [[[2, 0], [0, 2]]],
                          "wood": "p(2×2)", "coverage": 0.25},
            "candidates": [{"matrix": [[1, 1], [-1, 1]], "wood": "c(2×2)", "score": 0.4}]}


@pytest.fixture(scope="module")
def analysed_demo(webapp_env):
    """The p(2×2) demo analysed once through the real job callback (about 5 s)."""
    from webapp import service
    from webapp.pages import analyse as workspace

    name = "pt111_PX-7_oxygen_p2x2.png"
    if name not in {c["value"] for c in service.demo_choices()}:
        pytest.skip(f"demo image {name} is missing")
    out = _call(workspace.on_upload, "demo-pick.value", None, name, None, None, "")
    image, energy, substrate = out[0], out[3], out[4]
    progress = []
    record, note = _call(workspace.run_job, "run.n_clicks", progress.append, 1, None, image, energy, substrate,
                         {"readonly": False})
    truth = json.loads((service.DEMO_DIR / name).with_suffix(".json").read_text())
    return image, record, note, progress, truth


def test_analysis_job_finds_the_demo_superstructure(ws, analysed_demo):
    image, record, note, progress, truth = analysed_demo
    # truth from our own renderer: the scenario names the Wood notation and matrix it drew
    assert record["result"]["overlayer"]["wood"] == truth["scenario"]["wood_notation"]
    from analysis.superstructure import same_lattice

    assert same_lattice(record["result"]["overlayer"]["matrix"], truth["scenario"]["matrix"])
    assert progress[-1] == ("100", "100") and "Analysed" in _text(note)
    panel = _call(ws.show_result, "result.data", record, image, None)[0]
    assert truth["scenario"]["wood_notation"] in _text(panel)


def test_try_model_counts_explained_and_unexplained(ws, analysed_demo):
    image, record, _, _, _ = analysed_demo
    fractional = sum(1 for s in record["result"]["spots"] if s["kind"] == "fractional")
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "p(2x2)", record, image, "Pt(111)")
    assert model["explained"] == fractional > 0 and model["n_domains"] == 1
    assert note.id == "model-counts" and int(note.__getattribute__("data-explained")) == fractional
    # (√3×√3)R30° beams sit at thirds, never at halves (by hand: (1/3, 1/3) vs (1/2, 0)): it explains none
    model, _ = _call(ws.on_try_model, "model-try.n_clicks", 2, None, "(√3×√3)R30°", record, image, "Pt(111)")
    assert model["explained"] == 0 and model["unexplained"] >= fractional
    assert len(model["xy"]) > 0


def test_record_key_survives_the_browser_round_trip(webapp_env):
    from webapp import service

    params = {"energy_eV": 75.0, "substrate": "Cu(100)", "reference_energy_eV": 120.0}
    edits = {"added": [[10.0, 12.5]], "removed": [], "center": None}
    # what the browser sends back: JSON numbers lose their ".0", text may carry spaces
    back = json.loads(json.dumps(params).replace("75.0", "75").replace("120.0", "120"))
    back["substrate"] = " Cu(100) "
    assert back["energy_eV"] == 75 and isinstance(back["energy_eV"], int)
    assert service.record_key("abc", back, json.loads(json.dumps(edits))) == service.record_key("abc", params, edits)
    assert service.record_key("abc", {**params, "energy_eV": 76.0}, edits) != service.record_key("abc", params, edits)


def test_try_model_uses_the_cached_analysis_after_the_round_trip(ws, analysed_demo, monkeypatch):
    """The browser's copy of the record must find the job's cached analysis, not analyse again
    in the web server's process (which then leaves state behind for the forked jobs)."""
    from webapp import service

    image, record, _, _, _ = analysed_demo
    record = json.loads(json.dumps(record))
    e = record["parameters"]["energy_eV"]
    assert float(e).is_integer()
    record["parameters"]["energy_eV"] = int(e)  # as JavaScript's JSON gives it back

    def no_rerun(*a, **k):
        raise AssertionError("analysed again: the cache key missed")

    monkeypatch.setattr(service, "analyze", no_rerun)
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "p(2x2)", record, image, "Pt(111)")
    assert model is not None and model["explained"] > 0


def test_stop_clears_the_result_model_and_message(ws):
    result, model, note = ws.on_stop(1)
    assert result is None and model is None
    assert "Stopped" in _text(note) and "Analysed" not in _text(note)
    from dash.exceptions import PreventUpdate

    with pytest.raises(PreventUpdate):
        ws.on_stop(None)


def test_a_new_image_forgets_the_tried_model(ws):
    assert ws.on_new_image({"sha": "x"}) == (None, None, None)


def test_analysis_job_stops_at_its_time_limit(ws, fresh_store, noisy_png, monkeypatch):
    """A job that runs past RECINET_JOB_TIME_LIMIT_S ends with a plain message, not a hang."""
    import time

    from webapp import runtime, service

    import dataclasses

    settings = runtime.get_settings()
    monkeypatch.setattr(runtime, "get_settings", lambda: dataclasses.replace(settings, job_time_limit_s=0.2))

    def slow(*a, **k):
        time.sleep(5)

    monkeypatch.setattr(service, "analyze", slow)
    image = _call(ws.on_upload, "upload.contents", _data_url(noisy_png), None, "x.png", 60, "Cu(100)")[0]
    t0 = time.monotonic()
    record, note = _call(ws.run_job, "run.n_clicks", lambda p: None, 1, None, image, 60, "Cu(100)", {"readonly": False})
    assert time.monotonic() - t0 < 3
    assert record is no_update and "time limit of 0.2 s" in _text(note)


def test_try_model_bad_text_and_singular_matrix(ws, analysed_demo):
    image, record, _, _, _ = analysed_demo
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "1 2 / 2 4", record, image, "Pt(111)")
    assert model is None and "is singular (determinant 0)" in _text(note)
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "(3x)R", record, image, "Pt(111)")
    assert model is None and "Cannot read Wood notation '(3x)R'" in _text(note)
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "p(2x2)", None, image, "Pt(111)")
    assert model is None and "Analyse the image first" in _text(note)


def test_try_model_too_large_gives_a_plain_message(ws, analysed_demo):
    image, record, _, _, _ = analysed_demo
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "1e308 0 / 0 1e308", record, image,
                        "Pt(111)")
    assert model is None and "too large: its cell area (determinant) is not a finite number" in _text(note)
    assert "Something went wrong" not in _text(note)
    model, note = _call(ws.on_try_model, "model-try.n_clicks", 1, None, "1000 0 / 0 1000", record, image, "Pt(111)")
    assert model is None and "models up to 400 cells can be tried" in _text(note)


def test_result_panel_says_when_a_candidate_is_shown(ws, analysed_demo):
    image, record, _, _, _ = analysed_demo
    panel = _call(ws.show_result, "result.data", record, image, None)[0]
    assert "for one adsorbate per cell" in _text(panel) and "The pattern shows candidate" not in _text(panel)
    panel = _call(ws.show_result, "candidate-pick.value", record, image, 1)[0]
    assert "The pattern shows candidate 2" in _text(panel) and "of candidate 2, as drawn" in _text(panel)
    assert _call(ws.results.on_show_best, "show-best.n_clicks", 1) is None


def test_pattern_figure_draws_nets_spots_and_absent_beams(webapp_env):
    from webapp import figures

    res = _square_result()
    fig = figures.pattern_figure("data:image/png;base64,AAAA", width=512, height=512, result=res,
                                 overlays=["spots", "substrate", "domains", "unexplained"])
    names = [t.name for t in fig.data]
    assert names[0] == "image"
    assert {"Detected spots", "Substrate net", "Domain 1 net", "Domain 1: predicted, no spot"} <= set(names)
    spots = fig.data[names.index("Detected spots")]
    assert list(spots.customdata[0]) == ["spot", 0, False]
    assert "(-1, -1)" in spots.text[0] and "SNR 20.0" in spots.text[0]
    # p(2×2) on a 50 px square net inside 512 px: its net has 21 × 21 points at 25 px steps, so
    # 21 lines each way of 21 points (x holds each line's points and a None)
    net = fig.data[names.index("Domain 1 net")]
    assert len(net.x) == 2 * 21 * (21 + 1)
    # 320 fractional beams (21² − 11²), 16 of them with a hand-made spot: 304 faint ticks
    ticks = fig.data[names.index("Domain 1: predicted, no spot")]
    assert len(ticks.x) == 320 - 16
    # a1* and a2* labels beyond their arrows' tips (16 px along each vector), not at the centre
    labels = {a.text: (a.x, a.y) for a in fig.layout.annotations if a.text}
    assert labels == {"a1*": (322.0, 256.0), "a2*": (256.0, 322.0)}
    assert fig.layout.yaxis.range[0] > fig.layout.yaxis.range[1]  # y downwards
    hidden = figures.pattern_figure(None, width=512, height=512, result=res, overlays=[])
    assert [t.name for t in hidden.data] == []


def test_pattern_figure_shows_faint_detections_set_aside_and_a_click_keeps_them(webapp_env):
    from analysis.spots.accept import REJECT_FAINT_UNEXPLAINED, REJECT_NARROW
    from webapp import figures

    res = dict(_square_result())
    res["rejected_spots"] = [{"x": 100.5, "y": 140.0, "snr": 6.2, "reason": REJECT_FAINT_UNEXPLAINED},
                             {"x": 30.0, "y": 40.0, "snr": 300.0, "reason": REJECT_NARROW}]
    fig = figures.pattern_figure(None, width=512, height=512, result=res, overlays=["spots", "unexplained"])
    names = [t.name for t in fig.data]
    aside = fig.data[names.index("Set aside (faint, on no net)")]
    assert list(aside.x) == [100.5] and list(aside.y) == [140.0]  # the hot pixel is not drawn
    assert aside.customdata is None  # a click on it adds a spot there (see on_edit)
    assert "6.2" in aside.text[0]
    off = figures.pattern_figure(None, width=512, height=512, result=res, overlays=["spots"])
    assert "Set aside (faint, on no net)" not in [t.name for t in off.data]


def _two_domain_result():
    """p(2×1) in two domains on the hand-made square net: (2 0 / 0 1) and (1 0 / 0 2); the spots at
    (1/2, 0) and (0, 1/2) belong to one domain each, (1, 0) to the substrate."""
    res = _square_result()
    res["overlayer"] = {"kind": "commensurate", "matrix": [[2, 0], [0, 1]], "domains": [[[2, 0], [0, 1]],
                                                                                      [[1, 0], [0, 2]]]}
    res["spots"] = [{"x": 281.0, "y": 256.0, "h": 0.5, "k": 0.0, "kind": "fractional", "domain": 0},
                    {"x": 256.0, "y": 281.0, "h": 0.0, "k": 0.5, "kind": "fractional", "domain": 1},
                    {"x": 306.0, "y": 256.0, "h": 1.0, "k": 0.0, "kind": "integer", "domain": None},
                    {"x": 400.0, "y": 111.0, "kind": "unexplained"}]
    res["screen"] = {"center_px": [256.0, 256.0], "radius_px": 240.0}
    res["gun"] = {"center_px": [256.0, 256.0], "radius_px": 12.0}
    return res


def test_each_colour_and_line_style_means_one_thing(webapp_env):
    from webapp import figures

    model = {"xy": [[300.0, 300.0]], "matrices": [[[3, 0], [0, 3]]],
             "domains": [[{"x": 272.7, "y": 256.0, "h": 1 / 3, "k": 0.0}]]}
    fig = figures.pattern_figure(None, width=512, height=512, result=_two_domain_result(), model=model,
                                 overlays=["spots", "masks", "substrate", "domains", "unexplained", "model"])
    by = {t.name: t for t in fig.data}
    spots = by["Detected spots"]
    # measured spots tinted by the domain that explains them; the integer one grey, the unexplained white
    assert list(spots.marker.color) == [figures.domain_colour(0), figures.domain_colour(1), "#C8C8C8", "#FFFFFF"]
    screen, gun = by["Screen edge"].line, by["Gun shadow"].line
    assert (screen.color, screen.dash) != (gun.color, gun.dash)
    domain_colours = {figures.domain_colour(i) for i in range(6)}
    assert by["Model"].marker.color not in domain_colours and by["Model net"].line.dash == "dash"
    assert screen.color not in domain_colours and gun.color not in domain_colours
    assert len(domain_colours) == 6


def test_the_exported_figure_draws_the_domains_as_nets(webapp_env):
    from webapp import figures

    levels = np.zeros((128, 128), dtype=np.uint8)  # the 512 px pattern shown 4 times smaller
    svg = figures.export_figure(levels, factor=4, result=_two_domain_result(), fmt="svg").decode()
    # each domain's net as a line in its own colour (matplotlib writes colours in lower case)
    for i in (0, 1):
        assert f"stroke: {figures.domain_colour(i).lower()}" in svg
    assert "domain 2" in svg and "a1*" in svg


def test_a_focused_domain_comes_forward(webapp_env):
    from webapp import figures

    fig = figures.pattern_figure(None, width=512, height=512, result=_two_domain_result(), focus=0,
                                 overlays=["domains"])
    nets = [t for t in fig.data if t.name.endswith(" net")]
    assert [t.name for t in nets] == ["Domain 2 net", "Domain 1 net"]  # the focused one drawn last
    assert nets[-1].line.width > 2 and nets[0].line.width < 2 and nets[0].opacity < 0.3
    plain = figures.pattern_figure(None, width=512, height=512, result=_two_domain_result(), overlays=["domains"])
    assert all(t.line.width < 2 for t in plain.data if t.name.endswith(" net"))


def test_domain_buttons_set_and_clear_the_focus(ws):
    from dash.exceptions import PreventUpdate

    trig = '{"index":1,"type":"domain-button"}.n_clicks'
    assert _call(ws.results.on_domain_focus, trig, [None, 1], None, None, None) == 1
    assert _call(ws.results.on_domain_focus, trig, [None, 2], None, None, 1) is None  # again: all alike
    assert _call(ws.results.on_domain_focus, "candidate-pick.value", [None, 2], 1, None, 1) is None
    with pytest.raises(PreventUpdate):  # buttons just drawn, not clicked
        _call(ws.results.on_domain_focus, trig, [None, None], None, None, None)


def test_thumbnails_show_dark_background_and_bright_spots(webapp_env):
    from PIL import Image as PILImage

    from analysis.io import load_image
    from webapp import figures, service

    path = service.DEMO_DIR / "pt111_PX-7_oxygen_p2x2.png"
    if not path.exists():
        pytest.skip("demo image missing")
    thumb = np.asarray(PILImage.open(io.BytesIO(figures.thumbnail_png(load_image(path).data))))
    # common practice for a pattern on a dark screen: background near black, the brightest spots white
    assert np.median(thumb) < 40 and thumb.max() == 255


def test_display_levels_scales(webapp_env):
    from webapp import figures

    d = np.linspace(0.0, 1.0, 101).reshape(1, 101)
    lin = figures.display_levels(d, clip_pct=(0, 100))
    log = figures.display_levels(d, scale="log", clip_pct=(0, 100))
    gam = figures.display_levels(d, scale="gamma", gamma=0.5, clip_pct=(0, 100))
    assert lin[0, 50] == 128 and lin[0, 0] == 0 and lin[0, 100] == 255
    # log1p(1000 · 0.5) / log1p(1000) = 0.8998 -> 229 (computed by hand)
    assert log[0, 50] == 229
    assert gam[0, 25] == 128  # sqrt(0.25) = 0.5
    clipped = figures.display_levels(d, clip_pct=(10, 90))
    assert clipped[0, 5] == 0 and clipped[0, 95] == 255


# --------------------------------------------------------------------------- results, save, share

def _saved(ws, fresh_store, png, sample="<b>PX-7</b> & co"):
    image = _call(ws.on_upload, "upload.contents", _data_url(png), None, "f.png", 80, "Cu(100)")[0]
    record = {"sha": image["sha"], "parameters": {"energy_eV": 80.0, "substrate": "Cu(100)"},
              "edits": {"added": [[5.0, 6.0]], "removed": [], "center": None}, "result": _square_result()}
    note, link = _call(ws.on_save, "save.n_clicks", 1, record, image, sample, "first line\n<script>x</script>",
                       {"readonly": False, "token": None})
    return image, record, note, link


def test_result_panel_shows_wood_and_matrix(ws, webapp_env):
    res = _square_result()
    image = {"sha": "a" * 64, "width": 512, "height": 512}
    panel, options, _note, real = _call(ws.show_result, "result.data", {"sha": "a" * 64, "result": res}, image, None)
    text = _text(panel)
    assert "p(2×2)" in text and "commensurate" in text and "24 spots" in text
    assert "(2 0 / 0 2)" in str(panel)  # the matrix table keeps the plain form as its title
    assert "a* 0.3912 Å⁻¹" in text  # 1 / 2.556 Å for a square net (no 2π), by hand
    assert options[0]["label"].startswith("1.  c(2×2)  (1 1 / -1 1)")
    assert [t.name for t in real.data][-1] == "Domain 1"


def test_result_panel_names_the_models_with_the_same_beams(ws, webapp_env):
    # a hexagonal answer whose beams three p(2×1) domains would put at the same places
    # (analysis side: tests/test_same_beams.py); the square result above names none
    res = _square_result()
    res["overlayer"]["same_beams_as"] = [{"name": "p(2×1)", "n_domains": 3}]
    image = {"sha": "a" * 64, "width": 512, "height": 512}
    panel = _call(ws.show_result, "result.data", {"sha": "a" * 64, "result": res}, image, None)[0]
    assert "p(2×1) in 3 domains: its beams lie at the same places" in _text(panel)
    plain = _call(ws.show_result, "result.data", {"sha": "a" * 64, "result": _square_result()}, image, None)[0]
    assert "same places" not in _text(plain)


def test_save_makes_a_share_link_and_read_only_page(ws, fresh_store, noisy_png):
    image, record, note, link = _saved(ws, fresh_store, noisy_png)
    assert "Saved" in _text(note)
    token = link.children[1].children.rsplit("/", 1)[1]
    saved = fresh_store.get_analysis(token)
    assert saved.result == record["result"] and saved.edits["added"] == [[5.0, 6.0]]
    assert saved.summary == "p(2×2)"
    shared_layout = _page_layout("shared")
    page = shared_layout(token=token)
    # user text stays text: Dash renders children strings as text nodes, never as markup
    assert "<b>PX-7</b> & co" in _text(page)
    assert "Copy to edit" in _text(page)
    assert "Not found" in _text(shared_layout(token="nope-" + "x" * 20))


def test_save_refuses_without_a_result_and_in_read_only(ws, fresh_store, noisy_png):
    from dash.exceptions import PreventUpdate

    image = _call(ws.on_upload, "upload.contents", _data_url(noisy_png), None, "f.png", 80, "Cu(100)")[0]
    note, link = _call(ws.on_save, "save.n_clicks", 1, None, image, "S", "", {"readonly": False})
    assert "Analyse the image before saving it" in _text(note) and link is None
    with pytest.raises(PreventUpdate):
        _call(ws.on_save, "save.n_clicks", 1, None, image, "S", "", {"readonly": True})
    long_name = {"sha": image["sha"], "parameters": {}, "edits": {}, "result": {"spots": []}}
    note, _ = _call(ws.on_save, "save.n_clicks", 1, long_name, image, "x" * 300, "", {"readonly": False})
    assert "Sample name is 300 characters" in _text(note)
    assert fresh_store.count_analyses() == 0


def test_copy_to_edit_opens_the_saved_analysis(ws, fresh_store, noisy_png):
    _, record, _, link = _saved(ws, fresh_store, noisy_png)
    token = link.children[1].children.rsplit("/", 1)[1]
    page = _page_layout("editor")(copy=token)
    stores = {c.id: c.data for c in page.children if getattr(c, "id", None) in ("result", "source-token", "edits")}
    assert stores["result"]["result"] == record["result"]
    assert stores["source-token"] == {"readonly": False, "token": token}
    assert stores["edits"]["added"] == [[5.0, 6.0]]


def test_recent_page_lists_saved_analyses(ws, fresh_store, noisy_png):
    _saved(ws, fresh_store, noisy_png, sample="Sample one")
    _saved(ws, fresh_store, noisy_png, sample="Sample two")
    page = _page_layout("recent")()
    text = _text(page)
    assert text.index("Sample two") < text.index("Sample one") and "2 saved" in text
    assert "p(2×2)" in text


def test_export_json_round_trips_through_import(ws, fresh_store, noisy_png):
    image, record, _, _ = _saved(ws, fresh_store, noisy_png)
    out = _call(ws.on_export, "export-json.n_clicks", 1, None, None, None, record, image, "S-1", "n", "linear", 0.5,
                [0.5, 99.95])
    doc = json.loads(out["content"])
    assert doc["format"] == "recinet-analysis" and doc["result"] == record["result"]
    back = _call(ws.on_upload, "upload.contents", _data_url(out["content"].encode(), "application/json"), None,
                 out["filename"], None, "")
    img2, rec2, ed2 = back[0], back[1], back[2]
    assert img2["sha"] == image["sha"] and rec2["result"] == record["result"]
    assert ed2["added"] == [[5.0, 6.0]] and ed2["rev"] == 0  # restoring does not start a new analysis
    assert back[5] == "S-1" and back[6] == "n"


def test_export_csv_png_svg(ws, fresh_store, noisy_png):
    image, record, _, _ = _saved(ws, fresh_store, noisy_png)
    args = (record, image, "S", "", "linear", 0.5, [0.5, 99.95])
    out = _call(ws.on_export, "export-csv.n_clicks", None, 1, None, None, *args)
    rows = list(csv.DictReader(io.StringIO(out["content"])))
    assert len(rows) == 24 and float(rows[0]["x_px"]) == 206.0 and rows[0]["h"] == "-1"
    png = _call(ws.on_export, "export-png.n_clicks", None, None, 1, None, *args)
    assert base64.b64decode(png["content"])[:8] == b"\x89PNG\r\n\x1a\n"
    svg = _call(ws.on_export, "export-svg.n_clicks", None, None, None, 1, *args)
    assert b"<svg" in base64.b64decode(svg["content"])[:400]


def test_import_refuses_other_json(webapp_env):
    from webapp import service

    with pytest.raises(ParameterError, match="not a recinet analysis export"):
        service.read_bundle(b'{"a": 1}', max_bytes=10**6)
    with pytest.raises(ParameterError, match="not valid JSON"):
        service.read_bundle(b"{nope", max_bytes=10**6)
    doc = service.export_bundle(image_bytes=b"abc", filename="x.png", parameters={}, edits={}, result=None)
    doc["image"]["sha256"] = "0" * 64
    with pytest.raises(ParameterError, match="does not match its recorded hash"):
        service.read_bundle(json.dumps(doc), max_bytes=10**6)


# --------------------------------------------------------------------------- server: API, access key, errors

def test_api_save_and_get(webapp_env, fresh_store, noisy_png):
    from webapp import service

    client = webapp_env.server.test_client()
    doc = service.export_bundle(image_bytes=noisy_png, filename="f.png", parameters={"energy_eV": 70.0},
                                edits={}, result=_square_result(), sample_name="API sample")
    r = client.post("/api/analyses", data=json.dumps(doc), content_type="application/json")
    assert r.status_code == 201
    token = r.get_json()["token"]
    got = client.get(f"/api/analyses/{token}").get_json()
    assert got["result"] == _square_result() and got["sample_name"] == "API sample"
    assert client.get("/api/analyses/" + "z" * 22).status_code == 404
    bad = client.post("/api/analyses", data=b"not json", content_type="application/json")
    assert bad.status_code == 400 and "not valid JSON" in bad.get_json()["error"]
    thumb = client.get(f"/thumb/{fresh_store.get_analysis(token).image_sha256}.png")
    assert thumb.status_code == 200 and thumb.data[:4] == b"\x89PNG"
    assert client.get("/thumb/" + "0" * 64 + ".png").status_code == 404
    assert b"root:" not in client.get("/thumb/..%2F..%2Fetc%2Fpasswd.png").data


def test_request_over_the_limit_gets_413_with_a_message(webapp_env):
    client = webapp_env.server.test_client()
    limit = webapp_env.server.config["MAX_CONTENT_LENGTH"]
    r = client.post("/api/analyses", data=b"0" * (limit + 10), content_type="application/json")
    assert r.status_code == 413 and b"larger than the limit" in r.data


def test_access_key_protects_every_page(webapp_env, fresh_store):
    import dataclasses

    from webapp import runtime

    runtime.reset(dataclasses.replace(runtime.get_settings(), access_key="s3cret-group-key"))
    try:
        client = webapp_env.server.test_client()
        r = client.get("/recent")
        assert r.status_code == 302 and r.headers["Location"].startswith("/login?next=/recent")
        assert client.get("/_dash-layout").status_code == 401
        assert client.get("/api/analyses/" + "a" * 22).status_code == 401
        assert client.post("/login", data={"key": "wrong", "next": "/recent"}).status_code == 403
        r = client.post("/login", data={"key": "s3cret-group-key", "next": "//evil.example/x"})
        assert r.status_code == 302 and r.headers["Location"] == "/"  # never an off-site redirect
        assert client.get("/recent").status_code == 200  # the cookie now opens it
        other = webapp_env.server.test_client()
        assert other.get("/api/analyses/" + "a" * 22, headers={"X-Recinet-Key": "s3cret-group-key"}).status_code == 404
    finally:
        runtime.reset(dataclasses.replace(runtime.get_settings(), access_key=None))


def test_reference_image_upload_and_demo(ws, fresh_store, noisy_png):
    meta, note, energy, contents = _call(ws.on_reference, "ref-upload.contents", _data_url(noisy_png), None, "ref.png", 70)
    assert fresh_store.image_bytes(meta["sha"]) == noisy_png and "Reference: ref.png" in _text(note)
    meta, note, energy, contents = _call(ws.on_reference, "ref-upload.contents", _data_url(b"nope"), None, "r.txt", 70)
    assert meta is None and "r.txt: not an image" in _text(note)
    meta, note, energy, contents = _call(ws.on_reference, "ref-demo.value", None, None, None, 70)
    assert meta is None and note is None  # cleared


def test_candidate_labels_say_what_cost_each_candidate(ws):
    c = {"wood": "c(2×2)", "matrix": [[1, 1], [-1, 1]], "kind": "commensurate", "score": 4.5, "explained": 6,
         "score_terms": {"terms": {"explained": {"value": 6, "weight": 1.0, "contribution": 6.0},
                                   "unexplained": {"value": 3, "weight": -1.0, "contribution": -3.0},
                                   "extra_domains": {"value": 1, "weight": -1.0, "contribution": -1.0},
                                   "miss": {"value": 0.01, "weight": -1.0, "contribution": -0.01}},
                         "total": 1.99}}
    label = ws.results._candidate_label(c, 0)
    assert "costs: unexplained −3, extra domains −1" in label and "miss" not in label
    assert "costs" not in ws.results._candidate_label({"wood": "p(2×2)", "score": 1.0}, 1)
