"""Named calibrations on the analyse page: save the camera model of the analysis under a name, pick one
by name, and see where the picked one came from."""

from __future__ import annotations

from dash import Input, Output, State, callback, html, no_update
from dash.exceptions import PreventUpdate

from webapp import calibrations, ids, runtime, service
from webapp.pages.common import fail, note

from .state import result_of

__all__ = ["calibration_choices", "calibration_info", "on_save_calibration", "on_pick_calibration"]


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
