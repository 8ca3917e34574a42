"""``/compare?a=TOKEN&b=TOKEN``: two saved analyses side by side, what differs highlighted."""

from __future__ import annotations

from dash import Input, Output, callback, dcc, html, register_page

from webapp import comparison, figures, ids, runtime, service
from webapp.pages.common import fail, note

register_page(__name__, path="/compare", title="recinet: compare two analyses", name="Compare", order=15)

_OVERLAYS = ("spots", "substrate", "domains")
_GRAPH_STYLE = {"height": "460px"}


def _choices(extra=()) -> list[dict]:
    store = runtime.get_store()
    seen, out = set(), []
    for a in [x for x in (store.get_analysis(t) for t in extra if t) if x is not None] + store.recent(100):
        if a.token in seen:
            continue
        seen.add(a.token)
        p = a.parameters or {}
        label = (f"{a.sample_name or a.image_filename} · {a.summary or 'not analysed'} · "
                 f"{p.get('energy_eV', '?')} eV · {a.created_at:%Y-%m-%d %H:%M}")
        out.append({"label": label[:120], "value": a.token})
    return out


def _figure(a):
    """The saved pattern as the analyse page draws it, read-only."""
    try:
        data = service.image_array(a.image_sha256)
        small, f = figures.downsample(data, 1024)
        src = figures.png_data_url(figures.display_levels(small))
        fig = figures.pattern_figure(src, width=a.width, height=a.height, factor=f, result=a.result,
                                     overlays=_OVERLAYS, edits=a.edits, editable=False, revision=a.token)
        # the legend over the plot's left margin, so both sides keep the same plot area
        fig.update_layout(legend={"orientation": "v", "x": 0.0, "xanchor": "left", "y": 1.0, "yanchor": "top",
                                  "bgcolor": "rgba(20,20,20,0.75)", "font": {"size": 10, "color": "#eeeeee"}},
                          margin={"l": 10, "r": 10, "t": 10, "b": 30})
        return fig
    except Exception as err:  # noqa: BLE001 - one unreadable image must not hide the other side
        return figures.empty_figure(fail(err))


def _side(a, which: str):
    p = a.parameters or {}
    return html.Div(className="panel compare-side", id=f"compare-side-{which}", children=[
        html.H2(f"{which.upper()}: {a.sample_name or 'Untitled sample'}"),
        html.P([f"{a.image_filename} · {p.get('substrate', '?')} · {p.get('energy_eV', '?')} eV · saved "
                f"{a.created_at:%Y-%m-%d %H:%M} UTC · ", html.A("open", href=f"/analysis/{a.token}")],
               className="muted"),
        dcc.Graph(figure=_figure(a), config={"displaylogo": False, "scrollZoom": True}, style=_GRAPH_STYLE),
    ])


def _table(rows):
    head = html.Tr([html.Th("Quantity"), html.Th("A"), html.Th("B"), html.Th("")])
    body = [html.Tr(className="differs" if r.differs else "same", **{"data-label": r.label}, children=[
        html.Th(r.label), html.Td(r.a), html.Td(r.b), html.Td("differs" if r.differs else "same",
                                                             className="compare-flag")]) for r in rows]
    n = sum(r.differs for r in rows)
    return html.Div(className="panel", children=[
        html.H2("Differences"),
        html.P(f"{n} of {len(rows)} quantities differ (highlighted). Matrices that span the same lattice count as "
               "the same; numbers differ beyond twice their combined uncertainty, or 0.5 % without one.",
               className="muted"),
        html.Table(className="facts compare-table", id=ids.COMPARE_TABLE, children=[html.Thead(head), html.Tbody(body)]),
    ])


def comparison_body(token_a, token_b):
    """The two sides and the table of differences, or a one-line note for a missing analysis.

    Parameters
    ----------
    token_a, token_b : str or None
        Share tokens of the two saved analyses.

    Returns
    -------
    tuple
        (body, link href or None).
    """
    if not token_a or not token_b:
        return html.P("Pick two saved analyses to compare.", className="muted"), None
    try:
        store = runtime.get_store()
        found = [store.get_analysis(t) for t in (token_a, token_b)]
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), None
    for which, a in zip("AB", found):
        if a is None:
            return note(f"No saved analysis has the link given for {which}; pick another."), None
    a, b = found
    rows = comparison.compare_results({"parameters": a.parameters, "result": a.result},
                                      {"parameters": b.parameters, "result": b.result})
    body = html.Div(children=[
        html.Div(className="compare-sides", style={"display": "grid", "gridTemplateColumns": "1fr 1fr", "gap": "1rem"},
                 children=[_side(a, "a"), _side(b, "b")]),
        _table(rows),
    ])
    return body, f"/compare?a={a.token}&b={b.token}"


def layout(a: str | None = None, b: str | None = None, **_query):
    opts = _choices((a, b))
    known = {o["value"] for o in opts}
    missing = [w for w, t in (("A", a), ("B", b)) if t and t not in known]
    a, b = (t if t in known else None for t in (a, b))
    return html.Div(className="page-list", children=[
        html.H1("Compare two analyses"),
        html.Div(className="row", children=[
            html.Label("A", htmlFor=ids.COMPARE_A),
            dcc.Dropdown(id=ids.COMPARE_A, options=opts, value=a, placeholder="a saved analysis", className="grow"),
            html.Label("B", htmlFor=ids.COMPARE_B),
            dcc.Dropdown(id=ids.COMPARE_B, options=opts, value=b, placeholder="another one", className="grow"),
        ]),
        note(f"No saved analysis has the link given for {' and '.join(missing)}; pick one below." if missing
             else None),
        html.A("Link to this comparison", id=ids.COMPARE_LINK, href="", style={"display": "none"}),
        dcc.Loading(html.Div(id=ids.COMPARE_BODY)),
    ])


def on_pick(token_a, token_b):
    """Both picks made: draw the comparison and give its link.

    Parameters
    ----------
    token_a, token_b : str or None
        The picked share tokens.

    Returns
    -------
    tuple
        (body, link href, link style).
    """
    body, href = comparison_body(token_a, token_b)
    return body, href or "", {} if href else {"display": "none"}


callback(
    Output(ids.COMPARE_BODY, "children"), Output(ids.COMPARE_LINK, "href"), Output(ids.COMPARE_LINK, "style"),
    Input(ids.COMPARE_A, "value"), Input(ids.COMPARE_B, "value"),
)(on_pick)
