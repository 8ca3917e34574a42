"""Beside the answer: every overlayer phase found on the surface, and what the missing beams say
about the layer's plane group (glide lines), with the beams that are the evidence."""

from __future__ import annotations

from fractions import Fraction

from dash import html

from analysis.superstructure import format_matrix
from webapp import ids

__all__ = ["phases_panel", "plane_group_panel", "beam_text", "axis_text"]

_SUB = str.maketrans("12", "₁₂")


def beam_text(hk) -> str:
    """A beam's (h, k) in substrate units as small fractions, e.g. ``(1/2, 0)``.

    Parameters
    ----------
    hk : sequence of 2 float
        The indices.

    Returns
    -------
    str
        The text.

    Examples
    --------
    >>> beam_text([-1.5, 0.0]), beam_text([0.25, 0.5])
    ('(−3/2, 0)', '(1/4, 1/2)')
    """
    parts = []
    for v in list(hk or [])[:2]:
        try:
            parts.append(str(Fraction(float(v)).limit_denominator(12)).replace("-", "−"))
        except (TypeError, ValueError, OverflowError):
            parts.append("?")
    return "(" + ", ".join(parts) + ")"


def axis_text(axis) -> str:
    """A real-space cell vector in the substrate basis, e.g. ``2a₁`` or ``a₁ + a₂``.

    Parameters
    ----------
    axis : sequence of 2 int
        Its components along a1, a2.

    Returns
    -------
    str
        The text.

    Examples
    --------
    >>> axis_text([2, 0]), axis_text([1, -1]), axis_text([0, 4])
    ('2a₁', 'a₁ − a₂', '4a₂')
    """
    out = ""
    try:
        comps = (int(axis[0]), int(axis[1]))
    except (TypeError, ValueError, IndexError, OverflowError):
        return "?"
    for n, name in zip(comps, ("a1", "a2")):
        if n == 0:
            continue
        mag = "" if abs(n) == 1 else str(abs(n))
        sign = ("−" if n < 0 else "") if not out else (" − " if n < 0 else " + ")
        out += sign + mag + name.translate(_SUB)
    return out or "0"


def _matrix_text(m) -> str:
    try:
        return format_matrix(m) if m is not None else "–"
    except (TypeError, ValueError):
        return "–"


def _float(v):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if f == f else None  # NaN: not known


def _pct(v) -> str:
    f = _float(v)
    return "–" if f is None else f"{100 * f:.0f}\u00a0%"


def phases_panel(overlayer: dict | None):
    """Every overlayer phase: kind, Wood notation, matrix, domains, coverage and share of the intensity.

    Parameters
    ----------
    overlayer : dict or None
        The result's ``overlayer`` (its ``phases`` list, the dominant phase first).

    Returns
    -------
    dash.html.Div or None
        The panel, or None when no phase was found (a clean surface).
    """
    phases = [p for p in ((overlayer or {}).get("phases") or []) if isinstance(p, dict)]
    if not phases:
        return None
    if len(phases) == 1:
        lead = "One phase: every overlayer spot belongs to the cell above."
    else:
        lead = (f"{len(phases)} phases side by side: the first explains most spots and is the answer above; "
                "each further one explains spots the ones before it leave.")
    head = html.Tr([html.Th(h) for h in ("", "Cell (kind)", "Matrix", "Domains", "Coverage", "Share", "Spots")])
    rows = []
    for i, p in enumerate(phases):
        doms = p.get("domains") or ([p["matrix"]] if p.get("matrix") is not None else [])
        cov, share = _float(p.get("coverage")), _float(p.get("intensity_share"))
        rows.append(html.Tr(className="phase-row", **{"data-wood": str(p.get("wood") or ""),
                                                      "data-share": "" if share is None else f"{share:.4f}"},
                            children=[
            html.Th(f"{i + 1}"),
            html.Td([str(p.get("wood") or "no Wood notation"), html.Br(),
                     html.Span(str(p.get("kind") or "–"), className="muted")]),
            html.Td(_matrix_text(p.get("matrix"))),
            html.Td(html.Span(f"{len(doms)}", title="; ".join(_matrix_text(d) for d in doms))),
            html.Td("–" if cov is None else f"{cov:.3g} ML"),
            html.Td(_pct(p.get("intensity_share"))),
            html.Td(str(int(_float(p.get("explained")) or len(p.get("spots") or [])))),
        ]))
    return html.Div(id=ids.PHASES, className="phases", children=[
        html.H3("Phases on the surface"),
        html.P(lead, className="muted"),
        html.Table(className="phases-table", children=[html.Thead(head), html.Tbody(rows)]),
        html.P("Coverage counts one adsorbate per cell; the share is that of the summed intensity of all the "
               "phases' spots. Hover a domain count to see its matrices.", className="muted small"),
    ])


def plane_group_panel(overlayer: dict | None):
    """What the beams missing from the dominant phase say about its plane group, with the evidence.

    Parameters
    ----------
    overlayer : dict or None
        The result's ``overlayer`` (its ``plane_group`` reading and ``domains``).

    Returns
    -------
    dash.html.Div or None
        The panel, or None without a reading (a clean surface).
    """
    pg = (overlayer or {}).get("plane_group")
    if not isinstance(pg, dict):
        return None
    groups = [str(g) for g in (pg.get("groups") or [])]
    lines = [g for g in (pg.get("glide_lines") or []) if isinstance(g, dict)]
    if groups:
        verdict = "Allowed by the missing beams: " + ", ".join(groups)
    elif lines:
        verdict = "Glide lines seen, no plane group singled out"
    else:
        verdict = "The missing beams cannot tell the plane group"
    items = [html.P([html.B(verdict, id=ids.PLANE_GROUP_VERDICT, **{"data-groups": " ".join(groups)}), "."]),
             html.P(f"Cell tested: {pg.get('cell') or 'not known'}. {pg.get('note') or ''}".strip(), className="muted")]
    evidence = []
    for g in lines:
        miss = [beam_text(b) for b in (g.get("missing_beams") or [])]
        weak = [f"{beam_text((w.get('h'), w.get('k')))} at {_pct(w.get('relative_intensity'))}"
                for w in (g.get("weak_beams") or []) if isinstance(w, dict)]
        filled = [beam_text(b) for b in (g.get("filled_by_other_domains") or [])]
        parts = [html.B(f"Domain {int(_float(g.get('domain')) or 0) + 1}: glide line along {axis_text(g.get('axis') or [0, 0])}"),
                 html.Br(), "odd beams along it with no spot: " + (", ".join(miss) or "none")]
        if weak:
            parts += [html.Br(), "seen only weakly (of the domain's typical beam): " + ", ".join(weak)]
        if filled:
            parts += [html.Br(), "also made by another domain, so no evidence: " + ", ".join(filled)]
        evidence.append(html.Li(parts, className="glide-line"))
    for a in (pg.get("open_axes") or []):
        if not isinstance(a, dict):
            continue
        filled = [beam_text(b) for b in (a.get("filled_beams") or [])]
        evidence.append(html.Li([html.B(f"Domain {int(_float(a.get('domain')) or 0) + 1}, along "
                                        f"{axis_text(a.get('axis') or [0, 0])}: cannot be told"), html.Br(),
                                 "its odd beams are made by another domain too: " + (", ".join(filled) or "–")],
                                className="open-axis"))
    if evidence:
        items.append(html.Ul(evidence, className="evidence"))
    items.append(html.P("Only glide lines along the axes of a rectangular or square cell remove beams at normal "
                        "incidence; mirrors and rotations do not show in the spot positions.", className="muted small"))
    return html.Div(id=ids.PLANE_GROUP, className="plane-group", children=[html.H3("Symmetry from missing beams"),
                                                                         *items])
