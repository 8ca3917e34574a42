"""Energy-series figures: a frame with the followed beams on it, and the I(V) curves."""

from __future__ import annotations

import math

import numpy as np
import plotly.graph_objects as go

from analysis.errors import RecinetError
from analysis.series import FLAG_NAMES

from .common import empty_figure

__all__ = ["BEAM_COLOURS", "colour_of", "flag_text", "frame_figure", "iv_figure", "group_figure"]

# Okabe & Ito colours for the picked beams (the same colour on the frame and in the plot);
# black is kept for a group's average.
BEAM_COLOURS = ["#E69F00", "#56B4E9", "#009E73", "#D55E00", "#CC79A7", "#0072B2", "#F0E442"]


def colour_of(picked: list[str]) -> dict:
    """Each picked beam's colour, in the order picked.

    Parameters
    ----------
    picked : list of str
        Beam labels, in the order picked.

    Returns
    -------
    dict
        Label → CSS colour.
    """
    return {b: BEAM_COLOURS[i % len(BEAM_COLOURS)] for i, b in enumerate(picked)}



def flag_text(bits: int) -> str:
    """The names of the flags set in `bits`, or "none".

    Parameters
    ----------
    bits : int
        Flag bits of one beam in one frame (``analysis.series.FLAG_NAMES``).

    Returns
    -------
    str
        Comma-separated names.
    """
    names = [n.replace("_", " ") for b, n in FLAG_NAMES.items() if bits & b]
    return ", ".join(names) if names else "none"


def frame_figure(source: str, *, width: int, height: int, factor: int = 1, xy=None, labels=(), ok=None,
                 flags=None, intensity=None, picked=()) -> go.Figure:
    """One frame (a PNG preview `factor` times smaller) with the beams at their (x, y) pixels.

    Beams integrated in this frame are open circles; beams seen but left out (masked,
    saturated, crowded) are crosses; picked beams take their curve's colour and a label.
    Each marker's customdata is ``["beam", label]``.

    Parameters
    ----------
    source : str
        PNG data URL of the frame's preview.
    width, height : int, keyword-only
        Frame size, pixels.
    factor : int, keyword-only
        How many times smaller the preview is.
    xy : (K, 2) array_like of float, optional, keyword-only
        Beam positions (x, y), pixels.
    labels : sequence of str, keyword-only
        Beam labels.
    ok : (K,) array_like of bool, optional, keyword-only
        Beams integrated in this frame.
    flags : (K,) array_like of int, optional, keyword-only
        Flag bits of each beam.
    intensity : (K,) array_like of float, optional, keyword-only
        Intensities, shown on hover.
    picked : sequence of str, keyword-only
        Labels of the picked beams.

    Returns
    -------
    plotly.graph_objects.Figure
        The frame and its beams.
    """
    f = max(1, int(factor))
    fig = go.Figure(go.Image(source=source, x0=(f - 1) / 2.0, y0=(f - 1) / 2.0, dx=f, dy=f, name="frame",
                             hovertemplate="x %{x:.0f}, y %{y:.0f}<extra></extra>"))
    if xy is not None and len(labels):
        xy = np.asarray(xy, dtype=float)
        seen = np.isfinite(xy).all(axis=1)
        ok = np.asarray(ok, dtype=bool)
        colours = colour_of(list(picked))

        def trace(sel, name, symbol, colour, size, width_px, text=False):
            js = np.flatnonzero(sel)
            if not js.size:
                return
            hover = [f"{labels[j]}<br>I {intensity[j]:.4g}" if np.isfinite(intensity[j]) else
                     f"{labels[j]}<br>left out: {flag_text(int(flags[j]))}" for j in js]
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



def iv_figure(res, picked, *, average=None, energy_eV: float | None = None) -> go.Figure:
    """I(V) of each picked beam (gaps where it is off the screen or flagged), optionally a group average.

    Parameters
    ----------
    res : IVResult
        The run's result.
    picked : sequence of str
        Labels of the beams drawn.
    average : BeamGroup, optional, keyword-only
        A group whose average is drawn too.
    energy_eV : float, optional, keyword-only
        The current frame's energy, marked by a vertical line.

    Returns
    -------
    plotly.graph_objects.Figure
        Intensity against energy (eV).
    """
    fig = go.Figure()
    colours = colour_of(list(picked))
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
        return empty_figure("Pick beams from the list, or click spots on the frame", height=520)
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


def group_figure(res, members, *, average=None, height: int = 150) -> go.Figure:
    """A small plot of one group of equivalent beams: each member's I(V), and their average.

    Parameters
    ----------
    res : IVResult
        The run (:func:`analysis.series.track_series`).
    members : sequence of str
        The beams of the group, by label.
    average : object, optional
        The group's average (``energy_eV``, ``intensity``), from
        :func:`analysis.series.average_equivalent`.
    height : int, optional
        Height of the plot, px.

    Returns
    -------
    plotly.graph_objects.Figure
        Members in the beam colours (thin), the average black and dashed on top.
    """
    fig = go.Figure()
    for i, lab in enumerate(members):
        try:
            e, inten, _ = res.curve(lab)
        except RecinetError:
            continue
        o = np.argsort(e)
        col = BEAM_COLOURS[i % len(BEAM_COLOURS)]
        fig.add_trace(go.Scatter(x=e[o], y=inten[o], mode="lines", name=lab, connectgaps=False,
                                 line=dict(color=col, width=1.1), hovertemplate=f"{lab} %{{x:g}} eV<extra></extra>"))
    if average is not None and len(members) > 1:
        o = np.argsort(average.energy_eV)
        fig.add_trace(go.Scatter(x=average.energy_eV[o], y=average.intensity[o], mode="lines", name="average",
                                 connectgaps=False, line=dict(color="#000000", width=2.0, dash="dash"),
                                 hovertemplate="average %{x:g} eV<extra></extra>"))
    fig.update_layout(template="plotly_white", height=height, margin=dict(l=8, r=8, t=4, b=22), showlegend=False,
                      xaxis=dict(title=None, zeroline=False, tickfont=dict(size=9)),
                      yaxis=dict(visible=False, rangemode="tozero"))
    return fig
