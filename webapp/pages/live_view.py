"""The ``/live`` page's body: layout, callbacks and figures (``pages/live.py`` makes it a page).

Follow a surface while it changes — frames at one energy, one parameter per frame.

Watch a folder on the server (only under ``RECINET_WATCH_ROOT``) or drop frames as they
come; each frame is analysed once when complete (:mod:`webapp.live_sessions`, which runs
:func:`analysis.follow.watch.watch_folder`). The page polls the session every second:
the beam families' intensities against the parameter with the segments (their
structures) shaded on the same axis, the last frame with its beams, the lines printed so
far, and CSV / JSON exports. The link ``/live?session=…`` shows the same series to a
colleague.
"""

from __future__ import annotations

import base64
import binascii
import json

import plotly.graph_objects as go
from dash import Input, Output, State, callback, ctx, dcc, html, no_update

from analysis.errors import RecinetError
from webapp import ids, live_sessions, runtime

__all__ = ["layout", "curves_figure", "beams_figure", "frame_figure", "on_start", "on_stop", "on_upload", "on_tick", "on_export"]

_COLOURS = ("#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#8c564b", "#e377c2", "#17becf")
_SEG_FILL = ("rgba(31,119,180,0.08)", "rgba(214,39,40,0.08)", "rgba(44,160,44,0.08)", "rgba(148,103,189,0.08)")


def _empty(message: str, height: int) -> go.Figure:
    fig = go.Figure()
    fig.update_layout(template="plotly_white", height=height, margin=dict(l=10, r=10, t=10, b=10),
                      xaxis=dict(visible=False), yaxis=dict(visible=False),
                      annotations=[dict(text=message, showarrow=False, font=dict(size=15, color="#666"),
                                        xref="paper", yref="paper", x=0.5, y=0.5)])
    return fig


def curves_figure(state: dict) -> go.Figure:
    """Each family's summed intensity and the integer beams' against the parameter, segments shaded.

    Parameters
    ----------
    state : dict
        The session's state (:func:`webapp.live_sessions.read_state`).

    Returns
    -------
    plotly.graph_objects.Figure
        Intensity against the parameter.
    """
    par = state.get("parameter")
    if not par or not par.get("values"):
        return _empty("The beam intensities appear here as the frames arrive", 420)
    x = par["values"]
    heading = par["name"] + (f" ({par['unit']})" if par.get("unit") else "")
    fig = go.Figure()
    for n, fam in enumerate(state.get("families", [])):
        fig.add_trace(go.Scatter(x=x, y=fam["total"], mode="lines+markers", name=f"{fam['label']} family",
                                 line=dict(color=_COLOURS[n % len(_COLOURS)])))
    tr = state.get("transition")
    if tr:
        fig.add_trace(go.Scatter(x=x, y=tr["model"], mode="lines", name=f"fit: Tc = {tr['tc']:.4g}",
                                 line=dict(color="#000", dash="dash", width=1)))
    fig.add_trace(go.Scatter(x=x, y=state.get("integer_total", []), mode="lines", name="integer beams",
                             line=dict(color="#555", dash="dot"), yaxis="y2"))
    _segments_and_switches(fig, state, x)
    for pk in state.get("peaks", []):  # where each family is brightest (e.g. a phase complete)
        n = next((i for i, f in enumerate(state.get("families", [])) if f["label"] == pk["family"]), 0)
        fig.add_trace(go.Scatter(x=[pk["value"]], y=[pk["intensity"]], mode="markers", showlegend=False,
                                 marker=dict(symbol="triangle-down", size=11, color=_COLOURS[n % len(_COLOURS)]),
                                 hovertemplate=f"{pk['family']} brightest at %{{x:.4g}}<extra></extra>"))
    fig.update_layout(template="plotly_white", height=420, margin=dict(l=60, r=60, t=40, b=50),
                      xaxis=dict(title=heading),
                      yaxis=dict(title="family intensity (frame units)", rangemode="tozero", tickformat=".3s"),
                      yaxis2=dict(title="integer beams", overlaying="y", side="right", showgrid=False,
                                  rangemode="tozero", tickformat=".3s"),
                      legend=dict(orientation="h", y=-0.25), uirevision="live")
    return fig


def _segments_and_switches(fig: go.Figure, state: dict, x: list, *, label_row: int | None = None) -> None:
    """Shade the segments and draw each switch point as a dashed line (with its value) on `fig`."""
    kw = {} if label_row is None else {"row": "all", "col": 1}
    for n, seg in enumerate(state.get("segments", [])):
        lo, hi = seg["value_range"]
        pad = 0.0 if hi > lo else 0.5 * (abs(x[-1] - x[0]) / max(len(x) - 1, 1))
        fig.add_vrect(x0=lo - pad, x1=hi + pad, fillcolor=_SEG_FILL[n % len(_SEG_FILL)], line_width=0, layer="below",
                      **kw)
        fig.add_annotation(x=0.5 * (lo + hi), y=1.0, yref="paper", yanchor="bottom", showarrow=False,
                           text=seg["label"], font=dict(size=11))
    for sw in state.get("switches", []):
        fig.add_vline(x=sw["value"], line=dict(color="#333", dash="dash", width=1), **kw)
        fig.add_annotation(x=sw["value"], y=0.0, yref="paper", yanchor="top", showarrow=False, xanchor="left",
                           text=f"switch {sw['value']:.4g}", font=dict(size=10, color="#333"))


def beams_figure(state: dict) -> go.Figure:
    """What a surface scientist follows beside the family sums, on one parameter axis:
    every beam's intensity, each family's order parameter √(I/I_max) (with the order–disorder
    fit's), and each family's spot width (radial and tangential σ); segments shaded and
    the switch points marked.

    Parameters
    ----------
    state : dict
        The session's state (:func:`webapp.live_sessions.read_state`).

    Returns
    -------
    plotly.graph_objects.Figure
        Three panels sharing the parameter axis.
    """
    from plotly.subplots import make_subplots

    par = state.get("parameter")
    if not par or not par.get("values") or not state.get("beams"):
        return _empty("Each beam, the order parameter and the spot widths appear here as the frames arrive", 300)
    x = par["values"]
    heading = par["name"] + (f" ({par['unit']})" if par.get("unit") else "")
    fams = state.get("families", [])
    colour = {f["label"]: _COLOURS[n % len(_COLOURS)] for n, f in enumerate(fams)}
    fig = make_subplots(rows=3, cols=1, shared_xaxes=True, vertical_spacing=0.06, row_heights=[0.45, 0.3, 0.25])
    shown = set()
    for b in state["beams"]:
        integer = b["family"] == "integer"
        group = "integer beams" if integer else f"{b['family'] or 'other'} beams"
        fig.add_trace(go.Scatter(
            x=x, y=b["intensity"], mode="lines+markers", name=group, legendgroup=group, showlegend=group not in shown,
            text=[b["label"]] * len(x), hovertemplate="%{text}: %{y:.4s}<extra></extra>",
            visible="legendonly" if integer else True, marker=dict(size=4),
            line=dict(width=1, color="#888" if integer else colour.get(b["family"], "#444"))), row=1, col=1)
        shown.add(group)
    for f in fams:
        if "order" not in f:
            continue
        c = colour[f["label"]]
        fig.add_trace(go.Scatter(x=x, y=f["order"], mode="lines+markers", name=f"{f['label']} order parameter",
                                 line=dict(color=c), marker=dict(size=5)), row=2, col=1)
        fig.add_trace(go.Scatter(x=x, y=f["width_radial"], mode="lines+markers", name=f"{f['label']} σ radial",
                                 line=dict(color=c), marker=dict(size=5)), row=3, col=1)
        fig.add_trace(go.Scatter(x=x, y=f["width_tangential"], mode="lines", name=f"{f['label']} σ tangential",
                                 line=dict(color=c, dash="dot")), row=3, col=1)
    tr = state.get("transition")
    if tr and tr.get("model"):
        m = [v if v is not None else float("nan") for v in tr["model"]]
        top = max((v for v in m if v == v), default=0.0)
        if top > 0:
            fig.add_trace(go.Scatter(x=x, y=[(max(v, 0.0) / top) ** 0.5 if v == v else None for v in m], mode="lines",
                                     name=f"fit: Tc = {tr['tc']:.4g}", line=dict(color="#000", dash="dash", width=1)),
                          row=2, col=1)
    _segments_and_switches(fig, state, x, label_row=1)
    fig.update_yaxes(title_text="beam intensity", rangemode="tozero", tickformat=".3s", row=1, col=1)
    fig.update_yaxes(title_text="order √(I/I_max)", range=[0, 1.08], row=2, col=1)
    fig.update_yaxes(title_text="spot σ (px)", rangemode="tozero", row=3, col=1)
    fig.update_xaxes(title_text=heading, row=3, col=1)
    fig.update_layout(template="plotly_white", height=620, margin=dict(l=60, r=20, t=30, b=50),
                      legend=dict(orientation="h", y=-0.12), uirevision="live-beams")
    return fig


def frame_figure(png: bytes | None, meta: dict | None, beams: list) -> go.Figure:
    """The last frame (8-bit PNG, downsampled by meta['factor']) with its beams marked.

    Parameters
    ----------
    png : bytes or None
        The frame's preview.
    meta : dict or None
        Its ``shape`` (rows, cols) and ``factor``.
    beams : list of dict
        The beams with their (x, y) pixels and labels.

    Returns
    -------
    plotly.graph_objects.Figure
        The frame.
    """
    if not png or not meta:
        return _empty("The last frame appears here", 420)
    f = float(meta.get("factor", 1))
    rows, cols = meta["shape"]
    fig = go.Figure(go.Image(source="data:image/png;base64," + base64.b64encode(png).decode("ascii"),
                             dx=f, dy=f, x0=(f - 1) / 2, y0=(f - 1) / 2, hoverinfo="skip"))
    groups: dict[str, list] = {}
    for b in beams:
        groups.setdefault(b["family"] or "other", []).append(b)
    for n, (fam, bs) in enumerate(sorted(groups.items(), key=lambda kv: kv[0] != "integer")):
        colour = "#ffc400" if fam == "integer" else _COLOURS[n % len(_COLOURS)]
        fig.add_trace(go.Scatter(x=[b["x"] for b in bs], y=[b["y"] for b in bs], mode="markers",
                                 name=fam if fam == "integer" else f"{fam} family", text=[b["label"] for b in bs],
                                 hovertemplate="%{text}<extra></extra>",
                                 marker=dict(symbol="circle-open", size=11, color=colour, line=dict(width=1.5))))
    fig.update_layout(template="plotly_white", height=420, margin=dict(l=10, r=10, t=10, b=10),
                      xaxis=dict(visible=False, range=[-0.5, cols - 0.5]),
                      yaxis=dict(visible=False, range=[rows - 0.5, -0.5], scaleanchor="x"),
                      legend=dict(orientation="h", y=-0.02), uirevision="frame")
    return fig


def layout(session: str | None = None, **_query):
    """The page: the session's settings, start and stop, uploads, the curves and the last frame.

    Parameters
    ----------
    session : str, optional
        A session token from the link ``/live?session=…``.
    **_query
        Other query parameters (ignored).

    Returns
    -------
    dash.html.Div
        The page body.
    """
    root = runtime.get_settings().watch_root
    folder_note = (f"A folder inside {root.name}/ on the server." if root is not None
                   else "Watching server folders is off here (RECINET_WATCH_ROOT); upload the frames instead.")
    token = None
    if session:
        try:
            live_sessions.session_dir(session)
            token = session
        except RecinetError:
            token = None
    inputs = html.Div(className="panel", children=[
        html.H2("Follow a surface"),
        html.P("Frames at one energy while temperature, dose or time changes: each frame is analysed once when "
               "it is complete.", className="muted"),
        html.Div(className="row", children=[
            html.Label("Energy (eV)", htmlFor=ids.LIVE_ENERGY),
            dcc.Input(id=ids.LIVE_ENERGY, type="number", value=200, min=1, max=5000, debounce=True)]),
        html.Div(className="row", children=[
            html.Label("Substrate", htmlFor=ids.LIVE_SUBSTRATE),
            dcc.Input(id=ids.LIVE_SUBSTRATE, type="text", value="Pt(111)", maxLength=120, className="grow",
                      debounce=True)]),
        html.Div(className="row", children=[html.Label("The parameter of each frame from", htmlFor=ids.LIVE_PARAM_FROM)]),
        dcc.RadioItems(id=ids.LIVE_PARAM_FROM, value="names", options=[
            {"label": "a number in each file name", "value": "names"},
            {"label": "the file times (s)", "value": "times"}]),
        html.Div(className="row", children=[
            html.Label("Name", htmlFor=ids.LIVE_PARAM_NAME),
            dcc.Input(id=ids.LIVE_PARAM_NAME, type="text", value="temperature", maxLength=40, debounce=True),
            html.Label("Unit", htmlFor=ids.LIVE_UNIT),
            dcc.Input(id=ids.LIVE_UNIT, type="text", value="K", maxLength=12, debounce=True, style={"width": "4em"})]),
        html.Div(className="row", children=[
            html.Label("File-name pattern", htmlFor=ids.LIVE_PATTERN),
            dcc.Input(id=ids.LIVE_PATTERN, type="text", maxLength=200, className="grow", debounce=True,
                      placeholder="default: the last number in the name, e.g. anneal_315K.tif")]),
        html.Div(className="row", children=[
            html.Label("Folder", htmlFor=ids.LIVE_FOLDER),
            dcc.Input(id=ids.LIVE_FOLDER, type="text", maxLength=300, className="grow", debounce=True,
                      placeholder="e.g. 2026-12-03/anneal", disabled=root is None)]),
        html.P(folder_note, className="muted small-print"),
        html.Div(className="row", children=[
            html.Button("Watch the folder", id=ids.LIVE_WATCH, className="primary", disabled=root is None),
            html.Button("Start with uploads", id=ids.LIVE_UPLOAD_START),
            html.Button("Stop", id=ids.LIVE_STOP)]),
        dcc.Upload(id=ids.LIVE_UPLOAD, className="upload small", multiple=True, max_size=-1,
                   accept=".tif,.tiff,.png,.jpg,.jpeg,.bmp",
                   children=html.Div(["Drop frames here as they come, or ", html.A("choose them")])),
        html.Div(id=ids.LIVE_MESSAGE, **{"aria-live": "polite"}),
        html.Div(id=ids.LIVE_STATUS, className="status"),
        html.Div(id=ids.LIVE_LINK),
        html.Div(className="row", children=[
            html.Button("Beams (CSV)", id=ids.LIVE_EXPORT_CSV),
            html.Button("Series (JSON)", id=ids.LIVE_EXPORT_JSON)]),
        dcc.Download(id=ids.LIVE_DOWNLOAD),
    ])
    main = html.Div(className="main", children=[
        dcc.Graph(id=ids.LIVE_CURVES, figure=curves_figure({}), config={"displaylogo": False}),
        html.Div(id=ids.LIVE_SEGMENTS),
        dcc.Graph(id=ids.LIVE_BEAMS, figure=beams_figure({}), config={"displaylogo": False}),
        dcc.Graph(id=ids.LIVE_FRAME, figure=frame_figure(None, None, []), config={"displaylogo": False}),
        html.Pre(id=ids.LIVE_LOG, className="log", style={"maxHeight": "14em", "overflow": "auto",
                                                         "fontSize": "0.8em"}),
    ])
    return html.Div(className="page live", style={"display": "grid", "gridTemplateColumns": "minmax(300px, 28%) 1fr",
                                                  "gap": "1rem"}, children=[
        dcc.Store(id=ids.LIVE_SESSION, data=token),
        dcc.Store(id=ids.LIVE_DRAWN),
        dcc.Interval(id=ids.LIVE_TICK, interval=1000, disabled=False),
        inputs, main])


@callback(Output(ids.LIVE_SESSION, "data"), Output(ids.LIVE_MESSAGE, "children"),
          Input(ids.LIVE_WATCH, "n_clicks"), Input(ids.LIVE_UPLOAD_START, "n_clicks"),
          State(ids.LIVE_FOLDER, "value"), State(ids.LIVE_ENERGY, "value"), State(ids.LIVE_SUBSTRATE, "value"),
          State(ids.LIVE_PARAM_FROM, "value"), State(ids.LIVE_PARAM_NAME, "value"), State(ids.LIVE_UNIT, "value"),
          State(ids.LIVE_PATTERN, "value"), prevent_initial_call=True)
def on_start(_watch, _upload, folder, energy, substrate, param_from, param_name, unit, pattern,
             trigger: str | None = None):
    """Start a session watching `folder` (under the root) or taking uploads.

    Parameters
    ----------
    _watch, _upload : int or None
        Clicks of 'Watch the folder' and 'Start with uploads'.
    folder : str or None
        The folder under the watch root.
    energy : float or None
        Beam energy, eV.
    substrate : str or None
        E.g. ``"Pt(111)"``.
    param_from : str
        ``"names"`` or ``"times"``.
    param_name, unit : str or None
        What the parameter is.
    pattern : str or None
        Regular expression for the number in a file name.
    trigger : str, optional
        Which button fired (tests pass it).

    Returns
    -------
    token : str or None
        The new session's token.
    message : str
        What happened, in one line.
    """
    which = trigger or ctx.triggered_id
    cfg = {"energy_eV": energy, "substrate": substrate, "parameter_from": param_from, "parameter_name": param_name,
           "unit": unit, "name_pattern": pattern or None}
    try:
        token = live_sessions.start_session(cfg, folder=(folder or "") if which == ids.LIVE_WATCH else None)
    except RecinetError as err:
        return no_update, str(err)
    what = "watching the folder" if which == ids.LIVE_WATCH else "waiting for frames: drop them above"
    return token, f"Started: {what}."


@callback(Output(ids.LIVE_MESSAGE, "children", allow_duplicate=True), Input(ids.LIVE_STOP, "n_clicks"),
          State(ids.LIVE_SESSION, "data"), prevent_initial_call=True)
def on_stop(_n, token):
    """Stop pressed: ask the session to stop.

    Parameters
    ----------
    _n : int or None
        The button's clicks.
    token : str or None
        The session's token.

    Returns
    -------
    str
        What happened, in one line.
    """
    if not token:
        return "Nothing is running."
    try:
        live_sessions.stop_session(token)
    except RecinetError as err:
        return str(err)
    return "Stopping after the current frame."


@callback(Output(ids.LIVE_MESSAGE, "children", allow_duplicate=True), Output(ids.LIVE_UPLOAD, "contents"),
          Input(ids.LIVE_UPLOAD, "contents"), State(ids.LIVE_UPLOAD, "filename"), State(ids.LIVE_SESSION, "data"),
          prevent_initial_call=True)
def on_upload(contents, filenames, token):
    """Add the dropped frames to the session's folder (the watcher takes them from there).

    Parameters
    ----------
    contents : list of str or None
        Data URLs of the dropped frames.
    filenames : list of str or None
        Their names.
    token : str or None
        The session's token.

    Returns
    -------
    message : str
        What was added or refused.
    contents : None
        Clears the upload.
    """
    if not contents:
        return no_update, None
    if not token:
        return "Start first (“Start with uploads”), then drop the frames.", None
    limit = runtime.get_settings().max_upload_bytes
    added, problems = [], []
    for c, name in zip(contents, filenames or []):
        try:
            raw = base64.b64decode(c.split(",", 1)[1], validate=True)
        except (IndexError, binascii.Error, ValueError):
            problems.append(f"{name}: not a readable upload")
            continue
        if len(raw) > limit:
            problems.append(f"{name}: {len(raw) / 1e6:.0f} MB is over the {limit / 1e6:.0f} MB limit")
            continue
        try:
            added.append(live_sessions.save_upload(token, name, raw))
        except RecinetError as err:
            problems.append(str(err))
    msg = f"Added {len(added)} frame{'s' if len(added) != 1 else ''}." if added else ""
    return (msg + (" " if msg and problems else "") + "; ".join(problems)) or no_update, None


def _segments_table(state: dict):
    segs = state.get("segments") or []
    if not segs:
        return html.Div()
    unit = (state.get("parameter") or {}).get("unit", "")
    rows = [html.Tr([html.Td(f"{s['first']}–{s['last']}"), html.Td(f"{s['value_range'][0]:g}–{s['value_range'][1]:g}"
                                                                  + (f" {unit}" if unit else "")),
                     html.Td(s["label"]), html.Td(", ".join(s["families"]) or "none")]) for s in segs]
    table = html.Table(className="segments", style={"borderSpacing": "1.2em 0.2em"}, children=[
        html.Thead(html.Tr([html.Th("frames"), html.Th("range"), html.Th("structure"), html.Th("families")])),
        html.Tbody(rows)])
    u = f" {unit}" if unit else ""
    name = (state.get("parameter") or {}).get("name", "parameter")
    notes = [f"switch at {name} {sw['value']:.4g}{u} (between frames {sw['after_frame']} and {sw['before_frame']}): "
             f"{sw['from']} → {sw['to']}" for sw in state.get("switches") or []]
    notes += [f"{pk['family']} family brightest at {name} {pk['value']:.4g}{u} (frame {pk['frame']})"
              for pk in state.get("peaks") or []]
    return html.Div([table, html.Ul(className="switches", children=[html.Li(t) for t in notes])])


@callback(Output(ids.LIVE_STATUS, "children"), Output(ids.LIVE_CURVES, "figure"), Output(ids.LIVE_FRAME, "figure"),
          Output(ids.LIVE_SEGMENTS, "children"), Output(ids.LIVE_LOG, "children"), Output(ids.LIVE_LINK, "children"),
          Output(ids.LIVE_BEAMS, "figure"), Output(ids.LIVE_DRAWN, "data"), Input(ids.LIVE_TICK, "n_intervals"),
          Input(ids.LIVE_SESSION, "data"), State(ids.LIVE_DRAWN, "data"))
def on_tick(_n, token, drawn=None):
    """Redraw from the session's summary (any web worker can read it) when it has changed
    since the last drawing (every beam of a long series is a large figure to send each second).

    Parameters
    ----------
    _n : int
        Ticks of the interval.
    token : str or None
        The session's token.
    drawn : str, optional
        What was drawn last (the session and its summary's time and status).

    Returns
    -------
    tuple
        Status, curves figure, frame figure, segments, log text, share link, the beams'
        figure and what is drawn now.
    """
    if not token:
        return "No live series yet.", no_update, no_update, no_update, "", "", no_update, None
    try:
        state = live_sessions.read_state(token)
        d = live_sessions.session_dir(token)
    except RecinetError as err:
        return str(err), no_update, no_update, no_update, "", "", no_update, None
    now = f"{token}|{state.get('updated')}|{state.get('status')}|{len(state.get('lines', []))}"
    if drawn == now:
        return (no_update,) * 8
    png = meta = None
    try:
        png = (d / "last.png").read_bytes()
        meta = json.loads((d / "last.json").read_text())
    except (OSError, ValueError):
        pass
    segs = state.get("segments") or []
    status = f"{state.get('status', '')}: {state.get('n_frames', 0)} frames"
    msg = state.get("message", "")
    if state.get("status") == "error" or msg.startswith("stopped:"):
        status += f" ({msg.removeprefix('stopped: ')})"
    if segs:
        status += f"; now {segs[-1]['label']}"
    tr = state.get("transition")
    if tr:
        unit = (state.get("parameter") or {}).get("unit", "")
        status += (f"; order–disorder fit of the {tr['family']} family: Tc = {tr['tc']:.4g} {unit} "
                   f"± {tr['tc_sigma']:.2g} (statistics) ± {tr['tc_spread']:.2g} (refits)")
    link = html.A("Link to this series", href=f"/live?session={token}")
    return (status, curves_figure(state), frame_figure(png, meta, state.get("last_beams", [])),
            _segments_table(state), "\n".join(state.get("lines", [])), link, beams_figure(state), now)


@callback(Output(ids.LIVE_DOWNLOAD, "data"), Output(ids.LIVE_MESSAGE, "children", allow_duplicate=True),
          Input(ids.LIVE_EXPORT_CSV, "n_clicks"), Input(ids.LIVE_EXPORT_JSON, "n_clicks"),
          State(ids.LIVE_SESSION, "data"), prevent_initial_call=True)
def on_export(_csv, _json, token, trigger: str | None = None):
    """The beams so far as CSV, or the series as JSON (the whole record once stopped).

    Parameters
    ----------
    _csv, _json : int or None
        Clicks of the two export buttons.
    token : str or None
        The session's token.
    trigger : str, optional
        Which button fired (tests pass it; the page reads it from the callback context).

    Returns
    -------
    download : dict
        The file for ``dcc.Download`` (or ``no_update``).
    message : str
        What went wrong (or ``no_update``).
    """
    which = trigger or ctx.triggered_id
    if not token:
        return no_update, "Nothing to export yet."
    try:
        d = live_sessions.session_dir(token)
        if which == ids.LIVE_EXPORT_CSV:
            p = d / "series.csv"
            if not p.is_file():
                return no_update, "No frame has been analysed yet."
            return dcc.send_file(str(p), filename="live-series.csv"), no_update
        full = d / "series.json"
        text = full.read_text() if full.is_file() else json.dumps(live_sessions.read_state(token))
        return dict(content=text, filename="live-series.json"), no_update
    except (RecinetError, OSError) as err:
        return no_update, f"Export failed: {err}"

