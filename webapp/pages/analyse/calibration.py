"""Named calibrations on the analyse page: save the camera model of the analysis under a name, pick one
by name, see where the picked one came from, rename or delete it (asking first; 'Recently deleted
calibrations' brings it back for 30 days)."""

from __future__ import annotations

from datetime import timedelta

from dash import ALL, Input, Output, State, callback, ctx, html, no_update
from dash.exceptions import PreventUpdate

from webapp import calibrations, ids, runtime, service
from webapp.store import KEEP_DELETED_DAYS
from webapp.pages.common import fail, note

from .state import result_of

__all__ = ["calibration_choices", "calibration_info", "on_save_calibration", "on_pick_calibration",
           "deleted_calibration_rows", "on_rename_calibration", "on_ask_delete_calibration",
           "on_confirm_delete_calibration", "on_restore_calibration"]


def calibration_choices() -> list[dict]:
    """Named calibrations first, then saved analyses whose result carries a camera model; newest first.

    Returns
    -------
    list of dict
        Dropdown options ``{"label", "value"}``: ``"cal:<key>"`` for a named one, else a share token.
    """
    out = []
    try:
        store = runtime.get_store()
        out += [{"label": c.label()[:100], "value": c.value} for c in calibrations.list_calibrations(store)]
        for a in store.recent(40):
            if service.calibration_of(a.result) is not None:
                label = f"analysis: {a.sample_name or a.image_filename} · {a.created_at:%Y-%m-%d}"
                out.append({"label": label[:100], "value": a.token})
    except Exception:  # noqa: BLE001 - a list of choices must never break the page
        return out
    return out


def _num(v, unit=""):
    try:
        return f"{float(v):.3g}{unit}"
    except (TypeError, ValueError):
        return "not known"


def calibration_info(cal: calibrations.NamedCalibration | None):
    """Where a named calibration came from, as a small definition list (user text goes in as text).

    Parameters
    ----------
    cal : NamedCalibration or None
        The calibration.

    Returns
    -------
    dash.html.Table or None
        The facts, or None for no calibration.
    """
    if cal is None:
        return None
    p = cal.provenance or {}
    src = {"reference": "a reference image", "calibration": "a saved calibration",
           "image": "the analysed image itself"}.get(p.get("source"), "not known")
    rows = [
        ("Name", cal.name), ("Camera", cal.camera or "not given"),
        ("Energy range", f"{cal.energy_min_eV:g}–{cal.energy_max_eV:g} eV"),
        ("Saved", f"{cal.created_at:%Y-%m-%d %H:%M} UTC"),
        ("Fitted on", src),
        ("Reference image", p.get("reference_filename") or "none"),
        ("Reference energy", _num(p.get("reference_energy_eV"), " eV") if p.get("reference_filename") else "—"),
        ("Substrate", p.get("substrate") or "not given"),
        ("Analysed image", f"{p.get('image_filename') or 'not known'} at {_num(p.get('energy_eV'), ' eV')}"),
        ("Substrate-fit residual", _num(p.get("residual_px"), " px")),
    ]
    return html.Table(className="facts", id=ids.CAL_FACTS, children=html.Tbody(
        [html.Tr([html.Th(k), html.Td(str(v))]) for k, v in rows]))


def on_save_calibration(n_clicks, name, camera, e_lo, e_hi, record, image, source):
    """Save the camera model of the analysis on screen under a name -> (note, options, picked value).

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    name, camera : str or None
        As typed.
    e_lo, e_hi : float or None
        The energy range, eV; empty means the reference's energy (else the image's).
    record : dict or None
        The analysis store.
    image : dict or None
        The image store.
    source : dict or None
        The source store (a read-only page saves nothing).

    Returns
    -------
    tuple
        (note, dropdown options, dropdown value).
    """
    if not n_clicks or (source or {}).get("readonly"):
        raise PreventUpdate
    result = result_of(record, image)
    if result is None or service.calibration_of(result) is None:
        return note("Analyse an image first (best with a reference image): its camera model is what is saved."), \
            no_update, no_update
    prov = calibrations.provenance_of(record, image)
    default = prov["reference_energy_eV"] if prov["reference_filename"] else prov["energy_eV"]
    lo = default if e_lo in (None, "") else e_lo
    hi = lo if e_hi in (None, "") else e_hi
    try:
        cal = calibrations.save_calibration(runtime.get_store(), name=name, camera=camera, energy_range_eV=(lo, hi),
                                            geometry=service.calibration_of(result), provenance=prov)
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), no_update, no_update
    return note(f"Saved the calibration {cal.name!r}; it is now the screen calibration picked above.", "ok"), \
        calibration_choices(), cal.value


def on_pick_calibration(value, energy=None):
    """Show where the picked calibration came from, and say so when the energy lies outside its range.

    Parameters
    ----------
    value : str or None
        The dropdown value.
    energy : float, optional
        The beam energy typed for the image, eV.

    Returns
    -------
    dash component or None
        The facts of a named calibration, a line for a saved analysis's, or nothing.
    """
    if not value:
        return None
    if not str(value).startswith(calibrations.PREFIX):
        return html.P("The camera model of a saved analysis.", className="muted")
    try:
        cal = calibrations.get_calibration(runtime.get_store(), value)
    except Exception as err:  # noqa: BLE001
        return note(fail(err))
    if cal is None:
        return note("This calibration is no longer available; pick another.")
    try:
        e = float(energy)
    except (TypeError, ValueError):
        e = None
    warn = None
    if e is not None and not cal.energy_min_eV <= e <= cal.energy_max_eV:
        warn = note(f"It is meant for {cal.energy_min_eV:g}–{cal.energy_max_eV:g} eV; this image is at {e:g} eV.",
                    "warn")
    return [calibration_info(cal), warn]


def deleted_calibration_rows() -> list:
    """The deleted calibrations still kept: name, camera and range, when each goes for good, 'Restore'.

    Returns
    -------
    list of dash components
        One row each, or a line saying there are none.
    """
    try:
        gone = calibrations.deleted_calibrations(runtime.get_store())
    except Exception as err:  # noqa: BLE001 - a database fault must not break the page
        return [note(fail(err))]
    if not gone:
        return [html.P("No calibration deleted in the last 30 days.", className="muted")]
    return [html.Div(className="row deleted-row", children=[
        html.Span(c.label()),
        html.Span(f"deleted {c.deleted_at:%Y-%m-%d %H:%M} UTC, kept until "
                  f"{c.deleted_at + timedelta(days=KEEP_DELETED_DAYS):%Y-%m-%d}", className="muted"),
        html.Button("Restore", id={"type": ids.CAL_RESTORE, "key": c.key}, className="small"),
    ]) for c in gone]


def _picked_named(value, source):
    """The named calibration picked, or a one-line note why there is none to change."""
    if (source or {}).get("readonly"):
        return None, note("A shared analysis is read-only: open the analyse page to manage calibrations.")
    if not value or not str(value).startswith(calibrations.PREFIX):
        return None, note("Pick a named calibration above first (a saved analysis's camera model has no name "
                          "to change).")
    cal = calibrations.get_calibration(runtime.get_store(), value)
    if cal is None:
        return None, note("This calibration is no longer available; pick another.")
    return cal, None


def on_rename_calibration(n_clicks, new_name, value, energy, source):
    """'Rename' -> the picked calibration under the typed name -> (note, options, facts).

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    new_name : str or None
        As typed.
    value : str or None
        The calibration picked.
    energy : float or None
        The beam energy typed (for the facts' range line), eV.
    source : dict or None
        The source store (a read-only page changes nothing).

    Returns
    -------
    tuple
        (note, dropdown options, facts of the picked calibration).
    """
    if not n_clicks:
        raise PreventUpdate
    try:
        cal, why = _picked_named(value, source)
        if cal is None:
            return why, no_update, no_update
        new = calibrations.rename_calibration(runtime.get_store(), value, new_name)
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), no_update, no_update
    return note(f"Renamed {cal.name!r} to {new.name!r}.", "ok"), calibration_choices(), \
        on_pick_calibration(value, energy)


def on_ask_delete_calibration(n_clicks, value, source):
    """'Delete' -> ask first -> (dialog shown, its message, note).

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.
    value : str or None
        The calibration picked.
    source : dict or None
        The source store.

    Returns
    -------
    tuple
        (dialog shown, message, note).
    """
    if not n_clicks:
        raise PreventUpdate
    try:
        cal, why = _picked_named(value, source)
    except Exception as err:  # noqa: BLE001
        return False, no_update, note(fail(err))
    if cal is None:
        return False, no_update, why
    return True, (f"Delete the calibration '{cal.name}'? It leaves the list (analyses made with it keep their "
                  f"results); 'Recently deleted calibrations' brings it back for {KEEP_DELETED_DAYS} days."), None


def on_confirm_delete_calibration(submitted, value, source):
    """The deletion was confirmed: mark it deleted -> (note, options, picked value, deleted rows).

    Parameters
    ----------
    submitted : int or None
        Clicks of the dialog's OK.
    value : str or None
        The calibration picked.
    source : dict or None
        The source store.

    Returns
    -------
    tuple
        (note, dropdown options, dropdown value, deleted rows).
    """
    if not submitted:
        raise PreventUpdate
    try:
        cal, why = _picked_named(value, source)
        if cal is None:
            return why, no_update, no_update, no_update
        calibrations.delete_calibration(runtime.get_store(), value)
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), no_update, no_update, no_update
    return note(f"Deleted the calibration {cal.name!r}. 'Recently deleted calibrations' below brings it back.",
                "ok"), calibration_choices(), None, deleted_calibration_rows()


def on_restore_calibration(clicks, source):
    """A 'Restore' button -> that calibration back in the list -> (note, options, deleted rows).

    Parameters
    ----------
    clicks : list of int or None
        The Restore buttons' clicks.
    source : dict or None
        The source store.

    Returns
    -------
    tuple
        (note, dropdown options, deleted rows).
    """
    trig = ctx.triggered_id
    if not isinstance(trig, dict) or not ctx.triggered[0].get("value"):
        raise PreventUpdate
    if (source or {}).get("readonly"):
        return note("A shared analysis is read-only: open the analyse page to manage calibrations."), \
            no_update, no_update
    try:
        ok = calibrations.restore_calibration(runtime.get_store(), str(trig.get("key")))
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), no_update, no_update
    msg = note("Restored: the calibration is back in the list above.", "ok") if ok else \
        note("That calibration is no longer kept (deleted over 30 days ago) or was restored already.")
    return msg, calibration_choices(), deleted_calibration_rows()


callback(
    Output(ids.CAL_NOTE, "children"), Output(ids.CALIBRATION, "options"), Output(ids.CALIBRATION, "value"),
    Input(ids.CAL_SAVE, "n_clicks"),
    State(ids.CAL_NAME, "value"), State(ids.CAL_CAMERA, "value"), State(ids.CAL_E_LO, "value"),
    State(ids.CAL_E_HI, "value"), State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_save_calibration)

callback(
    Output(ids.CAL_INFO, "children"),
    Input(ids.CALIBRATION, "value"), Input(ids.ENERGY, "value"),
)(on_pick_calibration)

callback(
    Output(ids.CAL_NOTE, "children", allow_duplicate=True), Output(ids.CALIBRATION, "options", allow_duplicate=True),
    Output(ids.CAL_INFO, "children", allow_duplicate=True),
    Input(ids.CAL_RENAME, "n_clicks"),
    State(ids.CAL_NEW_NAME, "value"), State(ids.CALIBRATION, "value"), State(ids.ENERGY, "value"),
    State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_rename_calibration)

callback(
    Output(ids.CAL_CONFIRM, "displayed"), Output(ids.CAL_CONFIRM, "message"),
    Output(ids.CAL_NOTE, "children", allow_duplicate=True),
    Input(ids.CAL_DELETE, "n_clicks"), State(ids.CALIBRATION, "value"), State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_ask_delete_calibration)

callback(
    Output(ids.CAL_NOTE, "children", allow_duplicate=True), Output(ids.CALIBRATION, "options", allow_duplicate=True),
    Output(ids.CALIBRATION, "value", allow_duplicate=True), Output(ids.CAL_DELETED_LIST, "children"),
    Input(ids.CAL_CONFIRM, "submit_n_clicks"), State(ids.CALIBRATION, "value"), State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_confirm_delete_calibration)

callback(
    Output(ids.CAL_NOTE, "children", allow_duplicate=True), Output(ids.CALIBRATION, "options", allow_duplicate=True),
    Output(ids.CAL_DELETED_LIST, "children", allow_duplicate=True),
    Input({"type": ids.CAL_RESTORE, "key": ALL}, "n_clicks"), State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_restore_calibration)
