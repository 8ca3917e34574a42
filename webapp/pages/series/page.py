"""``/series``: an energy series in, I(V) curves out.

Drop a multi-page TIFF or a zip of frames, give the energies (a CSV or JSON file,
a start and a step, or a number in each file name) and the substrate; the beams
are followed in a background job with a progress bar. Then a slider walks the
frames with the followed beams drawn on them, and the I(V) plot shows the beams
picked from the list or by a click on a spot, with the equivalent-beam groups and
their Pendry R-factor beside it. The page's parts live in :mod:`webapp.pages.series`.
"""

from dash import register_page

from webapp.pages.series import layout  # the page's layout; importing the package registers its callbacks

__all__ = ["layout"]

register_page(__name__, path="/series", title="recinet: energy series", name="Energy series", order=20)
