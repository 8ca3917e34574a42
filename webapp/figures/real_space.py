"""Real space: the substrate net and each domain's overlayer cell."""

from __future__ import annotations

import math

import numpy as np
import plotly.graph_objects as go

from .common import DOMAIN_STYLES

__all__ = ["real_space_figure"]

def real_space_figure(substrate_vectors_A, domain_matrices, *, label: str = "") -> go.Figure:
    """Real-space drawing: substrate net points and cell, and each domain's overlayer cell.

    Parameters
    ----------
    substrate_vectors_A : (2, 2) array_like
        Rows a1, a2 in Å.
    domain_matrices : sequence of (2, 2) array_like
        (b1, b2) = M (a1, a2) for each domain.
    label : str, keyword-only
        Legend name of the substrate's points (default ``"Substrate"``).

    Returns
    -------
    plotly.graph_objects.Figure
        Equal axes in Å.
    """
    a = np.asarray(substrate_vectors_A, dtype=float)
    mats = [np.asarray(m, dtype=float) for m in (domain_matrices or [])]
    cells = [m @ a for m in mats if m.shape == (2, 2)]
    reach = max([np.abs(c).sum(axis=0).max() for c in cells] + [np.abs(a).sum(axis=0).max()]) * 1.25
    n = int(min(40, math.ceil(reach / min(np.linalg.norm(a, axis=1)) + 2)))
    g = np.stack(np.meshgrid(np.arange(-n, n + 1), np.arange(-n, n + 1), indexing="ij"), -1).reshape(-1, 2)
    pts = g @ a
    keep = np.all(np.abs(pts) <= reach, axis=1)
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=pts[keep, 0], y=pts[keep, 1], mode="markers", name=label or "Substrate",
                             marker=dict(size=6, color="#999"), hoverinfo="skip"))

    def cell_path(v):
        p = np.array([[0, 0], v[0], v[0] + v[1], v[1], [0, 0]])
        return p[:, 0], p[:, 1]

    x, y = cell_path(a)
    fig.add_trace(go.Scatter(x=x, y=y, mode="lines", name="Substrate cell",
                             line=dict(color="#444444", width=2), hoverinfo="name"))
    for i, c in enumerate(cells):
        x, y = cell_path(c)
        fig.add_trace(go.Scatter(x=x, y=y, mode="lines", name=f"Domain {i + 1}",
                                 line=dict(color=DOMAIN_STYLES[i % len(DOMAIN_STYLES)][1], width=2.5,
                                           dash=["solid", "dash", "dot", "dashdot"][i % 4]),
                                 hoverinfo="name"))
    fig.update_layout(template="plotly_white", height=320, margin=dict(l=30, r=10, t=10, b=30),
                      xaxis=dict(range=[-reach, reach], title="x (Å)", zeroline=False),
                      yaxis=dict(range=[-reach, reach], title="y (Å)", scaleanchor="x", zeroline=False),
                      legend=dict(orientation="h", y=-0.25))
    return fig
