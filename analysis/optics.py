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
    "pixel_derivatives",
    "GEOMETRY_PARAMETERS",
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
    return project(k_par, wavelength_A(energy_eV, relativistic=relativistic), geom)


def project(k_par, lam: float, geom) -> tuple[np.ndarray, np.ndarray]:
    """:func:`momentum_to_pixels` for a wavelength `lam` (Å) already known (hot loops).

    `geom` is a ScreenGeometry or any object with its fields (no validation here).
    """
    k = np.asarray(k_par, dtype=np.float64).reshape(-1, 2)
    st = lam * np.hypot(k[:, 0], k[:, 1])
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


#: Parameters of :func:`pixel_derivatives`, in its column order: centre (px), ln scale,
#: rotation (deg), distortion R/L, and the ellipse pair (e1, e2) = (ε − 1)(cos 2β, sin 2β).
GEOMETRY_PARAMETERS = ("center_x_px", "center_y_px", "log_scale", "rotation_deg", "distortion", "e1", "e2")


def pixel_derivatives(k_par: np.ndarray, energy_eV: float, geom: ScreenGeometry, *,
                      relativistic: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels of beams with their exact derivatives (for least-squares fits of the camera).

    Parameters
    ----------
    k_par : (K, 2) ndarray of float
        Outgoing parallel momentum, Å⁻¹ without 2π (as :func:`momentum_to_pixels`).

    Returns
    -------
    xy_px : (K, 2) ndarray
        As :func:`momentum_to_pixels` (NaN beyond the screen).
    d_k : (K, 2, 2) ndarray
        d(x, y)/d(k_x, k_y), pixels per Å⁻¹.
    d_geom : (K, 2, 7) ndarray
        d(x, y)/d(parameter) for the parameters named in :data:`GEOMETRY_PARAMETERS`.
        Both are NaN where the beam misses the screen.

    Examples
    --------
    >>> g = ScreenGeometry(512.0, 480.0, 700.0, distortion=0.3, rotation_deg=12.0)
    >>> xy, dk, dg = pixel_derivatives([[0.0, 0.0]], 100.0, g)
    >>> bool(np.allclose(dk[0], local_jacobian(100.0, g)))
    True
    """
    return project_derivatives(k_par, wavelength_A(energy_eV, relativistic=relativistic), geom)


def project_derivatives(k_par, lam: float, geom) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`pixel_derivatives` for a wavelength `lam` (Å) already known (hot loops)."""
    k = np.asarray(k_par, dtype=np.float64).reshape(-1, 2)
    d, sc_px = geom.distortion, geom.scale_px
    kn = np.hypot(k[:, 0], k[:, 1])
    st = lam * kn
    visible = st <= math.sin(math.radians(geom.acceptance_deg)) + 1e-12
    with np.errstate(invalid="ignore", divide="ignore"):
        st_ok = np.where(st < 1.0, st, np.nan)
        c = np.sqrt(1.0 - st_ok**2)
        den = 1.0 - d * c
        f = st_ok * (1.0 - d) / den  # r / s
        df_dst = (1.0 - d) * (1.0 - d / c) / den**2
        df_dd = st_ok * (c - 1.0) / den**2
    phi0 = np.arctan2(k[:, 1], k[:, 0])
    phi = phi0 + math.radians(geom.rotation_deg)
    cp, sp = np.cos(phi), np.sin(phi)
    r = sc_px * f
    v = np.stack([r * cp, r * sp], axis=1)  # before the ellipse, y up
    e = _ellipse(geom)
    # dv/dk: radial part along (cos φ, sin φ), azimuthal part along (−sin φ, cos φ)
    small = kn < 1e-12
    kn_s = np.where(small, 1.0, kn)
    u0 = np.stack([k[:, 0] / kn_s, k[:, 1] / kn_s], axis=1)  # unit k (surface axes)
    t0 = np.stack([-u0[:, 1], u0[:, 0]], axis=1)
    radial = np.stack([cp, sp], axis=1)
    azim = np.stack([-sp, cp], axis=1)
    dr_dk = (sc_px * df_dst * lam)[:, None] * u0  # (K, 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        dphi_dk = t0 / kn_s[:, None]
    dv_dk = radial[:, :, None] * dr_dk[:, None, :] + (r[:, None, None] * azim[:, :, None]) * dphi_dk[:, None, :]
    if small.any():  # at k = 0: the linear map s λ f'(0) R(rotation)
        cr, sr = math.cos(math.radians(geom.rotation_deg)), math.sin(math.radians(geom.rotation_deg))
        dv_dk[small] = sc_px * lam * (1.0 - d) / (1.0 - d) * np.array([[cr, -sr], [sr, cr]])
    flip = np.array([1.0, -1.0])
    d_k = flip[None, :, None] * np.einsum("ij,kjl->kil", e, dv_dk)
    xy_up = v @ e.T
    xy = np.column_stack([geom.center_x_px + xy_up[:, 0], geom.center_y_px - xy_up[:, 1]])
    d_geom = np.zeros((len(k), 2, 7))
    d_geom[:, 0, 0] = 1.0
    d_geom[:, 1, 1] = 1.0
    d_geom[:, :, 2] = flip * xy_up
    d_geom[:, :, 3] = flip * ((r[:, None] * azim) @ e.T) * (math.pi / 180.0)
    d_geom[:, :, 4] = flip * (((sc_px * df_dd)[:, None] * radial) @ e.T)
    eps1 = geom.ellipticity - 1.0
    b2 = math.radians(2.0 * geom.ellipse_deg)
    e1, e2 = eps1 * math.cos(b2), eps1 * math.sin(b2)
    h = math.hypot(e1, e2)
    c1, c2 = (e1 / h, e2 / h) if h > 1e-12 else (0.0, 0.0)
    de1 = 0.5 * np.array([[c1 + 1.0, 0.0], [0.0, c1 - 1.0]])
    de2 = 0.5 * np.array([[c2, 1.0], [1.0, c2]])
    d_geom[:, :, 5] = flip * (v @ de1.T)
    d_geom[:, :, 6] = flip * (v @ de2.T)
    xy[~visible] = np.nan
    d_k[~visible] = np.nan
    d_geom[~visible] = np.nan
    return xy, d_k, d_geom
