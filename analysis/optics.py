"""Electron optics of a LEED experiment: wavelength, exit angles and the
projection of beam directions onto camera pixels.

Momentum convention: parallel momenta are crystallographic, |g| in Å⁻¹
**without 2π** (a beam leaves at sin θ = λ |g + k_in∥|, λ in Å).

Camera model
------------
The sample sits at the centre of a hemispherical screen of radius R; a camera
on the axis, at distance L from the sample, images the screen. A beam leaving
at polar angle θ, azimuth φ lands at the image radius

    r = s · sin θ · (1 − d) / (1 − d cos θ),   d = R / L ∈ [0, 1),

so that d = 0 is the distant camera (r = s sin θ) and s is the image radius in
pixels that sin θ = 1 would reach in that limit. The image may be slightly
elliptical (axis ratio `ellipticity` along direction `ellipse_deg`) and rotated.
Pixels: x to the right, y downwards, the centre of the top-left pixel at (0, 0);
a surface direction at azimuth φ appears at image angle φ + rotation measured
counter-clockwise on the screen (so y_px decreases as sin φ grows).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
import scipy.constants as sc

from .errors import ParameterError

__all__ = [
    "wavelength_A",
    "sin_theta",
    "exit_angles_deg",
    "ScreenGeometry",
    "momentum_to_pixels",
    "pixels_to_momentum",
    "local_jacobian",
    "H2_OVER_2ME_EV_A2",
]

# h² / (2 m_e e) in eV·Å², from CODATA constants via scipy.constants (≈ 150.412).
H2_OVER_2ME_EV_A2 = sc.h**2 / (2.0 * sc.m_e * sc.e) * 1e20
_MEC2_EV = sc.m_e * sc.c**2 / sc.e


def _check_energy(energy_eV) -> np.ndarray:
    e = np.asarray(energy_eV, dtype=np.float64)
    if not np.all(np.isfinite(e)) or np.any(e <= 0):
        raise ParameterError(f"Electron energy must be a positive number of eV, got {energy_eV!r}.")
    return e


def wavelength_A(energy_eV, *, relativistic: bool = False):
    """Electron de Broglie wavelength λ = h / √(2 m_e e E) in Å.

    Parameters
    ----------
    energy_eV : float or ndarray
        Kinetic energy in eV (> 0).
    relativistic : bool, keyword-only
        Include the factor (1 + E / (2 m_e c²))^(−1/2) (0.005 % at 100 eV).

    Examples
    --------
    >>> print(round(wavelength_A(100.0), 6))
    1.226426
    """
    e = _check_energy(energy_eV)
    lam = np.sqrt(H2_OVER_2ME_EV_A2 / e)
    if relativistic:
        lam = lam / np.sqrt(1.0 + e / (2.0 * _MEC2_EV))
    return float(lam) if lam.ndim == 0 else lam


def sin_theta(g_par: np.ndarray, energy_eV: float, *, k_in_par: np.ndarray | None = None,
              relativistic: bool = False) -> np.ndarray:
    """sin θ = λ |g + k_in∥| for each beam.

    Parameters
    ----------
    g_par : (K, 2) ndarray of float
        Parallel momentum transfer of each beam, Å⁻¹ without 2π.
    energy_eV : float
    k_in_par : (2,) ndarray, optional
        Parallel component of the incident wave vector, Å⁻¹ without 2π
        (sin θ_in / λ along the tilt azimuth); None for normal incidence.

    Returns
    -------
    (K,) ndarray of float64
        May exceed 1 for evanescent beams.
    """
    k = np.asarray(g_par, dtype=np.float64).reshape(-1, 2)
    if k_in_par is not None:
        k = k + np.asarray(k_in_par, dtype=np.float64).reshape(1, 2)
    return wavelength_A(energy_eV, relativistic=relativistic) * np.hypot(k[:, 0], k[:, 1])


def exit_angles_deg(g_par: np.ndarray, energy_eV: float, **kw) -> np.ndarray:
    """Polar exit angle θ in degrees of each beam; NaN where |sin θ| > 1.

    Examples
    --------
    >>> a = 3.615 / np.sqrt(2)              # Cu(100), (1,0) at 100 eV
    >>> print(round(float(exit_angles_deg([[1 / a, 0.0]], 100.0)[0]), 3))
    28.671
    """
    s = sin_theta(g_par, energy_eV, **kw)
    with np.errstate(invalid="ignore"):
        return np.degrees(np.arcsin(np.where(s <= 1.0, s, np.nan)))


@dataclass(frozen=True)
class ScreenGeometry:
    """Where the camera sees each beam.

    Attributes
    ----------
    center_x_px, center_y_px : float
        Image of the surface normal (the (0,0) beam at normal incidence).
    scale_px : float
        Image radius of sin θ = 1 for a distant camera (pixels).
    distortion : float
        d = R / L, screen radius over camera distance, in [0, 1); 0 = distant camera.
    rotation_deg : float
        Image angle of the surface +x direction, counter-clockwise on screen.
    ellipticity : float
        Axis ratio (> 0) applied along `ellipse_deg`; 1 = round.
    ellipse_deg : float
        Image direction along which radii are multiplied by `ellipticity`.
    acceptance_deg : float
        Half-angle the screen accepts (beams beyond it are not seen).
    """

    center_x_px: float
    center_y_px: float
    scale_px: float
    distortion: float = 0.0
    rotation_deg: float = 0.0
    ellipticity: float = 1.0
    ellipse_deg: float = 0.0
    acceptance_deg: float = 52.0
    extra: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        if not (self.scale_px > 0 and math.isfinite(self.scale_px)):
            raise ParameterError(f"`scale_px` must be positive, got {self.scale_px}.")
        if not (0.0 <= self.distortion < 1.0):
            raise ParameterError(f"`distortion` (R/L) must be in [0, 1), got {self.distortion}.")
        if not (self.ellipticity > 0):
            raise ParameterError(f"`ellipticity` must be positive, got {self.ellipticity}.")
        if not (0.0 < self.acceptance_deg <= 90.0):
            raise ParameterError(f"`acceptance_deg` must be in (0, 90], got {self.acceptance_deg}.")

    @property
    def center_px(self) -> tuple[float, float]:
        """(x, y) of the pattern centre."""
        return (self.center_x_px, self.center_y_px)

    def to_dict(self) -> dict:
        d = asdict(self)
        d.pop("extra", None)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "ScreenGeometry":
        names = {f for f in cls.__dataclass_fields__ if f != "extra"}
        unknown = set(d) - names
        if unknown:
            raise ParameterError(f"Unknown screen-geometry fields {sorted(unknown)}; known: {sorted(names)}.")
        return cls(**{k: float(v) for k, v in d.items()})


def _radial(sin_t: np.ndarray, d: float) -> np.ndarray:
    """r / s as a function of sin θ (θ ≤ 90°)."""
    cos_t = np.sqrt(np.clip(1.0 - sin_t**2, 0.0, 1.0))
    return sin_t * (1.0 - d) / (1.0 - d * cos_t)


def _radial_inverse(u: np.ndarray, d: float) -> np.ndarray:
    """sin θ from u = r / s (inverse of :func:`_radial`)."""
    w = u / (1.0 - d)  # w (1 − d cos θ) = sin θ  →  sin θ + w d cos θ = w
    alpha = np.arctan(w * d)
    theta = np.arcsin(np.clip(w / np.sqrt(1.0 + (w * d) ** 2), -1.0, 1.0)) - alpha
    return np.sin(theta)


def _ellipse(geom: ScreenGeometry) -> np.ndarray:
    """2×2 image-plane matrix applying the ellipticity (acts on column (x, y_up))."""
    if geom.ellipticity == 1.0:
        return np.eye(2)
    b = math.radians(geom.ellipse_deg)
    u = np.array([[math.cos(b), -math.sin(b)], [math.sin(b), math.cos(b)]])
    return u @ np.diag([geom.ellipticity, 1.0]) @ u.T


def momentum_to_pixels(k_par: np.ndarray, energy_eV: float, geom: ScreenGeometry, *,
                       relativistic: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Image pixels of beams with parallel momentum `k_par` (outgoing, k_in included).

    Parameters
    ----------
    k_par : (K, 2) ndarray of float
        Outgoing parallel momentum, surface (x, y) axes, Å⁻¹ without 2π.
    energy_eV : float
    geom : ScreenGeometry

    Returns
    -------
    xy_px : (K, 2) ndarray of float64
        (x, y) pixel positions; NaN for beams that do not reach the screen.
    visible : (K,) ndarray of bool
        True where θ is within the screen acceptance.

    Examples
    --------
    >>> g = ScreenGeometry(100.0, 100.0, 80.0)
    >>> xy, vis = momentum_to_pixels([[0.0, 0.0], [0.5 / 1.226426, 0.0]], 100.0, g)
    >>> print(np.round(xy, 3).tolist(), vis.tolist())
    [[100.0, 100.0], [140.0, 100.0]] [True, True]
    """
    k = np.asarray(k_par, dtype=np.float64).reshape(-1, 2)
    st = wavelength_A(energy_eV, relativistic=relativistic) * np.hypot(k[:, 0], k[:, 1])
    visible = st <= math.sin(math.radians(geom.acceptance_deg)) + 1e-12
    phi = np.arctan2(k[:, 1], k[:, 0]) + math.radians(geom.rotation_deg)
    with np.errstate(invalid="ignore"):
        r = geom.scale_px * _radial(np.where(st <= 1.0, st, np.nan), geom.distortion)
    xy_up = np.stack([r * np.cos(phi), r * np.sin(phi)], axis=1) @ _ellipse(geom).T
    xy = np.column_stack([geom.center_x_px + xy_up[:, 0], geom.center_y_px - xy_up[:, 1]])
    xy[~visible] = np.nan
    return xy, visible


def pixels_to_momentum(xy_px: np.ndarray, energy_eV: float, geom: ScreenGeometry, *,
                       relativistic: bool = False) -> np.ndarray:
    """Inverse of :func:`momentum_to_pixels`.

    Parameters
    ----------
    xy_px : (K, 2) ndarray of float
        (x, y) pixel positions.

    Returns
    -------
    (K, 2) ndarray of float64
        Outgoing parallel momentum in surface axes, Å⁻¹ without 2π.

    Examples
    --------
    >>> g = ScreenGeometry(512.0, 480.0, 700.0, distortion=0.3, rotation_deg=12.0)
    >>> k = np.array([[0.31, -0.12], [0.05, 0.4]])
    >>> xy, _ = momentum_to_pixels(k, 77.0, g)
    >>> np.allclose(pixels_to_momentum(xy, 77.0, g), k)
    True
    """
    p = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    up = np.column_stack([p[:, 0] - geom.center_x_px, geom.center_y_px - p[:, 1]])
    up = up @ np.linalg.inv(_ellipse(geom)).T
    r = np.hypot(up[:, 0], up[:, 1])
    phi = np.arctan2(up[:, 1], up[:, 0]) - math.radians(geom.rotation_deg)
    st = _radial_inverse(r / geom.scale_px, geom.distortion)
    kmag = st / wavelength_A(energy_eV, relativistic=relativistic)
    return np.column_stack([kmag * np.cos(phi), kmag * np.sin(phi)])


def local_jacobian(energy_eV: float, geom: ScreenGeometry, *, relativistic: bool = False) -> np.ndarray:
    """d(pixel x, y) / d(k_x, k_y) at the pattern centre, pixels per Å⁻¹ (no 2π).

    Returns
    -------
    (2, 2) ndarray of float64
        J with columns for k_x and k_y, so a small momentum δk moves a spot by
        J @ δk pixels. Use ``reciprocal_vectors @ J.T`` for rows in pixels.
    """
    lam = wavelength_A(energy_eV, relativistic=relativistic)
    c, s = math.cos(math.radians(geom.rotation_deg)), math.sin(math.radians(geom.rotation_deg))
    rot = np.array([[c, -s], [s, c]])
    flip = np.diag([1.0, -1.0])  # y up → y down
    # dr/d(sin θ) at θ = 0 is s (1 − d) / (1 − d) = s
    return geom.scale_px * lam * (flip @ _ellipse(geom) @ rot)
