"""The pattern view: the image with the spots, the substrate net and the overlayer domains over it."""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go
from scipy.spatial import cKDTree

from analysis.spots.accept import REJECT_FAINT_UNEXPLAINED

from .common import (GUN_COLOUR, INTEGER_SPOT_COLOUR, MODEL_COLOUR, PHASE_COLOUR, SCREEN_COLOUR, SET_ASIDE_COLOUR,
                     SUBSTRATE_COLOUR, UNEXPLAINED_COLOUR, domain_colour, domain_dash, hk_text, num)

__all__ = ["OVERLAY_CHOICES", "pattern_figure", "predicted_spots", "net_lines"]

OVERLAY_CHOICES = [
    ("spots", "Detected spots"),
    ("masks", "Screen and gun masks"),
    ("substrate", "Substrate net and basis"),
    ("domains", "Overlayer domains"),
    ("unexplained", "Unexplained spots"),
    ("model", "Model being tried"),
]


def _set_aside(result: dict) -> list[dict]:
    """The detections the analysis set aside as faint and on none of its nets."""
    return [r for r in result.get("rejected_spots") or [] if r.get("reason") == REJECT_FAINT_UNEXPLAINED
            and r.get("x") is not None and r.get("y") is not None]


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

    Parameters
    ----------
    result : dict
        A result dict (its fitted reciprocal basis and centre in pixels).
    matrices : sequence of (2, 2) array_like of float
        Real-space superstructure matrices.
    width, height : int, keyword-only
        Image size, pixels.

    Returns
    -------
    list of dict
        One per matrix, as above.
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
                   candidate: dict | None = None, editable: bool = True, revision: str = "",
                   focus: int | None = None) -> go.Figure:
    """The pattern with its overlays, drawn as reciprocal nets.

    Each overlayer domain is its reciprocal net: thin lines through its lattice points
    (the camera model's positions, so the lines bend with the screen); the measured
    spots are drawn where they are, tinted by the domain that explains them (integer
    beams light grey, unexplained ones white crosses); beams a domain predicts but no
    spot shows are faint ticks. The substrate net is white, a tried model white dashed.

    Parameters
    ----------
    source : str or None
        PNG data URL of the display levels (from :func:`png_data_url`), `factor`
        times smaller than the image.
    width, height : int, keyword-only
        Full image size in pixels.
    factor : int, keyword-only
        How many times smaller the display levels are than the image.
    result : dict, optional
        Analysis result in the serialized form (``center_px``, ``spots``, ``substrate``,
        ``overlayer``, ``predicted``...).
    overlays : sequence of str
        Keys from :data:`OVERLAY_CHOICES` to draw.
    edits : dict, optional
        ``{"added": [[x, y], ...], "removed": [[x, y], ...], "center": [x, y] or None}``.
    model : dict, optional
        The model being tried: ``{"domains": [[{x, y, h, k}...]...], "matrices": [...], "xy": [...]}``.
    candidate : dict, optional
        A ranked candidate to draw instead of the chosen overlayer.
    editable : bool, keyword-only
        Clicks add and remove spots.
    revision : str, keyword-only
        Plotly ``uirevision``: zoom and pan are kept while it stays the same.
    focus : int, optional
        A domain (0-based) brought forward: its net drawn thicker and last, the others dimmed.

    Returns
    -------
    plotly.graph_objects.Figure
        Trace customdata: a detected spot is ``["spot", index, manual]``, a spot added by
        hand ``["added", index]``; anything else (the image, nets, ticks) has none, so a
        click there adds a spot.
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
    annotations = []

    if "masks" in show:
        for mask in _mask_outlines(result):
            screen = mask["name"] == "Screen edge"
            fig.add_trace(go.Scatter(x=mask["x"], y=mask["y"], mode="lines", name=mask["name"],
                                     line=dict(color=SCREEN_COLOUR if screen else GUN_COLOUR, width=1.5,
                                               dash="dash" if screen else "dot"), hoverinfo="name"))

    sub = result.get("substrate") or {}
    if "substrate" in show and sub.get("a_star_px") is not None and center is not None:
        hk, xy = _substrate_points(result, center, width, height)
        lx, ly = net_lines(xy, hk)
        fig.add_trace(go.Scatter(x=lx, y=ly, mode="lines", name="Substrate net", hoverinfo="skip",
                                 line=dict(color=SUBSTRATE_COLOUR, width=0.8), opacity=0.45))
        annotations += _basis_arrows(np.asarray(sub["a_star_px"], dtype=float), center, factor)

    chosen = candidate or result.get("overlayer") or {}
    preds = _domain_predictions(result, chosen, width, height) if chosen else []
    spots, sxy = _spot_arrays(result)
    owner = _spot_domains(spots, sxy, preds, use_own=candidate is None)
    if "domains" in show and preds:
        mats = _domain_matrices(chosen)
        sub_hk, sub_xy = (_substrate_points(result, center, width, height) if sub.get("a_star_px") is not None
                          and center is not None else (np.zeros((0, 2)), np.zeros((0, 2))))
        order = [i for i in range(len(preds)) if i != focus] + ([focus] if focus is not None and
                                                                 0 <= focus < len(preds) else [])
        for i in order:
            p = preds[i]
            col, dash = domain_colour(i), domain_dash(i)
            strong = focus is None or i == focus
            if i < len(mats):
                n_xy, n_idx = _domain_net_points(p, mats[i], sub_hk, sub_xy)
                lx, ly = net_lines(n_xy, n_idx)
                fig.add_trace(go.Scatter(
                    x=lx, y=ly, mode="lines", name=f"Domain {i + 1} net", hoverinfo="skip",
                    line=dict(color=col, width=2.2 if i == focus else 1.0, dash=dash),
                    opacity=0.95 if i == focus else (0.6 if strong else 0.18)))
            absent = _absent(p["xy"], sxy)
            if absent.any():
                fig.add_trace(go.Scatter(
                    x=p["xy"][absent, 0], y=p["xy"][absent, 1], mode="markers",
                    name=f"Domain {i + 1}: predicted, no spot",
                    marker=dict(symbol="line-ns-open", size=7, color=col, line=dict(width=1.2, color=col)),
                    opacity=0.55 if strong else 0.2, text=[hk_text(*q) for q in p["hk"][absent]],
                    hovertemplate=f"domain {i + 1} %{{text}}: predicted, no spot<extra></extra>"))

    if "domains" in show and candidate is None and sub.get("a_star_px") is not None and center is not None:
        sub_hk, sub_xy = _substrate_points(result, center, width, height)
        for k, (lx, ly) in _phase_nets(result.get("overlayer") or {}, spots, sxy, sub_hk, sub_xy):
            fig.add_trace(go.Scatter(x=lx, y=ly, mode="lines", name=f"Phase {k + 1} net", hoverinfo="skip",
                                     line=dict(color=PHASE_COLOUR, width=1.0, dash="dot"), opacity=0.7))

    if "model" in show and model:
        rows = model.get("domains")
        if rows:
            for j, dom in enumerate(rows):
                d = _rows_to_arrays(dom)
                mats = model.get("matrices") or []
                if j < len(mats):
                    n_xy, n_idx = _domain_net_points(d, np.asarray(mats[j], dtype=float), np.zeros((0, 2)),
                                                     np.zeros((0, 2)))
                    lx, ly = net_lines(n_xy, n_idx)
                    fig.add_trace(go.Scatter(x=lx, y=ly, mode="lines", name="Model net" if j == 0 else None,
                                             legendgroup="model", showlegend=j == 0, hoverinfo="skip",
                                             line=dict(color=MODEL_COLOUR, width=1.3, dash="dash"), opacity=0.8))
        xy = np.asarray(model.get("xy") or [], dtype=float).reshape(-1, 2)
        if len(xy):
            fig.add_trace(go.Scatter(x=xy[:, 0], y=xy[:, 1], mode="markers", name="Model",
                                     marker=dict(symbol="diamond-open", size=9, color=MODEL_COLOUR,
                                                 line=dict(width=1.2, color=MODEL_COLOUR)),
                                     hovertemplate="tried model<extra></extra>"))

    if "spots" in show and len(spots):
        custom = [["spot", i, bool(s.get("manual"))] for i, s in enumerate(spots)]
        colours = [domain_colour(d) if d is not None else
                   (INTEGER_SPOT_COLOUR if s.get("kind") == "integer" else UNEXPLAINED_COLOUR)
                   for s, d in zip(spots, owner)]
        text = [f"{hk_text(s.get('h'), s.get('k')) if s.get('h') is not None else '(not indexed)'}"
                + (f" · domain {d + 1}" if d is not None else "")
                + f"<br>intensity {num(s.get('intensity'))}<br>SNR {num(s.get('snr'), '{:.1f}')}"
                for s, d in zip(spots, owner)]
        fig.add_trace(go.Scatter(x=sxy[:, 0], y=sxy[:, 1], mode="markers", name="Detected spots",
                                 customdata=custom, text=text,
                                 marker=dict(symbol="circle-open", size=12, color=colours,
                                             line=dict(width=1.8, color=colours)),
                                 hovertemplate="%{text}<br>x %{x:.1f}, y %{y:.1f}<extra>spot</extra>"))
    other = [i for i, s in enumerate(spots) if isinstance(s.get("phase"), int) and s["phase"] >= 1]
    if "spots" in show and other:  # explained by a coexisting phase, not by the answer: not unexplained
        fig.add_trace(go.Scatter(x=sxy[other, 0], y=sxy[other, 1], mode="markers", name="Another phase",
                                 customdata=[["spot", i, bool(spots[i].get("manual"))] for i in other],
                                 text=[f"phase {spots[i]['phase'] + 1}" for i in other],
                                 marker=dict(symbol="square-open", size=13, color=PHASE_COLOUR,
                                             line=dict(width=1.8, color=PHASE_COLOUR)),
                                 hovertemplate="spot of %{text}<br>x %{x:.1f}, y %{y:.1f}<extra></extra>"))
    if "unexplained" in show and len(spots):
        un = [i for i, s in enumerate(spots) if (s.get("kind") == "unexplained" or s.get("explained") is False)
              and i not in set(other)]
        if un:
            fig.add_trace(go.Scatter(x=sxy[un, 0], y=sxy[un, 1], mode="markers", name="Unexplained",
                                     customdata=[["spot", i, bool(spots[i].get("manual"))] for i in un],
                                     marker=dict(symbol="x-thin-open", size=14, color=UNEXPLAINED_COLOUR,
                                                 line=dict(width=2, color=UNEXPLAINED_COLOUR)),
                                     hovertemplate="unexplained spot<br>x %{x:.1f}, y %{y:.1f}<extra></extra>"))
    aside = _set_aside(result) if "unexplained" in show else []
    if aside:  # no customdata: a click on one keeps it as a spot placed by hand
        fig.add_trace(go.Scatter(x=[r["x"] for r in aside], y=[r["y"] for r in aside], mode="markers",
                                 name="Set aside (faint, on no net)", text=[num(r.get("snr"), "{:.1f}") for r in aside],
                                 marker=dict(symbol="x-thin-open", size=8, color=SET_ASIDE_COLOUR,
                                             line=dict(width=1.2, color=SET_ASIDE_COLOUR)),
                                 hovertemplate="set aside: faint (SNR %{text}) and on none of the fitted nets"
                                               "<br>click to keep it as a spot<extra></extra>"))
    added = edits.get("added") or []
    if added:
        a = np.asarray(added, dtype=float).reshape(-1, 2)
        fig.add_trace(go.Scatter(x=a[:, 0], y=a[:, 1], mode="markers", name="Added by hand",
                                 customdata=[["added", i] for i in range(len(a))],
                                 marker=dict(symbol="star-open", size=13, color=SUBSTRATE_COLOUR,
                                             line=dict(width=1.5, color=SUBSTRATE_COLOUR)),
                                 hovertemplate="added by hand (click to drop)<extra></extra>"))
    removed = edits.get("removed") or []
    if removed:
        r = np.asarray(removed, dtype=float).reshape(-1, 2)
        fig.add_trace(go.Scatter(x=r[:, 0], y=r[:, 1], mode="markers", name="Dropped by hand",
                                 marker=dict(symbol="circle-x-open", size=12, color="#9A9A9A",
                                             line=dict(width=1.2, color="#9A9A9A")),
                                 hovertemplate="dropped by hand (Undo brings it back)<extra></extra>"))

    shapes = []
    if center is not None:
        cx, cy = float(center[0]), float(center[1])
        r = max(6.0, 0.012 * max(width, height))
        shapes.append(dict(type="circle", xref="x", yref="y", x0=cx - r, x1=cx + r, y0=cy - r, y1=cy + r,
                           line=dict(color=SUBSTRATE_COLOUR, width=2), editable=bool(editable)))
    fig.update_layout(
        template="plotly_white", height=700, margin=dict(l=10, r=10, t=10, b=10),
        clickmode="event", dragmode="zoom", uirevision=revision or "pattern", shapes=shapes,
        annotations=annotations,
        legend=dict(orientation="h", yanchor="bottom", y=1.0, x=0, bgcolor="rgba(255,255,255,0.8)"),
        xaxis=dict(range=[-0.5, width - 0.5], showgrid=False, zeroline=False, constrain="domain", title=None),
        yaxis=dict(range=[height - 0.5, -0.5], autorange=False, showgrid=False, zeroline=False,
                   scaleanchor="x", constrain="domain", title=None),
        plot_bgcolor="#111",
    )
    return fig


def _basis_arrows(a_star_px: np.ndarray, center, factor: int = 1) -> list[dict]:
    """a1* and a2* as arrows from the centre, each label just beyond its arrow's tip (as the PNG export)."""
    out = []
    cx, cy = float(center[0]), float(center[1])
    for i, v in enumerate(a_star_px):
        tip = (cx + v[0], cy + v[1])
        out.append(dict(x=tip[0], y=tip[1], ax=cx, ay=cy, xref="x", yref="y", axref="x", ayref="y", text="",
                        showarrow=True, arrowhead=3, arrowwidth=2, arrowcolor=SUBSTRATE_COLOUR))
        u = v / max(float(np.hypot(*v)), 1e-9)
        out.append(dict(x=tip[0] + 16 * u[0] * max(1, factor), y=tip[1] + 16 * u[1] * max(1, factor),
                        xref="x", yref="y", text=f"a{i + 1}*", showarrow=False, name=f"a{i + 1}* label",
                        font=dict(color=SUBSTRATE_COLOUR, size=13), bgcolor="rgba(0,0,0,0.65)", borderpad=2))
    return out


def net_lines(xy: np.ndarray, idx: np.ndarray) -> tuple[list, list]:
    """Polylines through a net's points along both index directions, for one Scatter trace.

    Parameters
    ----------
    xy : (K, 2) ndarray of float
        The points' (x, y) pixels.
    idx : (K, 2) ndarray
        Their integer indices in the net's own basis; only neighbours (indices one apart)
        are joined, so a missing point leaves a gap.

    Returns
    -------
    (list, list)
        x and y with ``None`` between the lines.

    Examples
    --------
    >>> g = np.array([[0, 0], [0, 1], [1, 0], [1, 1]])
    >>> x, y = net_lines(g * 10.0, g)
    >>> x
    [0.0, 0.0, None, 10.0, 10.0, None, 0.0, 10.0, None, 0.0, 10.0, None]
    """
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    n = np.rint(np.asarray(idx, dtype=float)).astype(np.int64).reshape(-1, 2)
    xs, ys = [], []
    for along in (1, 0):  # lines of constant n0 (along n1), then of constant n1
        fixed = 1 - along
        order = np.lexsort((n[:, along], n[:, fixed]))
        run = []
        for j in order:
            if run and (n[j, fixed] != n[run[-1], fixed] or n[j, along] != n[run[-1], along] + 1):
                if len(run) > 1:
                    xs += [float(xy[q, 0]) for q in run] + [None]
                    ys += [float(xy[q, 1]) for q in run] + [None]
                run = []
            run.append(j)
        if len(run) > 1:
            xs += [float(xy[q, 0]) for q in run] + [None]
            ys += [float(xy[q, 1]) for q in run] + [None]
    return xs, ys


def _phase_nets(overlayer: dict, spots, sxy, sub_hk, sub_xy, *, tol: float = 0.15) -> list:
    """Net lines of each coexisting phase (after the first) through its measured spots.

    A phase's spots (``phase`` = its index) sit on its domains' nets: at substrate indices hk
    (measured) a domain of matrix M has n = hk Mᵀ, whole to within `tol` (a measured position);
    the substrate beams (camera model) lie on every net. Returns ``[(phase, (x, y))]``.
    """
    out = []
    phase_of = np.array([s.get("phase") if isinstance(s.get("phase"), int) else -1 for s in spots], dtype=int)
    hk_all = np.array([[s.get("h_measured", np.nan), s.get("k_measured", np.nan)] for s in spots],
                      dtype=float).reshape(-1, 2)
    for k, ph in enumerate(overlayer.get("phases") or []):
        if k == 0 or not isinstance(ph, dict) or not np.any(phase_of == k):
            continue
        xs, ys = [], []
        for m in _domain_matrices(ph):
            own = (phase_of == k) & np.all(np.isfinite(hk_all), axis=1)
            n = hk_all[own] @ m.T
            near = np.all(np.abs(n - np.rint(n)) < tol, axis=1)
            n_sub = sub_hk @ m.T
            on = np.all(np.abs(n_sub - np.rint(n_sub)) < 1e-3, axis=1)  # substrate beams on this net
            xy = np.vstack([sxy[own][near], sub_xy[on]])
            idx = np.vstack([np.rint(n[near]), np.rint(n_sub[on])])
            lx, ly = net_lines(xy, idx)
            xs += lx
            ys += ly
        if xs:
            out.append((k, (xs, ys)))
    return out


def _domain_matrices(overlayer: dict) -> list[np.ndarray]:
    mats = overlayer.get("domains") or ([overlayer["matrix"]] if overlayer.get("matrix") is not None else [])
    out = []
    for m in mats:
        m = np.asarray(m, dtype=float)
        if m.shape == (2, 2) and np.all(np.isfinite(m)) and abs(np.linalg.det(m)) > 1e-9:
            out.append(m)
    return out


def _domain_net_points(pred: dict, matrix: np.ndarray, sub_hk: np.ndarray, sub_xy: np.ndarray):
    """(xy, n) of a domain's lattice points: its fractional beams and the substrate beams on its net.

    A beam at substrate indices hk sits at n = hk Mᵀ of the overlayer's reciprocal basis
    (b* = M⁻ᵀ a*, overlayer = M @ substrate); points whose n is not whole are not on the net.
    """
    hk = np.vstack([pred["hk"], sub_hk]) if len(sub_hk) else pred["hk"]
    xy = np.vstack([pred["xy"], sub_xy]) if len(sub_xy) else pred["xy"]
    ok = np.all(np.isfinite(hk), axis=1)
    n = hk[ok] @ np.asarray(matrix, dtype=float).T
    whole = np.all(np.abs(n - np.rint(n)) < 1e-3, axis=1)
    return xy[ok][whole], np.rint(n[whole])


def _absent(pred_xy: np.ndarray, spots_xy: np.ndarray) -> np.ndarray:
    """Which predicted beams have no detected spot within a third of their nearest spacing (≥ 3 px)."""
    pred_xy = np.asarray(pred_xy, dtype=float).reshape(-1, 2)
    if not len(pred_xy):
        return np.zeros(0, dtype=bool)
    if len(pred_xy) > 1:
        d_pp, _ = cKDTree(pred_xy).query(pred_xy, k=2)
        tol = max(3.0, float(np.median(d_pp[:, 1])) / 3.0)
    else:
        tol = 6.0
    ok = np.all(np.isfinite(spots_xy), axis=1) if len(spots_xy) else np.zeros(0, bool)
    if not ok.any():
        return np.ones(len(pred_xy), dtype=bool)
    d, _ = cKDTree(spots_xy[ok]).query(pred_xy, k=1)
    return d > tol


def _spot_domains(spots, sxy, preds, *, use_own: bool) -> list:
    """The domain (0-based) each spot is tinted by: its own for the chosen model, else the nearest
    predicted beam of the candidate shown (within a third of that domain's spacing)."""
    if use_own:
        return [s.get("domain") if isinstance(s.get("domain"), int) and s.get("kind") == "fractional" else None
                for s in spots]
    out = [None] * len(spots)
    best = np.full(len(spots), np.inf)
    for i, p in enumerate(preds):
        if not len(p["xy"]) or not len(sxy):
            continue
        d, _ = cKDTree(p["xy"]).query(np.nan_to_num(sxy, nan=-1e9), k=1)
        sp = cKDTree(p["xy"]).query(p["xy"], k=2)[0][:, 1] if len(p["xy"]) > 1 else np.array([18.0])
        tol = max(3.0, float(np.median(sp)) / 3.0)
        for j in np.flatnonzero((d < tol) & (d < best)):
            if spots[j].get("kind") != "integer":
                out[j], best[j] = i, d[j]
    return out


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
