"""Dropping an image, an exported analysis or a reference image, or picking a demo."""

from __future__ import annotations

from dash import Input, Output, State, callback, no_update
from dash.exceptions import PreventUpdate

from webapp import figures, ids, runtime, service
from webapp.pages.common import fail, note, triggered

from .state import empty_edits

__all__ = ["store_image", "on_upload", "on_reference"]

def store_image(raw: bytes, filename: str) -> dict:
    """Decode an uploaded image, keep it in the store and return the image store's data.

    Parameters
    ----------
    raw : bytes
        The file.
    filename : str
        Its name.

    Returns
    -------
    dict
        ``{"sha", "filename", "width", "height"}``.
    """
    im = service.read_image(raw, name=filename)
    h, w = im.data.shape
    sha = runtime.get_store().put_image(raw, filename=filename, width=w, height=h,
                                        thumbnail_png=figures.thumbnail_png(im.data))
    return {"sha": sha, "filename": filename, "width": int(w), "height": int(h)}


def on_upload(contents, demo, filename, energy, substrate):
    """A dropped file or a picked demo -> (image, record, edits, energy, substrate, sample, notes, note, contents).

    Parameters
    ----------
    contents : str or None
        Data URL of the dropped file (an image or an exported analysis).
    demo : str or None
        A demo image picked.
    filename : str or None
        The dropped file's name.
    energy : float or None
        The energy typed so far, eV.
    substrate : str or None
        The substrate typed so far.

    Returns
    -------
    tuple
        The outputs listed above.
    """
    keep = (no_update,) * 4
    trig, _ = triggered()
    try:
        if trig == ids.DEMO or (contents is None and demo):
            if not demo:
                raise PreventUpdate
            raw, truth = service.demo_bytes(demo)
            image = store_image(raw, demo)
            d = service.demo_defaults(truth)
            return (image, None, empty_edits(image["sha"]), d.get("energy_eV", energy),
                    d.get("substrate", substrate), d.get("sample_name", no_update), "",
                    note(f"Demo image {demo} ({image['width']}×{image['height']}) is ready: press Analyse.", "ok"),
                    None)
        if contents is None:
            raise PreventUpdate
        limit = runtime.get_settings().max_upload_bytes
        name = str(filename or "upload")[:200]
        raw = service.decode_upload(contents, name, max_bytes=limit)
        if name.lower().endswith(".json") or raw[:1] == b"{":
            doc = service.read_bundle(raw, max_bytes=limit)
            image = store_image(doc["image"]["data"], doc["image"]["filename"])
            params = doc.get("parameters") or {}
            edits = {**empty_edits(image["sha"]), **service.clean_edits(doc.get("edits")), "sha": image["sha"]}
            record = {"sha": image["sha"], "parameters": params, "edits": edits, "result": doc.get("result")}
            return (image, record, edits, params.get("energy_eV", energy), params.get("substrate", substrate),
                    doc["sample_name"], doc["notes"],
                    note(f"Restored the analysis from {name}.", "ok"), None)
        image = store_image(raw, name)
        return (image, None, empty_edits(image["sha"]), *keep[:2], no_update, no_update,
                note(f"{name} ({image['width']}×{image['height']}) is ready: press Analyse.", "ok"), None)
    except PreventUpdate:
        raise
    except Exception as err:  # noqa: BLE001 - every failure becomes a message in the page
        return (*keep, no_update, no_update, no_update, note(fail(err)), None)


def on_reference(contents, demo, filename, energy):
    """A reference image (dropped or a demo) -> (reference meta, note, reference energy, contents).

    Parameters
    ----------
    contents : str or None
        Data URL of the dropped reference image.
    demo : str or None
        A demo picked as the reference.
    filename : str or None
        The dropped file's name.
    energy : float or None
        The reference energy typed so far, eV.

    Returns
    -------
    tuple
        (reference meta, note, reference energy, upload contents cleared).
    """
    trig, _ = triggered()
    try:
        if trig == ids.REF_DEMO:
            if not demo:
                return None, None, no_update, None
            raw, truth = service.demo_bytes(demo)
            meta = store_image(raw, demo)
            e = service.demo_defaults(truth).get("energy_eV", energy)
            return {"sha": meta["sha"], "filename": demo}, note(f"Reference: {demo}.", "ok"), e, None
        if contents is None:
            raise PreventUpdate
        name = str(filename or "reference")[:200]
        raw = service.decode_upload(contents, name, max_bytes=runtime.get_settings().max_upload_bytes)
        meta = store_image(raw, name)
        return {"sha": meta["sha"], "filename": name}, note(f"Reference: {name}.", "ok"), no_update, None
    except PreventUpdate:
        raise
    except Exception as err:  # noqa: BLE001
        return None, note(fail(err)), no_update, None


callback(
    Output(ids.IMAGE, "data"), Output(ids.RESULT, "data", allow_duplicate=True),
    Output(ids.EDITS, "data", allow_duplicate=True),
    Output(ids.ENERGY, "value"), Output(ids.SUBSTRATE, "value"), Output(ids.SAMPLE, "value"),
    Output(ids.NOTES, "value"), Output(ids.UPLOAD_NOTE, "children"), Output(ids.UPLOAD, "contents"),
    Input(ids.UPLOAD, "contents"), Input(ids.DEMO, "value"),
    State(ids.UPLOAD, "filename"), State(ids.ENERGY, "value"), State(ids.SUBSTRATE, "value"),
    prevent_initial_call=True,
)(on_upload)

callback(
    Output(ids.REFERENCE, "data"), Output(ids.REF_NOTE, "children"), Output(ids.REF_ENERGY, "value"),
    Output(ids.REF_UPLOAD, "contents"),
    Input(ids.REF_UPLOAD, "contents"), Input(ids.REF_DEMO, "value"), State(ids.REF_UPLOAD, "filename"),
    State(ids.REF_ENERGY, "value"),
    prevent_initial_call=True,
)(on_reference)
