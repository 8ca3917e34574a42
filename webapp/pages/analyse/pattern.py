"""The pattern on screen: contrast, overlays, and the edits made by clicking on it."""

from __future__ import annotations

import functools
import math

import numpy as np
from dash import Input, Output, State, callback
from dash.exceptions import PreventUpdate

from analysis.spots import measure_image
from webapp import figures, ids, service
from webapp.figures.orient import clean_view, orient_figure, orient_levels, to_camera
from webapp.pages.common import fail, triggered

from .state import candidate, empty_edits, result_of

__all__ = ["display_image", "background_image", "render_pattern", "camera_point", "on_graph_event", "on_undo_last",
           "edit_summary"]

MAX_UNDO = 50  # edits remembered for "Undo last edit"

@functools.lru_cache(maxsize=4)
def background_image(sha: str) -> np.ndarray:
    """The smooth background the spot search estimates on a stored image (second pass, spots left out).

    Parameters
    ----------
    sha : str
        The image's SHA-256 (the store's key).

    Returns
    -------
    (M, N) ndarray of float64
        The background, camera values (read-only).
    """
    bg = np.asarray(measure_image(service.image_array(sha), accept=False).background.background, dtype=np.float64)
    bg.flags.writeable = False
    return bg


@functools.lru_cache(maxsize=16)
def display_image(sha: str, scale: str, gamma: float, clip_lo: float, clip_hi: float,
                  rotate_deg: int = 0, mirror: bool = False, minus_background: bool = False) -> tuple[str, int]:
    """PNG data URL of a stored image at the chosen contrast, turned and mirrored as displayed
    (optionally minus the estimated background), and its downsampling factor."""
    data = service.image_array(sha)
    if minus_background:
        data = data - background_image(sha)
    data = orient_levels(data, rotate_deg=rotate_deg, mirror=mirror)
    small, f = figures.downsample(data, 1024)
    levels = figures.display_levels(small, scale=scale, clip_pct=(clip_lo, clip_hi), gamma=gamma)
    return figures.png_data_url(levels), f



def render_pattern(image, record, edits, model, scale, gamma, clip, overlays, pick, focus=None, rotate=0,
                   view=None, source=None):
    """The pattern figure with the chosen contrast and overlays; `focus` is the domain brought forward.

    Parameters
    ----------
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.
    record : dict or None
        The analysis store: ``sha``, ``parameters``, ``edits``, ``result``.
    edits : dict or None
        The manual edits (``sha``, ``rev``, ``added``, ``removed``, ``center``).
    model : dict or None
        The model being tried.
    scale : str
        Contrast scale of the display (e.g. ``"linear"``).
    gamma : float
        Display gamma.
    clip : list of float
        Percentiles mapped to black and white.
    overlays : list of str
        The overlays drawn.
    pick : int or None
        The candidate drawn instead of the best answer.
    focus : int, optional
        The domain brought forward.
    rotate : int, optional
        Clockwise turn of the display, degrees (0, 90, 180, 270).
    view : list of str, optional
        ``"mirror"`` mirrors the display left–right, ``"minus_bg"`` shows the image minus
        the background the spot search estimated. Markers follow; coordinates stay the camera's.
    source : dict or None
        The source store: ``readonly`` and the share token.

    Returns
    -------
    plotly.graph_objects.Figure
        The pattern.
    """
    if not image or not image.get("sha"):
        return figures.empty_figure()
    clip = clip or [0.5, 99.95]
    view = [v for v in (view or []) if isinstance(v, str)]
    rot, mirror = clean_view(rotate, "mirror" in view)
    bg_note = None
    try:
        if "minus_bg" in view:
            try:
                background_image(image["sha"])
            except Exception as err:  # noqa: BLE001 - the plain image is shown instead, with the reason
                bg_note = "No background view: " + fail(err)
        url, f = display_image(image["sha"], scale or "linear", float(gamma or 0.5), float(clip[0]), float(clip[1]),
                               rot, mirror, "minus_bg" in view and bg_note is None)
    except Exception as err:  # noqa: BLE001
        return figures.empty_figure(fail(err))
    result = result_of(record, image)
    ed = edits if edits and edits.get("sha") == image["sha"] else None
    cand = candidate(result, pick)
    if cand is not None:
        try:
            cand = {**cand, "predicted": service.candidate_predictions(record, pick)}
        except Exception as err:  # noqa: BLE001 - fall back to the local linear prediction
            fail(err)
    fig = figures.pattern_figure(url, width=image["width"], height=image["height"], factor=f, result=result,
                                 overlays=overlays or [], edits=ed, model=model,
                                 candidate=cand, focus=focus if isinstance(focus, int) else None,
                                 editable=not (source or {}).get("readonly"),
                                 revision=f"{image['sha']}:{rot}:{int(mirror)}")
    fig = orient_figure(fig, width=image["width"], height=image["height"], rotate_deg=rot, mirror=mirror)
    if bg_note:
        fig.add_annotation(text=bg_note, xref="paper", yref="paper", x=0.0, y=0.0, xanchor="left", yanchor="bottom",
                           showarrow=False, font=dict(color="#fff"), bgcolor="rgba(160,40,20,0.85)")
    return fig


def camera_point(x, y, image, rotate=0, view=None):
    """Camera pixels of a point given on the (turned, mirrored) display.

    Parameters
    ----------
    x, y : float
        Display x and y, pixels.
    image : dict
        The image store (``width``, ``height``).
    rotate : int, optional
        Clockwise turn of the display, degrees.
    view : list of str, optional
        The view options (``"mirror"``).

    Returns
    -------
    (float, float)
        Camera x (column) and y (row), pixels.
    """
    rot, mirror = clean_view(rotate, "mirror" in (view or []))
    cx, cy = to_camera(float(x), float(y), width=image["width"], height=image["height"], rotate_deg=rot,
                       mirror=mirror)
    return float(cx), float(cy)


def on_graph_event(click, relayout, undo, mode, edits, image, source, rotate=0, view=None):
    """A click adds or drops a spot or sets the centre; dragging the centre circle moves it.

    Parameters
    ----------
    click : dict or None
        The pattern's clickData.
    relayout : dict or None
        The pattern's relayoutData (the centre circle dragged).
    undo : int or None
        Clicks of 'Undo all'.
    mode : str
        What a click does (add or drop a spot, set the centre).
    edits : dict or None
        The manual edits (``sha``, ``added``, ``removed``, ``center``).
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.
    source : dict or None
        The source store: ``readonly`` and the share token.
    rotate : int, optional
        Clockwise turn of the display, degrees (clicks are turned back to camera pixels).
    view : list of str, optional
        The view options (``"mirror"``).

    Returns
    -------
    dict
        The new edits.
    """
    if (source or {}).get("readonly") or not image:
        raise PreventUpdate
    trig, prop = triggered()
    ed = dict(edits) if edits and edits.get("sha") == image["sha"] else empty_edits(image["sha"])
    ed = {**ed, **service.clean_edits(ed)}
    before = _snapshot(ed)
    if trig == ids.UNDO_EDITS:
        out = empty_edits(image["sha"])
        out["rev"] = int(ed.get("rev", 0)) + 1
        out["history"] = _pushed(ed, before)
        return out
    if prop.endswith("relayoutData"):
        c = _center_from_relayout(relayout)
        if c is None:
            raise PreventUpdate
        ed["center"] = [round(v, 2) for v in camera_point(c[0], c[1], image, rotate, view)]
    else:
        if not click or not click.get("points") or mode == "none":
            raise PreventUpdate
        p = click["points"][0]
        x, y = p.get("x"), p.get("y")
        if x is None or y is None:
            raise PreventUpdate
        x, y = camera_point(x, y, image, rotate, view)
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
    ed["history"] = _pushed(ed, before)
    return ed


def _snapshot(ed: dict) -> dict:
    return {"added": list(ed.get("added") or []), "removed": list(ed.get("removed") or []),
            "center": ed.get("center")}


def _pushed(ed: dict, snapshot: dict) -> list:
    """The edits' history with `snapshot` (the state before this edit) on top, at most MAX_UNDO deep."""
    hist = [h for h in (ed.get("history") or []) if isinstance(h, dict)]
    return (hist + [snapshot])[-MAX_UNDO:]


def on_undo_last(n_clicks, edits, image, source):
    """'Undo last edit': the edits as they were before the last click, drag or 'Undo all'.

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    edits : dict or None
        The manual edits (``sha``, ``added``, ``removed``, ``center``).
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.
    source : dict or None
        The source store: ``readonly`` and the share token.

    Returns
    -------
    dict
        The edits before the last change.
    """
    if not n_clicks or (source or {}).get("readonly") or not image:
        raise PreventUpdate
    if not edits or edits.get("sha") != image["sha"] or not edits.get("history"):
        raise PreventUpdate
    hist = list(edits["history"])
    last = hist.pop()
    out = {**empty_edits(image["sha"]), **service.clean_edits(last)}
    out["rev"] = int(edits.get("rev", 0)) + 1
    out["history"] = hist
    return out


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
    """One line counting the edits by hand on this image.

    Parameters
    ----------
    edits : dict or None
        The manual edits.
    image : dict or None
        The image store.

    Returns
    -------
    str
        The line (empty without edits).
    """
    if not image or not edits or edits.get("sha") != image.get("sha"):
        return ""
    a, r, c = len(edits.get("added") or []), len(edits.get("removed") or []), edits.get("center")
    parts = [f"{a} added", f"{r} dropped", "centre " + (f"set to ({c[0]:.1f}, {c[1]:.1f})" if c else "found")]
    return "Edits by hand: " + ", ".join(parts)


callback(
    Output(ids.GRAPH, "figure"),
    Input(ids.IMAGE, "data"), Input(ids.RESULT, "data"), Input(ids.EDITS, "data"), Input(ids.MODEL, "data"),
    Input(ids.SCALE, "value"), Input(ids.GAMMA, "value"), Input(ids.CLIP, "value"), Input(ids.OVERLAYS, "value"),
    Input(ids.CANDIDATE_PICK, "value"), Input(ids.DOMAIN_FOCUS, "data"), Input(ids.ROTATE, "value"),
    Input(ids.VIEW_OPTIONS, "value"), State(ids.SOURCE, "data"),
)(render_pattern)

callback(
    Output(ids.EDITS, "data"),
    Input(ids.GRAPH, "clickData"), Input(ids.GRAPH, "relayoutData"), Input(ids.UNDO_EDITS, "n_clicks"),
    State(ids.CLICK_MODE, "value"), State(ids.EDITS, "data"), State(ids.IMAGE, "data"), State(ids.SOURCE, "data"),
    State(ids.ROTATE, "value"), State(ids.VIEW_OPTIONS, "value"),
    prevent_initial_call=True,
)(on_graph_event)

callback(
    Output(ids.EDITS, "data", allow_duplicate=True),
    Input(ids.UNDO_LAST, "n_clicks"),
    State(ids.EDITS, "data"), State(ids.IMAGE, "data"), State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_undo_last)

callback(Output(ids.EDIT_SUMMARY, "children"), Input(ids.EDITS, "data"), Input(ids.IMAGE, "data"))(edit_summary)
