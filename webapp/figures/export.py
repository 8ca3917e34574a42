"""Exports: the spots as CSV and the annotated figure as PNG or SVG (matplotlib, no browser)."""

from __future__ import annotations

import csv
import io

import numpy as np

from .common import INTEGER_SPOT_COLOUR, SUBSTRATE_COLOUR, UNEXPLAINED_COLOUR, domain_colour
from .pattern import (_absent, _domain_matrices, _domain_net_points, _domain_predictions, _spot_arrays,
                      _spot_domains, _substrate_points, net_lines)

__all__ = ["spots_csv", "export_figure"]

def spots_csv(result: dict) -> str:
    """CSV of the detected spots: index, x_px, y_px, h, k, intensity, snr, then any further numeric fields.

    Parameters
    ----------
    result : dict
        A result dict.

    Returns
    -------
    str
        CSV text.
    """
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
    """An annotated figure (matplotlib, Agg) of the pattern drawn as on the page: the substrate and
    each domain as its reciprocal net, the spots tinted by their domain, absent beams as ticks.

    Parameters
    ----------
    levels : (M, N) ndarray of uint8
        Display levels (as shown), `factor` times smaller than the image.
    factor : int, keyword-only
        How many times smaller `levels` is than the image.
    result : dict, optional, keyword-only
        The result dict (spots, substrate, overlayer).
    edits : dict, optional, keyword-only
        The manual edits.
    title_lines : sequence of str, keyword-only
        Lines of the title.
    fmt : {"png", "svg"}, keyword-only
        File format.

    Returns
    -------
    bytes
        The file.
    """
    # matplotlib is loaded when a figure is first exported, not with every web worker (~0.3 s)
    from matplotlib.figure import Figure

    result = result or {}
    h, w = levels.shape[0] * factor, levels.shape[1] * factor
    fig = Figure(figsize=(7.0, 7.0 * h / w + 0.8), dpi=150)
    ax = fig.add_axes([0.02, 0.02, 0.96, 0.96 * (7.0 * h / w) / (7.0 * h / w + 0.8)])
    ax.imshow(levels, cmap="gray", extent=(-0.5, w - 0.5, h - 0.5, -0.5), interpolation="nearest")
    center = (edits or {}).get("center") or result.get("center_px")
    sub = result.get("substrate") or {}
    sub_hk = sub_xy = np.zeros((0, 2))

    def lines(x, y, **kw):  # net_lines' None-separated polylines as one matplotlib line
        ax.plot([np.nan if v is None else v for v in x], [np.nan if v is None else v for v in y], **kw)

    if sub.get("a_star_px") is not None and center is not None:
        sub_hk, sub_xy = _substrate_points(result, center, w, h)
        lines(*net_lines(sub_xy, sub_hk), color=SUBSTRATE_COLOUR, lw=0.6, alpha=0.45, label="substrate net")
        for i, v in enumerate(np.asarray(sub["a_star_px"], dtype=float)):
            tip = (center[0] + v[0], center[1] + v[1])
            ax.annotate("", xy=tip, xytext=(center[0], center[1]),
                        arrowprops=dict(arrowstyle="->", color=SUBSTRATE_COLOUR, lw=1.5))
            u = v / max(np.hypot(*v), 1e-9)
            ax.text(tip[0] + 14 * u[0] * factor, tip[1] + 14 * u[1] * factor, f"a{i + 1}*", color=SUBSTRATE_COLOUR,
                    ha="center", va="center", fontsize=9, fontweight="bold",
                    bbox=dict(facecolor="black", alpha=0.6, pad=1.5, lw=0))
    overlayer = result.get("overlayer") or {}
    preds = _domain_predictions(result, overlayer, w, h)
    mats = _domain_matrices(overlayer)
    spots, sxy = _spot_arrays(result)
    for i, p in enumerate(preds):
        col = domain_colour(i)
        if i < len(mats):
            n_xy, n_idx = _domain_net_points(p, mats[i], sub_hk, sub_xy)
            lines(*net_lines(n_xy, n_idx), color=col, lw=0.8, alpha=0.7, label=f"domain {i + 1}")
        absent = _absent(p["xy"], sxy)
        if absent.any():
            ax.scatter(p["xy"][absent, 0], p["xy"][absent, 1], marker="|", s=30, c=col, alpha=0.55, linewidths=1.0)
    if len(sxy):
        owner = _spot_domains(spots, sxy, preds, use_own=True)
        colours = [domain_colour(d) if d is not None else
                   (INTEGER_SPOT_COLOUR if s.get("kind") == "integer" else UNEXPLAINED_COLOUR)
                   for s, d in zip(spots, owner)]
        ax.scatter(sxy[:, 0], sxy[:, 1], marker="o", s=40, facecolors="none", edgecolors=colours,
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
