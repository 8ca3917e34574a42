"""The workspace layout shared by the editor (``/``) and the read-only view (``/analysis/<token>``)."""

from __future__ import annotations

from dash import dcc, html

from webapp import figures, ids, service

from .calibration import calibration_choices, deleted_calibration_rows
from .spot_tools import tools_panels
from .state import empty_edits

__all__ = ["workspace", "calibration_choices", "DEFAULT_OVERLAYS"]

DEFAULT_OVERLAYS = ["spots", "substrate", "domains", "unexplained", "model"]

def workspace(*, readonly: bool = False, image: dict | None = None, record: dict | None = None,
              energy=None, substrate: str = "Pt(111)", sample_name: str = "", notes: str = "",
              token: str | None = None, header=None):
    """The page body: the pattern large on the left, the answer on the right.

    Parameters
    ----------
    readonly : bool, keyword-only
        A shared analysis: no edits, no new analysis.
    image : dict, optional, keyword-only
        The image store to start with.
    record : dict, optional, keyword-only
        The analysis store to start with.
    energy : float, optional, keyword-only
        Beam energy shown, eV.
    substrate : str, keyword-only
        Substrate shown.
    sample_name : str, keyword-only
        The sample's name.
    notes : str, keyword-only
        Free notes.
    token : str, optional, keyword-only
        Share token of a saved analysis.
    header : dash component, optional, keyword-only
        Shown above the page.

    Returns
    -------
    dash.html.Div
        The page body.
    """
    hide = {"display": "none"} if readonly else {}
    edits = (record or {}).get("edits") or empty_edits((image or {}).get("sha"))
    edits = {**empty_edits((image or {}).get("sha")), **edits, "sha": (image or {}).get("sha")}
    controls = html.Div(className="controls", children=[
        html.Div(className="control", children=[
            html.Label("Contrast", htmlFor=ids.SCALE),
            dcc.RadioItems(id=ids.SCALE, options=[{"label": l, "value": v} for v, l in figures.SCALES],
                           value="linear", inline=True),
        ]),
        html.Div(className="control", children=[
            html.Label("Gamma"),
            dcc.Slider(id=ids.GAMMA, min=0.1, max=2.0, step=0.05, value=0.5,
                       marks={0.25: "0.25", 0.5: "0.5", 1: "1", 1.5: "1.5", 2: "2"}),
        ]),
        html.Div(className="control wide", children=[
            html.Label("Clip (percentiles)"),
            dcc.RangeSlider(id=ids.CLIP, min=0, max=100, step=0.01, value=[0.5, 99.95],
                            marks={0: "0", 25: "25", 50: "50", 75: "75", 100: "100"},
                            tooltip={"placement": "bottom"}),
        ]),
        html.Div(className="control wide", children=[
            html.Label("Turn the view (clockwise)", htmlFor=ids.ROTATE),
            dcc.RadioItems(id=ids.ROTATE, inline=True, value=0,
                           options=[{"label": f"{r}°", "value": r} for r in (0, 90, 180, 270)]),
            dcc.Checklist(id=ids.VIEW_OPTIONS, inline=True, value=[], options=[
                {"label": "mirror left–right", "value": "mirror"},
                {"label": "minus the estimated background", "value": "minus_bg"},
            ]),
            html.Span("The view only: positions, results and exports stay in the camera's frame.",
                      className="muted"),
        ]),
        html.Div(className="control wide", children=[
            html.Label("Show"),
            dcc.Checklist(id=ids.OVERLAYS, options=[{"label": l, "value": v} for v, l in figures.OVERLAY_CHOICES],
                          value=DEFAULT_OVERLAYS, inline=True),
        ]),
        html.Div(className="control wide", style=hide, children=[
            html.Label("A click on the pattern"),
            dcc.RadioItems(id=ids.CLICK_MODE, inline=True, value="spots", options=[
                {"label": "adds a spot, or drops the spot under it", "value": "spots"},
                {"label": "sets the centre", "value": "center"},
                {"label": "does nothing", "value": "none"},
            ]),
            html.Div(className="row", children=[
                html.Span(id=ids.EDIT_SUMMARY, className="muted"),
                html.Button("Undo last edit", id=ids.UNDO_LAST, className="small"),
                html.Button("Undo all edits", id=ids.UNDO_EDITS, className="small"),
            ]),
        ]),
    ])
    left = html.Div(className="left", children=[
        dcc.Graph(id=ids.GRAPH, figure=figures.empty_figure(), className="pattern",
                  config={"edits": {"shapePosition": not readonly}, "displaylogo": False,
                          "scrollZoom": True, "modeBarButtonsToRemove": ["select2d", "lasso2d"]}),
        controls,
        *tools_panels(readonly=readonly),
    ])
    inputs = html.Div(className="panel", style=hide, children=[
        html.H2("Image and parameters"),
        dcc.Upload(id=ids.UPLOAD, className="upload", max_size=-1, multiple=False, children=html.Div([
            "Drop a LEED image (PNG, JPEG, TIFF incl. 16-bit) or an exported analysis (.json) here, or ",
            html.A("choose a file"),
        ])),
        html.Div(id=ids.UPLOAD_NOTE, **{"aria-live": "polite"}),
        html.Div(className="row", children=[
            html.Label("Demo image", htmlFor=ids.DEMO),
            dcc.Dropdown(id=ids.DEMO, options=service.demo_choices(), placeholder="pick a demo image",
                         className="grow"),
        ]),
        html.Div(className="row", children=[
            html.Label("Energy (eV)", htmlFor=ids.ENERGY),
            dcc.Input(id=ids.ENERGY, type="number", value=energy, placeholder="e.g. 80", debounce=True),
            html.Label("Substrate", htmlFor=ids.SUBSTRATE),
            dcc.Input(id=ids.SUBSTRATE, type="text", value=substrate, placeholder="Pt(111) or hexagonal:2.775",
                      debounce=True, maxLength=120),
        ]),
        html.Details(className="more", children=[
            html.Summary("Reference image and calibration (optional)"),
            html.Div(className="row", children=[
                dcc.Upload(id=ids.REF_UPLOAD, className="upload small", max_size=-1, multiple=False,
                           children=html.Div(["Drop a reference image (e.g. the clean substrate) or ",
                                              html.A("choose one")])),
            ]),
            html.Div(className="row", children=[
                html.Label("or a demo", htmlFor=ids.REF_DEMO),
                dcc.Dropdown(id=ids.REF_DEMO, options=service.demo_choices(), placeholder="no reference",
                             className="grow"),
                html.Label("at (eV)", htmlFor=ids.REF_ENERGY),
                dcc.Input(id=ids.REF_ENERGY, type="number", placeholder="eV", debounce=True),
            ]),
            html.Div(id=ids.REF_NOTE),
            html.Div(className="row", children=[
                html.Label("Screen calibration from", htmlFor=ids.CALIBRATION),
                dcc.Dropdown(id=ids.CALIBRATION, options=calibration_choices(), placeholder="fit it on this image",
                             className="grow"),
            ]),
            html.Div(id=ids.CAL_INFO),
            html.Div(className="row", children=[
                html.Label("The named calibration picked above:", htmlFor=ids.CAL_NEW_NAME),
                dcc.Input(id=ids.CAL_NEW_NAME, type="text", placeholder="new name", maxLength=80, className="grow"),
                html.Button("Rename", id=ids.CAL_RENAME, className="small"),
                html.Button("Delete", id=ids.CAL_DELETE, className="small",
                            title="Delete (recoverable for 30 days)"),
            ]),
            dcc.ConfirmDialog(id=ids.CAL_CONFIRM),
            html.Div(className="row", children=[
                html.Label("Keep the camera model of this analysis as", htmlFor=ids.CAL_NAME),
            ]),
            html.Div(className="row", children=[
                dcc.Input(id=ids.CAL_NAME, type="text", placeholder="calibration name", maxLength=80, className="grow"),
                dcc.Input(id=ids.CAL_CAMERA, type="text", placeholder="camera", maxLength=80),
                dcc.Input(id=ids.CAL_E_LO, type="number", placeholder="from eV", style={"width": "6em"}),
                dcc.Input(id=ids.CAL_E_HI, type="number", placeholder="to eV", style={"width": "6em"}),
                html.Button("Save this calibration", id=ids.CAL_SAVE, className="small"),
            ]),
            html.Div(id=ids.CAL_NOTE, **{"aria-live": "polite"}),
            html.Details(children=[
                html.Summary("Recently deleted calibrations (restorable for 30 days)"),
                html.Div(deleted_calibration_rows(), id=ids.CAL_DELETED_LIST),
            ]),
        ]),
        html.Div(className="row", children=[
            html.Button("Analyse", id=ids.RUN, className="primary"),
            html.Button("Stop", id=ids.CANCEL, disabled=True),
            html.Progress(id=ids.PROGRESS, value="0", max="100", style={"visibility": "hidden"}),
        ]),
        html.Div(id=ids.MESSAGE, **{"aria-live": "polite"}),
    ])
    saving = html.Div(className="panel", style=hide, children=[
        html.H2("Save and share"),
        dcc.Input(id=ids.SAMPLE, type="text", value=sample_name, placeholder="sample name", maxLength=200,
                  className="full"),
        dcc.Textarea(id=ids.NOTES, value=notes, placeholder="notes", maxLength=20000, className="full"),
        html.Button("Save and make a link", id=ids.SAVE),
        html.Div(id=ids.SAVE_NOTE, **{"aria-live": "polite"}),
        html.Div(id=ids.SHARE_LINK),
    ])
    right = html.Div(className="right", children=[
        header,
        inputs,
        html.Div(className="panel", children=[html.H2("Result"), html.Div(id=ids.RESULT_PANEL, children=
                                                                          html.P("No analysis yet.", className="muted"))]),
        html.Div(className="panel", children=[
            html.H2("Other candidates"),
            dcc.RadioItems(id=ids.CANDIDATE_PICK, options=[], value=None, className="candidates"),
            html.Div(id=ids.CANDIDATES),
        ]),
        html.Div(className="panel", children=[
            html.H2("Real space"),
            dcc.Graph(id=ids.REAL_SPACE, figure=figures.empty_figure("The cells appear after an analysis", height=300),
                      config={"displaylogo": False}, style={"height": "320px"}),
        ]),
        html.Div(className="panel", children=[
            html.H2("Try a model"),
            html.Div(className="row", children=[
                dcc.Input(id=ids.MODEL_TEXT, type="text", placeholder="2 1 / -1 1  or  (√3×√3)R30°",
                          maxLength=200, className="grow", debounce=False),
                html.Button("Try", id=ids.MODEL_TRY),
            ]),
            html.Div(id=ids.MODEL_NOTE, **{"aria-live": "polite"}),
        ]),
        saving,
        html.Div(className="panel", children=[
            html.H2("Export"),
            html.Div(className="row", children=[
                html.Button("Analysis (JSON)", id=ids.EXPORT_JSON),
                html.Button("Spots (CSV)", id=ids.EXPORT_CSV),
                html.Button("Figure (PNG)", id=ids.EXPORT_PNG),
                html.Button("Figure (SVG)", id=ids.EXPORT_SVG),
            ]),
            dcc.Download(id=ids.DOWNLOAD),
        ]),
    ])
    return html.Div(className="workspace", children=[
        dcc.Store(id=ids.IMAGE, data=image),
        dcc.Store(id=ids.RESULT, data=record),
        dcc.Store(id=ids.EDITS, data=edits),
        dcc.Store(id=ids.MODEL, data=None),
        dcc.Store(id=ids.DOMAIN_FOCUS, data=None),
        dcc.Store(id=ids.REFERENCE, data=None),
        dcc.Store(id=ids.SOURCE, data={"readonly": bool(readonly), "token": token}),
        left, right,
    ])
