"""Measuring on the pattern: a line profile drawn on it, each spot's widths, the domain size,
and the sortable, downloadable spot table.

Thin: the callbacks read the stores, call :mod:`analysis.profile_line` and
:mod:`analysis.spot_table`, and format. Each is a plain function that tests call directly.
"""

from __future__ import annotations

import json

import functools
import math

import numpy as np
from dash import Input, Output, Patch, State, callback, dash_table, dcc, html
from dash.exceptions import PreventUpdate

from analysis.errors import ParameterError
from analysis.optics import ScreenGeometry
from analysis.profile_line import line_profile
from analysis.spot_table import measure_widths, rows_to_csv, spot_rows
from analysis.timelimit import time_limit
from webapp import ids, service
from webapp.pages.common import fail, note, safe_stem

from webapp.figures.common import PALETTE
from webapp.figures.line_profile import PROFILE_UNITS, profile_figure
from webapp.figures.orient import clean_view, to_camera

from .state import result_of

__all__ = ["tools_panels", "on_draw_line", "line_from_relayout", "show_profile", "profile_csv",
           "show_widths", "table_csv", "TABLE_COLUMNS"]

_WIDTH_TIME_LIMIT_S = 60.0
_LINE_COLOUR = PALETTE["blue"]  # the profile curve's colour; nothing else on the pattern uses it

#: the table's columns: (key, header) — units in the headers
TABLE_COLUMNS = (
    ("n", "#"), ("label", "beam"), ("kind", "kind"), ("domain", "domain"), ("x", "x (px)"), ("y", "y (px)"),
    ("intensity", "intensity"), ("snr", "SNR"), ("fwhm_radial_px", "FWHM radial (px)"),
    ("fwhm_tangential_px", "FWHM tangential (px)"), ("fwhm_radial_bz_percent", "FWHM radial (% BZ)"),
    ("fwhm_tangential_bz_percent", "FWHM tangential (% BZ)"), ("fwhm_radial_invA", "FWHM radial (Å⁻¹)"),
    ("fwhm_major_px", "FWHM long axis (px)"), ("fwhm_minor_px", "FWHM short axis (px)"),
    ("axis_angle_deg", "long axis (° from +x)"),
    ("domain_size_A", "domain size (Å)"), ("flags", "flags"),
)


def tools_panels(*, readonly: bool = False):
    """The two panels: the line profile, and the spot widths with the spot table.

    Parameters
    ----------
    readonly : bool, keyword-only
        For a shared, read-only analysis.

    Returns
    -------
    list
        The two panels' components.
    """
    def num(cid, value=None, hint="px"):  # plain text boxes: compact, read as numbers by the callbacks
        return dcc.Input(id=cid, type="text", inputMode="decimal", value=value, placeholder=hint, debounce=True,
                         maxLength=12, style={"width": "5.2rem"})

    profile = html.Div(className="panel", id=ids.PROFILE_PANEL, children=[
        html.H2("Line profile"),
        html.P(className="muted", children=[
            "Press “Draw a line”, then drag across spots on the pattern; or type the ends (pixels)."]),
        html.Div(className="row", children=[
            html.Button("Draw a line", id=ids.PROFILE_DRAW, className="small"),
            html.Label("from", htmlFor=ids.PROFILE_X0), num(ids.PROFILE_X0, hint="x"), num(ids.PROFILE_Y0, hint="y"),
            html.Label("to", htmlFor=ids.PROFILE_X1), num(ids.PROFILE_X1, hint="x"), num(ids.PROFILE_Y1, hint="y"),
        ]),
        html.Div(className="row", children=[
            html.Label("averaged across (px)", htmlFor=ids.PROFILE_WIDTH), num(ids.PROFILE_WIDTH, "3"),
            html.Label("distance in", htmlFor=ids.PROFILE_UNIT),
            dcc.RadioItems(id=ids.PROFILE_UNIT, inline=True, value="px",
                           options=[{"label": l, "value": v} for v, l in PROFILE_UNITS]),
            html.Label("intensity", htmlFor=ids.PROFILE_SCALE),
            dcc.RadioItems(id=ids.PROFILE_SCALE, inline=True, value="linear",
                           options=[{"label": "linear", "value": "linear"}, {"label": "log", "value": "log"}]),
        ]),
        dcc.Graph(id=ids.PROFILE_GRAPH, figure=profile_figure(None), config={"displaylogo": False},
                  style={"height": "300px"}),
        html.Div(id=ids.PROFILE_NOTE, **{"aria-live": "polite"}),
        html.Button("Profile (CSV)", id=ids.PROFILE_CSV, className="small"),
        dcc.Download(id=ids.PROFILE_DOWNLOAD),
    ])
    table = html.Div(className="panel", id=ids.WIDTHS_PANEL, children=[
        html.H2("Spot widths and domain size"),
        dcc.Loading(type="dot", children=html.Div(id=ids.WIDTHS_SUMMARY, children=html.P(
            "Widths appear after an analysis.", className="muted"))),
        dash_table.DataTable(
            id=ids.SPOT_TABLE, data=[], sort_action="native", sort_mode="multi", page_size=15,
            columns=[{"name": h, "id": k, "type": "text" if k in ("label", "kind", "flags") else "numeric"}
                     for k, h in TABLE_COLUMNS],
            style_table={"overflowX": "auto"},
            style_cell={"fontFamily": "inherit", "fontSize": "12px", "padding": "2px 6px", "textAlign": "right"},
            style_cell_conditional=[{"if": {"column_id": c}, "textAlign": "left"} for c in ("label", "kind", "flags")],
            style_header={"fontWeight": "600", "whiteSpace": "normal", "height": "auto"},
            style_data_conditional=[{"if": {"filter_query": '{kind} = "fractional"'}, "backgroundColor": "#fdf4e3"}],
        ),
        html.Button("Spot table (CSV)", id=ids.SPOT_TABLE_CSV, className="small"),
        dcc.Download(id=ids.SPOT_TABLE_DOWNLOAD),
    ])
    return [profile, table]


# ------------------------------------------------------------------------------ line profile

def on_draw_line(n_clicks):
    """Turn the pattern's drag into line drawing (until the pattern is redrawn).

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.

    Returns
    -------
    dict
        A figure patch setting the drag mode to line drawing.
    """
    if not n_clicks:
        raise PreventUpdate
    fig = Patch()
    fig["layout"]["dragmode"] = "drawline"
    fig["layout"]["newshape"] = {"line": {"color": _LINE_COLOUR, "width": 3}, "opacity": 1.0}
    return fig


def line_from_relayout(relayout, image=None, rotate=0, view=None):
    """The ends (x0, y0, x1, y1) of the newest line drawn on the pattern, or of a drawn line
    moved afterwards (``shapes[i].x0``… with i ≥ 1: shape 0 is the pattern's centre circle),
    from the pattern's relayoutData.

    Parameters
    ----------
    relayout : dict or None
        The pattern's relayoutData.
    image : dict, optional
        The image store (``width``, ``height``): needed to turn a line drawn on a turned or
        mirrored view back to camera pixels.
    rotate : int, optional
        Clockwise turn of the view, degrees.
    view : list of str, optional
        The view options (``"mirror"``).

    Returns
    -------
    tuple of float, or None
        (x0, y0, x1, y1) in camera pixels; None when no line changed.
    """
    if not isinstance(relayout, dict):
        raise PreventUpdate
    moved = sorted({k.split("].")[0] for k in relayout if k.startswith("shapes[") and "]." in k})
    if not isinstance(relayout.get("shapes"), list) and len(moved) == 1 and moved[0] != "shapes[0":
        s = {k: relayout.get(f"{moved[0]}].{k}") for k in ("x0", "y0", "x1", "y1")}
    else:
        if not isinstance(relayout.get("shapes"), list):
            raise PreventUpdate
        lines = [s for s in relayout["shapes"] if isinstance(s, dict) and s.get("type") == "line"]
        if not lines:
            raise PreventUpdate
        s = lines[-1]
    try:
        vals = [round(float(s[k]), 2) for k in ("x0", "y0", "x1", "y1")]
    except (KeyError, TypeError, ValueError):
        raise PreventUpdate from None
    if not all(map(math.isfinite, vals)):
        raise PreventUpdate
    rot, mirror = clean_view(rotate, "mirror" in (view or []))
    if (rot or mirror) and isinstance(image, dict) and image.get("width"):
        xs, ys = to_camera(np.array(vals[0::2]), np.array(vals[1::2]), width=image["width"],
                           height=image["height"], rotate_deg=rot, mirror=mirror)
        vals = [round(float(v), 2) for v in (xs[0], ys[0], xs[1], ys[1])]
    return tuple(vals)


def _momentum_scale(result):
    """(energy eV, ScreenGeometry, |a*| Å⁻¹) of an analysis dict, or Nones."""
    try:
        geom = ScreenGeometry.from_dict(result["geometry"])
        return float(result["energy_eV"]), geom, float(result["substrate"]["a_star_invA"])
    except (KeyError, TypeError, ValueError, ParameterError):
        return None, None, None


def _number(value, what: str) -> float:
    try:
        v = float(str(value).strip().replace(",", "."))
    except ValueError:
        raise ParameterError(f"The {what} must be a number, got {str(value)[:20]!r}.") from None
    if not math.isfinite(v):
        raise ParameterError(f"The {what} must be a finite number, got {str(value)[:20]!r}.")
    return v


def _profile(image, record, x0, y0, x1, y1, width):
    if not image or not image.get("sha"):
        return None, "Load an image first."
    if any(v in (None, "") for v in (x0, y0, x1, y1)):
        return None, None
    names = ("start x", "start y", "end x", "end y")
    x0, y0, x1, y1 = (_number(v, n) for v, n in zip((x0, y0, x1, y1), names))
    width = 1.0 if width in (None, "") else _number(width, "width across the line")
    result = result_of(record, image)
    e, geom, a_star = _momentum_scale(result) if result else (None, None, None)
    data = service.image_array(image["sha"])
    p = line_profile(data, (x0, y0), (x1, y1), width_px=width, energy_eV=e, geometry=geom, a_star_invA=a_star)
    return p, None


def show_profile(x0, y0, x1, y1, width, unit, image, record, scale="linear"):
    """The profile figure and a note (plain message for bad input).

    Parameters
    ----------
    x0, y0, x1, y1 : float or None
        Ends of the line, image pixels.
    width : float or None
        Width averaged across the line, pixels.
    unit : str or None
        Distance unit of the axis.
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.
    record : dict or None
        The analysis store: ``sha``, ``parameters``, ``edits``, ``result``.
    scale : str
        ``"linear"`` or ``"log"`` intensity axis.

    Returns
    -------
    figure : plotly.graph_objects.Figure
        The profile.
    note : dash.html.Div or None
        A message.
    """
    log = scale == "log"
    try:
        p, msg = _profile(image, record, x0, y0, x1, y1, width)
    except Exception as err:  # noqa: BLE001
        return profile_figure(None), note(fail(err))
    if p is None:
        return profile_figure(None), note(msg, "warn") if msg else None
    if unit != "px" and p.distance_invA is None:
        return profile_figure(p, "px", log=log), note(
            "Momentum units need an analysis (its camera model); shown in px.", "warn")
    return profile_figure(p, unit or "px", log=log), note(
        f"{len(p)} samples over {p.distance_px[-1]:.1f} px, averaged across {p.width_px:g} px.", "ok")


def profile_csv(n_clicks, x0, y0, x1, y1, width, image, record):
    """The line profile as a CSV download.

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    x0, y0, x1, y1 : float or None
        Ends of the line, image pixels.
    width : float or None
        Width averaged across the line, pixels.
    image : dict or None
        The image store.
    record : dict or None
        The analysis store.

    Returns
    -------
    download : dict or None
        The file for ``dcc.Download``.
    note : dash.html.Div or None
        A message.
    """
    if not n_clicks:
        raise PreventUpdate
    try:
        p, msg = _profile(image, record, x0, y0, x1, y1, width)
    except Exception as err:  # noqa: BLE001
        return None, note(fail(err))
    if p is None:
        return None, note(msg or "Draw a line first.", "warn")
    stem = safe_stem((image or {}).get("filename"), "pattern")
    return dcc.send_string(p.to_csv(), f"{stem}_profile.csv"), None


# ------------------------------------------------------------------------------ widths and the table

@functools.lru_cache(maxsize=8)
def _widths_cached(sha: str, key: str, record_json: str):

    record = json.loads(record_json)
    obj = service.result_object(record)
    with time_limit(_WIDTH_TIME_LIMIT_S, "the spot-width fits"):
        rep = measure_widths(service.image_array(sha), obj)
    return rep, spot_rows(obj, widths=rep)


def _widths(record, image):

    result = result_of(record, image)
    if result is None:
        return None, None
    key = service.record_key(image["sha"], record.get("parameters") or {}, record.get("edits"))
    return _widths_cached(image["sha"], key, json.dumps({k: record.get(k) for k in ("sha", "parameters", "edits")},
                                                        sort_keys=True, default=str))


def _summary(rep):
    d = rep.domain
    px_r, px_t = d.instrument_fwhm_px
    lines = [html.P(html.Strong(d.message))]
    if math.isfinite(px_r):
        inst = f"Instrument response (integer beams): FWHM {px_r:.2f} px radial, {px_t:.2f} px tangential"
        if math.isfinite(d.instrument_fwhm_invA):
            bz = 100 * d.instrument_fwhm_invA / rep.beams.a_star_invA
            inst += f", {d.instrument_fwhm_invA:.4f} Å⁻¹ ({bz:.1f} % BZ)"
        lines.append(html.P(inst + "."))
    if rep.axes_text():
        lines.append(html.P(rep.axes_text()))
    if d.n_resolved:
        lines.append(html.P(f"Per beam: {d.spread_A[0]:.0f}–{d.spread_A[1]:.0f} Å (quartiles).", className="muted"))
    lines.append(html.Details([html.Summary("Method and source"), html.P(d.method, className="muted")]))
    return html.Div(lines)


def show_widths(record, image):
    """Summary (domain size, instrument response, method) and the table rows.

    Parameters
    ----------
    record : dict or None
        The analysis store: ``sha``, ``parameters``, ``edits``, ``result``.
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.

    Returns
    -------
    summary : dash component
        The summary, or a message.
    rows : list of dict
        The spot table's rows.
    """
    try:
        rep, rows = _widths(record, image)
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), []
    if rep is None:
        return html.P("Widths appear after an analysis.", className="muted"), []
    return _summary(rep), rows


def table_csv(n_clicks, record, image):
    """The spot table (with the domain-size estimate) as a CSV download.

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    record : dict or None
        The analysis store.
    image : dict or None
        The image store.

    Returns
    -------
    dict
        The file for ``dcc.Download``.
    """
    if not n_clicks:
        raise PreventUpdate
    try:
        rep, rows = _widths(record, image)
    except Exception as err:  # noqa: BLE001 - the summary already shows the message
        fail(err)
        raise PreventUpdate from None
    if rep is None:
        raise PreventUpdate
    stem = safe_stem((image or {}).get("filename"), "analysis")
    return dcc.send_string(rows_to_csv(rows, domain=rep.domain, axes_text=rep.axes_text()),
                           f"{stem}_spot_table.csv")


callback(Output(ids.GRAPH, "figure", allow_duplicate=True), Input(ids.PROFILE_DRAW, "n_clicks"),
         prevent_initial_call=True)(on_draw_line)
callback(Output(ids.PROFILE_X0, "value"), Output(ids.PROFILE_Y0, "value"), Output(ids.PROFILE_X1, "value"),
         Output(ids.PROFILE_Y1, "value"), Input(ids.GRAPH, "relayoutData"), State(ids.IMAGE, "data"),
         State(ids.ROTATE, "value"), State(ids.VIEW_OPTIONS, "value"),
         prevent_initial_call=True)(line_from_relayout)
callback(Output(ids.PROFILE_GRAPH, "figure"), Output(ids.PROFILE_NOTE, "children"),
         Input(ids.PROFILE_X0, "value"), Input(ids.PROFILE_Y0, "value"), Input(ids.PROFILE_X1, "value"),
         Input(ids.PROFILE_Y1, "value"), Input(ids.PROFILE_WIDTH, "value"), Input(ids.PROFILE_UNIT, "value"),
         Input(ids.IMAGE, "data"), Input(ids.RESULT, "data"), Input(ids.PROFILE_SCALE, "value"))(show_profile)
callback(Output(ids.PROFILE_DOWNLOAD, "data"), Output(ids.PROFILE_NOTE, "children", allow_duplicate=True),
         Input(ids.PROFILE_CSV, "n_clicks"), State(ids.PROFILE_X0, "value"), State(ids.PROFILE_Y0, "value"),
         State(ids.PROFILE_X1, "value"), State(ids.PROFILE_Y1, "value"), State(ids.PROFILE_WIDTH, "value"),
         State(ids.IMAGE, "data"), State(ids.RESULT, "data"), prevent_initial_call=True)(profile_csv)
callback(Output(ids.WIDTHS_SUMMARY, "children"), Output(ids.SPOT_TABLE, "data"),
         Input(ids.RESULT, "data"), Input(ids.IMAGE, "data"))(show_widths)
callback(Output(ids.SPOT_TABLE_DOWNLOAD, "data"), Input(ids.SPOT_TABLE_CSV, "n_clicks"),
         State(ids.RESULT, "data"), State(ids.IMAGE, "data"), prevent_initial_call=True)(table_csv)
