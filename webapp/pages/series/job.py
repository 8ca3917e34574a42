"""Following the beams of the uploaded series as a background job."""

from __future__ import annotations

from dash import Input, Output, State, callback, no_update
from dash.exceptions import PreventUpdate

from analysis.timelimit import time_limit
from webapp import ids, runtime, series_service
from webapp.jobs import job_controls
from webapp.pages.common import fail, note

__all__ = ["run_series_job"]


def run_series_job(set_progress, n_clicks, meta, table, mode, start, step, pattern, substrate, index_frame,
                   overlayer=None):
    """Background job: follow every beam of the uploaded series -> (summary, message).

    Parameters
    ----------
    set_progress : callable
        Dash's progress setter of the background callback.
    n_clicks : int or None
        The run button's clicks.
    meta : dict or None
        The uploaded series.
    table : dict or None
        The energy table read from an energy file.
    mode : str
        Where the energies come from: ``"file"``, ``"step"`` or ``"names"``.
    start, step : float or None
        First energy and step, eV.
    pattern : str or None
        Regular expression for the energy in a frame's name.
    substrate : str or None
        E.g. ``"Cu(100)"``.
    index_frame : int or None
        The frame to index alone (None: several together).
    overlayer : str, optional
        The overlayer typed (empty: as indexed; ``"none"``; a matrix or Wood notation).

    Returns
    -------
    summary : dict or None
        The run's summary.
    message : dash component or None
        A note.
    """
    if not n_clicks:
        raise PreventUpdate
    if not meta or not meta.get("sha"):
        return no_update, note("Drop an energy series first (a multi-page TIFF or a zip of images).")

    def say(frac, _text=""):
        set_progress((str(int(round(100 * min(max(float(frac), 0.0), 1.0)))), "100"))

    try:
        say(0.01)
        with time_limit(runtime.get_settings().job_time_limit_s, "the series"):
            summary = series_service.run_series(meta["sha"], meta.get("filename") or "series",
                                                substrate=(substrate or "").strip(), mode=mode or "file",
                                                table=table, start=start, step=step, pattern=pattern,
                                                index_frame=index_frame, overlayer=overlayer, progress=say)
    except Exception as err:  # noqa: BLE001
        return no_update, note(fail(err))
    n_beams = sum(1 for b in summary["beams"] if b["n_valid"])
    return summary, note(f"Followed {n_beams} beams through {summary['n_frames']} frames.", "ok")


callback(
    Output(ids.SERIES_RESULT, "data"), Output(ids.SERIES_MESSAGE, "children"),
    Input(ids.SERIES_RUN, "n_clicks"),
    State(ids.SERIES_META, "data"), State(ids.SERIES_ENERGY_TABLE, "data"), State(ids.SERIES_ENERGY_MODE, "value"),
    State(ids.SERIES_START, "value"), State(ids.SERIES_STEP, "value"), State(ids.SERIES_NAME_PATTERN, "value"),
    State(ids.SERIES_SUBSTRATE, "value"), State(ids.SERIES_INDEX_FRAME, "value"), State(ids.SERIES_OVERLAYER, "value"),
    **job_controls(ids.SERIES_RUN, ids.SERIES_CANCEL, ids.SERIES_PROGRESS),
    prevent_initial_call=True,
)(run_series_job)
