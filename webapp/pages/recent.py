"""``/recent``: the group's saved analyses, newest first, with thumbnails."""

from __future__ import annotations

from dash import html, register_page

from webapp import ids, runtime

register_page(__name__, path="/recent", title="recinet: saved analyses", name="Saved analyses", order=10)

PAGE_SIZE = 48


def cards(analyses) -> list:
    """One card per saved analysis; every user text goes in as text, never as markup."""
    out = []
    for a in analyses:
        p = a.parameters or {}
        out.append(html.A(href=f"/analysis/{a.token}", className="card", children=[
            html.Img(src=f"/thumb/{a.image_sha256}.png", alt="pattern thumbnail"),
            html.Div(a.sample_name or "Untitled sample", className="card-title"),
            html.Div(a.summary or "not analysed", className="card-result"),
            html.Div(f"{p.get('substrate', '')} · {p.get('energy_eV', '')} eV", className="muted"),
            html.Div(f"{a.created_at:%Y-%m-%d %H:%M} UTC", className="muted"),
        ]))
    return out


def layout(page: str | None = None, **_query):
    try:
        n = max(0, int(page or 0))
    except ValueError:
        n = 0
    store = runtime.get_store()
    items = store.recent(PAGE_SIZE, offset=n * PAGE_SIZE)
    total = store.count_analyses()
    nav = []
    if n > 0:
        nav.append(html.A("← newer", href=f"/recent?page={n - 1}"))
    if (n + 1) * PAGE_SIZE < total:
        nav.append(html.A("older →", href=f"/recent?page={n + 1}"))
    return html.Div(className="page-list", children=[
        html.H1("Saved analyses"),
        html.P(f"{total} saved in this group." if total else "Nothing saved yet: analyse an image and press "
               "'Save and make a link'.", className="muted"),
        html.Div(cards(items), id=ids.RECENT_LIST, className="cards"),
        html.Div(nav, className="row"),
    ])
