"""How the camera and the beam see the screen: keystone, framing, off-normal incidence.

* :func:`keystone_homography` — a camera looking at the (flat-imaged) screen through a
  viewport off the screen's axis sees it through a plane projection (homography);
  :func:`warp_image` resamples an image through any homography, :func:`map_points`
  moves positions, and :func:`keystone` does both for an image and its truth.
* :func:`crop` — a window of the frame (a screen cut by the frame edge, a small
  sensor), exact: whole pixels, positions shifted.
* :func:`off_normal_pattern` — the primary beam a few degrees off the surface normal:
  every beam's parallel momentum shifts by k sin(tilt), so the pattern moves off the
  gun; :func:`gun_position_px` is where the gun (the incident beam's source) appears.
* :func:`rescale_pattern` — the same pattern framed for another sensor size.

Homographies are (3, 3) arrays acting on column vectors (x, y, 1) of pixel
positions (x right, y down, the centre of the top-left pixel at (0, 0)); a truth
dict carries the product of all maps applied so far as ``truth["view"]["homography"]``.
"""

from __future__ import annotations

import copy
import dataclasses
import math

import numpy as np
from scipy import ndimage as ndi

from ..errors import ParameterError
from ..jsonsafe import json_safe
from ..optics import momentum_to_pixels, wavelength_A
from .pattern import Pattern, forward_pattern

__all__ = [
    "keystone_homography",
    "map_points",
    "warp_image",
    "map_truth",
    "keystone",
    "crop",
    "incidence_k_in_par",
    "off_normal_pattern",
    "gun_position_px",
    "rescale_pattern",
]


def keystone_homography(*, tilt_deg: float, azimuth_deg: float, distance_px: float, center_px) -> np.ndarray:
    """The map from the straight-on image of the screen to the image of a tilted camera.

    Straight on, a pinhole camera at distance D (its focal length in pixels: a screen
    point p in the plane z = 0 images at p itself) looks down the axis through
    `center_px`. The tilted camera sits on the sphere of radius D about that centre,
    turned by `tilt_deg` towards the image direction `azimuth_deg`, and still looks at
    the centre: with R the rotation by the tilt about the in-plane axis
    perpendicular to the azimuth, a point P has camera coordinates q = Rᵀ P − (0, 0, D)
    and images at D (q_x, q_y) / (−q_z). For P = (p, 0) this is a homography. The
    side of the screen towards `azimuth_deg` is nearer the camera and looks larger;
    the centre stays put; the screen shortens by about cos(tilt) along the azimuth.

    Parameters
    ----------
    tilt_deg : float, keyword-only
        Angle between the camera axis and the screen axis, [0, 80].
    azimuth_deg : float, keyword-only
        Image direction (counter-clockwise from +x, y up) the camera moved towards.
    distance_px : float, keyword-only
        Camera distance in pixels of the straight-on image (the focal length), > 0.
    center_px : (x, y), keyword-only
        The point the camera looks at (the screen centre).

    Returns
    -------
    (3, 3) ndarray of float64
        H with H[2, 2] = 1; (x', y', 1) ∝ H (x, y, 1).

    Examples
    --------
    >>> h = keystone_homography(tilt_deg=10.0, azimuth_deg=0.0, distance_px=2000.0, center_px=(500.0, 400.0))
    >>> print(np.round(map_points(h, [[500.0, 400.0], [700.0, 400.0], [300.0, 400.0]]), 2).tolist())
    [[500.0, 400.0], [700.44, 400.0], [306.4, 400.0]]

    (by hand: ±200 px along the azimuth go to ±200 cos t · D / (D ∓ 200 sin t) = +200.44, −193.60).
    """
    t, a = math.radians(float(tilt_deg)), math.radians(float(azimuth_deg))
    d = float(distance_px)
    if not (0.0 <= float(tilt_deg) <= 80.0) or not (d > 0 and math.isfinite(d)):
        raise ParameterError(f"`tilt_deg` must be in [0, 80] and `distance_px` > 0, got {tilt_deg!r}, {distance_px!r}.")
    ax, ay = math.cos(a), -math.sin(a)  # the azimuth as a pixel direction (y down)
    kx, ky = -ay, ax  # rotation axis in the plane, perpendicular to the azimuth: R ẑ = (sin t a, cos t)
    c, s = math.cos(t), math.sin(t)
    k = np.array([kx, ky, 0.0])
    kk = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    rot = c * np.eye(3) + s * kk + (1 - c) * np.outer(k, k)  # Rodrigues
    rt = rot.T
    a_mat = np.array([[rt[0, 0], rt[0, 1], 0.0], [rt[1, 0], rt[1, 1], 0.0], [rt[2, 0], rt[2, 1], -d]])
    local = np.diag([d, d, -1.0]) @ a_mat
    cx, cy = float(center_px[0]), float(center_px[1])
    to_c = np.array([[1.0, 0, -cx], [0, 1.0, -cy], [0, 0, 1.0]])
    back = np.array([[1.0, 0, cx], [0, 1.0, cy], [0, 0, 1.0]])
    h = back @ local @ to_c
    return h / h[2, 2]


def _homography(h) -> np.ndarray:
    a = np.asarray(h, dtype=np.float64)
    if a.shape != (3, 3) or not np.all(np.isfinite(a)) or abs(np.linalg.det(a)) < 1e-12:
        raise ParameterError(f"A homography must be a finite invertible (3, 3) array, got {np.asarray(h).tolist()}.")
    return a


def map_points(h, xy_px) -> np.ndarray:
    """Positions (x, y) through the homography `h`: (K, 2) → (K, 2) float64.

    Parameters
    ----------
    h : (3, 3) array_like of float
        The homography, acting on (x, y, 1) columns.
    xy_px : (K, 2) array_like of float
        Positions (x, y), pixels.

    Returns
    -------
    (K, 2) ndarray of float64
        The moved positions.

    Examples
    --------
    >>> print(map_points(np.diag([2.0, 1.0, 1.0]), [[1.0, 3.0]]).tolist())
    [[2.0, 3.0]]
    """
    a = _homography(h)
    p = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    q = np.column_stack([p, np.ones(len(p))]) @ a.T
    return q[:, :2] / q[:, 2:3]


def warp_image(image, h, *, shape=None, order: int = 3, conserve: bool = True, cval: float = 0.0) -> np.ndarray:
    """Resample `image` so that what was at p is at H p.

    Each output pixel takes the spline interpolation (`order`) of the input at
    H⁻¹ (x, y, 1). With `conserve` the values are amounts per pixel (photons) and
    are multiplied by the area the output pixel covers in the input, |det J(H⁻¹)| =
    |det G| / w³ for G = H⁻¹, w = G₃ · (x, y, 1); negative spline overshoots are
    clipped to 0.

    Parameters
    ----------
    image : (rows, cols) array_like
        The frame.
    h : (3, 3) array_like
        The homography H, acting on (x, y, 1) columns.
    shape : (rows, cols), optional, keyword-only
        Output size; default the input's.
    order : int, keyword-only
        0 (nearest: masks) … 5.
    conserve : bool, keyword-only
        Treat values as amounts per pixel and keep their totals.
    cval : float, keyword-only
        Value outside the input.

    Returns
    -------
    (rows, cols) ndarray of float64 (bool for a bool input with order 0)
        The resampled image.

    Examples
    --------
    >>> im = np.zeros((20, 20)); im[5, 7] = 1.0
    >>> out = warp_image(im, [[1, 0, 3], [0, 1, 2], [0, 0, 1]], order=1)
    >>> print([int(i) for i in np.unravel_index(int(np.argmax(out)), out.shape)], round(float(out.sum()), 6))
    [7, 10] 1.0
    """
    a = np.asarray(image)
    if a.ndim != 2:
        raise ParameterError(f"`image` must be 2-D, got shape {a.shape}.")
    g = np.linalg.inv(_homography(h))
    rows, cols = a.shape if shape is None else (int(shape[0]), int(shape[1]))
    y, x = np.mgrid[:rows, :cols].astype(np.float64)
    w = g[2, 0] * x + g[2, 1] * y + g[2, 2]
    xs = (g[0, 0] * x + g[0, 1] * y + g[0, 2]) / w
    ys = (g[1, 0] * x + g[1, 1] * y + g[1, 2]) / w
    if a.dtype == bool:
        return ndi.map_coordinates(a.astype(np.uint8), [ys, xs], order=0, mode="constant", cval=0).astype(bool)
    out = ndi.map_coordinates(a.astype(np.float64), [ys, xs], order=int(order), mode="constant", cval=cval)
    if conserve:
        out = np.clip(out, 0.0, None) * np.abs(np.linalg.det(g) / w**3)
    return out


def _edge_flags(spots: list[dict], xy: np.ndarray, shape) -> None:
    """Hide spots whose rounded centre left the frame; mark those within 3 σ of its edge."""
    rows, cols = shape
    for s, (x, y) in zip(spots, xy):
        s["x"], s["y"] = float(x), float(y)
        r, c = int(round(y)), int(round(x))
        if not (0 <= r < rows and 0 <= c < cols):
            s["hidden"], s["partly_hidden"] = True, False
            continue
        margin = min(x + 0.5, y + 0.5, cols - 0.5 - x, rows - 0.5 - y)
        if not s["hidden"] and margin < 3 * s["sigma_px"]:
            s["partly_hidden"] = True


def map_truth(truth: dict, h, *, shape) -> dict:
    """A copy of a frame's truth with every position moved through `h` into a frame of `shape`.

    Moved: the spots, ``center_px``, the screen and gun centres, and the positions of
    listed artefacts (``dust``). A spot whose centre leaves the frame becomes hidden;
    one within 3 σ of the frame's edge partly hidden. ``truth["view"]`` records the
    product of the homographies applied so far and the frame's shape; the other
    fields (geometry, screen radius) stay those of the frame before the maps.

    Parameters
    ----------
    truth : dict
        As made by :func:`analysis.simulate.render_image`.
    h : (3, 3) array_like
        The homography, acting on (x, y, 1) columns.
    shape : (rows, cols), keyword-only
        Size of the new frame.

    Returns
    -------
    dict
        The moved truth.
    """
    a = _homography(h)
    out = copy.deepcopy(truth)
    spots = out.get("spots", [])
    if spots:
        xy = map_points(a, [[s["x"], s["y"]] for s in spots])
        _edge_flags(spots, xy, shape)
    out["center_px"] = map_points(a, [out["center_px"]])[0].tolist()
    if out.get("screen"):
        out["screen"]["center_px"] = map_points(a, [out["screen"]["center_px"]])[0].tolist()
    if out.get("gun") and "center_px" in out["gun"]:
        out["gun"]["center_px"] = map_points(a, [out["gun"]["center_px"]])[0].tolist()
    for d in out.get("dust", []):
        d["x"], d["y"] = map_points(a, [[d["x"], d["y"]]])[0].tolist()
    before = np.asarray(out.get("view", {}).get("homography", np.eye(3)), dtype=np.float64)
    total = a @ before
    out["view"] = {"homography": total / total[2, 2], "shape": [int(shape[0]), int(shape[1])]}
    return json_safe(out)


def keystone(image, truth: dict, *, tilt_deg: float, azimuth_deg: float, distance_px: float | None = None,
             order: int = 3) -> tuple[np.ndarray, dict]:
    """An image of the screen and its truth as seen by a camera tilted off the screen axis.

    Parameters
    ----------
    image : (rows, cols) array_like of float
        Light in photons per pixel (it is resampled; do it before the sensor noise).
    truth : dict
        The image's truth (:func:`analysis.simulate.render_image`).
    tilt_deg, azimuth_deg : float, keyword-only
        See :func:`keystone_homography`.
    distance_px : float, optional, keyword-only
        Default 4 screen radii (a camera four screen radii away).
    order : int, keyword-only
        Spline order of the resampling.

    Returns
    -------
    image : (rows, cols) ndarray of float64
        The frame as the tilted camera sees it.
    truth : dict
        Positions moved (:func:`map_truth`); ``truth["keystone"]`` holds the parameters.

    Examples
    --------
    >>> t = {"center_px": [50.0, 50.0], "screen": {"center_px": [50.0, 50.0], "radius_px": 40.0},
    ...      "spots": [{"x": 80.0, "y": 50.0, "sigma_px": 2.0, "hidden": False, "partly_hidden": False}]}
    >>> im, t2 = keystone(np.ones((100, 100)), t, tilt_deg=8.0, azimuth_deg=180.0)
    >>> print(round(t2["spots"][0]["x"], 3), t2["spots"][0]["y"])
    78.953 50.0
    """
    a = np.asarray(image, dtype=np.float64)
    centre = truth["screen"]["center_px"]
    d = 4.0 * float(truth["screen"]["radius_px"]) if distance_px is None else float(distance_px)
    h = keystone_homography(tilt_deg=tilt_deg, azimuth_deg=azimuth_deg, distance_px=d, center_px=centre)
    out = map_truth(truth, h, shape=a.shape)
    out["keystone"] = {"tilt_deg": float(tilt_deg), "azimuth_deg": float(azimuth_deg), "distance_px": d}
    return warp_image(a, h, order=order), out


def crop(image, truth: dict, *, top_left_rc, shape) -> tuple[np.ndarray, dict]:
    """A window of the frame and its truth (positions shifted, spots outside hidden).

    Parameters
    ----------
    image : (rows, cols) ndarray
        The frame.
    truth : dict
        Its truth (as made by :func:`analysis.simulate.render_image`).
    top_left_rc : (row, col) of int, keyword-only
        First pixel of the window.
    shape : (rows, cols), keyword-only
        Size of the window; it must lie inside the image.

    Returns
    -------
    image : ndarray
        The window (a copy).
    truth : dict
        Its truth.

    Examples
    --------
    >>> t = {"center_px": [5.0, 5.0], "spots": [{"x": 6.0, "y": 7.5, "sigma_px": 1.0, "hidden": False,
    ...                                           "partly_hidden": False}]}
    >>> im, t2 = crop(np.arange(100).reshape(10, 10), t, top_left_rc=(2, 3), shape=(6, 5))
    >>> print(im[0, 0], t2["spots"][0]["x"], t2["spots"][0]["y"], t2["view"]["shape"])
    23 3.0 5.5 [6, 5]
    """
    a = np.asarray(image)
    r0, c0 = (int(v) for v in top_left_rc)
    rows, cols = (int(v) for v in shape)
    if r0 < 0 or c0 < 0 or rows < 1 or cols < 1 or r0 + rows > a.shape[0] or c0 + cols > a.shape[1]:
        raise ParameterError(f"The crop window {rows}×{cols} at (row {r0}, col {c0}) must lie inside the "
                             f"{a.shape[0]}×{a.shape[1]} image.")
    h = np.array([[1.0, 0, -c0], [0, 1.0, -r0], [0, 0, 1.0]])
    out = map_truth(truth, h, shape=(rows, cols))
    return a[r0:r0 + rows, c0:c0 + cols].copy(), out


# --------------------------------------------------------------------------- the beam


def incidence_k_in_par(energy_eV: float, *, tilt_deg: float, azimuth_deg: float,
                       relativistic: bool = False) -> np.ndarray:
    """Parallel momentum of a beam incident `tilt_deg` off the surface normal.

    |k∥| = sin(tilt) / λ (Å⁻¹, no 2π), pointing along the surface azimuth
    `azimuth_deg` (the optics' surface axes, counter-clockwise from x).

    Parameters
    ----------
    energy_eV : float
        Electron energy, eV.
    tilt_deg : float, keyword-only
        Angle of the incident beam from the surface normal, degrees.
    azimuth_deg : float, keyword-only
        Surface azimuth of the tilt, degrees.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

    Returns
    -------
    (2,) ndarray of float64
        k_in∥, Å⁻¹ without 2π.

    Examples
    --------
    >>> k = incidence_k_in_par(100.0, tilt_deg=30.0, azimuth_deg=90.0)
    >>> print(np.round(k * wavelength_A(100.0), 12).tolist())
    [0.0, 0.5]
    """
    lam = wavelength_A(energy_eV, relativistic=relativistic)
    if not (0.0 <= float(tilt_deg) < 90.0):
        raise ParameterError(f"`tilt_deg` must be in [0, 90), got {tilt_deg!r}.")
    a = math.radians(float(azimuth_deg))
    return math.sin(math.radians(float(tilt_deg))) / lam * np.array([math.cos(a), math.sin(a)])


def off_normal_pattern(pattern: Pattern, *, tilt_deg: float, azimuth_deg: float) -> Pattern:
    """`pattern` again with the primary beam `tilt_deg` off the surface normal.

    The incident beam's parallel momentum k∥ = sin(tilt)/λ is added to every beam
    (the (0,0) beam leaves at the specular angle, no longer at the pattern centre,
    which stays the image of the surface normal). The screen is centred on the gun,
    which now sits at the image of −k∥ (:func:`gun_position_px`), so beams up to
    the acceptance plus the tilt can reach it: the returned pattern's geometry has
    its acceptance widened by `tilt_deg` (the screen edge hides the rest when
    rendered with the original screen radius). Substrate, overlayers, energy,
    geometry and azimuth are those of `pattern`; beams are merged with the default
    tolerance (non-relativistic wavelength).

    Parameters
    ----------
    pattern : Pattern
        The pattern at normal incidence.
    tilt_deg : float, keyword-only
        Angle of the primary beam from the surface normal, degrees.
    azimuth_deg : float, keyword-only
        Surface azimuth of the tilt, degrees.

    Returns
    -------
    Pattern
        The beams at the tilted incidence.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.optics import ScreenGeometry
    >>> p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=100.0, geometry=ScreenGeometry(200.0, 200.0, 180.0))
    >>> q = off_normal_pattern(p, tilt_deg=4.0, azimuth_deg=0.0)
    >>> spec = q.xy_px[np.all(q.hk == 0, axis=1)][0]
    >>> print(np.round(spec - 200.0, 2).tolist(), np.round(gun_position_px(q) - 200.0, 2).tolist())
    [12.56, 0.0] [-12.56, 0.0]
    """
    if not isinstance(pattern, Pattern):
        raise ParameterError(f"`pattern` must be a Pattern, got {type(pattern).__name__}.")
    kin = np.asarray(pattern.k_in_par, dtype=np.float64) + incidence_k_in_par(
        pattern.energy_eV, tilt_deg=tilt_deg, azimuth_deg=azimuth_deg)
    geom = pattern.geometry
    wide = dataclasses.replace(geom, acceptance_deg=min(90.0, geom.acceptance_deg + float(tilt_deg)))
    return forward_pattern(pattern.substrate, list(pattern.overlayers), energy_eV=pattern.energy_eV, geometry=wide,
                           azimuth_deg=pattern.azimuth_deg, k_in_par=kin)


def gun_position_px(pattern: Pattern) -> np.ndarray:
    """(x, y) image position of the electron gun: the direction the incident beam comes from (−k_in∥).

    Parameters
    ----------
    pattern : Pattern
        A pattern with its incidence (``k_in_par``) and geometry.

    Returns
    -------
    (2,) ndarray of float64
        (x, y), pixels.
    """
    xy, _ = momentum_to_pixels(-np.asarray(pattern.k_in_par, dtype=np.float64).reshape(1, 2), pattern.energy_eV,
                               dataclasses.replace(pattern.geometry, acceptance_deg=90.0))
    return xy[0]


def rescale_pattern(pattern: Pattern, *, factor: float, center_px) -> Pattern:
    """`pattern` as a camera with `factor` times the pixels per screen radius sees it,
    its centre at `center_px` (x, y); everything else as in `pattern`.

    Parameters
    ----------
    pattern : Pattern
        The pattern.
    factor : float, keyword-only
        Ratio of the new camera scale to the old.
    center_px : (x, y), keyword-only
        The new pattern centre, pixels.

    Returns
    -------
    Pattern
        The same beams on the new camera.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.optics import ScreenGeometry
    >>> p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=100.0, geometry=ScreenGeometry(200.0, 200.0, 180.0))
    >>> q = rescale_pattern(p, factor=0.5, center_px=(160.0, 120.0))
    >>> print(bool(np.allclose(q.xy_px - [160.0, 120.0], 0.5 * (p.xy_px - 200.0))))
    True
    """
    if not isinstance(pattern, Pattern):
        raise ParameterError(f"`pattern` must be a Pattern, got {type(pattern).__name__}.")
    if not (float(factor) > 0 and math.isfinite(float(factor))):
        raise ParameterError(f"`factor` must be > 0, got {factor!r}.")
    geom = dataclasses.replace(pattern.geometry, center_x_px=float(center_px[0]), center_y_px=float(center_px[1]),
                               scale_px=pattern.geometry.scale_px * float(factor))
    return forward_pattern(pattern.substrate, list(pattern.overlayers), energy_eV=pattern.energy_eV, geometry=geom,
                           azimuth_deg=pattern.azimuth_deg, k_in_par=pattern.k_in_par)
