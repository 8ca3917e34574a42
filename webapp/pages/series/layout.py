"""The series page body: inputs and result on the side, the frames and the I(V) curves in the middle.

Browser-side state (dcc.Store):
  ``SERIES_PAYLOAD``      {"contents", "filename"} of a dropped file within the size limit
  ``SERIES_META``         {"sha", "filename", "width", "height", "bytes"} of the upload
  ``SERIES_ENERGY_TABLE`` the energy file read (series_service.read_energies)
  ``SERIES_RESULT``       the run's summary (series_service.run_series); the curves stay on the server
"""

from __future__ import annotations

import plotly.graph_objects as go
from dash import dcc, html

from webapp import figures, ids, runtime, series_service

__all__ = ["layout", "empty"]

_ENERGY_MODES = [
    {"label": "an energy file (CSV or JSON)", "value": "file"},
    {"label": "a start and a step", "value": "step"},
    {"label": "a number in each file name", "value": "names"},
]


def empty(message: str, height: int = 520) -> go.Figure:
    """The empty frame or I(V) plot with a message in it.

    Parameters
    ----------
    message : str
        The text shown.
    height : int
        Figure height, pixels.

    Returns
    -------
    plotly.graph_objects.Figure
        A blank plot with the message.
    """
    return figures.empty_figure(message, height=height)


def layout(**_query):
    """The series page: upload and energies, indexing and following, the frame and the I(V) curves.

    Parameters
    ----------
    **_query
        Query parameters of the URL (ignored).

    Returns
    -------
    dash.html.Div
        The page body.
    """
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
        dcc.Graph(id=ids.SERIES_FRAME_GRAPH, figure=empty("Drop an energy series to see its frames"),
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
        dcc.Graph(id=ids.SERIES_IV_GRAPH, figure=empty("The curves appear once the beams are followed"),
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
