"""Saving with a share link, and the exports (JSON, spots CSV, PNG/SVG figure)."""

from __future__ import annotations

import json

from dash import Input, Output, State, callback, dcc, html
from dash.exceptions import PreventUpdate

from webapp import figures, ids, runtime, service
from webapp.pages.common import fail, note, safe_stem, triggered

from .state import result_of

__all__ = ["on_save", "on_export"]

def on_save(n_clicks, record, image, sample, notes, source):
    """Save the analysis with its image and show its share link.

    Parameters
    ----------
    n_clicks : int or None
        The save button's clicks.
    record : dict or None
        The analysis store.
    image : dict or None
        The image store.
    sample : str or None
        The sample's name.
    notes : str or None
        Free notes.
    source : dict or None
        The source store (a read-only page cannot save).

    Returns
    -------
    note : dash.html.Div
        What happened.
    link : dash.html.Div or None
        The share link.
    """
    if not n_clicks:
        raise PreventUpdate
    if (source or {}).get("readonly"):
        raise PreventUpdate
    if not image:
        return note("Nothing to save: drop an image first."), None
    result = result_of(record, image)
    if result is None:
        return note("Analyse the image before saving it."), None
    try:
        saved = runtime.get_store().save_analysis(
            image_sha256=image["sha"], parameters=record.get("parameters") or {},
            edits=service.clean_edits(record.get("edits")), result=result, sample_name=sample or "",
            notes=notes or "", summary=service.summary_of(result), copied_from=(source or {}).get("token"))
    except Exception as err:  # noqa: BLE001
        return note(fail(err)), None
    href = f"/analysis/{saved.token}"
    return note("Saved. Anyone with the link (and the group key) can open it read-only.", "ok"), \
        html.Div(["Link: ", html.A(href, href=href, id=ids.SHARE_HREF, target="_blank")])


def on_export(nj, nc, npng, nsvg, record, image, sample, notes, scale, gamma, clip):
    """The analysis as a download: the re-importable JSON, the spots (CSV) or the figure (PNG, SVG).

    Parameters
    ----------
    nj, nc, npng, nsvg : int or None
        Clicks of the JSON, CSV, PNG and SVG buttons.
    record : dict or None
        The analysis store.
    image : dict or None
        The image store.
    sample : str or None
        The sample's name.
    notes : str or None
        Free notes.
    scale : str
        Contrast scale of the display.
    gamma : float
        Display gamma.
    clip : list of float
        Percentiles mapped to black and white.

    Returns
    -------
    dict
        The file for ``dcc.Download``.
    """
    trig, _ = triggered()
    if trig is None or not image:
        raise PreventUpdate
    result = result_of(record, image)
    stem = safe_stem(sample or image.get("filename") or "analysis")
    try:
        if trig == ids.EXPORT_JSON:
            raw = runtime.get_store().image_bytes(image["sha"])
            doc = service.export_bundle(image_bytes=raw, filename=image.get("filename") or "image",
                                        parameters=(record or {}).get("parameters") or {},
                                        edits=service.clean_edits((record or {}).get("edits")), result=result,
                                        sample_name=sample or "", notes=notes or "")
            return dict(content=json.dumps(doc, indent=1), filename=f"{stem}.recinet.json", type="application/json")
        if result is None:
            raise PreventUpdate
        if trig == ids.EXPORT_CSV:
            return dict(content=figures.spots_csv(result), filename=f"{stem}-spots.csv", type="text/csv")
        data = service.image_array(image["sha"])
        small, f = figures.downsample(data, 1024)
        clip = clip or [0.5, 99.95]
        levels = figures.display_levels(small, scale=scale or "linear", clip_pct=clip, gamma=float(gamma or 0.5))
        ov = result.get("overlayer") or {}
        params = (record or {}).get("parameters") or {}
        title = [sample or image.get("filename"),
                 f"{params.get('substrate', '')}, {params.get('energy_eV', '')} eV",
                 f"{ov.get('wood') or 'no Wood notation'}  {service.summary_matrix(ov)}  ({ov.get('kind', '')})"]
        fmt = "svg" if trig == ids.EXPORT_SVG else "png"
        content = figures.export_figure(levels, factor=f, result=result,
                                        edits=service.clean_edits((record or {}).get("edits")), title_lines=title, fmt=fmt)
        return dcc.send_bytes(content, f"{stem}.{fmt}")
    except PreventUpdate:
        raise
    except Exception as err:  # noqa: BLE001
        fail(err)
        raise PreventUpdate from None



callback(
    Output(ids.SAVE_NOTE, "children"), Output(ids.SHARE_LINK, "children"),
    Input(ids.SAVE, "n_clicks"),
    State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SAMPLE, "value"), State(ids.NOTES, "value"),
    State(ids.SOURCE, "data"),
    prevent_initial_call=True,
)(on_save)

callback(
    Output(ids.DOWNLOAD, "data"),
    Input(ids.EXPORT_JSON, "n_clicks"), Input(ids.EXPORT_CSV, "n_clicks"), Input(ids.EXPORT_PNG, "n_clicks"),
    Input(ids.EXPORT_SVG, "n_clicks"),
    State(ids.RESULT, "data"), State(ids.IMAGE, "data"), State(ids.SAMPLE, "value"), State(ids.NOTES, "value"),
    State(ids.SCALE, "value"), State(ids.GAMMA, "value"), State(ids.CLIP, "value"),
    prevent_initial_call=True,
)(on_export)
