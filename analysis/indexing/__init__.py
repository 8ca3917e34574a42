"""From measured spots to surface nets: pattern centre, substrate reciprocal net
through the camera model, fractional indices, overlayer matrices and domains.

Modules
-------
substrate     :class:`SubstrateFit`, :func:`fit_substrate` (readings of the named
              substrate, ranked), :func:`fractional_indices`
camera_refit  the least-squares camera fit, :func:`refine_with_model` (refits with a
              model's spots), readings with the distortion R/L held or set
candidates    candidate overlayer bases: beam vectors to pair, refinement, snapping
score         the substrate and overlayer scores: named terms, one table each
overlayers    :class:`OverlayerModel` (:class:`ModelDetails`), :func:`find_overlayers`, :func:`evaluate_model`,
              :func:`model_from_matrix`, domains, :func:`model_indices`
pattern       :class:`IndexResult`, :func:`index_pattern` (the whole pattern),
              :class:`PredictedBeams`, :func:`predicted_beams`
phases        :class:`Phase`, :func:`find_phases` (coexisting overlayer phases)
absences      :class:`PlaneGroupReading`, :func:`read_plane_group` (glide lines from
              systematic absences; glide-absent beams do not count against a cell)
matching      predicted beams against observed spots (shared by the above)

Conventions
-----------
Reciprocal nets are crystallographic (Å⁻¹, no 2π); spot positions at this
package's edges are (x, y) pixels, x right, y down; a real-space
superstructure matrix M has ``overlayer = M @ substrate`` and the beams of a
domain with matrix M are ``hk = n @ inv(M).T`` (n integer) in substrate units;
a substrate point-group operation W acts on beam indices as ``hk @ inv(W).T``.
"""

from .camera_refit import refine_with_model
from .overlayers import ModelDetails, OverlayerModel, evaluate_model, find_overlayers, model_from_matrix, model_indices
from .absences import PlaneGroupReading, read_plane_group
from .pattern import IndexResult, PredictedBeams, index_pattern, predicted_beams
from .phases import Phase, find_phases
from .substrate import SubstrateFit, fit_substrate, fractional_indices

__all__ = [
    "SubstrateFit",
    "fit_substrate",
    "fractional_indices",
    "OverlayerModel",
    "ModelDetails",
    "find_overlayers",
    "evaluate_model",
    "model_from_matrix",
    "model_indices",
    "refine_with_model",
    "IndexResult",
    "index_pattern",
    "PredictedBeams",
    "predicted_beams",
    "Phase",
    "find_phases",
    "PlaneGroupReading",
    "read_plane_group",
]
