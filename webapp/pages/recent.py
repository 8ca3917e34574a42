"""``/recent``: the group's saved analyses, newest first, with thumbnails; search, delete with a
confirmation, and the recently deleted ones (restorable for 30 days)."""

from __future__ import annotations

from datetime import timedelta

from dash import ALL, Input, Output, State, callback, ctx, dcc, html, register_page
from dash.exceptions import PreventUpdate

from webapp import ids, runtime
from webapp.pages.common import fail
from webapp.store import KEEP_DELETED_DAYS

register_page(__name__, path="/recent", title="recinet: saved analyses", name="Saved analyses", order=10)

PAGE_SIZE = 48
__all__ = ["cards", "deleted_rows", "layout", "list_view", "ask_delete", "confirm_delete", "restore"]


def _name(a) -> str:
    return a.sample_name or "Untitled sample"


def cards(analyses, *, deletable: bool = True) -> list:
    """One card per saved analysis; every user text goes in as text, never as markup.

    Parameters
    ----------
    analyses : sequence of SavedAnalysis
        The analyses shown.
    deletable : bool, keyword-only
        Each card gets a 'Delete' button.

    Returns
    -------
    list of dash components
        The cards.
    """
    out = []
    for a in analyses:
        p = a.parameters or {}
        card = html.A(href=f"/analysis/{a.token}", className="card", children=[
            html.Img(src=f"/thumb/{a.image_sha256}.png", alt="pattern thumbnail"),
            html.Div(_name(a), className="card-title"),
            html.Div(a.summary or "not analysed", className="card-result"),
            html.Div(f"{p.get('substrate', '')} · {p.get('energy_eV', '')} eV", className="muted"),
            html.Div(f"{a.created_at:%Y-%m-%d %H:%M} UTC", className="muted"),
        ])
        if not deletable:
            out.append(card)
            continue
        out.append(html.Div(className="card-wrap", children=[
            card,
            html.Button("Delete", id={"type": ids.RECENT_DELETE, "token": a.token}, className="small",
                        title="Delete (recoverable for 30 days)"),
        ]))
    return out


def deleted_rows(analyses) -> list:
    """The recently deleted analyses: name, result, when they go for good, and 'Restore'.

    Parameters
    ----------
    analyses : sequence of SavedAnalysis
        Deleted analyses (``deleted_at`` set).

    Returns
    -------
    list of dash components
        One row each, or a line saying there are none.
    """
    if not analyses:
        return [html.P("Nothing deleted in the last 30 days.", className="muted")]
    out = []
    for a in analyses:
        purge = a.deleted_at + timedelta(days=KEEP_DELETED_DAYS)
        out.append(html.Div(className="row deleted-row", children=[
            html.Span(_name(a), className="card-title"),
            html.Span(a.summary or "not analysed"),
            html.Span(f"deleted {a.deleted_at:%Y-%m-%d %H:%M} UTC, kept until {purge:%Y-%m-%d}", className="muted"),
            html.Button("Restore", id={"type": ids.RECENT_RESTORE, "token": a.token}, className="small"),
        ]))
    return out


def _count_line(total: int, query: str) -> str:
    if query.strip():
        return f"{total} saved analyses match '{query.strip()}'." if total != 1 else \
            f"1 saved analysis matches '{query.strip()}'."
    return f"{total} saved in this group." if total else \
        "Nothing saved yet: analyse an image and press 'Save and make a link'."


def list_view(query, _changed, page):
    """The cards, the count line, the page links and the deleted list for a search.

    Parameters
    ----------
    query : str or None
        Words to search for in sample names, notes and results (Wood notation).
    _changed : int or None
        Bumped after a delete or restore.
    page : int or None
        The page of the list (0: newest).

    Returns
    -------
    tuple
        Cards, count line, page links, deleted rows.
    """
    q = str(query or "")
    n = page if isinstance(page, int) and page >= 0 else 0
    store = runtime.get_store()
    items = store.recent(PAGE_SIZE, offset=n * PAGE_SIZE, query=q)
    total = store.count_analyses(query=q)
    nav = []
    if n > 0:
        nav.append(html.A("← newer", href=f"/recent?page={n - 1}"))
    if (n + 1) * PAGE_SIZE < total:
        nav.append(html.A("older →", href=f"/recent?page={n + 1}"))
    return cards(items), _count_line(total, q), nav, deleted_rows(store.deleted())


def layout(page: str | None = None, **_query):
    """The list page.

    Parameters
    ----------
    page : str, optional
        The page of the list, from the address (``?page=2``).
    **_query
        Other query parameters (ignored).

    Returns
    -------
    dash.html.Div
        The page.
    """
    try:
        n = max(0, int(page or 0))
    except ValueError:
        n = 0
    items, count, nav, deleted = list_view("", None, n)
    return html.Div(className="page-list", children=[
        html.H1("Saved analyses"),
        html.Div(className="row", children=[
            html.Label("Search", htmlFor=ids.RECENT_SEARCH),
            dcc.Input(id=ids.RECENT_SEARCH, type="search", debounce=True, maxLength=200, className="grow",
                      placeholder="sample name, notes or Wood notation, e.g. Pt(111) oxygen (sqrt3xsqrt3)R30"),
        ]),
        html.P(count, id=ids.RECENT_COUNT, className="muted"),
        html.Div(id=ids.RECENT_NOTE, **{"aria-live": "polite"}),
        html.Div(items, id=ids.RECENT_LIST, className="cards"),
        html.Div(nav, id=ids.RECENT_NAV, className="row"),
        html.Details(id=ids.RECENT_DELETED_VIEW, children=[
            html.Summary("Recently deleted (restorable for 30 days)"),
            html.Div(deleted, id=ids.RECENT_DELETED_LIST),
        ]),
        dcc.ConfirmDialog(id=ids.RECENT_CONFIRM),
        dcc.Store(id=ids.RECENT_PENDING),
        dcc.Store(id=ids.RECENT_CHANGED, data=0),
        dcc.Store(id=ids.RECENT_PAGE, data=n),
    ])


def ask_delete(clicks):
    """A 'Delete' button was pressed: ask before deleting.

    Parameters
    ----------
    clicks : list of int or None
        The Delete buttons' clicks.

    Returns
    -------
    tuple
        The dialog shown, its message, the analysis waiting for the answer.
    """
    trig = ctx.triggered_id
    if not isinstance(trig, dict) or not any(c for c in (clicks or []) if c) or not ctx.triggered[0].get("value"):
        raise PreventUpdate
    a = runtime.get_store().get_analysis(trig.get("token"))
    if a is None:
        raise PreventUpdate
    msg = (f"Delete '{_name(a)}' ({a.summary or 'not analysed'})? Its link stops working; "
           f"'Recently deleted' below brings it back for {KEEP_DELETED_DAYS} days.")
    return True, msg, a.token


def confirm_delete(submitted, token, changed):
    """The deletion was confirmed: mark it deleted.

    Parameters
    ----------
    submitted : int or None
        Clicks of the dialog's OK.
    token : str or None
        The analysis waiting for the answer.
    changed : int or None
        The list's change counter.

    Returns
    -------
    tuple
        The bumped counter and a one-line note.
    """
    if not submitted or not token:
        raise PreventUpdate
    store = runtime.get_store()
    a = store.get_analysis(token)
    try:
        ok = store.delete_analysis(token)
    except Exception as err:  # noqa: BLE001 - a database fault becomes one line
        return (changed or 0) + 1, html.Div(fail(err), className="note-error")
    if not ok or a is None:
        return (changed or 0) + 1, html.Div("That analysis was already deleted.", className="note-error")
    return (changed or 0) + 1, html.Div(f"Deleted '{_name(a)}'. 'Recently deleted' below brings it back.",
                                        className="note-ok")


def restore(clicks, changed):
    """A 'Restore' button was pressed: bring the analysis back into the list.

    Parameters
    ----------
    clicks : list of int or None
        The Restore buttons' clicks.
    changed : int or None
        The list's change counter.

    Returns
    -------
    tuple
        The bumped counter and a one-line note.
    """
    trig = ctx.triggered_id
    if not isinstance(trig, dict) or not ctx.triggered[0].get("value"):
        raise PreventUpdate
    try:
        ok = runtime.get_store().restore_analysis(trig.get("token"))
    except Exception as err:  # noqa: BLE001
        return (changed or 0) + 1, html.Div(fail(err), className="note-error")
    note = "Restored: it is back in the list and its link works again." if ok else \
        "That analysis is no longer kept (deleted over 30 days ago) or was restored already."
    return (changed or 0) + 1, html.Div(note, className="note-ok" if ok else "note-error")


callback(Output(ids.RECENT_LIST, "children"), Output(ids.RECENT_COUNT, "children"), Output(ids.RECENT_NAV, "children"),
         Output(ids.RECENT_DELETED_LIST, "children"),
         Input(ids.RECENT_SEARCH, "value"), Input(ids.RECENT_CHANGED, "data"), State(ids.RECENT_PAGE, "data"),
         prevent_initial_call=True)(list_view)
callback(Output(ids.RECENT_CONFIRM, "displayed"), Output(ids.RECENT_CONFIRM, "message"),
         Output(ids.RECENT_PENDING, "data"), Input({"type": ids.RECENT_DELETE, "token": ALL}, "n_clicks"),
         prevent_initial_call=True)(ask_delete)
callback(Output(ids.RECENT_CHANGED, "data"), Output(ids.RECENT_NOTE, "children"),
         Input(ids.RECENT_CONFIRM, "submit_n_clicks"), State(ids.RECENT_PENDING, "data"),
         State(ids.RECENT_CHANGED, "data"), prevent_initial_call=True)(confirm_delete)
callback(Output(ids.RECENT_CHANGED, "data", allow_duplicate=True),
         Output(ids.RECENT_NOTE, "children", allow_duplicate=True),
         Input({"type": ids.RECENT_RESTORE, "token": ALL}, "n_clicks"), State(ids.RECENT_CHANGED, "data"),
         prevent_initial_call=True)(restore)
