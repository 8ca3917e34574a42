"""``/series``: an energy series in, I(V) curves out.

Drop a multi-page TIFF or a zip of frames, give the energies (a CSV or JSON file,
a start and a step, or a number in each file name) and the substrate; the beams
are followed in a background job with a progress bar. Then a slider walks the
frames with the followed beams drawn on them, and the I(V) plot shows the beams
picked from the list or by a click on a spot, with the equivalent-beam groups and
their Pendry R-factor beside it.

The callbacks are plain functions (tests call them directly) registered at the
bottom. Browser-side state (dcc.Store):
  ``SERIES_PAYLOAD``      {"contents", "filename"} of a dropped file within the size limit
  ``SERIES_META``         {"sha", "filename", "width", "height", "bytes"} of the upload
  ``SERIES_ENERGY_TABLE`` the energy file read (series_service.read_energies)
  ``SERIES_RESULT``       the run's summary (series_service.run_series); the curves stay on the server
"""

from __future__ import annotations

import logging
import math

import numpy as np
import plotly.graph_objects as go
from dash import (Input, Output, State, callback, clientside_callback, ctx, dcc, html, no_update,
                  register_page)
from dash.exceptions import PreventUpdate

from analysis.errors import RecinetError
from analysis.timelimit import time_limit
from webapp import figures, ids, runtime, series_service, service
from webapp.jobs import job_controls

register_page(__name__, path="/series", title="recinet: energy series", name="Energy series")

_log = logging.getLogger("recinet.webapp")

# Okabe & Ito colours for the picked beams (the same colour on the frame and in the plot);
# black is kept for a group's average.
BEAM_COLOURS = ["#E69F00", "#56B4E9", "#009E73", "#D55E00", "#CC79A7", "#0072B2", "#F0E442"]
MAX_PICKED = 12
_ENERGY_MODES = [
    {"label": "an energy file (CSV or JSON)", "value": "file"},
    {"label": "a start and a step", "value": "step"},
    {"label": "a number in each file name", "value": "names"},
]


def _fail(err: Exception) -> str:
    """The one line the page shows; unexpected errors are logged, never shown as a traceback."""
    if isinstance(err, RecinetError):
        return str(err)
    _log.exception("unexpected error in a series callback")
    return f"Something went wrong ({type(err).__name__}); the server logged it."


def _note(text, kind="error"):
    if not text:
        return None
    return html.Div(text, className=f"note note-{kind}", role="alert" if kind == "error" else None)


def _triggered() -> str | None:
    """Component id of what fired the running callback (None outside one)."""
    try:
        t = ctx.triggered
    except Exception:  # noqa: BLE001 - called as a plain function
        return None
    if not t or t[0].get("prop_id") in (None, "."):
        return None
    return t[0]["prop_id"].rsplit(".", 1)[0]


# --------------------------------------------------------------------------- layout

def _empty(message: str, height: int = 520) -> go.Figure:
    return figures.empty_figure(message, height=height)


def layout(**_query):
    limit_mb = runtime.get_settings().max_upload_bytes / 1e6
    inputs = html.Div(className="panel", children=[
        html.H2("Series and energies"),
        dcc.Upload(id=ids.SERIES_UPLOAD, className="upload", max_size=-1, multiple=False,
                   accept=".tif,.tiff,.zip", children=html.Div([
                       "Drop an energy series here: a multi-page TIFF or a zip of images, or ",
                       html.A("choose a file")])),
        html.Div(id=ids.SERIES_UPLOAD_NOTE, **{"aria-live": "polite"}),
        html.Div(className="row", children=[html.Label("Energies from", htmlFor=ids.SERIES_ENERGY_MODE)]),
        dcc.RadioItems(id=ids.SERIES_ENERGY_MODE, options=_ENERGY_MODES, value="file", className="series-modes"),
        dcc.Upload(id=ids.SERIES_ENERGY_UPLOAD, className="upload small", max_size=-1, multiple=False,
                   accept=".csv,.json,.txt", children=html.Div([
                       "Drop the energy file (a column energy_eV; optional frame, current) or ",
                       html.A("choose it")])),
        html.Div(id=ids.SERIES_ENERGY_NOTE, **{"aria-live": "polite"}),
        html.Div(className="row", children=[
            html.Label("Start (eV)", htmlFor=ids.SERIES_START),
            dcc.Input(id=ids.SERIES_START, type="number", placeholder="e.g. 40", debounce=True),
            html.Label("Step (eV)", htmlFor=ids.SERIES_STEP),
            dcc.Input(id=ids.SERIES_STEP, type="number", placeholder="e.g. 2", debounce=True),
        ]),
        html.Div(className="row", children=[
            html.Label("File-name pattern", htmlFor=ids.SERIES_NAME_PATTERN),
            dcc.Input(id=ids.SERIES_NAME_PATTERN, type="text", className="grow", maxLength=200, debounce=True,
                      placeholder="default: the last number in the name, e.g. scan_105.5eV.tif"),
        ]),
        html.Div(className="row", children=[
            html.Label("Substrate", htmlFor=ids.SERIES_SUBSTRATE),
            dcc.Input(id=ids.SERIES_SUBSTRATE, type="text", value="Pt(111)", maxLength=120, debounce=True,
                      placeholder="Pt(111) or hexagonal:2.775", className="grow"),
        ]),
        html.Div(className="row", children=[
            html.Label("Overlayer", htmlFor=ids.SERIES_OVERLAYER),
            dcc.Input(id=ids.SERIES_OVERLAYER, type="text", maxLength=200, debounce=True, className="grow",
                      placeholder="as indexed; or none, 2 0 / 0 2, c(2x2)"),
        ]),
        html.Div(className="row", children=[
            html.Label("Index the pattern on frame", htmlFor=ids.SERIES_INDEX_FRAME),
            dcc.Input(id=ids.SERIES_INDEX_FRAME, type="number", min=0, step=1, debounce=True,
                      placeholder="blank: several frames vote"),
        ]),
        html.Div(className="row", children=[
            html.Button("Follow the beams", id=ids.SERIES_RUN, className="primary"),
            html.Button("Stop", id=ids.SERIES_CANCEL, disabled=True),
            html.Progress(id=ids.SERIES_PROGRESS, value="0", max="100", style={"visibility": "hidden"}),
        ]),
        html.Div(id=ids.SERIES_MESSAGE, **{"aria-live": "polite"}),
        html.P(f"Uploads up to {limit_mb:.0f} MB, at most {series_service.MAX_FRAMES} frames.",
               className="muted small-print"),
    ])
    side = html.Div(className="series-side", children=[
        inputs,
        html.Div(className="panel", children=[
            html.H2("Result"),
            html.Div(id=ids.SERIES_SUMMARY, children=html.P("No series followed yet.", className="muted")),
        ]),
        html.Div(className="panel", children=[
            html.H2("Export"),
            html.Div(className="row", children=[
                html.Button("I(V) per beam (CSV)", id=ids.SERIES_EXPORT_CSV),
                html.Button("I(V) per group (CSV)", id=ids.SERIES_EXPORT_AVG),
                html.Button("Everything (JSON)", id=ids.SERIES_EXPORT_JSON),
            ]),
            dcc.Download(id=ids.SERIES_DOWNLOAD),
        ]),
    ])
    frame_panel = html.Div(className="panel series-frame-panel", children=[
        html.H2("Frames"),
        dcc.Graph(id=ids.SERIES_FRAME_GRAPH, figure=_empty("Drop an energy series to see its frames"),
                  config={"displaylogo": False, "scrollZoom": True,
                          "modeBarButtonsToRemove": ["select2d", "lasso2d"]}),
        html.Div(className="row series-stepper", children=[
            html.Button("◀", id=ids.SERIES_PREV, className="small", title="previous frame"),
            html.Div(className="grow", children=dcc.Slider(
                id=ids.SERIES_SLIDER, min=0, max=1, step=1, value=0, marks=None, disabled=True,
                updatemode="drag")),
            html.Button("▶", id=ids.SERIES_NEXT, className="small", title="next frame"),
        ]),
        html.Div(id=ids.SERIES_FRAME_LABEL, className="muted series-frame-label"),
        html.P("A click on a spot adds its beam to the plot.", className="muted small-print"),
    ])
    iv_panel = html.Div(className="panel series-iv-panel", children=[
        html.H2("I(V) curves"),
        dcc.Graph(id=ids.SERIES_IV_GRAPH, figure=_empty("The curves appear once the beams are followed"),
                  config={"displaylogo": False}),
        html.Div(className="row", children=[
            html.Label("Beams", htmlFor=ids.SERIES_BEAMS),
            dcc.Dropdown(id=ids.SERIES_BEAMS, options=[], value=[], multi=True, className="grow",
                         placeholder="pick beams, or click spots on the frame"),
        ]),
        html.Div(className="row", children=[
            html.Label("Equivalent group", htmlFor=ids.SERIES_GROUP),
            dcc.Dropdown(id=ids.SERIES_GROUP, options=[], value=None, className="grow",
                         placeholder="show a group and its average"),
        ]),
    ])
    groups_panel = html.Div(className="panel series-groups-panel", children=[
        html.H2("Equivalent beams"),
        html.Div(id=ids.SERIES_GROUPS, children=html.P("The groups appear once the beams are followed.",
                                                       className="muted")),
    ])
    return html.Div(className="series", children=[
        dcc.Store(id=ids.SERIES_PAYLOAD, data=None),
        dcc.Store(id=ids.SERIES_META, data=None),
        dcc.Store(id=ids.SERIES_ENERGY_TABLE, data=None),
        dcc.Store(id=ids.SERIES_RESULT, data=None),
        side,
        html.Div(className="series-main", children=[
            html.Div(className="series-views", children=[frame_panel, iv_panel]),
            groups_panel,
        ]),
    ])


# --------------------------------------------------------------------------- uploads

def on_series_upload(payload):
    """A dropped series (within the size limit) -> (meta, note, result reset, upload contents)."""
    if not payload or not payload.get("contents"):
        raise PreventUpdate
    name = str(payload.get("filename") or "series")[:200]
    try:
        raw = service.decode_upload(payload["contents"], name, max_bytes=runtime.get_settings().max_upload_bytes)
        meta = series_service.store_upload(raw, name)
    except Exception as err:  # noqa: BLE001 - every failure becomes a message in the page
        return no_update, _note(_fail(err)), no_update, None
    return (meta, _note(f"{name}: frames of {meta['width']}×{meta['height']} px, {meta['bytes'] / 1e6:.1f} MB. "
                        "Give the energies and the substrate, then press 'Follow the beams'.", "ok"),
            None, None)


def on_energy_upload(contents, filename):
    """A dropped energy file -> (energy table, note, energy mode, upload contents)."""
    if contents is None:
        raise PreventUpdate
    name = str(filename or "energies")[:200]
    try:
        raw = service.decode_upload(contents, name, max_bytes=series_service.MAX_SIDECAR_BYTES)
        table = series_service.read_energies(raw, name)
    except Exception as err:  # noqa: BLE001
        return None, _note(_fail(err)), no_update, None
    e = table["energy_eV"]
    text = f"{name}: {len(e)} energies, {min(e):g}–{max(e):g} eV"
    if table.get("current"):
        text += ", with the beam current (intensities are divided by it)"
    return table, _note(text + ".", "ok"), "file", None


def mode_from_typing(start, step, pattern):
    """Typing a start and a step, or a file-name pattern, chooses that source of energies."""
    trig = _triggered()
    if trig == ids.SERIES_NAME_PATTERN and pattern:
        return "names"
    if trig in (ids.SERIES_START, ids.SERIES_STEP) and start not in (None, "") and step not in (None, ""):
        return "step"
    raise PreventUpdate


# --------------------------------------------------------------------------- the background run

def run_series_job(set_progress, n_clicks, meta, table, mode, start, step, pattern, substrate, index_frame,
                   overlayer=None):
    """Background job: follow every beam of the uploaded series -> (summary, message)."""
    if not n_clicks:
        raise PreventUpdate
    if not meta or not meta.get("sha"):
        return no_update, _note("Drop an energy series first (a multi-page TIFF or a zip of images).")

    def say(frac, _text=""):
        set_progress((str(int(round(100 * min(max(float(frac), 0.0), 1.0)))), "100"))

    try:
        say(0.01)
        with time_limit(runtime.get_settings().job_time_limit_s, "the series"):
            summary = series_service.run_series(meta["sha"], meta.get("filename") or "series",
                                                substrate=(substrate or "").strip(), mode=mode or "file",
                                                table=table, start=start, step=step, pattern=pattern,
                                                index_frame=index_frame, overlayer=overlayer, progress=say)
    except Exception as err:  # noqa: BLE001
        return no_update, _note(_fail(err))
    n_beams = sum(1 for b in summary["beams"] if b["n_valid"])
    return summary, _note(f"Followed {n_beams} beams through {summary['n_frames']} frames.", "ok")


# --------------------------------------------------------------------------- showing a result

def _fmt(v, digits=2, unit=""):
    if v is None or not isinstance(v, (int, float)) or not math.isfinite(v):
        return "–"
    return f"{v:.{digits}f}{unit}"


def _pm(v, u, digits=2, unit=""):
    """``value ± u`` with u to two significant digits and the value to the same place."""
    if isinstance(u, (int, float)) and math.isfinite(u) and u > 0:
        digits = min(max(0, 1 - math.floor(math.log10(u))), 6)
        s = _fmt(v, digits)
        return s + unit if s == "–" else f"{s} ± {u:.{digits}f}{unit}"
    return _fmt(v, digits) + unit


def summary_panel(summary: dict):
    """The facts of a run: frames and energies, the indexing, the calibration fitted from the series."""
    e = summary["energy_eV"]
    ix = summary["index"]
    seen = sum(1 for b in summary["beams"] if b["n_valid"])
    structure = ix.get("wood") or ix.get("matrix") or "(1×1), no overlayer"
    doms = f"{ix['n_domains']} domain{'s' if ix['n_domains'] != 1 else ''}"
    if ix.get("source") == "typed":
        structure = ("substrate beams only" if ix.get("kind") == "none" else
                     f"{ix.get('wood') or ix.get('matrix')} as typed ({doms})")
    elif ix.get("kind") not in (None, "none"):
        structure += f" ({ix['kind']}, {doms})"
    rows = [
        ("Series", f"{summary['n_frames']} frames, {min(e):g}–{max(e):g} eV, {summary['width']}×{summary['height']} px"),
        ("Indexed on", f"frame {ix['frame']} at {ix['energy_eV']:g} eV: {ix['substrate']}, {structure}"),
    ]
    votes = ix.get("votes") or []
    if votes:
        won = next((v["reading"] for v in votes if v.get("frame") == ix["frame"]), None)
        others = sorted({f"{v['reading']} ({v['energy_eV']:g} eV)" for v in votes if v.get("reading") != won})
        agree = sum(1 for v in votes if v.get("reading") == won)
        rows.append(("Frames voting", f"{agree} of {len(votes)} agree"
                     + (f"; the others read {', '.join(others)}" if others else "")))
    rows += [
        ("Beams followed", f"{seen} of {len(summary['beams'])} (the rest stay off the screen or flagged)"),
        ("Equivalence", str(summary.get("symmetry") or "–")),
    ]
    if summary.get("normalised"):
        rows.append(("Intensities", "divided by the beam current"))
    cal = summary.get("calibration")
    if cal:
        g, u = cal["geometry"], cal.get("uncertainty") or {}
        rows += [
            ("Centre (x, y)", f"{_pm(g.get('center_x_px'), u.get('center_x_px'))}, "
                              f"{_pm(g.get('center_y_px'), u.get('center_y_px'))} px"),
            ("Scale", f"{_pm(cal.get('scale_px_sqrt_eV_A'), u.get('scale_px_sqrt_eV_A'), 1)} px·√eV·Å "
                      "(radius × √E / |g|)"),
            ("Distortion", _pm(g.get("distortion"), u.get("distortion"), 3)),
            ("Rotation", _pm(g.get("rotation_deg"), u.get("rotation_deg"), 2, "°")),
            ("Fit", f"rms {_fmt(cal.get('rms_px'))} px over {cal.get('n_points')} positions in "
                    f"{cal.get('n_frames')} frames"),
        ]
    return html.Table(className="facts", children=[html.Tbody(
        [html.Tr([html.Th(k), html.Td(v)]) for k, v in rows])], id="series-facts",
        **{"data-frames": str(summary["n_frames"]), "data-beams": str(seen)})


def groups_table(summary: dict):
    groups = summary.get("groups") or []
    if not groups:
        return html.P("No beam was followed long enough to compare.", className="muted")
    head = html.Tr([html.Th("Group"), html.Th("Beams"), html.Th("R_P", title="Pendry R-factor among the members"),
                    html.Th("R_ZJ", title="reduced Zanazzi–Jona R-factor"), html.Th("Overlap")])
    body = []
    for g in groups:
        m = g["members"]
        body.append(html.Tr([
            html.Td(g["label"], className="mono"),
            html.Td(", ".join(m) if len(m) <= 6 else ", ".join(m[:6]) + f" … ({len(m)})", className="mono"),
            html.Td(_fmt(g.get("r_pendry"), 3), className="num"),
            html.Td(_fmt(g.get("r_zj"), 3), className="num"),
            html.Td(_fmt(g.get("overlap_eV"), 0, " eV"), className="num"),
        ]))
    return html.Div([
        html.Table(className="series-groups", children=[html.Thead(head), html.Tbody(body)]),
        html.P("R_P compares each pair of equivalent beams over their common energies (V0i 4 eV); "
               "low values mean the data agree. Overlap: the energy range every member covers.",
               className="muted small-print"),
    ])


def _group_label(g: dict) -> str:
    r = g.get("r_pendry")
    rp = f"R_P {r:.3f}" if isinstance(r, (int, float)) else "one beam"
    return f"{g['label']}  ×{len(g['members'])}  ·  {rp}"


def on_result(summary):
    """A new run -> slider (max, marks, disabled), beam options, group options and value, summary, groups."""
    if not summary:  # a new upload: forget the last run
        return (1, None, True, [], [], None, html.P("No series followed yet.", className="muted"),
                html.P("The groups appear once the beams are followed.", className="muted"))
    try:
        n = int(summary["n_frames"])
        e = summary["energy_eV"]
        step = max(1, n // 6)
        marks = {i: f"{e[i]:g}" for i in range(0, n, step)}
        marks[n - 1] = f"{e[n - 1]:g} eV"
        options = [{"label": b["label"], "value": b["label"]}
                   for b in summary["beams"] if b["n_valid"] >= 2]
        groups = [{"label": _group_label(g), "value": i} for i, g in enumerate(summary.get("groups") or [])]
        return (max(n - 1, 1), marks, n < 2, options, groups, None, summary_panel(summary),
                groups_table(summary))
    except Exception as err:  # noqa: BLE001
        return (no_update,) * 6 + (_note(_fail(err)), no_update)


def pick_beams(click, group, summary, frame, current):
    """The beams in the plot: defaults for a new run, a group's members, or a clicked spot added."""
    trig = _triggered()
    if not summary:
        if trig == ids.SERIES_RESULT:
            return []
        raise PreventUpdate
    known = {b["label"] for b in summary["beams"] if b["n_valid"] >= 2}
    current = [b for b in (current or []) if b in known]
    if trig == ids.SERIES_RESULT or trig is None:
        return [b for b in summary.get("default_beams") or [] if b in known]
    if trig == ids.SERIES_GROUP:
        groups = summary.get("groups") or []
        if group is None or not (isinstance(group, int) and 0 <= group < len(groups)):
            raise PreventUpdate
        return [b for b in groups[group]["members"] if b in known][:MAX_PICKED]
    if trig == ids.SERIES_FRAME_GRAPH:
        label = beam_at_click(click, summary, frame)
        if label is None or label not in known or label in current:
            raise PreventUpdate
        return (current + [label])[-MAX_PICKED:]
    raise PreventUpdate


def beam_at_click(click, summary, frame) -> str | None:
    """The beam under a click on the frame: the marker's beam, else the nearest within 12 px."""
    if not click or not click.get("points"):
        return None
    p = click["points"][0]
    cd = p.get("customdata")
    if isinstance(cd, (list, tuple)) and len(cd) >= 2 and cd[0] == "beam":
        return str(cd[1])
    x, y = p.get("x"), p.get("y")
    if x is None or y is None:
        return None
    try:
        res = series_service.load_result(summary["key"])
    except RecinetError:
        return None
    i = _frame_index(frame, summary)
    xy = res.xy_px[i]
    d = np.hypot(xy[:, 0] - float(x), xy[:, 1] - float(y))
    d[~np.isfinite(d)] = np.inf
    j = int(np.argmin(d)) if d.size else -1
    if j < 0 or d[j] > 12.0:
        return None
    return res.beams.labels[j]


def _frame_index(frame, summary) -> int:
    n = int((summary or {}).get("n_frames") or 1)
    try:
        i = int(frame or 0)
    except (TypeError, ValueError):
        i = 0
    return min(max(i, 0), n - 1)


def move_frame(prev, nxt, iv_click, summary, value):
    """The slider's frame: 0 for a new run, one step back or on, or the energy clicked in the I(V) plot."""
    trig = _triggered()
    if not summary:
        if trig == ids.SERIES_RESULT:
            return 0
        raise PreventUpdate
    n = int(summary["n_frames"])
    i = _frame_index(value, summary)
    if trig == ids.SERIES_RESULT:
        return 0
    if trig == ids.SERIES_PREV:
        return max(i - 1, 0)
    if trig == ids.SERIES_NEXT:
        return min(i + 1, n - 1)
    if trig == ids.SERIES_IV_GRAPH and iv_click and iv_click.get("points"):
        x = iv_click["points"][0].get("x")
        if x is None:
            raise PreventUpdate
        e = np.asarray(summary["energy_eV"], dtype=float)
        return int(np.argmin(np.abs(e - float(x))))
    raise PreventUpdate


def _colour_of(picked: list[str]) -> dict:
    return {b: BEAM_COLOURS[i % len(BEAM_COLOURS)] for i, b in enumerate(picked)}


def render_frame(meta, summary, frame, picked):
    """The frame on the slider with the followed beams drawn on it, and the label under the slider."""
    if not summary or (meta and summary.get("sha") != meta.get("sha")):
        if meta and meta.get("sha"):
            url = series_service.first_frame_view(meta["sha"])
            if url:
                w, h = int(meta["width"]), int(meta["height"])
                return (frame_figure(url, width=w, height=h, factor=series_service.preview_factor(w, h)),
                        "First frame of the upload; the beams are drawn once they are followed.")
        return _empty("Drop an energy series to see its frames"), ""
    i = _frame_index(frame, summary)
    try:
        res = series_service.load_result(summary["key"])
        url = series_service.frame_view(summary["key"], i)
    except Exception as err:  # noqa: BLE001
        return _empty(_fail(err)), ""
    fig = frame_figure(url, width=summary["width"], height=summary["height"], factor=summary["factor"],
                       xy=res.xy_px[i], labels=res.beams.labels, ok=res.valid[i], flags=res.flags[i],
                       intensity=res.intensity[i], picked=picked or [])
    name = summary["frame_names"][i] if i < len(summary.get("frame_names") or []) else ""
    label = html.Span([f"Frame {i} (of 0–{summary['n_frames'] - 1}) · ", html.B(f"{summary['energy_eV'][i]:g} eV"),
                       f" · {name}" if name else "", f" · {int(res.valid[i].sum())} beams integrated"],
                      id="series-frame-text", **{"data-frame": str(i)})
    return fig, label


def _flag_text(bits: int) -> str:
    from analysis.series import FLAG_NAMES

    names = [n.replace("_", " ") for b, n in FLAG_NAMES.items() if bits & b]
    return ", ".join(names) if names else "none"


def frame_figure(source: str, *, width: int, height: int, factor: int = 1, xy=None, labels=(), ok=None,
                 flags=None, intensity=None, picked=()) -> go.Figure:
    """One frame (a PNG preview `factor` times smaller) with the beams at their (x, y) pixels.

    Beams integrated in this frame are open circles; beams seen but left out (masked,
    saturated, crowded) are crosses; picked beams take their curve's colour and a label.
    Each marker's customdata is ``["beam", label]``.
    """
    f = max(1, int(factor))
    fig = go.Figure(go.Image(source=source, x0=(f - 1) / 2.0, y0=(f - 1) / 2.0, dx=f, dy=f, name="frame",
                             hovertemplate="x %{x:.0f}, y %{y:.0f}<extra></extra>"))
    if xy is not None and len(labels):
        xy = np.asarray(xy, dtype=float)
        seen = np.isfinite(xy).all(axis=1)
        ok = np.asarray(ok, dtype=bool)
        colours = _colour_of(list(picked))

        def trace(sel, name, symbol, colour, size, width_px, text=False):
            js = np.flatnonzero(sel)
            if not js.size:
                return
            hover = [f"{labels[j]}<br>I {intensity[j]:.4g}" if np.isfinite(intensity[j]) else
                     f"{labels[j]}<br>left out: {_flag_text(int(flags[j]))}" for j in js]
            fig.add_trace(go.Scatter(
                x=xy[js, 0], y=xy[js, 1], mode="markers+text" if text else "markers", name=name,
                customdata=[["beam", labels[j]] for j in js], hovertext=hover,
                text=[labels[j] for j in js] if text else None, textposition="top center",
                textfont=dict(color=colour if isinstance(colour, str) else "#fff", size=12),
                marker=dict(symbol=symbol, size=size, color=colour, line=dict(width=width_px, color=colour)),
                hovertemplate="%{hovertext}<extra></extra>"))

        is_picked = np.array([lab in colours for lab in labels])
        trace(seen & ok & ~is_picked, "Integrated", "circle-open", "rgba(230,230,230,0.75)", 13, 1.2)
        trace(seen & ~ok & ~is_picked, "Left out", "x-thin-open", "#999999", 9, 1.5)
        for lab, col in colours.items():
            if lab in labels:
                j = labels.index(lab)
                if seen[j]:
                    sel = np.zeros(len(labels), bool)
                    sel[j] = True
                    trace(sel, lab, "circle-open" if ok[j] else "x-thin-open", col, 17, 2.5, text=True)
    fig.update_layout(
        template="plotly_white", height=520, margin=dict(l=5, r=5, t=5, b=5), clickmode="event",
        dragmode="zoom", uirevision="series-frame", showlegend=False, plot_bgcolor="#111",
        xaxis=dict(range=[-0.5, width - 0.5], showgrid=False, zeroline=False, constrain="domain",
                   showticklabels=False),
        yaxis=dict(range=[height - 0.5, -0.5], autorange=False, showgrid=False, zeroline=False,
                   scaleanchor="x", constrain="domain", showticklabels=False),
    )
    return fig


def render_iv(summary, picked, group, frame):
    """The I(V) curves of the picked beams, a group's average, and the energy of the frame on the slider."""
    if not summary:
        return _empty("The curves appear once the beams are followed")
    try:
        res = series_service.load_result(summary["key"])
        avg = None
        groups = summary.get("groups") or []
        if isinstance(group, int) and 0 <= group < len(groups):
            label = groups[group]["label"]
            avg = next((g for g in series_service.groups_of(summary["key"]) if g.label == label), None)
    except Exception as err:  # noqa: BLE001
        return _empty(_fail(err))
    i = _frame_index(frame, summary)
    return iv_figure(res, picked or [], average=avg, energy_eV=float(summary["energy_eV"][i]))


def iv_figure(res, picked, *, average=None, energy_eV: float | None = None) -> go.Figure:
    """I(V) of each picked beam (gaps where it is off the screen or flagged), optionally a group average."""
    fig = go.Figure()
    colours = _colour_of(list(picked))
    for lab, col in colours.items():
        try:
            e, inten, sig = res.curve(lab)
        except RecinetError:
            continue
        o = np.argsort(e)
        fig.add_trace(go.Scatter(
            x=e[o], y=inten[o], mode="lines+markers", name=lab, connectgaps=False,
            line=dict(color=col, width=1.8), marker=dict(size=4, color=col),
            error_y=dict(type="data", array=sig[o], visible=True, thickness=0.8, width=0, color=col),
            hovertemplate=f"{lab}<br>%{{x:g}} eV<br>I %{{y:.4g}}<extra></extra>"))
    if average is not None:
        o = np.argsort(average.energy_eV)
        r = average.r_pendry
        rp = f", R_P {r:.3f}" if math.isfinite(r) else ""
        fig.add_trace(go.Scatter(
            x=average.energy_eV[o], y=average.intensity[o], mode="lines", connectgaps=False,
            name=f"{average.label} average ({len(average.members)} beams{rp})",
            line=dict(color="#000000", width=2.6, dash="dash"),
            hovertemplate="average<br>%{x:g} eV<br>I %{y:.4g}<extra></extra>"))
    if not fig.data:
        return _empty("Pick beams from the list, or click spots on the frame")
    shapes = []
    if energy_eV is not None:
        shapes.append(dict(type="line", xref="x", yref="paper", x0=energy_eV, x1=energy_eV, y0=0, y1=1,
                           line=dict(color="#6b7075", width=1, dash="dot")))
    unit = "frame units / beam current" if res.settings.get("normalised_by_current") else "frame units"
    fig.update_layout(
        template="plotly_white", height=520, margin=dict(l=60, r=10, t=10, b=45), shapes=shapes,
        clickmode="event", hovermode="closest", uirevision="series-iv",
        legend=dict(orientation="h", yanchor="bottom", y=1.0, x=0),
        xaxis=dict(title="Energy (eV)", zeroline=False),
        yaxis=dict(title=f"Intensity ({unit})", zeroline=False, rangemode="tozero"),
    )
    return fig


# --------------------------------------------------------------------------- export

def on_export(n_csv, n_avg, n_json, summary):
    trig = _triggered()
    if trig is None or not summary:
        raise PreventUpdate
    stem = _safe_stem(summary.get("filename") or "series")
    try:
        if trig == ids.SERIES_EXPORT_CSV:
            return dict(content=series_service.export_csv(summary["key"]), filename=f"{stem}-iv.csv",
                        type="text/csv")
        if trig == ids.SERIES_EXPORT_AVG:
            return dict(content=series_service.export_csv(summary["key"], averaged=True),
                        filename=f"{stem}-iv-groups.csv", type="text/csv")
        if trig == ids.SERIES_EXPORT_JSON:
            return dict(content=series_service.export_json(summary["key"]), filename=f"{stem}-iv.json",
                        type="application/json")
    except Exception as err:  # noqa: BLE001
        _fail(err)
    raise PreventUpdate


def _safe_stem(name: str) -> str:
    base = str(name).rsplit(".", 1)[0] if "." in str(name) else str(name)
    stem = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in base)[:60].strip("_")
    return stem or "series"


# --------------------------------------------------------------------------- registration

# A file over the upload limit would be refused by the server (413) with no word in the page:
# the browser checks the size first and says so; only files within the limit travel on.
clientside_callback(
    """
    function (contents, filename) {
        var nu = window.dash_clientside.no_update;
        if (!contents) { return [nu, nu]; }
        var el = document.querySelector("[data-max-bytes]");
        var max = el ? parseInt(el.getAttribute("data-max-bytes"), 10) : 0;
        var comma = contents.indexOf(",");
        var pad = contents.endsWith("==") ? 2 : (contents.endsWith("=") ? 1 : 0);
        var bytes = Math.floor((contents.length - comma - 1) * 3 / 4) - pad;
        var name = filename || "the file";
        function note(text, kind) {
            return {type: "Div", namespace: "dash_html_components",
                    props: {children: text, className: "note note-" + kind, role: kind === "error" ? "alert" : null}};
        }
        if (max && bytes > max) {
            var a = (bytes / 1e6).toFixed(1), b = (max / 1e6).toFixed(1);
            if (a === b) { a = bytes.toLocaleString("en") + " bytes"; b = max.toLocaleString("en") + " bytes"; }
            else { a += " MB"; b += " MB"; }
            return [nu, note(name + ": the file is " + a + "; the limit is " + b + ".", "error")];
        }
        return [{contents: contents, filename: filename}, note("Reading " + name + "…", "wait")];
    }
    """,
    Output(ids.SERIES_PAYLOAD, "data"), Output(ids.SERIES_UPLOAD_NOTE, "children", allow_duplicate=True),
    Input(ids.SERIES_UPLOAD, "contents"), State(ids.SERIES_UPLOAD, "filename"),
    prevent_initial_call=True,
)

callback(
    Output(ids.SERIES_META, "data"), Output(ids.SERIES_UPLOAD_NOTE, "children"),
    Output(ids.SERIES_RESULT, "data", allow_duplicate=True), Output(ids.SERIES_UPLOAD, "contents"),
    Input(ids.SERIES_PAYLOAD, "data"),
    prevent_initial_call=True,
)(on_series_upload)

callback(
    Output(ids.SERIES_ENERGY_TABLE, "data"), Output(ids.SERIES_ENERGY_NOTE, "children"),
    Output(ids.SERIES_ENERGY_MODE, "value"), Output(ids.SERIES_ENERGY_UPLOAD, "contents"),
    Input(ids.SERIES_ENERGY_UPLOAD, "contents"), State(ids.SERIES_ENERGY_UPLOAD, "filename"),
    prevent_initial_call=True,
)(on_energy_upload)

callback(
    Output(ids.SERIES_ENERGY_MODE, "value", allow_duplicate=True),
    Input(ids.SERIES_START, "value"), Input(ids.SERIES_STEP, "value"), Input(ids.SERIES_NAME_PATTERN, "value"),
    prevent_initial_call=True,
)(mode_from_typing)

callback(
    Output(ids.SERIES_RESULT, "data"), Output(ids.SERIES_MESSAGE, "children"),
    Input(ids.SERIES_RUN, "n_clicks"),
    State(ids.SERIES_META, "data"), State(ids.SERIES_ENERGY_TABLE, "data"), State(ids.SERIES_ENERGY_MODE, "value"),
    State(ids.SERIES_START, "value"), State(ids.SERIES_STEP, "value"), State(ids.SERIES_NAME_PATTERN, "value"),
    State(ids.SERIES_SUBSTRATE, "value"), State(ids.SERIES_INDEX_FRAME, "value"), State(ids.SERIES_OVERLAYER, "value"),
    **job_controls(ids.SERIES_RUN, ids.SERIES_CANCEL, ids.SERIES_PROGRESS),
    prevent_initial_call=True,
)(run_series_job)

callback(
    Output(ids.SERIES_SLIDER, "max"), Output(ids.SERIES_SLIDER, "marks"), Output(ids.SERIES_SLIDER, "disabled"),
    Output(ids.SERIES_BEAMS, "options"), Output(ids.SERIES_GROUP, "options"), Output(ids.SERIES_GROUP, "value"),
    Output(ids.SERIES_SUMMARY, "children"), Output(ids.SERIES_GROUPS, "children"),
    Input(ids.SERIES_RESULT, "data"),
    prevent_initial_call=True,
)(on_result)

callback(
    Output(ids.SERIES_BEAMS, "value"),
    Input(ids.SERIES_FRAME_GRAPH, "clickData"), Input(ids.SERIES_GROUP, "value"), Input(ids.SERIES_RESULT, "data"),
    State(ids.SERIES_SLIDER, "value"), State(ids.SERIES_BEAMS, "value"),
    prevent_initial_call=True,
)(pick_beams)

callback(
    Output(ids.SERIES_SLIDER, "value"),
    Input(ids.SERIES_PREV, "n_clicks"), Input(ids.SERIES_NEXT, "n_clicks"), Input(ids.SERIES_IV_GRAPH, "clickData"),
    Input(ids.SERIES_RESULT, "data"), State(ids.SERIES_SLIDER, "value"),
    prevent_initial_call=True,
)(move_frame)

callback(
    Output(ids.SERIES_FRAME_GRAPH, "figure"), Output(ids.SERIES_FRAME_LABEL, "children"),
    Input(ids.SERIES_META, "data"), Input(ids.SERIES_RESULT, "data"), Input(ids.SERIES_SLIDER, "value"),
    Input(ids.SERIES_BEAMS, "value"),
    prevent_initial_call=True,
)(render_frame)

callback(
    Output(ids.SERIES_IV_GRAPH, "figure"),
    Input(ids.SERIES_RESULT, "data"), Input(ids.SERIES_BEAMS, "value"), Input(ids.SERIES_GROUP, "value"),
    Input(ids.SERIES_SLIDER, "value"),
    prevent_initial_call=True,
)(render_iv)

callback(
    Output(ids.SERIES_DOWNLOAD, "data"),
    Input(ids.SERIES_EXPORT_CSV, "n_clicks"), Input(ids.SERIES_EXPORT_AVG, "n_clicks"),
    Input(ids.SERIES_EXPORT_JSON, "n_clicks"), State(ids.SERIES_RESULT, "data"),
    prevent_initial_call=True,
)(on_export)
