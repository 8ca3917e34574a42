"""``/live``: follow a surface while it changes (frames at one energy, a parameter per frame).

Watch a folder under ``RECINET_WATCH_ROOT`` or drop frames as they come; the beam families'
intensities against the parameter, the segments and their structures, the last frame with
its beams, CSV / JSON exports and a link. The body lives in :mod:`webapp.pages.live_view`
(imported under that one name, so its callbacks are registered once).
"""

from dash import register_page

from webapp.pages.live_view import layout  # importing it registers the page's callbacks

__all__ = ["layout"]

register_page(__name__, path="/live", title="recinet: follow a surface", name="Live series", order=30)
