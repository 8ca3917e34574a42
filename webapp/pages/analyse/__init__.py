"""The analyse workspace: one image in, its superstructure out, corrected by hand, saved and shared.

Used by two registered pages, the editor (``/``, :mod:`webapp.pages.editor`) and the
read-only view of a saved analysis (``/analysis/<token>``, :mod:`webapp.pages.shared`).
One module per concern, each registering its own callbacks (kept as plain
functions that tests call directly):

- ``layout``  the page body (:func:`workspace`)
- ``state``   the browser-side stores and the reads every concern shares
- ``upload``  an image, an exported analysis or a reference image dropped, or a demo picked
- ``pattern`` the pattern figure and the edits made by clicking on it
- ``job``     the analysis as a background job, Stop, and forgetting stale state
- ``results`` the result panel, the other candidates and the real-space drawing
- ``model``   trying a typed model
- ``export``  saving with a share link and the exports
- ``calibration`` named calibrations: saved, picked by name, their provenance shown
"""

from . import calibration, export, job, layout, model, pattern, results, state, upload
from .export import on_export, on_save
from .job import on_new_image, on_new_result, on_stop, run_job
from .layout import DEFAULT_OVERLAYS, workspace
from .model import on_try_model
from .pattern import display_image, edit_summary, on_graph_event, on_undo_last, render_pattern
from .results import show_result
from .upload import on_reference, on_upload

__all__ = [
    "workspace", "DEFAULT_OVERLAYS", "on_upload", "on_reference", "render_pattern", "display_image",
    "on_graph_event", "on_undo_last", "edit_summary", "run_job", "on_stop", "on_new_image", "on_new_result", "show_result",
    "on_try_model", "on_save", "on_export",
    "calibration", "export", "job", "layout", "model", "pattern", "results", "state", "upload",
]
