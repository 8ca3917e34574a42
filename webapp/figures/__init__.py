"""Pure drawing: arrays and result dicts in, Plotly figures, PNG/SVG bytes or CSV text out.

Nothing here touches the store, the request or the file system. Pixel
coordinates are x to the right and y downwards, the centre of the top-left
pixel at (0, 0), as everywhere at the edges of recinet.

- ``common``     colours, domain styles, index text, the empty figure
- ``display``    grey levels, PNG bytes, thumbnails
- ``pattern``    the pattern view with its overlays
- ``real_space`` the substrate and overlayer cells in real space
- ``export``     spots CSV and the annotated PNG/SVG figure
- ``series``     an energy-series frame with its beams, and the I(V) curves
"""

from .common import DOMAIN_COLOURS, DOMAIN_STYLES, PALETTE, domain_colour, empty_figure, hk_text
from .display import SCALES, display_levels, downsample, png_bytes, png_data_url, thumbnail_png
from .export import export_figure, spots_csv
from .pattern import OVERLAY_CHOICES, net_lines, pattern_figure, predicted_spots
from .real_space import real_space_figure
from .series import BEAM_COLOURS, colour_of, flag_text, frame_figure, group_figure, iv_figure

__all__ = [
    "PALETTE", "DOMAIN_COLOURS", "DOMAIN_STYLES", "domain_colour", "net_lines", "OVERLAY_CHOICES", "SCALES", "BEAM_COLOURS",
    "display_levels", "downsample", "png_data_url", "png_bytes", "thumbnail_png",
    "hk_text", "pattern_figure", "predicted_spots", "empty_figure", "real_space_figure",
    "spots_csv", "export_figure", "frame_figure", "iv_figure", "group_figure", "colour_of", "flag_text",
]
