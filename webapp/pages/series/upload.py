"""Dropping a series (checked for size in the browser first) and its energy file."""

from __future__ import annotations

from dash import Input, Output, State, callback, clientside_callback, no_update
from dash.exceptions import PreventUpdate

from webapp import ids, runtime, series_service, service
from webapp.pages.common import fail, note, triggered_id

__all__ = ["on_series_upload", "on_energy_upload", "mode_from_typing"]


def on_series_upload(payload):
    """A dropped series (within the size limit) -> (meta, note, result reset, upload contents).

    Parameters
    ----------
    payload : dict or None
        The dropped series (its name and contents).

    Returns
    -------
    tuple
        The outputs listed above.
    """
    if not payload or not payload.get("contents"):
        raise PreventUpdate
    name = str(payload.get("filename") or "series")[:200]
    try:
        raw = service.decode_upload(payload["contents"], name, max_bytes=runtime.get_settings().max_upload_bytes)
        meta = series_service.store_upload(raw, name)
    except Exception as err:  # noqa: BLE001 - every failure becomes a message in the page
        return no_update, note(fail(err)), no_update, None
    return (meta, note(f"{name}: frames of {meta['width']}×{meta['height']} px, {meta['bytes'] / 1e6:.1f} MB. "
                        "Give the energies and the substrate, then press 'Follow the beams'.", "ok"),
            None, None)


def on_energy_upload(contents, filename):
    """A dropped energy file -> (energy table, note, energy mode, upload contents).

    Parameters
    ----------
    contents : str or None
        Data URL of the dropped energy file.
    filename : str or None
        Its name.

    Returns
    -------
    tuple
        The outputs listed above.
    """
    if contents is None:
        raise PreventUpdate
    name = str(filename or "energies")[:200]
    try:
        raw = service.decode_upload(contents, name, max_bytes=series_service.MAX_SIDECAR_BYTES)
        table = series_service.read_energies(raw, name)
    except Exception as err:  # noqa: BLE001
        return None, note(fail(err)), no_update, None
    e = table["energy_eV"]
    text = f"{name}: {len(e)} energies, {min(e):g}–{max(e):g} eV"
    if table.get("current"):
        text += ", with the beam current (intensities are divided by it)"
    return table, note(text + ".", "ok"), "file", None


def mode_from_typing(start, step, pattern):
    """Typing a start and a step, or a file-name pattern, chooses that source of energies.

    Parameters
    ----------
    start, step : float or None
        First energy and step typed, eV.
    pattern : str or None
        A file-name pattern typed.

    Returns
    -------
    str
        The energy mode, ``"step"`` or ``"names"`` (no update otherwise).
    """
    trig = triggered_id()
    if trig == ids.SERIES_NAME_PATTERN and pattern:
        return "names"
    if trig in (ids.SERIES_START, ids.SERIES_STEP) and start not in (None, "") and step not in (None, ""):
        return "step"
    raise PreventUpdate


# A file over the upload limit would be refused by the server (413) with no word in the page:
# the browser checks the size first and says so; only files within the limit travel on.
clientside_callback(
    """
    function (contents, filename) {
        var nu = window.dash_clientside.no_update;
        if (!contents) { return [nu, nu]; }
        var el = document.querySelector("[data-max-bytes]");
        var max = el ? parseInt(el.getAttribute("data-max-bytes"), 10) : 0;
        var comma = contents.indexOf(",");
        var pad = contents.endsWith("==") ? 2 : (contents.endsWith("=") ? 1 : 0);
        var bytes = Math.floor((contents.length - comma - 1) * 3 / 4) - pad;
        var name = filename || "the file";
        function note(text, kind) {
            return {type: "Div", namespace: "dash_html_components",
                    props: {children: text, className: "note note-" + kind, role: kind === "error" ? "alert" : null}};
        }
        if (max && bytes > max) {
            var a = (bytes / 1e6).toFixed(1), b = (max / 1e6).toFixed(1);
            if (a === b) { a = bytes.toLocaleString("en") + " bytes"; b = max.toLocaleString("en") + " bytes"; }
            else { a += " MB"; b += " MB"; }
            return [nu, note(name + ": the file is " + a + "; the limit is " + b + ".", "error")];
        }
        return [{contents: contents, filename: filename}, note("Reading " + name + "…", "wait")];
    }
    """,
    Output(ids.SERIES_PAYLOAD, "data"), Output(ids.SERIES_UPLOAD_NOTE, "children", allow_duplicate=True),
    Input(ids.SERIES_UPLOAD, "contents"), State(ids.SERIES_UPLOAD, "filename"),
    prevent_initial_call=True,
)

callback(
    Output(ids.SERIES_META, "data"), Output(ids.SERIES_UPLOAD_NOTE, "children"),
    Output(ids.SERIES_RESULT, "data", allow_duplicate=True), Output(ids.SERIES_UPLOAD, "contents"),
    Input(ids.SERIES_PAYLOAD, "data"),
    prevent_initial_call=True,
)(on_series_upload)

callback(
    Output(ids.SERIES_ENERGY_TABLE, "data"), Output(ids.SERIES_ENERGY_NOTE, "children"),
    Output(ids.SERIES_ENERGY_MODE, "value"), Output(ids.SERIES_ENERGY_UPLOAD, "contents"),
    Input(ids.SERIES_ENERGY_UPLOAD, "contents"), State(ids.SERIES_ENERGY_UPLOAD, "filename"),
    prevent_initial_call=True,
)(on_energy_upload)

callback(
    Output(ids.SERIES_ENERGY_MODE, "value", allow_duplicate=True),
    Input(ids.SERIES_START, "value"), Input(ids.SERIES_STEP, "value"), Input(ids.SERIES_NAME_PATTERN, "value"),
    prevent_initial_call=True,
)(mode_from_typing)
