"""The series exports: I(V) per beam or per group as CSV, everything as JSON."""

from __future__ import annotations

from dash import Input, Output, State, callback
from dash.exceptions import PreventUpdate

from webapp import ids, series_service
from webapp.pages.common import fail, safe_stem, triggered_id

__all__ = ["on_export"]


def on_export(n_csv, n_avg, n_json, summary):
    """The run as a download: the I(V) table per beam or per group (CSV), or the whole run (JSON).

    Parameters
    ----------
    n_csv, n_avg, n_json : int or None
        Clicks of the three export buttons.
    summary : dict or None
        The run's summary.

    Returns
    -------
    dict
        The file for ``dcc.Download``.
    """
    trig = triggered_id()
    if trig is None or not summary:
        raise PreventUpdate
    stem = safe_stem(summary.get("filename", "series") or "series")
    try:
        if trig == ids.SERIES_EXPORT_CSV:
            return dict(content=series_service.export_csv(summary["key"]), filename=f"{stem}-iv.csv",
                        type="text/csv")
        if trig == ids.SERIES_EXPORT_AVG:
            return dict(content=series_service.export_csv(summary["key"], averaged=True),
                        filename=f"{stem}-iv-groups.csv", type="text/csv")
        if trig == ids.SERIES_EXPORT_JSON:
            return dict(content=series_service.export_json(summary["key"]), filename=f"{stem}-iv.json",
                        type="application/json")
    except Exception as err:  # noqa: BLE001
        fail(err)
    raise PreventUpdate



callback(
    Output(ids.SERIES_DOWNLOAD, "data"),
    Input(ids.SERIES_EXPORT_CSV, "n_clicks"), Input(ids.SERIES_EXPORT_AVG, "n_clicks"),
    Input(ids.SERIES_EXPORT_JSON, "n_clicks"), State(ids.SERIES_RESULT, "data"),
    prevent_initial_call=True,
)(on_export)
