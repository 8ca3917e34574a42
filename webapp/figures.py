"""Pure drawing: arrays and result dicts in, Plotly figures, PNG/SVG bytes or CSV text out.

Nothing here touches the store, the request or the file system. Pixel
coordinates are x to the right and y downwards, the centre of the top-left
pixel at (0, 0), as everywhere at the edges of recinet.
"""

from __future__ import annotations

import base64
import csv
import io
import math
from fractions import Fraction

import numpy as np
import plotly.graph_objects as go
from PIL import Image

__all__ = [
    "PALETTE", "DOMAIN_STYLES", "OVERLAY_CHOICES", "SCALES",
    "display_levels", "downsample", "png_data_url", "png_bytes", "thumbnail_png",
    "hk_text", "pattern_figure", "empty_figure", "real_space_figure",
    "spots_csv", "export_figure",
]

# Okabe & Ito, "Color Universal Design" (2008): eight colours told apart with every common colour-vision deficiency.
PALETTE = {
    "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73", "yellow": "#F0E442",
    "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7", "black": "#000000",
}
# each domain gets its own marker shape as well as its own colour
DOMAIN_STYLES = [
    ("circle-open", PALETTE["orange"]), ("square-open", PALETTE["green"]),
    ("diamond-open", PALETTE["purple"]), ("triangle-up-open", PALETTE["yellow"]),
    ("pentagon-open", PALETTE["vermillion"]), ("hexagon-open", PALETTE["sky"]),
    ("triangle-down-open", "#FFFFFF"), ("star-open", PALETTE["blue"]),
]
_MPL_MARKERS = {"circle-open": "o", "square-open": "s", "diamond-open": "D", "triangle-up-open": "^",
                "pentagon-open": "p", "hexagon-open": "h", "triangle-down-open": "v", "star-open": "*"}

OVERLAY_CHOICES = [
    ("spots", "Detected spots"),
    ("masks", "Screen and gun masks"),
    ("substrate", "Substrate net and basis"),
    ("domains", "Overlayer domains"),
    ("unexplained", "Unexplained spots"),
    ("model", "Model being tried"),
]
SCALES = [("linear", "Linear"), ("log", "Log"), ("gamma", "Gamma")]
_LOG_SPAN = 1000.0  # log scale maps [0, 1] to log1p(1000 x) / log1p(1000): three decades


# --------------------------------------------------------------------------- image display

def downsample(data: np.ndarray, max_side: int = 1024) -> tuple[np.ndarray, int]:
    """Block-mean `data` (M, N) so that its longer side is at most `max_side`; return it and the factor."""
    h, w = data.shape
    f = max(1, math.ceil(max(h, w) / max_side))
    if f == 1:
        return np.asarray(data, dtype=np.float64), 1
    hh, ww = (h // f) * f, (w // f) * f
    a = np.asarray(data[:hh, :ww], dtype=np.float64).reshape(hh // f, f, ww // f, f).mean(axis=(1, 3))
    return a, f


def display_levels(data: np.ndarray, *, scale: str = "linear", clip_pct=(0.5, 99.95),
                   gamma: float = 0.5) -> np.ndarray:
    """Grey levels for the screen.

    Parameters
    ----------
    data : (M, N) ndarray of real
        Camera values (any units).
    scale : {"linear", "log", "gamma"}
    clip_pct : (2,) sequence of float
        Percentiles of `data` mapped to black and white, 0 ≤ low < high ≤ 100.
    gamma : float
        Exponent for ``scale="gamma"`` (0 < gamma ≤ 5); below 1 lifts faint spots.

    Returns
    -------
    (M, N) ndarray of uint8

    Examples
    --------
    >>> d = np.linspace(0.0, 1.0, 11).reshape(1, 11)
    >>> display_levels(d, clip_pct=(0, 100)).tolist()[0][:3], int(display_levels(d, scale="gamma", gamma=1.0, clip_pct=(0, 100))[0, 10])
    ([0, 26, 51], 255)
    """
    lo_pct, hi_pct = float(clip_pct[0]), float(clip_pct[1])
    if not (0.0 <= lo_pct < hi_pct <= 100.0):
        lo_pct, hi_pct = 0.0, 100.0
    d = np.asarray(data, dtype=np.float64)
    finite = d[np.isfinite(d)]
    sample = finite[:: max(1, finite.size // 250_000)] if finite.size else np.zeros(1)
    lo, hi = np.percentile(sample, [lo_pct, hi_pct])
    if not hi > lo:
        lo, hi = float(sample.min()), float(sample.max())
    x = np.clip((np.nan_to_num(d, nan=lo) - lo) / (hi - lo if hi > lo else 1.0), 0.0, 1.0)
    if scale == "log":
        x = np.log1p(_LOG_SPAN * x) / np.log1p(_LOG_SPAN)
    elif scale == "gamma":
        g = float(gamma) if gamma and 0 < float(gamma) <= 5 else 0.5
        x = x**g
    return np.round(x * 255.0).astype(np.uint8)


def png_bytes(levels: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(levels)).save(buf, format="PNG", compress_level=3)
    return buf.getvalue()


def png_data_url(levels: np.ndarray) -> str:
    return "data:image/png;base64," + base64.b64encode(png_bytes(levels)).decode("ascii")


def thumbnail_png(data: np.ndarray, *, side: int = 160) -> bytes:
    """A small log-scaled PNG of the pattern for the list of saved analyses."""
    small, _ = downsample(data, side)
    im = Image.fromarray(display_levels(small, scale="log", clip_pct=(1.0, 99.9)))
    im.thumbnail((side, side))
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()


# --------------------------------------------------------------------------- pattern view

def hk_text(h: float, k: float) -> str:
    """``(1/2, -1)``: indices as small fractions, or 2 decimals when not one.

    >>> hk_text(0.5, -1.0), hk_text(0.3333333, 0.0), hk_text(0.123, 1)
    ('(1/2, -1)', '(1/3, 0)', '(0.12, 1)')
    """
    def one(x):
        if x is None or not np.isfinite(x):
            return "?"
        f = Fraction(float(x)).limit_denominator(12)
        return str(f) if abs(float(f) - x) < 2e-3 else f"{x:.2f}"
    return f"({one(h)}, {one(k)})"


def _num(x, fmt="{:.3g}"):
    try:
        return fmt.format(float(x))
    except (TypeError, ValueError):
        return "–"


def empty_figure(message: str = "Drop a LEED image here or pick a demo image", *, height: int = 640) -> go.Figure:
    fig = go.Figure()
    fig.update_layout(
        template="plotly_white", margin=dict(l=10, r=10, t=10, b=10), height=height,
        xaxis=dict(visible=False), yaxis=dict(visible=False),
        annotations=[dict(text=message, showarrow=False, font=dict(size=16, color="#666"),
                          xref="paper", yref="paper", x=0.5, y=0.5)])
    return fig


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
                f"<br>intensity {_num(s.get('intensity'))}<br>SNR {_num(s.get('snr'), '{:.1f}')}"
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


# --------------------------------------------------------------------------- real space

def real_space_figure(substrate_vectors_A, domain_matrices, *, label: str = "") -> go.Figure:
    """Real-space drawing: substrate net points and cell, and each domain's overlayer cell.

    Parameters
    ----------
    substrate_vectors_A : (2, 2) array_like
        Rows a1, a2 in Å.
    domain_matrices : sequence of (2, 2) array_like
        (b1, b2) = M (a1, a2) for each domain.
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
                             line=dict(color=PALETTE["vermillion"], width=2), hoverinfo="name"))
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


# --------------------------------------------------------------------------- exports

def spots_csv(result: dict) -> str:
    """CSV of the detected spots: index, x_px, y_px, h, k, intensity, snr, then any further numeric fields."""
    spots = (result or {}).get("spots") or []
    first = ["x", "y", "h", "k", "intensity", "snr"]
    extra = sorted({k for s in spots for k, v in s.items()
                    if k not in first and k != "index" and isinstance(v, (int, float, bool, str)) and not isinstance(v, str)})
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["index", "x_px", "y_px", "h", "k", "intensity", "snr", *extra])
    for i, s in enumerate(spots):
        w.writerow([s.get("index", i), *[_csv_value(s.get(k)) for k in first], *[_csv_value(s.get(k)) for k in extra]])
    return buf.getvalue()


def _csv_value(v):
    if v is None:
        return ""
    if isinstance(v, bool):
        return int(v)
    if isinstance(v, float):
        return repr(v) if np.isfinite(v) else ""
    return v


def export_figure(levels: np.ndarray, *, factor: int = 1, result: dict | None = None,
                  edits: dict | None = None, title_lines=(), fmt: str = "png") -> bytes:
    """An annotated figure (matplotlib, Agg) of the pattern with spots, substrate net and domains.

    Parameters
    ----------
    levels : (M, N) ndarray of uint8
        Display levels (as shown), `factor` times smaller than the image.
    fmt : {"png", "svg"}
    """
    import matplotlib
    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    result = result or {}
    h, w = levels.shape[0] * factor, levels.shape[1] * factor
    fig = Figure(figsize=(7.0, 7.0 * h / w + 0.8), dpi=150)
    ax = fig.add_axes([0.02, 0.02, 0.96, 0.96 * (7.0 * h / w) / (7.0 * h / w + 0.8)])
    ax.imshow(levels, cmap="gray", extent=(-0.5, w - 0.5, h - 0.5, -0.5), interpolation="nearest")
    center = (edits or {}).get("center") or result.get("center_px")
    sub = result.get("substrate") or {}
    if sub.get("a_star_px") is not None and center is not None:
        _, xy = _substrate_points(result, center, w, h)
        ax.scatter(xy[:, 0], xy[:, 1], marker="+", s=60, c=PALETTE["vermillion"], linewidths=1.2, label="substrate net")
        for i, v in enumerate(np.asarray(sub["a_star_px"], dtype=float)):
            tip = (center[0] + v[0], center[1] + v[1])
            ax.annotate("", xy=tip, xytext=(center[0], center[1]),
                        arrowprops=dict(arrowstyle="->", color=PALETTE["vermillion"], lw=1.5))
            u = v / max(np.hypot(*v), 1e-9)
            ax.text(tip[0] + 14 * u[0] * factor, tip[1] + 14 * u[1] * factor, f"a{i + 1}*", color=PALETTE["vermillion"],
                    ha="center", va="center", fontsize=9, fontweight="bold")
    for i, p in enumerate(_domain_predictions(result, result.get("overlayer") or {}, w, h)):
        sym, col = DOMAIN_STYLES[i % len(DOMAIN_STYLES)]
        ax.scatter(p["xy"][:, 0], p["xy"][:, 1], marker=_MPL_MARKERS[sym], s=110, facecolors="none",
                   edgecolors=col, linewidths=1.4, label=f"domain {i + 1}")
    _, sxy = _spot_arrays(result)
    if len(sxy):
        ax.scatter(sxy[:, 0], sxy[:, 1], marker="o", s=40, facecolors="none", edgecolors=PALETTE["sky"],
                   linewidths=1.0, label="detected spots")
    ax.set_xlim(-0.5, w - 0.5)
    ax.set_ylim(h - 0.5, -0.5)
    ax.set_xticks([])
    ax.set_yticks([])
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower right", fontsize=7, framealpha=0.8)
    fig.text(0.02, 0.995, "\n".join(str(t) for t in title_lines if t), va="top", ha="left", fontsize=9)
    buf = io.BytesIO()
    fig.savefig(buf, format="svg" if fmt == "svg" else "png")
    return buf.getvalue()
