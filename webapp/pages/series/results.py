"""A run's facts, its equivalent-beam groups, and which beams the I(V) plot shows."""

from __future__ import annotations

import math

import numpy as np
from dash import Input, Output, State, callback, dcc, html, no_update
from dash.exceptions import PreventUpdate

from analysis.errors import RecinetError
from webapp import ids, series_service
from webapp.figures import group_figure
from webapp.pages.common import fail, note, triggered_id

from .frames import frame_index

__all__ = ["MAX_PICKED", "summary_panel", "groups_table", "on_result", "pick_beams", "beam_at_click"]

MAX_PICKED = 12
MAX_GROUP_PLOTS = 16  # groups drawn as small plots; further ones show their numbers only


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
    """The facts of a run: frames and energies, the indexing, the calibration fitted from the series.

    Parameters
    ----------
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).

    Returns
    -------
    dash.html.Div
        The facts.
    """
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
    if votes:  # frames indexed together: each frame's own reading, and whether it agrees with the joint one
        if all("agrees" in v for v in votes):
            agrees = [bool(v["agrees"]) for v in votes]
        else:
            won = next((v["reading"] for v in votes if v.get("frame") == ix["frame"]), None)
            agrees = [v.get("reading") == won for v in votes]
        others = sorted({f"{v['reading']} ({v['energy_eV']:g} eV)" for v, ok in zip(votes, agrees) if not ok})
        rows.append(("Frames on their own", f"{sum(agrees)} of {len(votes)} agree"
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
        [html.Tr([html.Th(k), html.Td(v)]) for k, v in rows])], id=ids.SERIES_FACTS,
        **{"data-frames": str(summary["n_frames"]), "data-beams": str(seen)})


def groups_table(summary: dict):
    """One card per group of equivalent beams: its members' I(V) and their average in one small plot,
    the members, and how well they agree (Pendry and reduced Zanazzi–Jona R-factors, common range).

    Parameters
    ----------
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).

    Returns
    -------
    dash.html.Div
        The cards.
    """
    groups = summary.get("groups") or []
    if not groups:
        return html.P("No beam was followed long enough to compare.", className="muted")
    try:  # the curves stay on the server; without them the cards still give the numbers
        res = series_service.load_result(summary["key"])
        averages = {g.label: g for g in series_service.groups_of(summary["key"])}
    except RecinetError:
        res, averages = None, {}
    order = sorted(range(len(groups)), key=lambda i: (len(groups[i]["members"]) < 2, -(groups[i].get("overlap_eV") or 0)))
    cards = []
    for n, i in enumerate(order):
        g = groups[i]
        m = g["members"]
        plot = None
        if res is not None and n < MAX_GROUP_PLOTS:
            plot = dcc.Graph(figure=group_figure(res, m, average=averages.get(g["label"])),
                             config={"staticPlot": True}, className="group-plot")
        cards.append(html.Div(className="group-card", children=[
            html.Div(className="group-head", children=[
                html.Span(g["label"], className="mono group-label"),
                html.Span(f"{len(m)} beam{'s' if len(m) != 1 else ''}", className="muted")]),
            plot,
            html.Div(", ".join(m) if len(m) <= 6 else ", ".join(m[:6]) + f" … ({len(m)})", className="mono small-print"),
            html.Dl(className="group-numbers", children=[
                html.Dt("R_P", title="Pendry R-factor among the members"), html.Dd(_fmt(g.get("r_pendry"), 3)),
                html.Dt("R_ZJ", title="reduced Zanazzi–Jona R-factor"), html.Dd(_fmt(g.get("r_zj"), 3)),
                html.Dt("common", title="the energy range every member covers"),
                html.Dd(_fmt(g.get("overlap_eV"), 0, " eV")),
            ]),
        ]))
    return html.Div([
        html.Div(cards, className="group-cards"),
        html.P("Each card: the equivalent beams' I(V) (thin) and their average (dashed). R_P compares each pair "
               "of them over their common energies (V0i 4 eV); low values mean the data agree.",
               className="muted small-print"),
    ])


def _group_label(g: dict) -> str:
    r = g.get("r_pendry")
    rp = f"R_P {r:.3f}" if isinstance(r, (int, float)) else "one beam"
    return f"{g['label']}  ×{len(g['members'])}  ·  {rp}"


def on_result(summary):
    """A new run -> slider (max, marks, disabled), beam options, group options and value, summary, groups.

    Parameters
    ----------
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).

    Returns
    -------
    tuple
        The outputs listed above.
    """
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
        return (no_update,) * 6 + (note(fail(err)), no_update)


def pick_beams(click, group, summary, frame, current):
    """The beams in the plot: defaults for a new run, a group's members, or a clicked spot added.

    Parameters
    ----------
    click : dict or None
        The frame figure's clickData.
    group : str or None
        A group picked.
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).
    frame : int or None
        The frame on the slider.
    current : list of str or None
        The beams plotted now.

    Returns
    -------
    list of str
        The beams' labels.
    """
    trig = triggered_id()
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
    """The beam under a click on the frame: the marker's beam, else the nearest within 12 px.

    Parameters
    ----------
    click : dict or None
        The frame figure's clickData.
    summary : dict or None
        The run's summary (:func:`webapp.series_service.run_series`).
    frame : int or None
        The frame on the slider.

    Returns
    -------
    str or None
        The beam's label.
    """
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
    i = frame_index(frame, summary)
    xy = res.xy_px[i]
    d = np.hypot(xy[:, 0] - float(x), xy[:, 1] - float(y))
    d[~np.isfinite(d)] = np.inf
    j = int(np.argmin(d)) if d.size else -1
    if j < 0 or d[j] > 12.0:
        return None
    return res.beams.labels[j]


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
