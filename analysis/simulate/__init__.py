"""Forward LEED pattern and synthetic camera images with exact truth.

Conventions
-----------
* Reciprocal quantities are crystallographic, a_i · a*_j = δ_ij, in Å⁻¹ with
  **no factor 2π**; a beam with parallel momentum transfer g leaves at
  sin θ = λ |g + k_in∥| (λ in Å).
* A superstructure (domain) matrix M gives the overlayer basis in the
  substrate basis, rows as vectors: ``(b1, b2) = M (a1, a2)``. Its reciprocal
  net is ``(b1*, b2*) = (M⁻¹)ᵀ (a1*, a2*)``, so the beam n1 b1* + n2 b2* has
  fractional substrate indices ``hk = n @ inv(M).T``.
* Pixels: x to the right, y downwards, the centre of the top-left pixel at
  (0, 0); pixel (row r, col c) has its centre at x = c, y = r. Image angles
  are counter-clockwise on the screen, measured from +x (as in
  :mod:`analysis.optics`).

Modules
-------
pattern   :class:`Pattern`, :func:`forward_pattern`, :func:`hk_label`
render    :func:`render_image`, :class:`SyntheticImage`, :class:`GunShadow`,
          :func:`default_intensities`, :func:`acceptance_radius_px`
series    :class:`LayerIV`, :func:`render_series`
spot_shapes  :class:`SpotShape` (tailed and elongated spots for the renderer)
realism      camera artefacts on arrays: channel-plate texture, dust, glare, exposure
             with blooming, hot pixels, cosmic rays, colour JPEG
viewing      keystone homography and warping, crops, off-normal incidence, reframing
photograph   :func:`photograph` (the renderer plus chosen artefacts, exact truth),
             :data:`EFFECTS`, :func:`score_spots`
"""

from .pattern import Pattern, forward_pattern, hk_label
from .photograph import EFFECTS, Photograph, photograph, score_spots
from .render import GunShadow, SyntheticImage, acceptance_radius_px, default_intensities, render_image
from .series import LayerIV, render_series

__all__ = [
    "Pattern",
    "GunShadow",
    "SyntheticImage",
    "LayerIV",
    "forward_pattern",
    "default_intensities",
    "render_image",
    "render_series",
    "acceptance_radius_px",
    "hk_label",
    "EFFECTS",
    "Photograph",
    "photograph",
    "score_spots",
]

