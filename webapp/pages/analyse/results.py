"""The result panel, the other candidates and the real-space drawing."""

from __future__ import annotations

import numpy as np
from dash import ALL, Input, Output, State, callback, ctx, html
from dash.exceptions import PreventUpdate

from analysis.superstructure import format_matrix
from webapp import figures, ids, service
from webapp.pages.common import fail, note

from .phases import phases_panel, plane_group_panel
from .state import candidate, result_of

__all__ = ["show_result", "on_domain_focus", "on_show_best"]

def _fmt_pm(value, err, unit="", digits=3):
    if value is None:
        return "–"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    s = f"{v:.{digits}f}"
    if err is not None:
        try:
            s += f" ± {float(err):.{digits}f}"
        except (TypeError, ValueError):
            pass
    return s + unit


def _uncertainty(d: dict, base: str):
    sig = d.get("sigma")
    if isinstance(sig, dict) and sig.get(base) is not None:
        return sig[base]
    for k in (f"{base}_err", f"{base}_sigma", f"{base}_unc", f"sigma_{base}", f"d{base}"):
        if k in d:
            return d[k]
    stem = base.split("_")[0]
    for k, v in d.items():
        if k.startswith(stem) and any(t in k for t in ("err", "sigma", "unc")) and isinstance(v, (int, float)):
            return v
    unc = d.get("uncertainties") or d.get("uncertainty")
    if isinstance(unc, dict):
        return unc.get(base) or unc.get(stem)
    return None


def _matrix_table(m, cls="matrix"):
    m = np.asarray(m, dtype=float)
    text = format_matrix(m)
    inner = text.strip("()").split(" / ")
    return html.Span(className=cls, title=text, children=[
        html.Span("(", className="paren"),
        html.Span(className="rows", children=[html.Span(r, className="mrow") for r in inner]),
        html.Span(")", className="paren"),
    ])


def show_result(record, image, pick):
    """Result panel, candidate list and real-space drawing from the stored record.

    With a candidate picked, the pattern draws that candidate: the panel says so at its top,
    and its Domains row lists the domains drawn (the buttons bring one domain's net forward).

    Parameters
    ----------
    record : dict or None
        The analysis store: ``sha``, ``parameters``, ``edits``, ``result``.
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.
    pick : int or None
        The candidate picked.

    Returns
    -------
    tuple
        Result panel, candidate options, candidate list and real-space figure.
    """
    result = result_of(record, image)
    empty = figures.empty_figure("The cells appear after an analysis", height=300)
    if not result:
        return html.P("No analysis yet.", className="muted"), [], None, empty
    try:
        return _result_children(result, record, pick), _candidate_options(result), _candidate_note(result, pick), \
            _real_space(result, pick)
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), [], None, empty


def _shown_note(result, pick):
    """A note when the pattern shows a picked candidate rather than the best-scoring answer."""
    cand = candidate(result, pick)
    if cand is None:
        return None
    ov = result.get("overlayer") or {}
    what = " ".join(str(x) for x in (cand.get("wood"), _matrix_text(cand.get("matrix"))) if x)
    best = ov.get("wood") or _matrix_text(ov.get("matrix")) or "the best-scoring answer"
    return html.Div(
        [html.B(f"The pattern shows candidate {int(pick) + 1}"), f" ({what or 'picked'}). ",
         f"The facts below are those of the best-scoring answer, {best}. ",
         html.Button("Show the best answer", id=ids.SHOW_BEST, className="small")],
        className="note note-warn", id=ids.SHOWN_NOTE, **{"data-pick": str(int(pick))})


def _matrix_text(m) -> str:
    try:
        return format_matrix(m) if m is not None else ""
    except (TypeError, ValueError):
        return ""


def _domain_buttons(domains, shown_label: str | None):
    """One button per domain drawn: a click brings its net forward on the pattern (again: all alike)."""
    if not domains:
        return "–"
    items = [html.Button([html.Span(f"{i + 1}: ", className=f"dom dom{i % 6}"), _matrix_table(m)],
                         id={"type": ids.DOMAIN_BUTTON, "index": i}, className="domain-button",
                         title="Bring this domain's net forward on the pattern (click again for all)")
             for i, m in enumerate(domains)]
    if shown_label:
        items.insert(0, html.Div(shown_label, className="muted"))
    return items


def _result_children(result, record, pick=None):
    sub = result.get("substrate") or {}
    ov = result.get("overlayer") or {}
    spots = result.get("spots") or []
    params = (record or {}).get("parameters") or {}
    a, b, g = sub.get("a_angstrom"), sub.get("b_angstrom"), sub.get("gamma_deg")
    label = str(sub.get("spec") or params.get("substrate") or "–")
    if sub.get("net") and sub.get("net") != label:
        label += f" ({sub['net']})"
    rows = [
        ("Substrate", label),
        ("a", _fmt_pm(a, _uncertainty(sub, "a_angstrom"), " Å")),
        ("b", _fmt_pm(b, _uncertainty(sub, "b_angstrom"), " Å")),
        ("γ", _fmt_pm(g, _uncertainty(sub, "gamma_deg"), "°", 2)),
    ]
    rec = (sub.get("a_star_invA"), sub.get("b_star_invA"), sub.get("gamma_star_deg"))
    if None in rec:
        rec = service.reciprocal_parameters(a, b, g)
    if rec:
        rows.append(("Reciprocal net", f"a* {rec[0]:.4f} Å⁻¹, b* {rec[1]:.4f} Å⁻¹, γ* {rec[2]:.2f}° (no 2π)"))
    rows.append(("Energy", f"{float(params['energy_eV']):g} eV" if params.get("energy_eV") else "–"))
    kinds = [s.get("kind") for s in spots]
    spot_line = f"{len(spots)} spot" + ("" if len(spots) == 1 else "s")
    if any(kinds):
        other = sum(1 for s in spots if s.get("kind") == "unexplained" and isinstance(s.get("phase"), int)
                    and s["phase"] >= 1)  # explained by a coexisting phase
        spot_line += (f" ({kinds.count('integer')} substrate, {kinds.count('fractional')} overlayer, "
                      + (f"{other} of other phases, " if other else "")
                      + f"{kinds.count('unexplained') - other} unexplained)")
    manual = sum(1 for s in spots if s.get("manual"))
    if manual:
        spot_line += f", {manual} added by hand"
    cut = sum(1 for s in spots if s.get("trusted") is False)
    if cut:
        spot_line += f"; {cut} not counted in the scores (centre cut by a mask edge or fit failed)"
    if sub.get("lattice_source"):
        rows.append(("Lattice from", str(sub["lattice_source"])))
    kind = ov.get("kind") or "–"
    wood = ov.get("wood")
    shown = candidate(result, pick)
    drawn = shown if shown is not None else ov
    domains = drawn.get("domains") or ([drawn["matrix"]] if drawn.get("matrix") is not None else [])
    table = html.Table(className="facts", children=[html.Tbody(
        [html.Tr([html.Th(k), html.Td(v)]) for k, v in rows]
        + [html.Tr([html.Th("Spots"), html.Td(spot_line, id=ids.SPOT_COUNT, **{"data-count": str(len(spots))})])]
    )])
    answer = html.Table(className="facts answer", children=[html.Tbody([
        html.Tr([html.Th("Overlayer"), html.Td(kind)]),
        html.Tr([html.Th("Wood notation"), html.Td(wood if wood else "none exists", id=ids.WOOD)]),
        *([html.Tr([html.Th(""), html.Td(str(ov["wood_note"]), className="muted")])] if ov.get("wood_note") else []),
        html.Tr([html.Th("Matrix"), html.Td(_matrix_table(ov["matrix"]) if ov.get("matrix") is not None else "–",
                                            id=ids.MATRIX,
                                            **({"data-matrix": format_matrix(ov["matrix"])} if ov.get("matrix") is not None else {}))]),
        html.Tr([html.Th("Coverage"), html.Td(_fmt_pm(ov.get("coverage"), None, " ML", 3)
                                              + " for one adsorbate per cell"
                                              if ov.get("coverage") is not None else "–")]),
        html.Tr([html.Th("Domains"), html.Td(_domain_buttons(
            domains, f"of candidate {int(pick) + 1}, as drawn:" if shown is not None else None))]),
        *([html.Tr([html.Th("Same beams as"), html.Td(
            "; ".join(f"{t['name']} in {t['n_domains']} domain{'s' if t['n_domains'] > 1 else ''}"
                      for t in ov["same_beams_as"])
            + ": its beams lie at the same places, so only the spots' intensities (domain populations, "
              "I(V) curves) tell it from this answer", id=ids.SAME_BEAMS, className="muted")])]
          if ov.get("same_beams_as") else []),
    ])])
    warn = [html.Div(str(w), className="note note-warn") for w in (result.get("warnings") or [])]
    return [n for n in (_shown_note(result, pick), *warn, answer, phases_panel(ov), plane_group_panel(ov), table)
            if n is not None]


def on_show_best(n_clicks):
    """'Show the best answer' in the note -> no candidate picked.

    Parameters
    ----------
    n_clicks : int or None
        The link's clicks.
    """
    if not n_clicks:
        raise PreventUpdate
    return None


def on_domain_focus(clicks, pick, record, current):
    """A domain button -> that domain brought forward (a second click: all alike); a new result
    or another candidate -> none.

    Parameters
    ----------
    clicks : list of int or None
        Clicks of each domain button.
    pick : int or None
        The candidate picked.
    record : dict or None
        The analysis store: ``sha``, ``parameters``, ``edits``, ``result``.
    current : int or None
        The domain brought forward now.

    Returns
    -------
    int or None
        The domain brought forward (None: all alike).
    """
    trig = ctx.triggered_id if _in_callback() else None
    fired = {str(t.get("prop_id", "")).rsplit(".", 1)[0] for t in ctx.triggered} if _in_callback() else set()
    if fired & {ids.RESULT, ids.CANDIDATE_PICK}:  # a new answer or another candidate: all domains alike
        return None
    if isinstance(trig, dict) and trig.get("type") == ids.DOMAIN_BUTTON:
        if not any(clicks or []):
            raise PreventUpdate  # the buttons were just drawn
        i = int(trig.get("index"))
        return None if current == i else i
    return None


def _in_callback() -> bool:
    try:
        return bool(ctx.triggered)
    except Exception:  # noqa: BLE001 - called as a plain function, outside a callback
        return False


def _candidate_label(c: dict, i: int) -> str:
    parts = [f"{i + 1}."]
    if c.get("wood"):
        parts.append(str(c["wood"]))
    if c.get("matrix") is not None:
        try:
            parts.append(format_matrix(c["matrix"]))
        except (TypeError, ValueError):
            pass
    if c.get("kind"):
        parts.append(str(c["kind"]))
    for key in ("score", "cost", "rms_px"):
        if isinstance(c.get(key), (int, float)):
            parts.append(f"{key.replace('_', ' ')} {c[key]:.3g}")
            break
    if isinstance(c.get("explained"), (int, float)):
        parts.append(f"explains {int(c['explained'])}")
    costs = _score_costs(c)
    if costs:
        parts.append("costs: " + ", ".join(costs))
    return "  ".join(parts)


def _score_costs(c, most: int = 3) -> list[str]:
    """The score terms that cost a candidate most, e.g. ``['unexplained −3', 'extra domains −1']``."""
    terms = ((c.get("score_terms") or {}).get("terms") or {}) if isinstance(c, dict) else {}
    costs = [(float(t.get("contribution", 0.0)), name) for name, t in terms.items()
             if isinstance(t, dict) and isinstance(t.get("contribution"), (int, float))]
    costs = sorted((v, n) for v, n in costs if v <= -0.05)[:most]
    return [f"{n.replace('_', ' ')} −{abs(v):.2g}" for v, n in costs]


def _candidate_options(result):
    cands = [c for c in (result.get("candidates") or []) if isinstance(c, dict)]
    return [{"label": _candidate_label(c, i), "value": i} for i, c in enumerate(cands[:20])]


def _candidate_note(result, pick):
    if not (result.get("candidates") or []):
        return html.P("No other candidates.", className="muted")
    if pick is None:
        return html.P("Pick one to see its spots over the image.", className="muted")
    return None


def _real_space(result, pick):
    sub = result.get("substrate") or {}
    chosen = candidate(result, pick) or result.get("overlayer") or {}
    mats = chosen.get("domains") or ([chosen["matrix"]] if chosen.get("matrix") is not None else [])
    vec = service.substrate_vectors(sub)
    return figures.real_space_figure(vec, mats, label=str(sub.get("spec") or sub.get("net") or "substrate"))



callback(
    Output(ids.RESULT_PANEL, "children"), Output(ids.CANDIDATE_PICK, "options"), Output(ids.CANDIDATES, "children"),
    Output(ids.REAL_SPACE, "figure"),
    Input(ids.RESULT, "data"), Input(ids.IMAGE, "data"), Input(ids.CANDIDATE_PICK, "value"),
)(show_result)

callback(
    Output(ids.CANDIDATE_PICK, "value", allow_duplicate=True),
    Input(ids.SHOW_BEST, "n_clicks"),
    prevent_initial_call=True,
)(on_show_best)

callback(
    Output(ids.DOMAIN_FOCUS, "data"),
    Input({"type": ids.DOMAIN_BUTTON, "index": ALL}, "n_clicks"), Input(ids.CANDIDATE_PICK, "value"),
    Input(ids.RESULT, "data"), State(ids.DOMAIN_FOCUS, "data"),
    prevent_initial_call=True,
)(on_domain_focus)
