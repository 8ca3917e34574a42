"""The analysis as a background job, Stop, and what a new image or result makes the page forget."""

from __future__ import annotations

from dash import Input, Output, State, callback, no_update
from dash.exceptions import PreventUpdate

from analysis.errors import ParameterError
from analysis.timelimit import time_limit
from webapp import calibrations, ids, runtime, service
from webapp.jobs import job_controls, progress_reporter
from webapp.pages.common import fail, note, triggered

from .state import empty_edits

__all__ = ["run_job", "on_stop", "on_new_image", "on_new_result"]

def run_job(set_progress, n_clicks, edits, image, energy, substrate, source, reference=None, ref_energy=None,
            calibration_token=None):
    """Background job: analyse the stored image with the parameters and edits -> (record, message).

    Parameters
    ----------
    set_progress : callable
        Dash's progress setter of the background callback.
    n_clicks : int or None
        The button's clicks.
    edits : dict or None
        The manual edits.
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.
    energy : float or None
        Beam energy, eV.
    substrate : str or None
        E.g. ``"Pt(111)"``.
    source : dict or None
        The source store: ``readonly`` and the share token.
    reference : dict, optional
        The reference image store.
    ref_energy : float, optional
        Its energy, eV.
    calibration_token : str, optional
        A named calibration (``"cal:<key>"``) or the share token of a saved analysis whose camera
        model is reused.

    Returns
    -------
    record : dict or None
        The analysis store.
    message : dash component or None
        A note.
    """
    trig, _ = triggered()
    if (source or {}).get("readonly") or not image:
        raise PreventUpdate
    if trig == ids.EDITS and (not edits or int(edits.get("rev", 0)) == 0):
        raise PreventUpdate  # a fresh image resets the edits; that alone starts nothing
    if trig == ids.RUN and not n_clicks:
        raise PreventUpdate
    ed = edits if edits and edits.get("sha") == image["sha"] else empty_edits(image["sha"])
    ed = service.clean_edits(ed)
    try:
        set_progress(("2", "100"))
        e = service.check_energy(energy)
        service.check_substrate(substrate)
        data = service.image_array(image["sha"])
        ref = ref_e = cal = None
        if reference and reference.get("sha"):
            ref = service.image_array(reference["sha"])
            ref_e = service.check_energy(ref_energy if ref_energy not in (None, "") else e)
        if calibration_token:
            cal = calibrations.resolve(runtime.get_store(), calibration_token)
            if cal is None:
                raise ParameterError("The chosen calibration is no longer available; pick another or none.")
        params = {"energy_eV": e, "substrate": substrate.strip()}
        if ref is not None:
            params.update(reference_sha256=reference["sha"], reference_filename=reference.get("filename"),
                          reference_energy_eV=ref_e)
        if cal is not None:
            params["calibration_from"] = calibration_token
        set_progress(("5", "100"))
        with time_limit(runtime.get_settings().job_time_limit_s, "the analysis"):
            result = service.analyze(data, energy_eV=e, substrate=substrate.strip(), edits=ed, reference=ref,
                                     reference_energy_eV=ref_e, calibration=cal,
                                     progress=progress_reporter(set_progress, start=5, span=93),
                                     cache_key=service.record_key(image["sha"], params, ed))
        set_progress(("100", "100"))
    except Exception as err:  # noqa: BLE001
        return no_update, note(fail(err))
    record = {"sha": image["sha"], "parameters": params, "edits": ed, "result": result}
    n = len(result.get("spots") or [])
    return record, note(f"Analysed: {n} spots.", "ok")


def on_stop(n_clicks):
    """Stop pressed: the page forgets what the stopped run would have replaced -> (result, model, message).

    Parameters
    ----------
    n_clicks : int or None
        The button's clicks.

    Returns
    -------
    tuple
        (result, model, message) to show after the stop.
    """
    if not n_clicks:
        raise PreventUpdate
    return None, None, note("Stopped: nothing was analysed. Press Analyse to start again.", "warn")


def on_new_image(image):
    """A new image forgets the model tried on the last one -> (model, model note, message).

    Parameters
    ----------
    image : dict or None
        The image store: ``sha``, ``filename``, ``width``, ``height``.

    Returns
    -------
    tuple
        (None, None, None): no model, no note, no message.
    """
    return None, None, None


def on_new_result(result):
    """A new result (or none) forgets the candidate picked among the last one's -> pick.

    Parameters
    ----------
    result : dict or None
        The analysis store.
    """
    return None


callback(
    Output(ids.RESULT, "data"), Output(ids.MESSAGE, "children"),
    Input(ids.RUN, "n_clicks"), Input(ids.EDITS, "data"),
    State(ids.IMAGE, "data"), State(ids.ENERGY, "value"), State(ids.SUBSTRATE, "value"), State(ids.SOURCE, "data"),
    State(ids.REFERENCE, "data"), State(ids.REF_ENERGY, "value"), State(ids.CALIBRATION, "value"),
    **job_controls(ids.RUN, ids.CANCEL, ids.PROGRESS),
    prevent_initial_call=True,
)(run_job)

callback(
    Output(ids.RESULT, "data", allow_duplicate=True), Output(ids.MODEL, "data", allow_duplicate=True),
    Output(ids.MESSAGE, "children", allow_duplicate=True),
    Input(ids.CANCEL, "n_clicks"),
    prevent_initial_call=True,
)(on_stop)

callback(
    Output(ids.MODEL, "data", allow_duplicate=True), Output(ids.MODEL_NOTE, "children", allow_duplicate=True),
    Output(ids.MESSAGE, "children", allow_duplicate=True),
    Input(ids.IMAGE, "data"),
    prevent_initial_call=True,
)(on_new_image)

callback(
    Output(ids.CANDIDATE_PICK, "value", allow_duplicate=True),
    Input(ids.RESULT, "data"),
    prevent_initial_call=True,
)(on_new_result)
