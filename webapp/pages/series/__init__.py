"""The energy-series page (``/series``), one module per concern; registered by ``page.py``.

- ``layout``  the page body and its browser-side stores
- ``upload``  the series and its energy file
- ``job``     following the beams as a background job
- ``results`` the run's facts, the equivalent-beam groups, the beams picked
- ``frames``  walking the frames, drawing the frame and the I(V) curves
- ``export``  CSV and JSON exports
The callbacks are plain functions (tests call them directly), each module registering its own.
"""

from . import export, frames, job, results, upload
from .export import on_export
from .frames import frame_index, move_frame, render_frame, render_iv
from .job import run_series_job
from .layout import layout
from .results import MAX_PICKED, beam_at_click, groups_table, on_result, pick_beams, summary_panel
from .upload import mode_from_typing, on_energy_upload, on_series_upload

__all__ = [
    "layout", "on_series_upload", "on_energy_upload", "mode_from_typing", "run_series_job", "summary_panel",
    "groups_table", "on_result", "pick_beams", "beam_at_click", "frame_index", "move_frame", "render_frame",
    "render_iv", "on_export", "MAX_PICKED", "export", "frames", "job", "results", "upload",
]
