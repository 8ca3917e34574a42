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

Off-normal incidence: the primary beam's parallel momentum k_in∥ adds to every beam,
so a beam of parallel momentum transfer g leaves along the direction whose sin θ
vector (on the screen, before the rotation to image axes is undone) is
λ R g + t, with t = λ k_in∥ rotated into image axes (`incidence_x`, `incidence_y`:
the sin θ vector of the specular (0,0) beam; energy-independent for a fixed
sample). The screen axis stays the image of the surface normal; the specular beam
lands at :attr:`ScreenGeometry.specular_px`, about s·|t| from it. At d = 0 a
shift of t is a shift of the centre; the radial law (d > 0) tells them apart.
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

    Returns
    -------
    float or ndarray of float64
        Wavelength in Å, a float for a scalar energy, else an array of the energies' shape.

    Raises
    ------
    ParameterError
        When an energy is not a positive finite number.

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
    """Sine of each beam's exit angle, sin θ = λ |g + k_in∥|.

    Parameters
    ----------
    g_par : (K, 2) ndarray of float
        Parallel momentum transfer of each beam, Å⁻¹ without 2π.
    energy_eV : float
        Electron energy, eV.
    k_in_par : (2,) ndarray, optional, keyword-only
        Parallel component of the incident wave vector, Å⁻¹ without 2π
        (sin θ_in / λ along the tilt azimuth); None for normal incidence.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

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

    Parameters
    ----------
    g_par : (K, 2) array_like of float
        Parallel momentum transfer of each beam, Å⁻¹ without 2π.
    energy_eV : float
        Electron energy, eV.
    **kw
        ``k_in_par`` and ``relativistic``, as for :func:`sin_theta`.

    Returns
    -------
    (K,) ndarray of float64
        Exit angles from the surface normal, degrees.

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
    incidence_x, incidence_y : float
        sin θ vector of the specular (0,0) beam in image axes (x right, y up):
        λ k_in∥ for a primary beam off the surface normal; 0 at normal incidence.
    perspective_x, perspective_y : float
        Keystone of a camera looking at the screen off its axis: the image point q
        (relative to the centre, after the ellipse) goes to q / (1 + p·q / scale_px),
        the projective part of a homography that keeps the centre (dimensionless;
        about tan(tilt) · scale / camera distance along the tilt). 0 on the axis.
    """

    center_x_px: float
    center_y_px: float
    scale_px: float
    distortion: float = 0.0
    rotation_deg: float = 0.0
    ellipticity: float = 1.0
    ellipse_deg: float = 0.0
    acceptance_deg: float = 52.0
    incidence_x: float = 0.0
    incidence_y: float = 0.0
    perspective_x: float = 0.0
    perspective_y: float = 0.0
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
        if not math.hypot(self.perspective_x, self.perspective_y) < 0.5:
            raise ParameterError(f"The perspective (keystone) must be below 0.5, got "
                                 f"({self.perspective_x}, {self.perspective_y}).")
        if not math.hypot(self.incidence_x, self.incidence_y) < 0.5:
            raise ParameterError(f"The incidence (sin θ of the specular beam) must be below 0.5 (30°), got "
                                 f"({self.incidence_x}, {self.incidence_y}).")

    @property
    def center_px(self) -> tuple[float, float]:
        """(x, y) of the screen axis (the image of the surface normal)."""
        return (self.center_x_px, self.center_y_px)

    @property
    def specular_px(self) -> tuple[float, float]:
        """(x, y) of the specular (0,0) beam: the centre itself at normal incidence.

        Examples
        --------
        >>> g = ScreenGeometry(100.0, 100.0, 80.0, incidence_x=0.05)
        >>> print(np.round(g.specular_px, 3).tolist())
        [104.0, 100.0]
        """
        xy, _ = project(np.zeros((1, 2)), 1.0, self)
        return (float(xy[0, 0]), float(xy[0, 1]))

    def to_dict(self) -> dict:
        """The camera model as plain numbers (what :meth:`from_dict` reads).

        Returns
        -------
        dict
            One entry per field, by name.
        """
        d = asdict(self)
        d.pop("extra", None)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "ScreenGeometry":
        """A camera model from :meth:`to_dict`'s dict.

        Parameters
        ----------
        d : dict
            Field values by name: ``center_x_px``, ``center_y_px`` and ``scale_px`` are
            needed, the others take their defaults.

        Returns
        -------
        ScreenGeometry
            The camera model.

        Raises
        ------
        ParameterError
            When `d` names a field that does not exist.
        """
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
        Electron energy, eV.
    geom : ScreenGeometry
        The camera model.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

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
    w = _screen_sin(k_par, lam, geom)
    st = np.hypot(w[:, 0], w[:, 1])
    visible = st <= math.sin(math.radians(geom.acceptance_deg)) + 1e-12
    with np.errstate(invalid="ignore", divide="ignore"):
        st_ok = np.where(st <= 1.0, st, np.nan)
        ratio = np.where(st_ok > 0, _radial(st_ok, geom.distortion) / np.where(st_ok > 0, st_ok, 1.0), 1.0)
    xy_up = (geom.scale_px * ratio)[:, None] * w @ _ellipse(geom).T
    p = _perspective(geom)
    if p.any():
        xy_up = xy_up / (1.0 + xy_up @ p / geom.scale_px)[:, None]
    xy = np.column_stack([geom.center_x_px + xy_up[:, 0], geom.center_y_px - xy_up[:, 1]])
    xy[~visible] = np.nan
    return xy, visible


def _perspective(geom) -> np.ndarray:
    return np.array([getattr(geom, "perspective_x", 0.0), getattr(geom, "perspective_y", 0.0)], dtype=np.float64)


def _incidence(geom) -> np.ndarray:
    return np.array([getattr(geom, "incidence_x", 0.0), getattr(geom, "incidence_y", 0.0)], dtype=np.float64)


def _rotation(geom) -> np.ndarray:
    c, s = math.cos(math.radians(geom.rotation_deg)), math.sin(math.radians(geom.rotation_deg))
    return np.array([[c, -s], [s, c]])


def _screen_sin(k_par, lam: float, geom) -> np.ndarray:
    """(K, 2) sin θ vectors in image axes (y up): λ R k + t."""
    k = np.asarray(k_par, dtype=np.float64).reshape(-1, 2)
    return lam * k @ _rotation(geom).T + _incidence(geom)[None, :]


def pixels_to_momentum(xy_px: np.ndarray, energy_eV: float, geom: ScreenGeometry, *,
                       relativistic: bool = False) -> np.ndarray:
    """Inverse of :func:`momentum_to_pixels`.

    Parameters
    ----------
    xy_px : (K, 2) ndarray of float
        (x, y) pixel positions.
    energy_eV : float
        Electron energy, eV.
    geom : ScreenGeometry
        The camera model.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

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
    persp = _perspective(geom)
    if persp.any():  # out = q / (1 + p·q/s)  ⇔  q = out / (1 − p·out/s)
        up = up / (1.0 - up @ persp / geom.scale_px)[:, None]
    up = up @ np.linalg.inv(_ellipse(geom)).T
    r = np.hypot(up[:, 0], up[:, 1])
    st = _radial_inverse(r / geom.scale_px, geom.distortion)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(r[:, None] > 0, up * (st / np.where(r > 0, r, 1.0))[:, None], 0.0)
    lam = wavelength_A(energy_eV, relativistic=relativistic)
    return (w - _incidence(geom)[None, :]) @ _rotation(geom) / lam


def local_jacobian(energy_eV: float, geom: ScreenGeometry, *, relativistic: bool = False) -> np.ndarray:
    """Derivative d(pixel x, y) / d(k_x, k_y) at the specular (0,0) beam, pixels per Å⁻¹ (no 2π).

    Parameters
    ----------
    energy_eV : float
        Electron energy, eV.
    geom : ScreenGeometry
        The camera model.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

    Returns
    -------
    (2, 2) ndarray of float64
        J with columns for k_x and k_y, so a small momentum δk moves a spot by
        J @ δk pixels. Use ``reciprocal_vectors @ J.T`` for rows in pixels.
    """
    lam = wavelength_A(energy_eV, relativistic=relativistic)
    return project_derivatives(np.zeros((1, 2)), lam, geom)[1][0]


#: Parameters of :func:`pixel_derivatives`, in its column order: centre (px), ln scale,
#: rotation (deg), distortion R/L, the ellipse pair (e1, e2) = (ε − 1)(cos 2β, sin 2β), and the
#: incidence (sin θ vector of the specular beam, image axes) and the perspective (keystone).
GEOMETRY_PARAMETERS = ("center_x_px", "center_y_px", "log_scale", "rotation_deg", "distortion", "e1", "e2",
                       "incidence_x", "incidence_y", "perspective_x", "perspective_y")


def pixel_derivatives(k_par: np.ndarray, energy_eV: float, geom: ScreenGeometry, *,
                      relativistic: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels of beams with their exact derivatives (for least-squares fits of the camera).

    Parameters
    ----------
    k_par : (K, 2) ndarray of float
        Outgoing parallel momentum, Å⁻¹ without 2π (as :func:`momentum_to_pixels`).
    energy_eV : float
        Electron energy, eV.
    geom : ScreenGeometry
        The camera model.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

    Returns
    -------
    xy_px : (K, 2) ndarray
        As :func:`momentum_to_pixels` (NaN beyond the screen).
    d_k : (K, 2, 2) ndarray
        d(x, y)/d(k_x, k_y), pixels per Å⁻¹.
    d_geom : (K, 2, 11) ndarray
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
    """:func:`pixel_derivatives` for a wavelength `lam` (Å) already known (hot loops).

    With w = λ R k + t the sin θ vector on the screen and ρ = |w|, the image point
    before the ellipse is v = s · (f(ρ)/ρ) · w, f the radial law; so
    ∂v/∂w = s [(f/ρ) I + (f′ − f/ρ) ŵŵᵀ], smooth through ρ = 0.
    """
    k = np.asarray(k_par, dtype=np.float64).reshape(-1, 2)
    d, sc_px = geom.distortion, geom.scale_px
    rot = _rotation(geom)
    w = lam * k @ rot.T + _incidence(geom)[None, :]
    rho = np.hypot(w[:, 0], w[:, 1])
    visible = rho <= math.sin(math.radians(geom.acceptance_deg)) + 1e-12
    small = rho < 1e-12
    rho_s = np.where(small, 1.0, rho)
    with np.errstate(invalid="ignore", divide="ignore"):
        r_ok = np.where(rho < 1.0, rho, np.nan)
        c = np.sqrt(1.0 - r_ok**2)
        den = 1.0 - d * c
        f_over = np.where(small, 1.0, (1.0 - d) / den)  # f(ρ)/ρ
        df = (1.0 - d) * (1.0 - d / c) / den**2  # f′(ρ)
        df_dd = np.where(small, 0.0, (c - 1.0) / den**2)  # ∂(f/ρ)/∂d
    w_hat = w / rho_s[:, None]
    dv_dw = sc_px * (f_over[:, None, None] * np.eye(2)[None]
                     + np.where(small, 0.0, df - f_over)[:, None, None] * w_hat[:, :, None] * w_hat[:, None, :])
    v = (sc_px * f_over)[:, None] * w  # before the ellipse, y up
    e = _ellipse(geom)
    flip = np.array([1.0, -1.0])
    d_k = flip[None, :, None] * (e @ (dv_dw @ (lam * rot)))
    xy_up = v @ e.T
    xy = np.column_stack([geom.center_x_px + xy_up[:, 0], geom.center_y_px - xy_up[:, 1]])
    d_geom = np.zeros((len(k), 2, 11))
    d_geom[:, 0, 0] = 1.0
    d_geom[:, 1, 1] = 1.0
    d_geom[:, :, 2] = flip * xy_up
    turn = lam * k @ rot.T @ np.array([[0.0, 1.0], [-1.0, 0.0]])  # ∂(R k)/∂angle = J90 R k (rows)
    d_geom[:, :, 3] = flip * ((dv_dw @ turn[:, :, None])[:, :, 0] @ e.T) * (math.pi / 180.0)
    d_geom[:, :, 4] = flip * (((sc_px * df_dd)[:, None] * w) @ e.T)
    eps1 = geom.ellipticity - 1.0
    b2 = math.radians(2.0 * geom.ellipse_deg)
    e1, e2 = eps1 * math.cos(b2), eps1 * math.sin(b2)
    h = math.hypot(e1, e2)
    c1, c2 = (e1 / h, e2 / h) if h > 1e-12 else (0.0, 0.0)
    de1 = 0.5 * np.array([[c1 + 1.0, 0.0], [0.0, c1 - 1.0]])
    de2 = 0.5 * np.array([[c2, 1.0], [1.0, c2]])
    d_geom[:, :, 5] = flip * (v @ de1.T)
    d_geom[:, :, 6] = flip * (v @ de2.T)
    d_t = flip[None, :, None] * (e @ dv_dw)  # ∂(x, y)/∂t
    d_geom[:, :, 7] = d_t[:, :, 0]
    d_geom[:, :, 8] = d_t[:, :, 1]
    persp = _perspective(geom)
    if persp.any():  # out = q / (1 + p·q/s): ∂out/∂q = (I − out pᵀ/s) / den, ∂out/∂p = −out qᵀ / (s den)
        q = xy_up
        den = 1.0 + q @ persp / sc_px
        out = q / den[:, None]
        chain = (np.eye(2)[None] - out[:, :, None] * persp[None, None, :] / sc_px) / den[:, None, None]
        fl = np.diag(flip)
        # the columns so far are flip · ∂q/∂·: map them through flip · chain · flip
        m_all = fl @ chain @ fl
        d_k = m_all @ d_k
        d_geom[:, :, 2:9] = m_all @ d_geom[:, :, 2:9]
        d_geom[:, :, 2] = flip * out  # out ∝ s (den does not depend on s)
        xy = np.column_stack([geom.center_x_px + out[:, 0], geom.center_y_px - out[:, 1]])
    else:
        q, den, out = xy_up, np.ones(len(k)), xy_up
    dp = -out[:, :, None] * q[:, None, :] / (sc_px * den[:, None, None])  # also at p = 0
    d_geom[:, :, 9] = flip * dp[:, :, 0]
    d_geom[:, :, 10] = flip * dp[:, :, 1]
    xy[~visible] = np.nan
    d_k[~visible] = np.nan
    d_geom[~visible] = np.nan
    return xy, d_k, d_geom
