"""The line profile as a figure: intensity against distance along the line (px, Å⁻¹ or % of |a*|)."""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go

from .common import PALETTE, empty_figure

__all__ = ["PROFILE_UNITS", "profile_figure"]

#: (value, label) of the distance units offered
PROFILE_UNITS = (("px", "px"), ("invA", "Å⁻¹"), ("bz", "% BZ"))
_AXIS = {"px": "distance along the line (px)", "invA": "distance along the line (Å⁻¹, no 2π)",
         "bz": "distance along the line (% of |a*|)"}


def profile_figure(profile, unit: str = "px", *, log: bool = False, height: int = 300) -> go.Figure:
    """Intensity along a :class:`analysis.profile_line.LineProfile`; an empty figure for None.

    `unit` is one of :data:`PROFILE_UNITS`' values; momentum units fall back to px when the
    profile has no camera model. `log` draws the intensity on a log axis (faint, broad
    fractional beams beside sharp integer ones).

    Parameters
    ----------
    profile : LineProfile or None
        The profile.
    unit : str
        Distance unit of the axis.
    log : bool, keyword-only
        Log intensity axis.
    height : int, keyword-only
        Figure height, pixels.

    Returns
    -------
    plotly.graph_objects.Figure
        Intensity against distance.
    """
    if profile is None:
        return empty_figure("Draw a line on the pattern to see its profile", height=height)
    x = {"px": profile.distance_px, "invA": profile.distance_invA, "bz": profile.distance_bz_percent}.get(unit)
    if x is None:
        unit, x = "px", profile.distance_px
    xy = np.asarray(profile.xy_px)
    fig = go.Figure(go.Scatter(
        x=x, y=profile.intensity, mode="lines", line=dict(color=PALETTE["blue"], width=1.6), name="intensity",
        customdata=np.column_stack([xy, profile.distance_px]),
        hovertemplate="%{y:.4g} at %{x:.4g}<br>(x, y) = (%{customdata[0]:.1f}, %{customdata[1]:.1f}) px"
                      "<extra></extra>"))
    fig.update_layout(template="plotly_white", height=height, margin=dict(l=55, r=10, t=10, b=45),
                      xaxis=dict(title=_AXIS[unit], zeroline=False),
                      yaxis=dict(title=f"mean intensity across {profile.width_px:g} px", zeroline=False,
                                 type="log" if log else "linear"),
                      showlegend=False)
    return fig
