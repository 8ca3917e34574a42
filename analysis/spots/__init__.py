"""From a camera frame to measured spots: screen and gun-shadow masks, smooth
background with a per-pixel noise map, matched-filter detection in units of
the local noise, and sub-pixel refinement by a 2-D spot-profile fit.

Modules
-------
screen        :class:`ScreenMask`, :func:`find_screen`, :func:`disk_mask`
gun_shadow    :class:`ShadowMask`, :func:`find_gun_shadow`
background    :class:`BackgroundEstimate`, :func:`estimate_background`
detect        matched filter, its noise scale, local maxima
fit           the profile fitter, one-spot and two-spot fits, model images, flags
crowded       joint refits of spots that share a fit window
measure       :func:`find_spots` / :class:`SpotTable`, :func:`measure_image` /
              :class:`Measurement`, :func:`localization_bound_px`
_common       input checks, coarse block grids, the array thread pool

Conventions
-----------
Inside this package pixel arrays are (row, col); ``rc`` columns are (row, col)
in pixels with the centre of the top-left pixel at (0, 0). At the edges
(``to_records``, ``to_dict``) positions are named ``x`` (column) and ``y`` (row).
Image angles are counter-clockwise on the screen from +x (so they grow as y
decreases), as in :mod:`analysis.optics`.

Pipeline (:func:`measure_image`): :func:`find_screen` → :func:`find_gun_shadow`
→ :func:`estimate_background` → :func:`find_spots` (detect, fit, subtract, detect
again on the residual, refit neighbours jointly, split close pairs) → a second
background pass with the spots masked out → :func:`find_spots` again.
"""

from ._common import _by_row_strips, _pool
from .background import BackgroundEstimate, estimate_background
from .fit import FLAG_FIT_FAILED, FLAG_NAMES, FLAG_NEAR_EDGE, FLAG_SATURATED, FLAG_SPLIT
from .gun_shadow import ShadowMask, find_gun_shadow
from .measure import Measurement, SpotTable, find_spots, localization_bound_px, measure_image
from .screen import ScreenMask, disk_mask, find_screen

__all__ = [
    "ScreenMask",
    "ShadowMask",
    "BackgroundEstimate",
    "SpotTable",
    "Measurement",
    "FLAG_SATURATED",
    "FLAG_NEAR_EDGE",
    "FLAG_FIT_FAILED",
    "FLAG_SPLIT",
    "FLAG_NAMES",
    "find_screen",
    "find_gun_shadow",
    "estimate_background",
    "find_spots",
    "measure_image",
    "localization_bound_px",
    "disk_mask",
]
