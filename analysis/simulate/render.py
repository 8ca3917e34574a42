"""Synthetic camera frames of a :class:`~analysis.simulate.pattern.Pattern` with
exact truth: spots, diffuse background, screen edge, gun shadow, shot and read
noise, gain, offset and quantisation.

Pixels: x to the right, y downwards, the centre of the top-left pixel at (0, 0).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..jsonsafe import json_safe
from ..optics import ScreenGeometry, momentum_to_pixels, wavelength_A
from ..profiles import GAUSSIAN
from .pattern import Pattern

__all__ = ["GunShadow", "SyntheticImage", "acceptance_radius_px", "default_intensities", "render_image"]

@dataclass(frozen=True)
class GunShadow:
    """The electron gun and its holder, dark in front of the screen.

    Attributes
    ----------
    offset_x_px, offset_y_px : float
        Centre of the gun disk relative to the pattern centre (x right, y down).
    radius_px : float
        Radius of the gun disk.
    arm_angle_deg : float
        Image direction (counter-clockwise from +x) from the disk to the screen edge.
    arm_width_px : float
        Full width of the holder arm; 0 for no arm.
    """

    offset_x_px: float = 0.0
    offset_y_px: float = 0.0
    radius_px: float = 34.0
    arm_angle_deg: float = 235.0
    arm_width_px: float = 24.0

    def __post_init__(self):
        vals = dataclasses.astuple(self)
        if not all(math.isfinite(v) for v in vals):
            raise ParameterError(f"GunShadow fields must be finite, got {vals}.")
        if self.radius_px < 0 or self.arm_width_px < 0:
            raise ParameterError(f"GunShadow radius and arm width must be ≥ 0, got "
                                 f"{self.radius_px} and {self.arm_width_px}.")

    @classmethod
    def scaled(cls, screen_radius: float, *, arm_angle_deg: float = 235.0, offset_px=(0.0, 0.0)) -> "GunShadow":
        """A typical gun for a screen of radius `screen_radius` px (disk 7 %, arm 5 % of it).

        Parameters
        ----------
        screen_radius : float
            Screen radius, pixels.
        arm_angle_deg : float, keyword-only
            Image direction of the holder arm from the gun, degrees.
        offset_px : (dx, dy), keyword-only
            Offset of the gun from the pattern centre, pixels.

        Returns
        -------
        GunShadow
            The gun.
        """
        return cls(float(offset_px[0]), float(offset_px[1]), 0.07 * screen_radius, arm_angle_deg,
                   0.05 * screen_radius)

    def signed_distance(self, x, y, center_px) -> np.ndarray:
        """Distance (px) from the shadow's edge, negative inside the shadow.

        Parameters
        ----------
        x, y : ndarray of float
            Broadcastable pixel coordinates.
        center_px : (x, y)
            The pattern centre, pixels.

        Returns
        -------
        ndarray of float64
            The signed distance, pixels.
        """
        cx, cy = center_px[0] + self.offset_x_px, center_px[1] + self.offset_y_px
        dx, dy = x - cx, y - cy
        disk = np.hypot(dx, dy) - self.radius_px
        if self.arm_width_px <= 0:
            return disk
        ux, uy = math.cos(math.radians(self.arm_angle_deg)), -math.sin(math.radians(self.arm_angle_deg))
        along = dx * ux + dy * uy
        across = np.abs(dx * uy - dy * ux)
        arm = np.where(along >= 0, across - self.arm_width_px / 2.0, np.inf)
        return np.minimum(disk, arm)

    def to_dict(self, center_px=None) -> dict:
        """The gun as plain numbers (for a frame's truth).

        Parameters
        ----------
        center_px : (x, y), optional
            The pattern centre: the gun's centre is then given too.

        Returns
        -------
        dict
            The fields, and ``center_px`` of the gun.
        """
        d = dataclasses.asdict(self)
        if center_px is not None:
            d["center_px"] = [center_px[0] + self.offset_x_px, center_px[1] + self.offset_y_px]
        return d


@dataclass(frozen=True, eq=False)
class SyntheticImage:
    """A rendered camera frame with its exact truth.

    Attributes
    ----------
    image : (rows, cols) ndarray of uint8 or uint16
    truth : dict
        JSON-safe: pattern and screen centres, energy, geometry, screen, gun,
        camera, background, substrate vectors, overlayer matrices and one
        record per beam (see :func:`render_image`).
    masks : dict of str to (rows, cols) ndarray of bool
        ``"screen"`` (inside the screen disk) and ``"gun"`` (under the shadow).
    """

    image: np.ndarray
    truth: dict
    masks: dict

    def __post_init__(self):
        self.image.flags.writeable = False
        for m in self.masks.values():
            m.flags.writeable = False


def acceptance_radius_px(geometry: ScreenGeometry, energy_eV: float = 100.0) -> float:
    """Image radius reached at the acceptance angle (round screen, ellipticity ignored).

    It does not depend on the energy: the radius is a function of θ only.

    Parameters
    ----------
    geometry : ScreenGeometry
        The camera model (its acceptance angle and scale).
    energy_eV : float
        Any electron energy, eV (the radius does not depend on it).

    Returns
    -------
    float
        Radius, pixels.

    Examples
    --------
    >>> print(round(acceptance_radius_px(ScreenGeometry(0.0, 0.0, 500.0, acceptance_deg=30.0)), 6))
    250.0
    """
    round_geom = dataclasses.replace(geometry, ellipticity=1.0, center_x_px=0.0, center_y_px=0.0)
    k = math.sin(math.radians(geometry.acceptance_deg)) / wavelength_A(energy_eV)
    xy, _ = momentum_to_pixels([[k * (1 - 1e-12), 0.0]], energy_eV, round_geom)
    return float(np.hypot(*xy[0]))


def default_intensities(pattern: Pattern, rng: np.random.Generator, *, photons: float = 20000.0,
                        overlayer_factor: float = 0.3) -> np.ndarray:
    """Plausible per-beam photon counts: a smooth falloff with |g|, random factors.

    I = photons · (0.25 + 0.75 exp(−(sin θ / 0.55)²)) · u, u uniform in [0.35, 1),
    times `overlayer_factor` for fractional-order beams.

    Parameters
    ----------
    pattern : Pattern
        The beams.
    rng : numpy.random.Generator
        Source of the random factors.
    photons : float, keyword-only
        Photons of a beam at the pattern centre before the random factor.
    overlayer_factor : float, keyword-only
        Factor on fractional-order beams.

    Returns
    -------
    (K,) ndarray of float64
        Expected photons per spot (before the gun shadow).
    """
    s = np.sin(np.radians(pattern.theta_deg))
    base = photons * (0.25 + 0.75 * np.exp(-(s / 0.55) ** 2))
    factor = rng.uniform(0.35, 1.0, len(pattern))
    return base * factor * np.where(pattern.integer, 1.0, overlayer_factor)


def _spots_image(xy: np.ndarray, sigma: np.ndarray, photons: np.ndarray, trans: np.ndarray, *,
                 shape_fn=GAUSSIAN) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Expected photons per pixel from spots integrated over pixels.

    Parameters
    ----------
    xy : (K, 2) spot centres (x, y) px; sigma, photons : (K,)
    trans : (rows, cols) ndarray of float64
        Transmission in [0, 1] applied to the spots (screen × gun, and whatever
        else darkens the screen).
    shape_fn : object with ``pixel_integrals(rc, sigma, amount, half)``, keyword-only
        The spot shape; default :data:`analysis.profiles.GAUSSIAN` (round, exact
        error-function integrals). An optional ``half_px(sigma_max)`` gives the
        window half-width (default 6 σ).

    Returns
    -------
    image : (rows, cols) ndarray of float64
        Spot photons per pixel after the transmission.
    seen : (K,) ndarray of float64
        Photons of each spot that land on the image and pass the transmission.
    peak : (K,) ndarray of float64
        Brightest pixel of each spot alone (photons), after the transmission.
    """
    rows, cols = trans.shape
    out = np.zeros(rows * cols)
    seen = np.zeros(len(xy))
    peak = np.zeros(len(xy))
    if len(xy) == 0:
        return out.reshape(rows, cols), seen, peak
    t_flat = trans.ravel()
    half_fn = getattr(shape_fn, "half_px", None)
    half = int(math.ceil(6.0 * float(sigma.max()))) if half_fn is None else int(half_fn(float(sigma.max())))
    step = max(1, 2_000_000 // (2 * half + 1) ** 2)
    for s in range(0, len(xy), step):  # chunks keep the (K, w, w) block small
        sl = slice(s, s + step)
        ri, ci, val = shape_fn.pixel_integrals(xy[sl, ::-1], sigma[sl], photons[sl], half)
        r = np.broadcast_to(ri[:, :, None], val.shape)
        c = np.broadcast_to(ci[:, None, :], val.shape)
        ok = (r >= 0) & (r < rows) & (c >= 0) & (c < cols)
        flat = np.where(ok, r * cols + c, 0)
        val = np.where(ok, val * t_flat[flat], 0.0)
        seen[sl] = val.sum(axis=(1, 2))
        peak[sl] = val.max(axis=(1, 2))
        out += np.bincount(flat.ravel(), weights=val.ravel(), minlength=rows * cols)
    return out.reshape(rows, cols), seen, peak


def _per_spot(value, k: int, name: str) -> np.ndarray:
    """A scalar or K values as a (K,) float64 array."""
    a = np.asarray(value, dtype=np.float64)
    if a.ndim == 0:
        return np.full(k, float(a))
    if a.shape != (k,):
        raise ParameterError(f"`{name}` must be a number or {k} numbers, got shape {a.shape}.")
    return a.copy()


def _background(x, y, center_px, radius: float, peak: float, gradient) -> np.ndarray:
    """Diffuse inelastic background, photons per pixel at broadcastable (x, y):
    a broad radial falloff times a gentle tilt."""
    u, v = (x - center_px[0]) / radius, (y - center_px[1]) / radius
    radial = 0.22 + 0.78 * np.exp(-(u * u + v * v) / 0.45)
    tilt = np.clip(1.0 + gradient[0] * u + gradient[1] * v, 0.0, None)
    return peak * radial * tilt


_DEFAULT = object()


def render_image(pattern: Pattern, *, shape=(1024, 1024), rng: np.random.Generator,
                 spot_sigma_px=2.0, intensities=None, screen_radius_px: float | None = None,
                 screen_center_px=None, gun=_DEFAULT, background_photons: float = 40.0,
                 background_gradient=(0.12, -0.08), read_noise_e: float = 3.0, gain: float | None = None,
                 offset_adu: float | None = None, bit_depth: int = 16, saturate: bool = True,
                 noise: bool = True) -> SyntheticImage:
    """Render `pattern` as a camera frame.

    Spots are Gaussians integrated exactly over each pixel (error functions), so
    their sub-pixel truth is exact. Expected photons = (spots + diffuse
    background) × screen transmission × gun transmission (edges soft over one
    pixel); then Poisson shot noise, Gaussian read noise, gain, a dark offset
    and quantisation with clipping. Outside the screen disk only the offset and
    read noise remain.

    Parameters
    ----------
    pattern : Pattern
        The beams, framed by its geometry.
    shape : (rows, cols), keyword-only
        Size of the frame.
    rng : numpy.random.Generator, keyword-only
        Source of every random number (noise and default intensities).
    spot_sigma_px : float or (K,) array_like
        Gaussian σ of each spot, pixels.
    intensities : (K,) array_like, optional
        Photons per spot; default :func:`default_intensities`.
    screen_radius_px : float, optional
        Default: the image radius of the acceptance angle.
    screen_center_px : (x, y), optional
        Default: the pattern centre (``geometry.center_px``).
    gun : GunShadow or None
        Default ``GunShadow.scaled(screen radius)``; None for no shadow.
    background_photons : float
        Diffuse background at the pattern centre, photons per pixel.
    background_gradient : (gx, gy)
        Relative change of the background per screen radius along x and y.
    read_noise_e : float
        Gaussian read noise, electrons (1 photon = 1 electron).
    gain : float, optional
        ADU per electron; default 4.0 (16-bit) or 0.25 (8-bit).
    offset_adu : float, optional
        Dark level; default 100 (16-bit) or 4 (8-bit).
    bit_depth : {8, 16}
        Bits per pixel.
    saturate : bool
        True: pixels above full scale clip (real camera). False: the gain is
        lowered so the brightest expected pixel stays below full scale.
    noise : bool
        False renders the rounded expected value (no shot or read noise).

    Returns
    -------
    SyntheticImage
        ``truth["spots"]`` has, per beam: x, y (px), h, k, label, integer,
        domains (indices), theta_deg, photons (expected photons that reach the
        image, after the screen edge and gun shadow), photons_unshadowed,
        sigma_px, background_per_px (expected diffuse photons per pixel at the
        spot centre, after the shadow), hidden (centre under the gun or off the
        screen), partly_hidden (within 3σ of an edge) and saturated (centre
        pixel at full scale).

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.simulate import forward_pattern
    >>> geom = ScreenGeometry(128.0, 128.0, 140.0)
    >>> p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=150.0, geometry=geom)
    >>> im = render_image(p, shape=(256, 256), rng=np.random.default_rng(0))
    >>> print(im.image.dtype, im.image.shape, im.truth["spots"][0]["hidden"])
    uint16 (256, 256) True
    """
    _check_render_inputs(pattern, rng, bit_depth)
    if not (read_noise_e >= 0 and math.isfinite(read_noise_e)):
        raise ParameterError(f"`read_noise_e` must be ≥ 0, got {read_noise_e}.")
    scene = _scene(pattern, shape=shape, rng=rng, spot_sigma_px=spot_sigma_px, intensities=intensities,
                   screen_radius_px=screen_radius_px, screen_center_px=screen_center_px, gun=gun,
                   background_photons=background_photons, background_gradient=background_gradient)
    gain, offset = _camera_levels(bit_depth, gain, offset_adu)
    image, gain = _expose(scene.mu, rng, gain=gain, offset=offset, read_noise_e=read_noise_e, bit_depth=bit_depth,
                          saturate=saturate, noise=noise)
    camera = {"bit_depth": bit_depth, "gain_adu_per_e": gain, "offset_adu": offset,
              "read_noise_e": read_noise_e, "noise": bool(noise), "shape": list(scene.mu.shape)}
    return SyntheticImage(image=image, truth=_truth(pattern, scene, image, camera), masks=scene.masks)


@dataclass(frozen=True, eq=False)
class _Scene:
    """The light on the camera before the sensor: what :func:`render_image` exposes.

    mu : (rows, cols) expected photons per pixel; trans : (rows, cols) transmission
    applied to it; sigma, photons, seen, peak : (K,) per spot (see :func:`_spots_image`);
    masks : {"screen", "gun"}; the screen centre (x, y) and radius, the gun, and the
    arguments of :func:`_background`.
    """

    mu: np.ndarray
    trans: np.ndarray
    sigma: np.ndarray
    photons: np.ndarray
    seen: np.ndarray
    peak: np.ndarray
    masks: dict
    screen_center: tuple
    screen_radius: float
    gun: GunShadow | None
    bg_args: tuple


def _scene(pattern: Pattern, *, shape, rng, spot_sigma_px, intensities, screen_radius_px, screen_center_px, gun,
           background_photons, background_gradient, transmission=None, shape_fn=GAUSSIAN) -> _Scene:
    """Checked arguments → expected photons per pixel: (spots + background) × transmission.

    `transmission` (rows, cols), optional, further darkens the screen (dust, channel
    plate); `shape_fn` draws the spots (see :func:`_spots_image`).
    """
    try:
        rows, cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise ParameterError(f"`shape` must be (rows, cols), got {shape!r}.") from None
    if not (8 <= rows <= 8192 and 8 <= cols <= 8192):
        raise ParameterError(f"`shape` must be between 8 and 8192 pixels a side, got {shape!r}.")
    k = len(pattern)
    sigma = _per_spot(spot_sigma_px, k, "spot_sigma_px")
    if not np.all((sigma > 0.05) & (sigma < 100)):
        raise ParameterError(f"`spot_sigma_px` must be a number or {k} numbers in (0.05, 100) px, "
                             f"got {np.asarray(spot_sigma_px).tolist()!r}.")
    photons = default_intensities(pattern, rng) if intensities is None else np.asarray(intensities, dtype=np.float64)
    if photons.shape != (k,) or not np.all(np.isfinite(photons) & (photons >= 0)):
        raise ParameterError(f"`intensities` must be {k} non-negative photon counts, got shape {photons.shape}.")
    if not (background_photons >= 0 and math.isfinite(background_photons)):
        raise ParameterError(f"`background_photons` must be ≥ 0, got {background_photons}.")
    geom = pattern.geometry
    centre = geom.center_px
    s_centre = centre if screen_center_px is None else (float(screen_center_px[0]), float(screen_center_px[1]))
    s_radius = acceptance_radius_px(geom) if screen_radius_px is None else float(screen_radius_px)
    if not (s_radius > 0 and math.isfinite(s_radius)):
        raise ParameterError(f"`screen_radius_px` must be positive, got {screen_radius_px}.")
    gun = GunShadow.scaled(s_radius) if gun is _DEFAULT else gun
    if gun is not None and not isinstance(gun, GunShadow):
        raise ParameterError(f"`gun` must be a GunShadow or None, got {type(gun).__name__}.")

    y = np.arange(rows, dtype=np.float64)[:, None]
    x = np.arange(cols, dtype=np.float64)[None, :]
    screen_sd = s_radius - np.hypot(x - s_centre[0], y - s_centre[1])  # > 0 inside
    trans = np.clip(screen_sd + 0.5, 0.0, 1.0)
    gun_sd = None
    if gun is not None:
        gun_sd = gun.signed_distance(x, y, centre)
        trans = trans * np.clip(gun_sd + 0.5, 0.0, 1.0)
    if transmission is not None:
        trans = trans * transmission
    bg_args = (centre, s_radius, background_photons, background_gradient)
    bg = _background(x, y, *bg_args)
    spots_mu, seen, peak = _spots_image(pattern.xy_px, sigma, photons, trans, shape_fn=shape_fn)
    mu = spots_mu + bg * trans
    masks = {"screen": screen_sd > 0, "gun": (gun_sd < 0) if gun_sd is not None else np.zeros((rows, cols), bool)}
    return _Scene(mu=mu, trans=trans, sigma=sigma, photons=photons, seen=seen, peak=peak, masks=masks,
                  screen_center=s_centre, screen_radius=s_radius, gun=gun, bg_args=bg_args)


def _camera_levels(bit_depth: int, gain, offset_adu) -> tuple[float, float]:
    """Gain (ADU per electron) and dark offset (ADU), defaults by bit depth, checked."""
    gain = (4.0 if bit_depth == 16 else 0.25) if gain is None else float(gain)
    offset = (100.0 if bit_depth == 16 else 4.0) if offset_adu is None else float(offset_adu)
    if not (gain > 0 and math.isfinite(gain)) or not (offset >= 0 and math.isfinite(offset)):
        raise ParameterError(f"`gain` must be > 0 and `offset_adu` ≥ 0, got {gain} and {offset}.")
    return gain, offset


def _expose(mu: np.ndarray, rng, *, gain: float, offset: float, read_noise_e: float, bit_depth: int,
            saturate: bool, noise: bool) -> tuple[np.ndarray, float]:
    """Shot and read noise, gain, offset, rounding and clipping: (image, gain used)."""
    full = float(2**bit_depth - 1)
    if not saturate:
        gain = min(gain, 0.98 * (full - offset) / max(float(mu.max()) + 5 * read_noise_e + 1e-9, 1e-9))
    if noise:
        electrons = rng.poisson(mu).astype(np.float64)
        if read_noise_e > 0:
            electrons += rng.normal(0.0, read_noise_e, mu.shape)
    else:
        electrons = mu
    adu = np.clip(np.rint(offset + gain * electrons), 0.0, full)
    return adu.astype(np.uint8 if bit_depth == 8 else np.uint16), gain


def _truth(pattern: Pattern, scene: _Scene, image: np.ndarray, camera: dict) -> dict:
    """The JSON-safe truth of a frame (see :func:`render_image`)."""
    geom = pattern.geometry
    centre = geom.center_px
    full = float(2 ** camera["bit_depth"] - 1)
    bg_at = _background(pattern.xy_px[:, 0], pattern.xy_px[:, 1], *scene.bg_args)
    spots = _spot_truth(pattern, scene.sigma, scene.photons, scene.seen, scene.screen_center, scene.screen_radius,
                        scene.gun, image, full, bg_at)
    truth = {
        "center_px": [centre[0], centre[1]],
        "energy_eV": pattern.energy_eV,
        "geometry": geom.to_dict(),
        "azimuth_deg": pattern.azimuth_deg,
        "k_in_par_invA": pattern.k_in_par,
        "screen": {"center_px": list(scene.screen_center), "radius_px": scene.screen_radius},
        "gun": None if scene.gun is None else scene.gun.to_dict(centre),
        "camera": camera,
        "background": {"photons_per_px_at_center": scene.bg_args[2], "gradient": list(scene.bg_args[3])},
        "substrate_vectors_A": pattern.substrate.vectors,
        "substrate_label": pattern.substrate.label,
        "overlayer_matrices": pattern.overlayers,
        "reciprocal_convention": "crystallographic, no 2π",
        "pixel_convention": "x right, y down, centre of the top-left pixel at (0, 0)",
        "spots": spots,
    }
    return json_safe(truth)


def _spot_truth(pattern, sigma, photons, seen, s_centre, s_radius, gun, image, full, bg_at) -> list[dict]:
    """One JSON-ready record per beam (see :func:`render_image`)."""
    xy = pattern.xy_px
    screen_sd = s_radius - np.hypot(xy[:, 0] - s_centre[0], xy[:, 1] - s_centre[1])
    gun_sd = (gun.signed_distance(xy[:, 0], xy[:, 1], pattern.geometry.center_px) if gun is not None
              else np.full(len(xy), np.inf))
    edge = np.minimum(screen_sd, gun_sd)
    rows, cols = image.shape
    labels = pattern.labels()
    out = []
    for i in range(len(pattern)):
        r, c = int(round(xy[i, 1])), int(round(xy[i, 0]))
        inside = 0 <= r < rows and 0 <= c < cols
        hidden = bool(edge[i] <= 0 or not inside)
        t_centre = float(np.clip(screen_sd[i] + 0.5, 0, 1) * np.clip(gun_sd[i] + 0.5, 0, 1))
        out.append({
            "x": xy[i, 0], "y": xy[i, 1], "h": pattern.hk[i, 0], "k": pattern.hk[i, 1], "label": labels[i],
            "integer": bool(pattern.integer[i]), "domains": np.flatnonzero(pattern.domains[i]).tolist(),
            "theta_deg": pattern.theta_deg[i], "photons": seen[i],
            "photons_unshadowed": photons[i], "sigma_px": sigma[i],
            "background_per_px": bg_at[i] * t_centre,
            "hidden": hidden, "partly_hidden": bool(not hidden and edge[i] < 3 * sigma[i]),
            "saturated": bool(inside and not hidden and image[r, c] >= full),
        })
    return out


def _check_render_inputs(pattern, rng, bit_depth) -> None:
    """The checks every renderer makes of its pattern, random source and bit depth."""
    if not isinstance(pattern, Pattern):
        raise ParameterError(f"`pattern` must be a Pattern from forward_pattern, got {type(pattern).__name__}.")
    if not isinstance(rng, np.random.Generator):
        raise ParameterError(f"`rng` must be a numpy.random.Generator, got {type(rng).__name__}.")
    if bit_depth not in (8, 16):
        raise ParameterError(f"`bit_depth` must be 8 or 16, got {bit_depth!r}.")
