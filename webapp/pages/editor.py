"""The editor: drop an image, analyse it, correct it by hand, save and share it."""

from __future__ import annotations

from dash import html, register_page

from webapp import runtime
from webapp.pages.analyse import workspace

register_page(__name__, path="/", title="recinet: analyse a LEED pattern", name="Analyse", order=0)


def layout(copy: str | None = None, **_query):
    """``/?copy=<token>`` opens a saved analysis for editing (saving makes a new link)."""
    if copy:
        a = runtime.get_store().get_analysis(copy)
        if a is None:
            return workspace(header=html.Div("No saved analysis has this link; starting afresh.",
                                                       className="note note-error", role="alert"))
        image = {"sha": a.image_sha256, "filename": a.image_filename, "width": a.width, "height": a.height}
        record = {"sha": a.image_sha256, "parameters": a.parameters, "edits": a.edits, "result": a.result}
        return workspace(
            image=image, record=record, energy=a.parameters.get("energy_eV"),
            substrate=a.parameters.get("substrate", ""), sample_name=a.sample_name, notes=a.notes, token=a.token,
            header=html.Div(["Editing a copy of ", html.A(a.sample_name or a.token, href=f"/analysis/{a.token}"),
                             "; saving makes a new link."], className="note note-ok"))
    return workspace()
