"""The workspace shared by the editor (``/``) and the read-only view (``/analysis/<token>``).

One layout builder, :func:`workspace`, and thin callbacks kept as plain
functions (``on_upload``, ``render_pattern``, ``run_job``...) so tests call
them directly; they are registered with Dash at the bottom of the module.

Browser-side state (dcc.Store):
  ``IMAGE``  {"sha", "filename", "width", "height"} of the image on screen
  ``RESULT`` {"sha", "parameters", "edits", "result"}: the last answer and what produced it
  ``EDITS``  {"sha", "rev", "added": [[x, y]], "removed": [i], "center": [x, y] or None}
  ``MODEL``  the model being tried (predicted spots, counts)
  ``SOURCE`` {"readonly": bool, "token": share token shown or copied from}
"""

from __future__ import annotations

import functools
import logging
import math

import numpy as np
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate

from analysis.errors import ParameterError, RecinetError
from analysis.timelimit import time_limit

from . import figures, ids, runtime, service
from .jobs import job_controls, progress_reporter

__all__ = [
    "workspace", "on_upload", "render_pattern", "run_job", "on_stop", "on_new_image", "on_new_result", "on_graph_event", "show_result",
    "on_try_model", "on_save", "on_export", "display_image", "on_reference",
]

_log = logging.getLogger("recinet.webapp")
DEFAULT_OVERLAYS = ["spots", "substrate", "domains", "unexplained", "model"]


def _fail(err: Exception) -> str:
    """The one line a page shows for an error; unexpected ones are logged, never shown as a traceback."""
    if isinstance(err, RecinetError):
        return str(err)
    _log.exception("unexpected error in a callback")
    return f"Something went wrong ({type(err).__name__}); the server logged it. Nothing was saved."


def _note(text: str | None, kind: str = "error"):
    return html.Div(text, className=f"note note-{kind}", role="alert" if kind == "error" else None) if text else None


def _triggered() -> tuple[str | None, str]:
    """(component id, "id.prop") of what fired the running callback; (None, "") outside one."""
    try:
        t = ctx.triggered
    except Exception:  # noqa: BLE001 - called as a plain function
        return None, ""
    if not t or t[0].get("prop_id") in (None, "."):
        return None, ""
    prop = t[0]["prop_id"]
    return prop.rsplit(".", 1)[0], prop


def _empty_edits(sha=None) -> dict:
    return {"sha": sha, "rev": 0, "added": [], "removed": [], "center": None}


# --------------------------------------------------------------------------- layout

def workspace(*, readonly: bool = False, image: dict | None = None, record: dict | None = None,
              energy=None, substrate: str = "Pt(111)", sample_name: str = "", notes: str = "",
              token: str | None = None, header=None):
    """The page body: the pattern large on the left, the answer on the right."""
    hide = {"display": "none"} if readonly else {}
    edits = (record or {}).get("edits") or _empty_edits((image or {}).get("sha"))
    edits = {**_empty_edits((image or {}).get("sha")), **edits, "sha": (image or {}).get("sha")}
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
                html.Button("Undo all edits", id=ids.UNDO_EDITS, className="small"),
            ]),
        ]),
    ])
    left = html.Div(className="left", children=[
        dcc.Graph(id=ids.GRAPH, figure=figures.empty_figure(), className="pattern",
                  config={"edits": {"shapePosition": not readonly}, "displaylogo": False,
                          "scrollZoom": True, "modeBarButtonsToRemove": ["select2d", "lasso2d"]}),
        controls,
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
                dcc.Dropdown(id=ids.CALIBRATION, options=_calibration_choices(), placeholder="fit it on this image",
                             className="grow"),
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
        dcc.Store(id=ids.REFERENCE, data=None),
        dcc.Store(id=ids.SOURCE, data={"readonly": bool(readonly), "token": token}),
        left, right,
    ])


def _calibration_choices() -> list[dict]:
    """Saved analyses whose result carries a screen calibration, newest first."""
    try:
        saved = runtime.get_store().recent(40)
    except Exception:  # noqa: BLE001 - a list of choices must never break the page
        return []
    out = []
    for a in saved:
        if service.calibration_of(a.result) is not None:
            label = f"{a.sample_name or a.image_filename} · {a.created_at:%Y-%m-%d}"
            out.append({"label": label[:80], "value": a.token})
    return out


# --------------------------------------------------------------------------- upload

def _store_image(raw: bytes, filename: str) -> dict:
    im = service.read_image(raw, name=filename)
    h, w = im.data.shape
    sha = runtime.get_store().put_image(raw, filename=filename, width=w, height=h,
                                        thumbnail_png=figures.thumbnail_png(im.data))
    return {"sha": sha, "filename": filename, "width": int(w), "height": int(h)}


def on_upload(contents, demo, filename, energy, substrate):
    """A dropped file or a picked demo -> (image, record, edits, energy, substrate, sample, notes, note, contents)."""
    keep = (no_update,) * 4
    trig, _ = _triggered()
    try:
        if trig == ids.DEMO or (contents is None and demo):
            if not demo:
                raise PreventUpdate
            raw, truth = service.demo_bytes(demo)
            image = _store_image(raw, demo)
            d = service.demo_defaults(truth)
            return (image, None, _empty_edits(image["sha"]), d.get("energy_eV", energy),
                    d.get("substrate", substrate), d.get("sample_name", no_update), "",
                    _note(f"Demo image {demo} ({image['width']}×{image['height']}) is ready: press Analyse.", "ok"),
                    None)
        if contents is None:
            raise PreventUpdate
        limit = runtime.get_settings().max_upload_bytes
        name = str(filename or "upload")[:200]
        raw = service.decode_upload(contents, name, max_bytes=limit)
        if name.lower().endswith(".json") or raw[:1] == b"{":
            doc = service.read_bundle(raw, max_bytes=limit)
            image = _store_image(doc["image"]["data"], doc["image"]["filename"])
            params = doc.get("parameters") or {}
            edits = {**_empty_edits(image["sha"]), **service.clean_edits(doc.get("edits")), "sha": image["sha"]}
            record = {"sha": image["sha"], "parameters": params, "edits": edits, "result": doc.get("result")}
            return (image, record, edits, params.get("energy_eV", energy), params.get("substrate", substrate),
                    doc["sample_name"], doc["notes"],
                    _note(f"Restored the analysis from {name}.", "ok"), None)
        image = _store_image(raw, name)
        return (image, None, _empty_edits(image["sha"]), *keep[:2], no_update, no_update,
                _note(f"{name} ({image['width']}×{image['height']}) is ready: press Analyse.", "ok"), None)
    except PreventUpdate:
        raise
    except Exception as err:  # noqa: BLE001 - every failure becomes a message in the page
        return (*keep, no_update, no_update, no_update, _note(_fail(err)), None)


def on_reference(contents, demo, filename, energy):
    """A reference image (dropped or a demo) -> (reference meta, note, reference energy, contents)."""
    trig, _ = _triggered()
    try:
        if trig == ids.REF_DEMO:
            if not demo:
                return None, None, no_update, None
            raw, truth = service.demo_bytes(demo)
            meta = _store_image(raw, demo)
            e = service.demo_defaults(truth).get("energy_eV", energy)
            return {"sha": meta["sha"], "filename": demo}, _note(f"Reference: {demo}.", "ok"), e, None
        if contents is None:
            raise PreventUpdate
        name = str(filename or "reference")[:200]
        raw = service.decode_upload(contents, name, max_bytes=runtime.get_settings().max_upload_bytes)
        meta = _store_image(raw, name)
        return {"sha": meta["sha"], "filename": name}, _note(f"Reference: {name}.", "ok"), no_update, None
    except PreventUpdate:
        raise
    except Exception as err:  # noqa: BLE001
        return None, _note(_fail(err)), no_update, None


# --------------------------------------------------------------------------- the pattern

@functools.lru_cache(maxsize=16)
def display_image(sha: str, scale: str, gamma: float, clip_lo: float, clip_hi: float) -> tuple[str, int]:
    """PNG data URL of a stored image at the chosen contrast, and its downsampling factor."""
    data = service.image_array(sha)
    small, f = figures.downsample(data, 1024)
    levels = figures.display_levels(small, scale=scale, clip_pct=(clip_lo, clip_hi), gamma=gamma)
    return figures.png_data_url(levels), f


def _result_of(record, image):
    if not record or not image or record.get("sha") != image.get("sha"):
        return None
    return record.get("result")


def _candidate(result, pick):
    if pick is None or not result:
        return None
    cands = result.get("candidates") or []
    if isinstance(pick, int) and 0 <= pick < len(cands) and isinstance(cands[pick], dict):
        return cands[pick]
    return None


def render_pattern(image, record, edits, model, scale, gamma, clip, overlays, pick, source):
    """The pattern figure with the chosen contrast and overlays."""
    if not image or not image.get("sha"):
        return figures.empty_figure()
    clip = clip or [0.5, 99.95]
    try:
        url, f = display_image(image["sha"], scale or "linear", float(gamma or 0.5), float(clip[0]), float(clip[1]))
    except Exception as err:  # noqa: BLE001
        return figures.empty_figure(_fail(err))
    result = _result_of(record, image)
    ed = edits if edits and edits.get("sha") == image["sha"] else None
    cand = _candidate(result, pick)
    if cand is not None and service.pipeline_ready():
        try:
            cand = {**cand, "predicted": service.candidate_predictions(record, pick)}
        except Exception as err:  # noqa: BLE001 - fall back to the local linear prediction
            _fail(err)
    return figures.pattern_figure(url, width=image["width"], height=image["height"], factor=f, result=result,
                                  overlays=overlays or [], edits=ed, model=model,
                                  candidate=cand,
                                  editable=not (source or {}).get("readonly"), revision=image["sha"])


def on_graph_event(click, relayout, undo, mode, edits, image, source):
    """A click adds or drops a spot or sets the centre; dragging the centre circle moves it."""
    if (source or {}).get("readonly") or not image:
        raise PreventUpdate
    trig, prop = _triggered()
    ed = dict(edits) if edits and edits.get("sha") == image["sha"] else _empty_edits(image["sha"])
    ed = {**ed, **service.clean_edits(ed)}
    if trig == ids.UNDO_EDITS:
        out = _empty_edits(image["sha"])
        out["rev"] = int(ed.get("rev", 0)) + 1
        return out
    if prop.endswith("relayoutData"):
        c = _center_from_relayout(relayout)
        if c is None:
            raise PreventUpdate
        ed["center"] = c
    else:
        if not click or not click.get("points") or mode == "none":
            raise PreventUpdate
        p = click["points"][0]
        x, y = p.get("x"), p.get("y")
        if x is None or y is None:
            raise PreventUpdate
        x, y = float(x), float(y)
        if not (-0.5 <= x <= image["width"] - 0.5 and -0.5 <= y <= image["height"] - 0.5):
            raise PreventUpdate
        cd = p.get("customdata")
        if mode == "center":
            ed["center"] = [x, y]
        elif isinstance(cd, (list, tuple)) and len(cd) >= 2 and cd[0] == "spot":
            if len(cd) >= 3 and cd[2] and ed["added"]:  # a spot added by hand: forget it
                d = [math.hypot(q[0] - x, q[1] - y) for q in ed["added"]]
                j = int(np.argmin(d))
                ed["added"] = [q for i, q in enumerate(ed["added"]) if i != j]
            else:  # a detected spot: drop it (the analysis finds it again by position)
                ed["removed"] = ed["removed"] + [[round(x, 2), round(y, 2)]]
        elif isinstance(cd, (list, tuple)) and len(cd) == 2 and cd[0] == "added":
            i = int(cd[1])
            ed["added"] = [q for j, q in enumerate(ed["added"]) if j != i]
        else:
            if len(ed["added"]) >= service.MAX_EDITS:
                raise PreventUpdate
            ed["added"] = ed["added"] + [[round(x, 2), round(y, 2)]]
    ed["rev"] = int(ed.get("rev", 0)) + 1
    ed["sha"] = image["sha"]
    return ed


def _center_from_relayout(relayout):
    if not isinstance(relayout, dict):
        return None
    keys = [f"shapes[0].{k}" for k in ("x0", "x1", "y0", "y1")]
    if not all(k in relayout for k in keys):
        return None
    try:
        x0, x1, y0, y1 = (float(relayout[k]) for k in keys)
    except (TypeError, ValueError):
        return None
    if not all(map(math.isfinite, (x0, x1, y0, y1))):
        return None
    return [round((x0 + x1) / 2, 2), round((y0 + y1) / 2, 2)]


def edit_summary(edits, image):
    if not image or not edits or edits.get("sha") != image.get("sha"):
        return ""
    a, r, c = len(edits.get("added") or []), len(edits.get("removed") or []), edits.get("center")
    parts = [f"{a} added", f"{r} dropped", "centre " + (f"set to ({c[0]:.1f}, {c[1]:.1f})" if c else "found")]
    return "Edits by hand: " + ", ".join(parts)


# --------------------------------------------------------------------------- analysis job

def run_job(set_progress, n_clicks, edits, image, energy, substrate, source, reference=None, ref_energy=None,
            calibration_token=None):
    """Background job: analyse the stored image with the parameters and edits -> (record, message)."""
    trig, _ = _triggered()
    if (source or {}).get("readonly") or not image:
        raise PreventUpdate
    if trig == ids.EDITS and (not edits or int(edits.get("rev", 0)) == 0):
        raise PreventUpdate  # a fresh image resets the edits; that alone starts nothing
    if trig == ids.RUN and not n_clicks:
        raise PreventUpdate
    ed = edits if edits and edits.get("sha") == image["sha"] else _empty_edits(image["sha"])
    ed = service.clean_edits(ed)
    try:
        set_progress(("2", "100"))
        e = service.check_energy(energy)
        service.check_substrate(substrate)
        data = service.image_array(image["sha"])
        ref = ref_e = cal = None
        if reference and reference.get("sha"):
            ref = service.image_array(reference["sha"])
            ref_e = service.check_energy(ref_energy if ref_energy not in (None, "") else e)
        if calibration_token:
            saved = runtime.get_store().get_analysis(calibration_token)
            cal = service.calibration_of(saved.result if saved else None)
            if cal is None:
                raise ParameterError("The chosen calibration is no longer available; pick another or none.")
        params = {"energy_eV": e, "substrate": substrate.strip()}
        if ref is not None:
            params.update(reference_sha256=reference["sha"], reference_filename=reference.get("filename"),
                          reference_energy_eV=ref_e)
        if cal is not None:
            params["calibration_from"] = calibration_token
        set_progress(("5", "100"))
        with time_limit(runtime.get_settings().job_time_limit_s, "the analysis"):
            result = service.analyze(data, energy_eV=e, substrate=substrate.strip(), edits=ed, reference=ref,
                                     reference_energy_eV=ref_e, calibration=cal,
                                     progress=progress_reporter(set_progress, start=5, span=93),
                                     cache_key=service.record_key(image["sha"], params, ed))
        set_progress(("100", "100"))
    except Exception as err:  # noqa: BLE001
        return no_update, _note(_fail(err))
    record = {"sha": image["sha"], "parameters": params, "edits": ed, "result": result}
    n = len(result.get("spots") or [])
    return record, _note(f"Analysed: {n} spots.", "ok")


def on_stop(n_clicks):
    """Stop pressed: the page forgets what the stopped run would have replaced -> (result, model, message)."""
    if not n_clicks:
        raise PreventUpdate
    return None, None, _note("Stopped: nothing was analysed. Press Analyse to start again.", "warn")


def on_new_image(image):
    """A new image forgets the model tried on the last one -> (model, model note, message)."""
    return None, None, None


def on_new_result(result):
    """A new result (or none) forgets the candidate picked among the last one's -> pick."""
    return None


# --------------------------------------------------------------------------- result panel

def _fmt_pm(value, err, unit="", digits=3):
    if value is None:
        return "–"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    s = f"{v:.{digits}f}"
    if err is not None:
        try:
            s += f" ± {float(err):.{digits}f}"
        except (TypeError, ValueError):
            pass
    return s + unit


def _uncertainty(d: dict, base: str):
    sig = d.get("sigma")
    if isinstance(sig, dict) and sig.get(base) is not None:
        return sig[base]
    for k in (f"{base}_err", f"{base}_sigma", f"{base}_unc", f"sigma_{base}", f"d{base}"):
        if k in d:
            return d[k]
    stem = base.split("_")[0]
    for k, v in d.items():
        if k.startswith(stem) and any(t in k for t in ("err", "sigma", "unc")) and isinstance(v, (int, float)):
            return v
    unc = d.get("uncertainties") or d.get("uncertainty")
    if isinstance(unc, dict):
        return unc.get(base) or unc.get(stem)
    return None


def _matrix_table(m, cls="matrix"):
    from analysis.superstructure import format_matrix

    m = np.asarray(m, dtype=float)
    text = format_matrix(m)
    inner = text.strip("()").split(" / ")
    return html.Span(className=cls, title=text, children=[
        html.Span("(", className="paren"),
        html.Span(className="rows", children=[html.Span(r, className="mrow") for r in inner]),
        html.Span(")", className="paren"),
    ])


def show_result(record, image, pick):
    """Result panel, candidate list and real-space drawing from the stored record."""
    result = _result_of(record, image)
    empty = figures.empty_figure("The cells appear after an analysis", height=300)
    if not result:
        return html.P("No analysis yet.", className="muted"), [], None, empty
    try:
        return _result_children(result, record), _candidate_options(result), _candidate_note(result, pick), \
            _real_space(result, pick)
    except Exception as err:  # noqa: BLE001
        return _note(_fail(err)), [], None, empty


def _result_children(result, record):
    from analysis.superstructure import format_matrix

    sub = result.get("substrate") or {}
    ov = result.get("overlayer") or {}
    spots = result.get("spots") or []
    params = (record or {}).get("parameters") or {}
    a, b, g = sub.get("a_angstrom"), sub.get("b_angstrom"), sub.get("gamma_deg")
    label = str(sub.get("spec") or params.get("substrate") or "–")
    if sub.get("net") and sub.get("net") != label:
        label += f" ({sub['net']})"
    rows = [
        ("Substrate", label),
        ("a", _fmt_pm(a, _uncertainty(sub, "a_angstrom"), " Å")),
        ("b", _fmt_pm(b, _uncertainty(sub, "b_angstrom"), " Å")),
        ("γ", _fmt_pm(g, _uncertainty(sub, "gamma_deg"), "°", 2)),
    ]
    rec = (sub.get("a_star_invA"), sub.get("b_star_invA"), sub.get("gamma_star_deg"))
    if None in rec:
        rec = service.reciprocal_parameters(a, b, g)
    if rec:
        rows.append(("Reciprocal net", f"a* {rec[0]:.4f} Å⁻¹, b* {rec[1]:.4f} Å⁻¹, γ* {rec[2]:.2f}° (no 2π)"))
    rows.append(("Energy", f"{float(params['energy_eV']):g} eV" if params.get("energy_eV") else "–"))
    kinds = [s.get("kind") for s in spots]
    spot_line = f"{len(spots)} spot" + ("" if len(spots) == 1 else "s")
    if any(kinds):
        spot_line += (f" ({kinds.count('integer')} substrate, {kinds.count('fractional')} overlayer, "
                      f"{kinds.count('unexplained')} unexplained)")
    manual = sum(1 for s in spots if s.get("manual"))
    if manual:
        spot_line += f", {manual} added by hand"
    cut = sum(1 for s in spots if s.get("trusted") is False)
    if cut:
        spot_line += f"; {cut} not counted in the scores (centre cut by a mask edge or fit failed)"
    if sub.get("lattice_source"):
        rows.append(("Lattice from", str(sub["lattice_source"])))
    kind = ov.get("kind") or "–"
    wood = ov.get("wood")
    domains = ov.get("domains") or ([ov["matrix"]] if ov.get("matrix") is not None else [])
    table = html.Table(className="facts", children=[html.Tbody(
        [html.Tr([html.Th(k), html.Td(v)]) for k, v in rows]
        + [html.Tr([html.Th("Spots"), html.Td(spot_line, id=ids.SPOT_COUNT, **{"data-count": str(len(spots))})])]
    )])
    answer = html.Table(className="facts answer", children=[html.Tbody([
        html.Tr([html.Th("Overlayer"), html.Td(kind)]),
        html.Tr([html.Th("Wood notation"), html.Td(wood if wood else "none exists", id=ids.WOOD)]),
        *([html.Tr([html.Th(""), html.Td(str(ov["wood_note"]), className="muted")])] if ov.get("wood_note") else []),
        html.Tr([html.Th("Matrix"), html.Td(_matrix_table(ov["matrix"]) if ov.get("matrix") is not None else "–",
                                            id=ids.MATRIX,
                                            **({"data-matrix": format_matrix(ov["matrix"])} if ov.get("matrix") is not None else {}))]),
        html.Tr([html.Th("Coverage"), html.Td(_fmt_pm(ov.get("coverage"), None, " ML", 3)
                                              if ov.get("coverage") is not None else "–")]),
        html.Tr([html.Th("Domains"), html.Td(
            [html.Div([html.Span(f"{i + 1}: ", className=f"dom dom{i % 8}"), _matrix_table(m)]) for i, m in enumerate(domains)]
            if domains else "–")]),
    ])])
    warn = [html.Div(str(w), className="note note-warn") for w in (result.get("warnings") or [])]
    return [*warn, answer, table]


def _candidate_label(c: dict, i: int) -> str:
    from analysis.superstructure import format_matrix

    parts = [f"{i + 1}."]
    if c.get("wood"):
        parts.append(str(c["wood"]))
    if c.get("matrix") is not None:
        try:
            parts.append(format_matrix(c["matrix"]))
        except (TypeError, ValueError):
            pass
    if c.get("kind"):
        parts.append(str(c["kind"]))
    for key in ("score", "cost", "rms_px"):
        if isinstance(c.get(key), (int, float)):
            parts.append(f"{key.replace('_', ' ')} {c[key]:.3g}")
            break
    if isinstance(c.get("explained"), (int, float)):
        parts.append(f"explains {int(c['explained'])}")
    costs = _score_costs(c)
    if costs:
        parts.append("costs: " + ", ".join(costs))
    return "  ".join(parts)


def _score_costs(c, most: int = 3) -> list[str]:
    """The score terms that cost a candidate most, e.g. ``['unexplained −3', 'extra domains −1']``."""
    terms = ((c.get("score_terms") or {}).get("terms") or {}) if isinstance(c, dict) else {}
    costs = [(float(t.get("contribution", 0.0)), name) for name, t in terms.items()
             if isinstance(t, dict) and isinstance(t.get("contribution"), (int, float))]
    costs = sorted((v, n) for v, n in costs if v <= -0.05)[:most]
    return [f"{n.replace('_', ' ')} −{abs(v):.2g}" for v, n in costs]


def _candidate_options(result):
    cands = [c for c in (result.get("candidates") or []) if isinstance(c, dict)]
    return [{"label": _candidate_label(c, i), "value": i} for i, c in enumerate(cands[:20])]


def _candidate_note(result, pick):
    if not (result.get("candidates") or []):
        return html.P("No other candidates.", className="muted")
    if pick is None:
        return html.P("Pick one to see its spots over the image.", className="muted")
    return None


def _real_space(result, pick):
    sub = result.get("substrate") or {}
    chosen = _candidate(result, pick) or result.get("overlayer") or {}
    mats = chosen.get("domains") or ([chosen["matrix"]] if chosen.get("matrix") is not None else [])
    vec = service.substrate_vectors(sub)
    return figures.real_space_figure(vec, mats, label=str(sub.get("spec") or sub.get("net") or "substrate"))


# --------------------------------------------------------------------------- try a model

def on_try_model(n_clicks, n_submit, text, record, image, substrate):
    if not n_clicks and not n_submit:
        raise PreventUpdate
    result = _result_of(record, image)
    if not result:
        return None, _note("Analyse the image first: the model is drawn on the fitted substrate net.")
    try:
        m = service.try_model(text, record)
    except Exception as err:  # noqa: BLE001
        return None, _note(_fail(err))
    msg = (f"{m['label']} ({m['kind']}, {m['n_domains']} domain{'s' if m['n_domains'] != 1 else ''}): "
           f"explains {m['explained']} spots beyond the substrate's; {m['unexplained']} stay unexplained.")
    return m, html.Div(msg, className="note note-ok", id="model-counts",
                       **{"data-explained": str(m["explained"]), "data-unexplained": str(m["unexplained"])})


# --------------------------------------------------------------------------- save and export

def on_save(n_clicks, record, image, sample, notes, source):
    if not n_clicks:
        raise PreventUpdate
    if (source or {}).get("readonly"):
        raise PreventUpdate
    if not image:
        return _note("Nothing to save: drop an image first."), None
    result = _result_of(record, image)
    if result is None:
        return _note("Analyse the image before saving it."), None
    try:
        saved = runtime.get_store().save_analysis(
            image_sha256=image["sha"], parameters=record.get("parameters") or {},
            edits=service.clean_edits(record.get("edits")), result=result, sample_name=sample or "",
            notes=notes or "", summary=service.summary_of(result), copied_from=(source or {}).get("token"))
    except Exception as err:  # noqa: BLE001
        return _note(_fail(err)), None
    href = f"/analysis/{saved.token}"
    return _note("Saved. Anyone with the link (and the group key) can open it read-only.", "ok"), \
        html.Div(["Link: ", html.A(href, href=href, id="share-href", target="_blank")])


def on_export(nj, nc, npng, nsvg, record, image, sample, notes, scale, gamma, clip):
    trig, _ = _triggered()
    if trig is None or not image:
        raise PreventUpdate
    result = _result_of(record, image)
    stem = _safe_stem(sample or image.get("filename") or "analysis")
    try:
        if trig == ids.EXPORT_JSON:
            raw = runtime.get_store().image_bytes(image["sha"])
            doc = service.export_bundle(image_bytes=raw, filename=image.get("filename") or "image",
                                        parameters=(record or {}).get("parameters") or {},
                                        edits=service.clean_edits((record or {}).get("edits")), result=result,
                                        sample_name=sample or "", notes=notes or "")
            import json
            return dict(content=json.dumps(doc, indent=1), filename=f"{stem}.recinet.json", type="application/json")
        if result is None:
            raise PreventUpdate
        if trig == ids.EXPORT_CSV:
            return dict(content=figures.spots_csv(result), filename=f"{stem}-spots.csv", type="text/csv")
        data = service.image_array(image["sha"])
        small, f = figures.downsample(data, 1024)
        clip = clip or [0.5, 99.95]
        levels = figures.display_levels(small, scale=scale or "linear", clip_pct=clip, gamma=float(gamma or 0.5))
        ov = result.get("overlayer") or {}
        params = (record or {}).get("parameters") or {}
        title = [sample or image.get("filename"),
                 f"{params.get('substrate', '')}, {params.get('energy_eV', '')} eV",
                 f"{ov.get('wood') or 'no Wood notation'}  {service.summary_matrix(ov)}  ({ov.get('kind', '')})"]
        fmt = "svg" if trig == ids.EXPORT_SVG else "png"
        content = figures.export_figure(levels, factor=f, result=result,
                                        edits=service.clean_edits((record or {}).get("edits")), title_lines=title, fmt=fmt)
        return dcc.send_bytes(content, f"{stem}.{fmt}")
    except PreventUpdate:
        raise
    except Exception as err:  # noqa: BLE001
        _fail(err)
        raise PreventUpdate from None


def _safe_stem(name: str) -> str:
    stem = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in str(name))[:60].strip("._")
    return stem.rsplit(".", 1)[0] if "." in stem else (stem or "analysis")


# --------------------------------------------------------------------------- registration

callback(
    Output(ids.IMAGE, "data"), Output(ids.RESULT, "data", allow_duplicate=True),
    Output(ids.EDITS, "data", allow_duplicate=True),
    Output(ids.ENERGY, "value"), Output(ids.SUBSTRATE, "value"), Output(ids.SAMPLE, "value"),
    Output(ids.NOTES, "value"), Output(ids.UPLOAD_NOTE, "children"), Output(ids.UPLOAD, "contents"),
    Input(ids.UPLOAD, "contents"), Input(ids.DEMO, "value"),
    State(ids.UPLOAD, "filename"), State(ids.ENERGY, "value"), State(ids.SUBSTRATE, "value"),
    prevent_initial_call=True,
)(on_upload)

callback(
    Output(ids.REFERENCE, "data"), Output(ids.REF_NOTE, "children"), Output(ids.REF_ENERGY, "value"),
    Output(ids.REF_UPLOAD, "contents"),
    Input(ids.REF_UPLOAD, "contents"), Input(ids.REF_DEMO, "value"), State(ids.REF_UPLOAD, "filename"),
    State(ids.REF_ENERGY, "value"),
    prevent_initial_call=True,
)(on_reference)

callback(
    Output(ids.GRAPH, "figure"),
    Input(ids.IMAGE, "data"), Input(ids.RESULT, "data"), Input(ids.EDITS, "data"), Input(ids.MODEL, "data"),
    Input(ids.SCALE, "value"), Input(ids.GAMMA, "value"), Input(ids.CLIP, "value"), Input(ids.OVERLAYS, "value"),
    Input(ids.CANDIDATE_PICK, "value"), State(ids.SOURCE, "data"),
)(render_pattern)

callback(
    Output(ids.EDITS, "data"),
    Input(ids.GRAPH, "clickData"), Input(ids.GRAPH, "relayoutData"), Input(ids.UNDO_EDITS, "n_clicks"),
    State(ids.CLICK_MODE, "value"), State(ids.EDITS, "data"), State(ids.IMAGE, "data"), State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_graph_event)

callback(Output(ids.EDIT_SUMMARY, "children"), Input(ids.EDITS, "data"), Input(ids.IMAGE, "data"))(edit_summary)

callback(
    Output(ids.RESULT, "data"), Output(ids.MESSAGE, "children"),
    Input(ids.RUN, "n_clicks"), Input(ids.EDITS, "data"),
    State(ids.IMAGE, "data"), State(ids.ENERGY, "value"), State(ids.SUBSTRATE, "value"), State(ids.SOURCE, "data"),
    State(ids.REFERENCE, "data"), State(ids.REF_ENERGY, "value"), State(ids.CALIBRATION, "value"),
    **job_controls(ids.RUN, ids.CANCEL, ids.PROGRESS),
    prevent_initial_call=True,
)(run_job)

callback(
    Output(ids.RESULT, "data", allow_duplicate=True), Output(ids.MODEL, "data", allow_duplicate=True),
    Output(ids.MESSAGE, "children", allow_duplicate=True),
    Input(ids.CANCEL, "n_clicks"),
    prevent_initial_call=True,
)(on_stop)

callback(
    Output(ids.MODEL, "data", allow_duplicate=True), Output(ids.MODEL_NOTE, "children", allow_duplicate=True),
    Output(ids.MESSAGE, "children", allow_duplicate=True),
    Input(ids.IMAGE, "data"),
    prevent_initial_call=True,
)(on_new_image)

callback(
    Output(ids.CANDIDATE_PICK, "value", allow_duplicate=True),
    Input(ids.RESULT, "data"),
    prevent_initial_call=True,
)(on_new_result)

callback(
    Output(ids.RESULT_PANEL, "children"), Output(ids.CANDIDATE_PICK, "options"), Output(ids.CANDIDATES, "children"),
    Output(ids.REAL_SPACE, "figure"),
    Input(ids.RESULT, "data"), Input(ids.IMAGE, "data"), Input(ids.CANDIDATE_PICK, "value"),
)(show_result)

callback(
    Output(ids.MODEL, "data"), Output(ids.MODEL_NOTE, "children"),
    Input(ids.MODEL_TRY, "n_clicks"), Input(ids.MODEL_TEXT, "n_submit"),
    State(ids.MODEL_TEXT, "value"), State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SUBSTRATE, "value"),
    prevent_initial_call=True,
)(on_try_model)

callback(
    Output(ids.SAVE_NOTE, "children"), Output(ids.SHARE_LINK, "children"),
    Input(ids.SAVE, "n_clicks"),
    State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SAMPLE, "value"), State(ids.NOTES, "value"),
    State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_save)

callback(
    Output(ids.DOWNLOAD, "data"),
    Input(ids.EXPORT_JSON, "n_clicks"), Input(ids.EXPORT_CSV, "n_clicks"), Input(ids.EXPORT_PNG, "n_clicks"),
    Input(ids.EXPORT_SVG, "n_clicks"),
    State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SAMPLE, "value"), State(ids.NOTES, "value"),
    State(ids.SCALE, "value"), State(ids.GAMMA, "value"), State(ids.CLIP, "value"),
    prevent_initial_call=True,
)(on_export)
