"""The pattern view: the image with the spots, the substrate net and the overlayer domains over it."""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go

from .common import DOMAIN_STYLES, PALETTE, hk_text, num

__all__ = ["OVERLAY_CHOICES", "pattern_figure", "predicted_spots"]

OVERLAY_CHOICES = [
    ("spots", "Detected spots"),
    ("masks", "Screen and gun masks"),
    ("substrate", "Substrate net and basis"),
    ("domains", "Overlayer domains"),
    ("unexplained", "Unexplained spots"),
    ("model", "Model being tried"),
]

def _lattice_hk(a_star_px: np.ndarray, center, width, height, *, inv_m=None, limit=4000):
    """Integer n (of the net with basis inv_m.T @ a*) whose pixel positions fall inside the image."""
    basis = np.asarray(a_star_px, dtype=np.float64)
    if inv_m is not None:
        basis = np.asarray(inv_m, dtype=np.float64).T @ basis
    if abs(np.linalg.det(basis)) < 1e-6:
        return np.zeros((0, 2)), np.zeros((0, 2))
    corners = np.array([[0, 0], [width, 0], [0, height], [width, height]], dtype=np.float64) - np.asarray(center)
    n_corners = corners @ np.linalg.inv(basis)
    lo, hi = np.floor(n_corners.min(axis=0)) - 1, np.ceil(n_corners.max(axis=0)) + 1
    span = (hi - lo + 1).prod()
    if span > limit:  # a net much finer than a pixel: nothing useful to draw
        return np.zeros((0, 2)), np.zeros((0, 2))
    g = np.stack(np.meshgrid(np.arange(lo[0], hi[0] + 1), np.arange(lo[1], hi[1] + 1), indexing="ij"), -1).reshape(-1, 2)
    xy = np.asarray(center) + g @ basis
    inside = (xy[:, 0] >= -0.5) & (xy[:, 0] <= width - 0.5) & (xy[:, 1] >= -0.5) & (xy[:, 1] <= height - 0.5)
    return g[inside], xy[inside]


def predicted_spots(result: dict, matrices, *, width: int, height: int) -> list[dict]:
    """Spots each overlayer domain matrix predicts, from the fitted reciprocal basis in pixels.

    Returns one dict per matrix with ``xy`` (K, 2) px and ``hk`` (K, 2) fractional
    substrate indices; integer (substrate) beams are left out.
    """
    sub = (result or {}).get("substrate") or {}
    a_star = sub.get("a_star_px")
    center = (result or {}).get("center_px")
    if a_star is None or center is None:
        return []
    a_star = np.asarray(a_star, dtype=np.float64)
    out = []
    for m in matrices:
        m = np.asarray(m, dtype=np.float64)
        if m.shape != (2, 2) or abs(np.linalg.det(m)) < 1e-9:
            out.append({"xy": np.zeros((0, 2)), "hk": np.zeros((0, 2))})
            continue
        inv_m = np.linalg.inv(m)
        n, xy = _lattice_hk(a_star, center, width, height, inv_m=inv_m)
        hk = n @ inv_m.T
        frac = np.any(np.abs(hk - np.round(hk)) > 1e-6, axis=1)
        out.append({"xy": xy[frac], "hk": hk[frac]})
    return out


def _spot_arrays(result):
    spots = (result or {}).get("spots") or []
    xy = np.array([[float(s.get("x", np.nan)), float(s.get("y", np.nan))] for s in spots]).reshape(-1, 2)
    return spots, xy


def pattern_figure(source: str | None, *, width: int, height: int, factor: int = 1,
                   result: dict | None = None, overlays=("spots", "substrate", "domains"),
                   edits: dict | None = None, model: dict | None = None,
                   candidate: dict | None = None, editable: bool = True, revision: str = "") -> go.Figure:
    """The pattern with its overlays.

    Parameters
    ----------
    source : str or None
        PNG data URL of the display levels (from :func:`png_data_url`), `factor`
        times smaller than the image.
    width, height : int
        Full image size in pixels.
    result : dict, optional
        Analysis result in the serialized form (``center_px``, ``spots``, ``substrate``,
        ``overlayer``, ``predicted``...).
    overlays : sequence of str
        Keys from :data:`OVERLAY_CHOICES` to draw.
    edits : dict, optional
        ``{"added": [[x, y], ...], "removed": [...], "center": [x, y] or None}``.
    model : dict, optional
        ``{"matrices": [...], "xy": [...], "label": str}`` from the model being tried.
    candidate : dict, optional
        A ranked candidate to draw instead of the chosen overlayer.

    Trace customdata: a detected spot is ``["spot", index]``, a spot added by
    hand ``["added", index]``; anything else (the image, predictions) has none,
    so a click there adds a spot.
    """
    result = result or {}
    edits = edits or {}
    show = set(overlays or ())
    fig = go.Figure()
    if source:
        f = max(1, int(factor))
        fig.add_trace(go.Image(source=source, x0=(f - 1) / 2.0, y0=(f - 1) / 2.0, dx=f, dy=f,
                               hovertemplate="x %{x:.0f}, y %{y:.0f}<extra></extra>", name="image"))
    center = edits.get("center") or result.get("center_px")

    if "masks" in show:
        for mask in _mask_outlines(result):
            fig.add_trace(go.Scatter(x=mask["x"], y=mask["y"], mode="lines", name=mask["name"],
                                     line=dict(color=PALETTE["yellow"], width=1.5, dash="dot"),
                                     hoverinfo="name"))

    sub = result.get("substrate") or {}
    if "substrate" in show and sub.get("a_star_px") is not None and center is not None:
        hk, xy = _substrate_points(result, center, width, height)
        fig.add_trace(go.Scatter(
            x=xy[:, 0], y=xy[:, 1], mode="markers", name="Substrate net",
            marker=dict(symbol="cross-thin-open", size=11, color=PALETTE["vermillion"], line=dict(width=1.5, color=PALETTE["vermillion"])),
            text=[hk_text(*p) for p in hk], hovertemplate="substrate %{text}<extra></extra>"))
        for i, vec in enumerate(np.asarray(sub["a_star_px"], dtype=float)):
            fig.add_annotation(x=center[0] + vec[0], y=center[1] + vec[1], ax=center[0], ay=center[1],
                               xref="x", yref="y", axref="x", ayref="y", showarrow=True, arrowhead=3,
                               arrowwidth=2, arrowcolor=PALETTE["vermillion"], text=f"a{i + 1}*",
                               font=dict(color=PALETTE["vermillion"], size=13))

    if "domains" in show:
        chosen = candidate or result.get("overlayer") or {}
        preds = _domain_predictions(result, chosen, width, height)
        for i, p in enumerate(preds):
            sym, col = DOMAIN_STYLES[i % len(DOMAIN_STYLES)]
            fig.add_trace(go.Scatter(
                x=p["xy"][:, 0], y=p["xy"][:, 1], mode="markers", name=f"Domain {i + 1}",
                marker=dict(symbol=sym, size=16, color=col, line=dict(width=2, color=col)),
                text=[hk_text(*q) for q in p["hk"]], hovertemplate=f"domain {i + 1} %{{text}}<extra></extra>"))

    if "model" in show and model and model.get("xy"):
        xy = np.asarray(model["xy"], dtype=float).reshape(-1, 2)
        fig.add_trace(go.Scatter(x=xy[:, 0], y=xy[:, 1], mode="markers", name="Model",
                                 marker=dict(symbol="circle-open-dot", size=20, color=PALETTE["green"],
                                             line=dict(width=1.5, color=PALETTE["green"])),
                                 hovertemplate="model<extra></extra>"))

    spots, sxy = _spot_arrays(result)
    if "spots" in show and len(spots):
        custom = [["spot", i, bool(s.get("manual"))] for i, s in enumerate(spots)]
        text = [f"{hk_text(s.get('h'), s.get('k')) if s.get('h') is not None else '(not indexed)'}"
                f"<br>intensity {num(s.get('intensity'))}<br>SNR {num(s.get('snr'), '{:.1f}')}"
                for s in spots]
        fig.add_trace(go.Scatter(x=sxy[:, 0], y=sxy[:, 1], mode="markers", name="Detected spots",
                                 customdata=custom, text=text,
                                 marker=dict(symbol="circle-open", size=11, color=PALETTE["sky"], line=dict(width=1.5, color=PALETTE["sky"])),
                                 hovertemplate="%{text}<br>x %{x:.1f}, y %{y:.1f}<extra>spot</extra>"))
    if "unexplained" in show and len(spots):
        un = [i for i, s in enumerate(spots) if s.get("kind") == "unexplained" or s.get("explained") is False]
        if un:
            fig.add_trace(go.Scatter(x=sxy[un, 0], y=sxy[un, 1], mode="markers", name="Unexplained",
                                     customdata=[["spot", i, bool(spots[i].get("manual"))] for i in un],
                                     marker=dict(symbol="x-thin-open", size=14, color=PALETTE["purple"], line=dict(width=2, color=PALETTE["purple"])),
                                     hovertemplate="unexplained spot<br>x %{x:.1f}, y %{y:.1f}<extra></extra>"))
    added = edits.get("added") or []
    if added:
        a = np.asarray(added, dtype=float).reshape(-1, 2)
        fig.add_trace(go.Scatter(x=a[:, 0], y=a[:, 1], mode="markers", name="Added by hand",
                                 customdata=[["added", i] for i in range(len(a))],
                                 marker=dict(symbol="star-open", size=13, color=PALETTE["green"], line=dict(width=1.5, color=PALETTE["green"])),
                                 hovertemplate="added by hand (click to drop)<extra></extra>"))

    shapes = []
    if center is not None:
        cx, cy = float(center[0]), float(center[1])
        r = max(6.0, 0.012 * max(width, height))
        shapes.append(dict(type="circle", xref="x", yref="y", x0=cx - r, x1=cx + r, y0=cy - r, y1=cy + r,
                           line=dict(color=PALETTE["orange"], width=2), editable=bool(editable)))
    fig.update_layout(
        template="plotly_white", height=700, margin=dict(l=10, r=10, t=10, b=10),
        clickmode="event", dragmode="zoom", uirevision=revision or "pattern", shapes=shapes,
        legend=dict(orientation="h", yanchor="bottom", y=1.0, x=0, bgcolor="rgba(255,255,255,0.8)"),
        xaxis=dict(range=[-0.5, width - 0.5], showgrid=False, zeroline=False, constrain="domain", title=None),
        yaxis=dict(range=[height - 0.5, -0.5], autorange=False, showgrid=False, zeroline=False,
                   scaleanchor="x", constrain="domain", title=None),
        plot_bgcolor="#111",
    )
    return fig


def _substrate_points(result, center, width, height):
    """(hk, xy) of the substrate beams: the camera model's positions when the result has them."""
    pred = result.get("predicted")
    if isinstance(pred, dict) and pred.get("substrate"):
        pts = pred["substrate"]
        return (np.array([[p["h"], p["k"]] for p in pts], dtype=float).reshape(-1, 2),
                np.array([[p["x"], p["y"]] for p in pts], dtype=float).reshape(-1, 2))
    return _lattice_hk(result["substrate"]["a_star_px"], center, width, height)


def _rows_to_arrays(rows) -> dict:
    if isinstance(rows, dict):  # {"xy": [...], "hk": [...]}
        xy = np.asarray(rows.get("xy", []), dtype=float).reshape(-1, 2)
        hk = np.asarray(rows.get("hk", np.full((len(xy), 2), np.nan)), dtype=float).reshape(-1, 2)
        return {"xy": xy, "hk": hk}
    return {"xy": np.array([[p["x"], p["y"]] for p in rows], dtype=float).reshape(-1, 2),
            "hk": np.array([[p.get("h", np.nan), p.get("k", np.nan)] for p in rows], dtype=float).reshape(-1, 2)}


def _domain_predictions(result, overlayer, width, height) -> list[dict]:
    """Predicted spots per domain: from the result when it lists them, else from the domain matrices."""
    pred = overlayer.get("predicted") if isinstance(overlayer, dict) else None
    if pred is None and overlayer is result.get("overlayer"):
        pred = result.get("predicted")
        if isinstance(pred, dict):
            pred = pred.get("domains")
    if pred is not None:
        return [_rows_to_arrays(p) for p in pred]
    mats = overlayer.get("domains") or ([overlayer["matrix"]] if overlayer.get("matrix") else [])
    return predicted_spots(result, mats, width=width, height=height)


def _mask_outlines(result) -> list[dict]:
    """Outlines of the screen and gun-shadow masks, when the result describes them."""
    out = []
    t = np.linspace(0, 2 * np.pi, 181)
    scr = result.get("screen")
    if isinstance(scr, dict) and scr.get("center_px") and scr.get("source") != "frame":
        cx, cy = scr["center_px"]
        ax = scr.get("semi_axes_px") or [scr.get("radius_px", 0.0)] * 2
        ang = np.deg2rad(float(scr.get("angle_deg") or 0.0))
        u, v = ax[0] * np.cos(t), ax[1] * np.sin(t)
        # image angles are counter-clockwise on the screen, so y_px grows as the angle falls
        out.append({"name": "Screen edge", "x": cx + u * np.cos(ang) - v * np.sin(ang),
                    "y": cy - (u * np.sin(ang) + v * np.cos(ang))})
    gun = result.get("gun")
    if isinstance(gun, dict) and gun.get("center_px") and float(gun.get("radius_px") or 0) > 0:
        (gx, gy), r = gun["center_px"], float(gun["radius_px"])
        xs, ys = list(gx + r * np.cos(t)), list(gy + r * np.sin(t))
        if gun.get("arm_angle_deg") is not None and float(gun.get("arm_width_px") or 0) > 0:
            a = np.deg2rad(float(gun["arm_angle_deg"]))
            d = np.array([np.cos(a), -np.sin(a)])  # along the arm, y downwards
            n = np.array([-d[1], d[0]]) * float(gun["arm_width_px"]) / 2.0
            far = np.array([gx, gy]) + d * 4.0 * max(scr.get("radius_px", 500.0) if isinstance(scr, dict) else 500.0, r)
            poly = [np.array([gx, gy]) + n, far + n, far - n, np.array([gx, gy]) - n]
            xs += [None] + [p[0] for p in poly]
            ys += [None] + [p[1] for p in poly]
        out.append({"name": "Gun shadow", "x": xs, "y": ys})
    return out
