"""``/analysis/<token>``: a saved analysis, read-only, with 'copy to edit'."""

from __future__ import annotations

from dash import html, register_page

from webapp import ids, runtime
from webapp.pages.analyse import workspace

register_page(__name__, path_template="/analysis/<token>", title="recinet: saved analysis", name="Saved analysis")


def layout(token: str | None = None, **_query):
    a = runtime.get_store().get_analysis(token or "")
    if a is None:
        return html.Div(className="page-message", children=[
            html.H1("Not found"),
            html.P("No saved analysis has this link. It may have been mistyped.", role="alert"),
            html.A("Back to the list of saved analyses", href="/recent"),
        ])
    image = {"sha": a.image_sha256, "filename": a.image_filename, "width": a.width, "height": a.height}
    record = {"sha": a.image_sha256, "parameters": a.parameters, "edits": a.edits, "result": a.result}
    p = a.parameters
    header = html.Div(className="panel", children=[
        html.H1(a.sample_name or "Untitled sample", id=ids.SHARED_TITLE),
        html.P(f"{a.image_filename} · {p.get('substrate', '?')} · {p.get('energy_eV', '?')} eV · saved "
               f"{a.created_at:%Y-%m-%d %H:%M} UTC", className="muted"),
        html.P(a.notes, className="notes-text") if a.notes else None,
        html.A("Copy to edit", href=f"/?copy={a.token}", id=ids.COPY_TO_EDIT, className="button"),
        " ",
        html.A("Compare with another", href=f"/compare?a={a.token}", id=ids.COMPARE_FROM, className="button"),
    ])
    return workspace(readonly=True, image=image, record=record, energy=p.get("energy_eV"),
                               substrate=p.get("substrate", ""), sample_name=a.sample_name, notes=a.notes,
                               token=a.token, header=header)
