"""Trying a model typed as a matrix or in Wood notation on the fitted substrate net."""

from __future__ import annotations

from dash import Input, Output, State, callback, html
from dash.exceptions import PreventUpdate

from webapp import ids, service
from webapp.pages.common import fail, note

from .state import result_of

__all__ = ["on_try_model"]

def on_try_model(n_clicks, n_submit, text, record, image, substrate):
    """Draw and score a model typed by hand (a matrix or a Wood notation) on the analysed spots.

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    n_submit : int or None
        Enter pressed in the field.
    text : str or None
        The model typed.
    record : dict or None
        The analysis store.
    image : dict or None
        The image store.
    substrate : str or None
        The substrate field.

    Returns
    -------
    model : dict or None
        :func:`webapp.service.try_model` of the text.
    note : dash.html.Div
        Its counts, or what went wrong.
    """
    if not n_clicks and not n_submit:
        raise PreventUpdate
    result = result_of(record, image)
    if not result:
        return None, note("Analyse the image first: the model is drawn on the fitted substrate net.")
    try:
        m = service.try_model(text, record)
    except Exception as err:  # noqa: BLE001
        return None, note(fail(err))
    msg = (f"{m['label']} ({m['kind']}, {m['n_domains']} domain{'s' if m['n_domains'] != 1 else ''}): "
           f"explains {m['explained']} spots beyond the substrate's; {m['unexplained']} stay unexplained.")
    return m, html.Div(msg, className="note note-ok", id=ids.MODEL_COUNTS,
                       **{"data-explained": str(m["explained"]), "data-unexplained": str(m["unexplained"])})


callback(
    Output(ids.MODEL, "data"), Output(ids.MODEL_NOTE, "children"),
    Input(ids.MODEL_TRY, "n_clicks"), Input(ids.MODEL_TEXT, "n_submit"),
    State(ids.MODEL_TEXT, "value"), State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SUBSTRATE, "value"),
    prevent_initial_call=True,
)(on_try_model)
