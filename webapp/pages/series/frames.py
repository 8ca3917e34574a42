"""Walking the frames (slider, steps, a click in the I(V) plot) and drawing the frame and the curves."""

from __future__ import annotations

import numpy as np
from dash import Input, Output, State, callback, html
from dash.exceptions import PreventUpdate

from webapp import ids, series_service
from webapp.figures import frame_figure, iv_figure
from webapp.pages.common import fail, triggered_id

from .layout import empty

__all__ = ["frame_index", "move_frame", "render_frame", "render_iv"]


def frame_index(frame, summary) -> int:
    """The frame number on the slider, kept inside the run's frames.

    Parameters
    ----------
    frame : int or None
        The frame on the slider.
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).

    Returns
    -------
    int
        A frame index between 0 and the last frame.
    """
    n = int((summary or {}).get("n_frames") or 1)
    try:
        i = int(frame or 0)
    except (TypeError, ValueError):
        i = 0
    return min(max(i, 0), n - 1)


def move_frame(prev, nxt, iv_click, summary, value):
    """The slider's frame: 0 for a new run, one step back or on, or the energy clicked in the I(V) plot.

    Parameters
    ----------
    prev, nxt : int or None
        Clicks of the back and on buttons.
    iv_click : dict or None
        The I(V) plot's clickData.
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).
    value : int or None
        The slider's value.

    Returns
    -------
    int
        The frame to show.
    """
    trig = triggered_id()
    if not summary:
        if trig == ids.SERIES_RESULT:
            return 0
        raise PreventUpdate
    n = int(summary["n_frames"])
    i = frame_index(value, summary)
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


def render_frame(meta, summary, frame, picked):
    """The frame on the slider with the followed beams drawn on it, and the label under the slider.

    Parameters
    ----------
    meta : dict or None
        The uploaded series (``sha``, ``filename``, ``width``, ``height``).
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).
    frame : int or None
        The frame on the slider.
    picked : list of str or None
        The beams plotted.

    Returns
    -------
    figure : plotly.graph_objects.Figure
        The frame.
    label : str
        Frame number, name and energy.
    """
    if not summary or (meta and summary.get("sha") != meta.get("sha")):
        if meta and meta.get("sha"):
            url = series_service.first_frame_view(meta["sha"])
            if url:
                w, h = int(meta["width"]), int(meta["height"])
                return (frame_figure(url, width=w, height=h, factor=series_service.preview_factor(w, h)),
                        "First frame of the upload; the beams are drawn once they are followed.")
        return empty("Drop an energy series to see its frames"), ""
    i = frame_index(frame, summary)
    try:
        res = series_service.load_result(summary["key"])
        url = series_service.frame_view(summary["key"], i)
    except Exception as err:  # noqa: BLE001
        return empty(fail(err)), ""
    fig = frame_figure(url, width=summary["width"], height=summary["height"], factor=summary["factor"],
                       xy=res.xy_px[i], labels=res.beams.labels, ok=res.valid[i], flags=res.flags[i],
                       intensity=res.intensity[i], picked=picked or [])
    name = summary["frame_names"][i] if i < len(summary.get("frame_names") or []) else ""
    label = html.Span([f"Frame {i} (of 0–{summary['n_frames'] - 1}) · ", html.B(f"{summary['energy_eV'][i]:g} eV"),
                       f" · {name}" if name else "", f" · {int(res.valid[i].sum())} beams integrated"],
                      id=ids.SERIES_FRAME_TEXT, **{"data-frame": str(i)})
    return fig, label



def render_iv(summary, picked, group, frame):
    """The I(V) curves of the picked beams, a group's average, and the energy of the frame on the slider.

    Parameters
    ----------
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).
    picked : list of str or None
        The beams plotted.
    group : str or None
        A group whose average is drawn.
    frame : int or None
        The frame on the slider.

    Returns
    -------
    plotly.graph_objects.Figure
        The curves.
    """
    if not summary:
        return empty("The curves appear once the beams are followed")
    try:
        res = series_service.load_result(summary["key"])
        avg = None
        groups = summary.get("groups") or []
        if isinstance(group, int) and 0 <= group < len(groups):
            label = groups[group]["label"]
            avg = next((g for g in series_service.groups_of(summary["key"]) if g.label == label), None)
    except Exception as err:  # noqa: BLE001
        return empty(fail(err))
    i = frame_index(frame, summary)
    return iv_figure(res, picked or [], average=avg, energy_eV=float(summary["energy_eV"][i]))



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
