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

__version__ = "0.1.0"

__all__ = [
    "RecinetError", "NetError", "ParameterError", "ImageError", "FitError", "SeriesError",
    "Net2D", "SymmetryOp", "NET_TYPES", "reciprocal", "rotate_net", "reduce_net",
    "classify_net", "conventional_cell", "point_group", "point_group_name",
    "surface_net", "parse_substrate",
]
