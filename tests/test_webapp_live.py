"""The live page's callbacks as plain functions, and its session service: a folder only under the
configured root, uploads checked by name, sessions read back by any worker from their folder.
"""

from __future__ import annotations

import dataclasses
import io
import json
import os
import time

import numpy as np
import pytest
import tifffile
from dash import no_update

from dash_helpers import call_callback, data_url


@pytest.fixture
def live_env(webapp_env, tmp_path):
    """The app with its data and a watch root in `tmp_path`."""
    from webapp import runtime

    base = runtime.get_settings()
    root = tmp_path / "root"
    (root / "run1").mkdir(parents=True)
    runtime.reset(dataclasses.replace(base, data_dir=tmp_path / "data", watch_root=root.resolve()))
    yield root
    runtime.reset(base)


def test_watch_root_from_the_environment(tmp_path):
    from analysis.errors import ParameterError
    from webapp.settings import load_settings

    s = load_settings({"RECINET_DATA_DIR": str(tmp_path), "RECINET_WATCH_ROOT": str(tmp_path)})
    assert s.watch_root == tmp_path.resolve()
    assert load_settings({"RECINET_DATA_DIR": str(tmp_path)}).watch_root is None
    with pytest.raises(ParameterError, match="RECINET_WATCH_ROOT must be an existing folder"):
        load_settings({"RECINET_DATA_DIR": str(tmp_path), "RECINET_WATCH_ROOT": str(tmp_path / "nope")})


def test_no_path_outside_the_root_is_accepted(live_env, tmp_path):
    from analysis.errors import ParameterError
    from webapp import live_sessions

    assert live_sessions.resolve_watch_folder("run1") == (live_env / "run1").resolve()
    (tmp_path / "outside").mkdir()
    os.symlink(tmp_path / "outside", live_env / "link")
    for bad in ("../outside", str(tmp_path / "outside"), "link", "run1/../../outside"):
        with pytest.raises(ParameterError, match="inside the watched root"):
            live_sessions.resolve_watch_folder(bad)
    with pytest.raises(ParameterError, match="No folder 'missing'"):
        live_sessions.resolve_watch_folder("missing")


def test_start_refuses_bad_input_with_one_line(live_env):
    from webapp import ids
    from webapp.pages import live_view as live

    args = ("run1", 200, "Pt(111)", "names", "temperature", "K", None)
    tok, msg = live.on_start(1, None, "../x", *args[1:], trigger=ids.LIVE_WATCH)
    assert "inside the watched root" in msg
    tok, msg = live.on_start(1, None, *args[:1], -5, *args[2:], trigger=ids.LIVE_WATCH)
    assert "energy must be a number of eV" in msg
    tok, msg = live.on_start(1, None, "run1", 200, "Qq(999)", "names", "t", "", None, trigger=ids.LIVE_WATCH)
    assert msg.count("\n") == 0 and "Qq" in msg
    tok, msg = live.on_start(1, None, "run1", 200, "Pt(111)", "names", "t", "", "([", trigger=ids.LIVE_WATCH)
    assert "not a regular expression" in msg


def _tif(image) -> bytes:
    buf = io.BytesIO()
    tifffile.imwrite(buf, image)
    return buf.getvalue()


@pytest.mark.slow
def test_upload_session_analyses_dropped_frames(live_env):
    from analysis.nets import parse_substrate
    from analysis.optics import ScreenGeometry
    from analysis.simulate.parameter_series import OrderDisorderModel, render_parameter_series
    from webapp import ids, live_sessions
    from webapp.pages import live_view as live

    tok, msg = live.on_start(None, 1, None, 200, "Pt(111)", "names", "temperature", "K", None,
                             trigger=ids.LIVE_UPLOAD_START)
    assert tok and "waiting for frames" in msg
    geom = ScreenGeometry(129.0, 126.0, 115.0, distortion=0.1, rotation_deg=4.0)
    frames = list(render_parameter_series(parse_substrate("Pt(111)"), [[[2, 0], [0, 2]]], [300.0, 320.0, 340.0],
                                          model=OrderDisorderModel(tc=400.0), energy_eV=200.0, geometry=geom,
                                          rng=np.random.default_rng(0)))
    contents = [data_url(_tif(im.image)) for _, im in frames] + [data_url(b"hello")]
    names = [f"T_{t:.0f}K.tif" for t, _ in frames] + ["notes.txt"]
    out, cleared = live.on_upload(contents, names, tok)
    assert out.startswith("Added 3 frames.") and "not an image file name" in out and cleared is None
    out, _ = live.on_upload(contents[:1], names[:1], tok)
    assert "already added" in out
    end = time.monotonic() + 120
    state = {}
    while time.monotonic() < end:
        state = live_sessions.read_state(tok)
        if state.get("n_frames") == 3:
            break
        time.sleep(0.3)
    # truth: the names carry the temperatures; the renderer drew p(2×2) below Tc = 400 K
    assert state["parameter"]["values"] == [300.0, 320.0, 340.0]
    assert state["segments"] and state["segments"][0]["label"].startswith("p(2×2)")
    status, curves, frame, table, log, link, beams, drawn = live.on_tick(1, tok)
    assert "3 frames" in status and len(curves.data) >= 2 and len(frame.data) >= 2
    # nothing new since: nothing is sent again
    assert all(x is no_update for x in live.on_tick(2, tok, drawn))
    # every beam followed has its own curve; the (1/2,0) family its order parameter and widths
    assert len([t for t in beams.data if t.name.endswith(" beams")]) == len(state["beams"]) >= 6
    assert {"(1/2,0) order parameter", "(1/2,0) σ radial"} <= {t.name for t in beams.data}
    assert f"session={tok}" in link.href
    data, _ = call_callback(live.on_export, f"{ids.LIVE_EXPORT_JSON}.n_clicks", None, 1, tok)
    assert json.loads(data["content"])["n_frames"] == 3
    live_sessions.stop_session(tok)
    end = time.monotonic() + 30
    while time.monotonic() < end and live_sessions.read_state(tok)["status"] != "stopped":
        time.sleep(0.2)
    assert live_sessions.read_state(tok)["status"] == "stopped"
    data, _ = call_callback(live.on_export, f"{ids.LIVE_EXPORT_JSON}.n_clicks", None, 1, tok)
    assert json.loads(data["content"])["frames"] == names[:3]  # the whole record once stopped


def test_curves_figure_draws_families_segments_and_the_fit(live_env):
    from webapp.pages import live_view as live

    st = {"parameter": {"name": "temperature", "unit": "K", "values": [300.0, 350.0, 400.0, 450.0]},
          "families": [{"label": "(1/2,0)", "total": [9.0, 7.0, 1.0, 0.0], "present": [True, True, False, False]}],
          "integer_total": [5.0, 4.8, 4.6, 4.4],
          "segments": [{"first": 0, "last": 1, "value_range": [300.0, 350.0], "label": "p(2×2), commensurate",
                        "families": ["(1/2,0)"]},
                       {"first": 2, "last": 3, "value_range": [400.0, 450.0], "label": "(1×1)", "families": []}],
          "transition": {"family": "(1/2,0)", "tc": 402.0, "tc_sigma": 0.5, "tc_spread": 2.0,
                         "model": [9.0, 7.1, 0.9, 0.0]}}
    fig = live.curves_figure(st)
    assert [t.name for t in fig.data] == ["(1/2,0) family", "fit: Tc = 402", "integer beams"]
    assert [(s.x0, s.x1) for s in fig.layout.shapes] == [(300.0, 350.0), (400.0, 450.0)]
    assert [a.text for a in fig.layout.annotations] == ["p(2×2), commensurate", "(1×1)"]
    assert fig.layout.xaxis.title.text == "temperature (K)"
    assert "as the frames arrive" in live.curves_figure({}).layout.annotations[0].text


def test_beams_figure_draws_each_beam_order_widths_and_switches(live_env):
    from webapp.pages import live_view as live

    # a hand-made state: one family fading from 9 to 0 (so √(I/I_max) = 1, 0.88, 0.33, 0), two
    # beams of it, one integer beam, and a switch between frames 1 and 2 at 375 K
    st = {"parameter": {"name": "temperature", "unit": "K", "values": [300.0, 350.0, 400.0, 450.0]},
          "families": [{"label": "(1/2,0)", "total": [9.0, 7.0, 1.0, 0.0], "order": [1.0, 0.88, 0.33, 0.0],
                        "width_radial": [1.6, 1.7, 2.3, None], "width_tangential": [1.6, 1.6, 2.0, None]}],
          "beams": [{"label": "(1/2,0)", "family": "(1/2,0)", "intensity": [4.5, 3.5, 0.5, 0.0]},
                    {"label": "(0,1/2)", "family": "(1/2,0)", "intensity": [4.5, 3.5, 0.5, 0.0]},
                    {"label": "(1,0)", "family": "integer", "intensity": [5.0, 4.8, 4.6, 4.4]}],
          "segments": [{"first": 0, "last": 1, "value_range": [300.0, 350.0], "label": "p(2×2)",
                        "families": ["(1/2,0)"]},
                       {"first": 2, "last": 3, "value_range": [400.0, 450.0], "label": "(1×1)", "families": []}],
          "switches": [{"after_frame": 1, "before_frame": 2, "value": 375.0, "from": "p(2×2)", "to": "(1×1)"}],
          "peaks": [{"family": "(1/2,0)", "frame": 0, "value": 300.0, "intensity": 9.0}]}
    fig = live.beams_figure(st)
    names = [t.name for t in fig.data]
    assert names == ["(1/2,0) beams", "(1/2,0) beams", "integer beams", "(1/2,0) order parameter",
                     "(1/2,0) σ radial", "(1/2,0) σ tangential"]
    assert fig.data[2].visible == "legendonly"  # integer beams off until asked for
    assert list(fig.data[3].y) == [1.0, 0.88, 0.33, 0.0] and fig.data[3].yaxis == "y2"
    assert fig.data[4].yaxis == "y3" and fig.layout.xaxis3.title.text == "temperature (K)"
    switch_lines = [s for s in fig.layout.shapes if s.type == "line"]
    assert len(switch_lines) == 3 and all(s.x0 == 375.0 for s in switch_lines)  # one per panel
    assert "switch 375" in [a.text for a in fig.layout.annotations]
    curves = live.curves_figure(dict(st, integer_total=[5.0, 4.8, 4.6, 4.4]))
    assert any(t.hovertemplate and "brightest" in t.hovertemplate for t in curves.data)
    table = live._segments_table(st)
    text = str(table)
    assert "switch at temperature 375 K" in text and "brightest at temperature 300 K" in text
    assert "as the frames arrive" in live.beams_figure({}).layout.annotations[0].text


def test_uploads_only_into_an_upload_session_and_running_sessions_capped(live_env, monkeypatch):
    from analysis.errors import ParameterError
    from webapp import live_sessions

    cfg = {"energy_eV": 200, "substrate": "Pt(111)", "parameter_from": "names", "parameter_name": "T", "unit": "K"}
    watching = live_sessions.start_session(cfg, folder="run1")
    try:
        with pytest.raises(ParameterError, match="takes no uploads"):
            live_sessions.save_upload(watching, "T_300K.tif", b"x")
        monkeypatch.setattr(live_sessions, "MAX_RUNNING", 1)
        with pytest.raises(ParameterError, match="running on this server already"):
            live_sessions.start_session(cfg)
    finally:
        live_sessions.stop_session(watching)
    monkeypatch.setattr(live_sessions, "MAX_RUNNING", 4)
    up = live_sessions.start_session(cfg)
    try:
        monkeypatch.setattr(live_sessions, "MAX_SESSION_BYTES", 10)
        with pytest.raises(ParameterError, match="at most 0 GB"):
            live_sessions.save_upload(up, "T_300K.tif", b"x" * 11)
    finally:
        live_sessions.stop_session(up)


def test_a_session_whose_worker_ended_reads_as_stopped(live_env):
    from webapp import live_sessions
    from webapp.pages import live_view as live

    token = "t" * 24
    d = live_sessions.session_dir(token)
    d.mkdir(parents=True)
    (d / "state.json").write_text(json.dumps({"status": "watching", "message": "", "lines": [], "n_frames": 2,
                                              "updated": time.time()}))
    (d / "alive").touch()
    assert live_sessions.read_state(token)["status"] == "watching"  # a fresh heartbeat
    old = time.time() - 10 * 60
    os.utime(d / "alive", (old, old))  # no heartbeat for ten minutes
    status = live.on_tick(1, token)[0]
    assert status.startswith("stopped: 2 frames") and "has ended" in status
