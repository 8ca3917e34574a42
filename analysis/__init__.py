"""recinet's numerical core: nets, superstructures, optics, spots, indexing, I(V).

Pure numpy / scipy / scikit-image; never imports the web layer.
Reciprocal quantities are crystallographic (a_i · a*_j = δ_ij, no 2π) unless
a function says otherwise.
"""

from .errors import FitError, ImageError, NetError, ParameterError, RecinetError, SeriesError
from .nets import (
    NET_TYPES,
    Net2D,
    SymmetryOp,
    classify_net,
    conventional_cell,
    parse_substrate,
    point_group,
    point_group_name,
    reciprocal,
    reduce_net,
    rotate_net,
    surface_net,
)

from .optics import ScreenGeometry, exit_angles_deg, momentum_to_pixels, pixels_to_momentum, wavelength_A
from .superstructure import (
    classify_superstructure,
    coverage,
    domains,
    format_matrix,
    overlayer_net,
    overlayer_reciprocal,
    parse_matrix,
    parse_wood,
    same_lattice,
    wood_notation,
)

__version__ = "0.1.0"

# The heavier parts load on first use (keeps `import analysis` light):
_LAZY = {
    "load_image": "io", "iter_frames": "io", "LoadedImage": "io",
    "measure_image": "spots", "find_spots": "spots", "SpotTable": "spots",
    "Calibration": "calibration", "fit_geometry": "calibration",
    "estimate_center_from_pairs": "calibration", "calibrate_from_reference": "calibration",
    "forward_pattern": "simulate", "render_image": "simulate", "render_series": "simulate",
    "index_pattern": "indexing", "fit_substrate": "indexing", "find_overlayers": "indexing",
    "analyze_image": "pipeline", "try_model": "pipeline", "Edits": "pipeline",
    "result_to_dict": "serialize", "pendry_r": "rfactor", "track_series": "series",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'analysis' has no attribute {name!r}")

__all__ = [
    "RecinetError", "NetError", "ParameterError", "ImageError", "FitError", "SeriesError",
    "Net2D", "SymmetryOp", "NET_TYPES", "reciprocal", "rotate_net", "reduce_net",
    "classify_net", "conventional_cell", "point_group", "point_group_name",
    "surface_net", "parse_substrate",
    "ScreenGeometry", "wavelength_A", "exit_angles_deg", "momentum_to_pixels", "pixels_to_momentum",
    "classify_superstructure", "coverage", "domains", "format_matrix", "overlayer_net",
    "overlayer_reciprocal", "parse_matrix", "parse_wood", "same_lattice", "wood_notation",
    *_LAZY,
]
