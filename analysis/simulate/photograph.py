"""Photograph-like frames: the renderer's light, then the camera artefacts, with exact truth.

:func:`photograph` renders a :class:`~analysis.simulate.pattern.Pattern` the way a
real camera photographs a LEED screen, with any of the effects in :data:`EFFECTS`;
:func:`score_spots` compares measured spot positions with the truth.

Order of the model (each step from :mod:`.spot_shapes`, :mod:`.realism`, :mod:`.viewing`):

1. the pattern: framed for another sensor (``small_frame``, ``large_frame``), the
   primary beam off the normal (``off_normal``);
2. the light on the screen: spots (``wide_spots``, ``tailed_spots``,
   ``elongated_spots``, ``saturated_spots``: a few spots far brighter than the full
   well), diffuse background, screen edge and gun shadow, darkened by the channel
   plate's texture (``channel_plate``) and by dust (``dust``);
3. the camera's view: off the screen axis (``keystone``), a frame that cuts the
   screen (``cut_screen``); stray light in the viewport (``glare``);
4. the sensor: shot noise, full well and blooming (with ``saturated_spots``), read
   noise, gain, offset, quantisation; ``hot_pixels``, ``cosmic_rays``;
5. the file: an 8-bit colour JPEG (``jpeg``).

Every position in the truth is in the final frame; ``truth["effects"]`` lists the
parameters each effect used.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..jsonsafe import json_safe
from ..profiles import GAUSSIAN
from .pattern import Pattern
from .realism import (
    add_cosmic_rays,
    add_glare,
    add_hot_pixels,
    channel_plate_transmission,
    dust_transmission,
    expose,
    to_colour_jpeg,
)
from .render import (
    _check_render_inputs,
    _DEFAULT,
    GunShadow,
    SyntheticImage,
    _camera_levels,
    _scene,
    _truth,
    acceptance_radius_px,
    default_intensities,
)
from .spot_shapes import SpotShape
from .viewing import (
    gun_position_px,
    keystone_homography,
    map_points,
    map_truth,
    off_normal_pattern,
    rescale_pattern,
    warp_image,
)

__all__ = ["EFFECTS", "Photograph", "photograph", "score_spots"]

#: every effect :func:`photograph` knows, in the order its parameters are drawn
EFFECTS = ("small_frame", "large_frame", "off_normal", "wide_spots", "tailed_spots", "elongated_spots",
           "saturated_spots", "channel_plate", "dust", "keystone", "cut_screen", "glare", "hot_pixels",
           "cosmic_rays", "jpeg")


@dataclass(frozen=True, eq=False)
class Photograph(SyntheticImage):
    """A photograph-like frame with its exact truth (a :class:`SyntheticImage`).

    Attributes
    ----------
    image : (rows, cols) ndarray
        The camera's frame: uint8 or uint16 counts; for a JPEG, the float64
        luminance of the decoded file as :func:`analysis.io.load_image` reads it.
    truth : dict
        As :func:`analysis.simulate.render_image`'s, every position in this frame, and:
        per spot ``peak_photons`` (its brightest pixel alone) and ``obscured`` (dust);
        ``effects`` (parameters drawn), ``view`` (homography from the rendered frame),
        ``hot_pixels`` (x, y, adu), ``cosmic_rays``, ``dust``, ``glare``, ``spot_shape``.
    masks : dict
        ``"screen"`` and ``"gun"`` in this frame.
    encoded : bytes or None
        The JPEG file, when the ``jpeg`` effect was applied.
    """

    encoded: bytes | None = None

    @property
    def analysis_input(self):
        """What a user would load: the JPEG bytes, or the image."""
        return self.encoded if self.encoded is not None else self.image


def _u(rng, lo, hi) -> float:
    return float(rng.uniform(lo, hi))


def _draw(names: set, rng: np.random.Generator, options: dict) -> dict:
    """Parameters of each chosen effect: drawn from the ranges of real photographs,
    then replaced by the caller's `options`."""
    draws = {
        "small_frame": lambda: {"shape": [480, 640]},
        "large_frame": lambda: {"shape": [2160, 3840]},
        "off_normal": lambda: {"tilt_deg": _u(rng, 2.0, 5.0), "azimuth_deg": _u(rng, 0.0, 360.0)},
        "wide_spots": lambda: {"sigma_px": _u(rng, 3.0, 6.0)},
        "tailed_spots": lambda: {"tail_beta": _u(rng, 1.8, 3.0)},
        "elongated_spots": lambda: {"elongation": _u(rng, 1.8, 3.0), "axis_deg": _u(rng, 0.0, 180.0)},
        "saturated_spots": lambda: {"n": int(rng.integers(1, 4)), "over_full_well": _u(rng, 3.0, 10.0)},
        "channel_plate": lambda: {"period_px": _u(rng, 3.0, 6.0), "depth": _u(rng, 0.05, 0.2),
                                  "angle_deg": _u(rng, 0.0, 60.0),
                                  "phase_rad": rng.uniform(0, 2 * math.pi, 3).tolist()},
        "dust": lambda: {"n": int(rng.integers(6, 21)), "radius_px": [1.5, 15.0], "opacity": [0.3, 0.9]},
        "keystone": lambda: {"tilt_deg": _u(rng, 6.0, 11.0), "azimuth_deg": _u(rng, 0.0, 360.0),
                             "distance_radii": 4.0},
        "cut_screen": lambda: {"side": ["left", "right", "top", "bottom"][int(rng.integers(4))],
                               "cut_fraction": _u(rng, 0.1, 0.3)},
        "glare": lambda: {"peak_over_background": _u(rng, 1.0, 4.0), "sigma_radii": _u(rng, 0.15, 0.35),
                          "aspect": _u(rng, 0.3, 0.8), "angle_deg": _u(rng, 0.0, 180.0),
                          "offset_radii": _u(rng, 0.3, 1.0), "direction_deg": _u(rng, 0.0, 360.0)},
        "hot_pixels": lambda: {"per_megapixel": _u(rng, 40.0, 150.0), "level": [0.85, 1.0]},
        "cosmic_rays": lambda: {"per_megapixel": _u(rng, 5.0, 20.0), "length_px": [1.0, 3.0],
                                "charge_e": [2000.0, 20000.0]},
        "jpeg": lambda: {"quality": int(rng.integers(60, 91)), "white_fraction": _u(rng, 0.5, 1.0), "gamma": 1.0},
    }
    out = {}
    for name in EFFECTS:
        if name in names:
            p = draws[name]()
            extra = set(options.get(name, {})) - set(p)
            if extra:
                raise ParameterError(f"`options[{name!r}]` has unknown keys {sorted(extra)}; known: {sorted(p)}.")
            out[name] = p | dict(options.get(name, {}))
    return out


def _check(effects, options) -> tuple[set, dict]:
    names = set(effects)
    unknown = names - set(EFFECTS)
    if unknown:
        raise ParameterError(f"Unknown effects {sorted(unknown)}; known: {list(EFFECTS)}.")
    if {"small_frame", "large_frame"} <= names:
        raise ParameterError("Choose one of `small_frame` and `large_frame`, not both.")
    opts = dict(options or {})
    if set(opts) - names:
        raise ParameterError(f"`options` for effects not chosen: {sorted(set(opts) - names)}.")
    return names, opts


def photograph(pattern: Pattern, *, rng: np.random.Generator, effects=(), options: dict | None = None,
               shape=(1024, 1024), spot_sigma_px=2.0, intensities=None, screen_radius_px: float | None = None,
               screen_center_px=None, gun=_DEFAULT, background_photons: float = 40.0,
               background_gradient=(0.12, -0.08), read_noise_e: float = 3.0, gain: float | None = None,
               offset_adu: float | None = None, bit_depth: int = 16) -> Photograph:
    """Render `pattern` as a camera photographs a LEED screen, with the chosen `effects`.

    Parameters
    ----------
    pattern : Pattern
        Framed for `shape` (as for :func:`analysis.simulate.render_image`).
    rng : numpy.random.Generator, keyword-only
        Source of every random number (effect parameters, intensities, noise).
    effects : iterable of str, keyword-only
        Names from :data:`EFFECTS`; the model applies them in its own order (see the
        module docstring), whatever the order given.
    options : dict, optional, keyword-only
        Per effect, values that replace the drawn parameters, e.g.
        ``{"keystone": {"tilt_deg": 8.0}}`` (the keys are those in ``truth["effects"]``).
    shape : (rows, cols), keyword-only
        Size of the frame (the other sizes are in its pixels).
    spot_sigma_px : float or (K,) array_like, keyword-only
        Gaussian σ of each spot, pixels.
    intensities : (K,) array_like or callable(Pattern) -> (K,), optional, keyword-only
        Photons per beam; a callable is asked for the final pattern (after
        ``off_normal`` or a new frame changed the beams). Default
        :func:`analysis.simulate.default_intensities`.
    screen_radius_px : float, optional, keyword-only
        As for :func:`analysis.simulate.render_image`.
    screen_center_px : (x, y), optional, keyword-only
        As for :func:`analysis.simulate.render_image`.
    gun : GunShadow or None, keyword-only
        As for :func:`analysis.simulate.render_image`.
    background_photons : float, keyword-only
        Diffuse background at the pattern centre, photons per pixel.
    background_gradient : (gx, gy), keyword-only
        Relative change of the background per screen radius along x and y.
    read_noise_e : float, keyword-only
        Gaussian read noise, electrons.
    gain : float, optional, keyword-only
        ADU per electron (as for :func:`analysis.simulate.render_image`).
    offset_adu : float, optional, keyword-only
        Dark level (as for :func:`analysis.simulate.render_image`).
    bit_depth : {8, 16}, keyword-only
        Bits per pixel.

    Returns
    -------
    Photograph
        The image, its truth (every spot and artefact), the masks and the encoded file when compressed.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.optics import ScreenGeometry
    >>> from analysis.simulate import forward_pattern
    >>> p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=150.0, geometry=ScreenGeometry(128.0, 128.0, 140.0))
    >>> ph = photograph(p, rng=np.random.default_rng(0), shape=(256, 256), effects=["hot_pixels", "keystone"])
    >>> hp = ph.truth["hot_pixels"][0]
    >>> print(ph.image.dtype, ph.image[hp["y"], hp["x"]] == hp["adu"], sorted(ph.truth["effects"]))
    uint16 True ['hot_pixels', 'keystone']
    """
    _check_render_inputs(pattern, rng, bit_depth)
    names, opts = _check(effects, options)
    prm = _draw(names, rng, opts)
    rows, cols = (int(v) for v in shape)
    geom = pattern.geometry
    s_radius = acceptance_radius_px(geom) if screen_radius_px is None else float(screen_radius_px)
    s_centre = geom.center_px if screen_center_px is None else (float(screen_center_px[0]),
                                                                 float(screen_center_px[1]))
    sigma = prm["wide_spots"]["sigma_px"] if "wide_spots" in prm else spot_sigma_px
    gun = GunShadow.scaled(s_radius) if gun is _DEFAULT else gun

    # 1. the pattern
    frame = prm.get("small_frame") or prm.get("large_frame")
    if frame:
        new_rows, new_cols = (int(v) for v in frame["shape"])
        f = min(new_rows, new_cols) / min(rows, cols)

        def move(p):
            return ((new_cols - 1) / 2 + (p[0] - (cols - 1) / 2) * f, (new_rows - 1) / 2 + (p[1] - (rows - 1) / 2) * f)

        pattern = rescale_pattern(pattern, factor=f, center_px=move(geom.center_px))
        s_centre, s_radius = move(s_centre), s_radius * f
        sigma = np.maximum(np.asarray(sigma, dtype=np.float64) * f, 1.0)
        if gun is not None:
            gun = GunShadow(gun.offset_x_px * f, gun.offset_y_px * f, gun.radius_px * f, gun.arm_angle_deg,
                            gun.arm_width_px * f)
        rows, cols = new_rows, new_cols
        frame["factor"] = f
    if "off_normal" in prm:
        q = prm["off_normal"]
        pattern = off_normal_pattern(pattern, tilt_deg=q["tilt_deg"], azimuth_deg=q["azimuth_deg"])
        shift = gun_position_px(pattern) - np.asarray(pattern.geometry.center_px)
        s_centre = (s_centre[0] + shift[0], s_centre[1] + shift[1])
        if gun is not None:
            gun = dataclasses.replace(gun, offset_x_px=gun.offset_x_px + shift[0],
                                      offset_y_px=gun.offset_y_px + shift[1])
        q["k_in_par_invA"] = pattern.k_in_par.tolist()

    # 2. the light on the screen
    photons = _photons(pattern, intensities, rng)
    gain, offset = _camera_levels(bit_depth, gain, offset_adu)
    full = float(2**bit_depth - 1)
    boosted = np.zeros(len(pattern), bool)
    if "saturated_spots" in prm:
        q = prm["saturated_spots"]
        sig = np.broadcast_to(np.asarray(sigma, dtype=np.float64), (len(pattern),))
        boosted = _brightest_clear(pattern, photons, s_centre, s_radius, gun, sig, (rows, cols), int(q["n"]))
        full_well = (full - offset) / gain
        photons = photons.copy()
        photons[boosted] = q["over_full_well"] * full_well * 2 * math.pi * (sig[boosted] ** 2 + 1 / 12)
        q["beams"] = [pattern.labels()[i] for i in np.flatnonzero(boosted)]
    shape_fn = GAUSSIAN
    if "tailed_spots" in prm or "elongated_spots" in prm:
        el = prm.get("elongated_spots", {})
        shape_fn = SpotShape(tail_beta=prm.get("tailed_spots", {}).get("tail_beta"),
                             elongation=el.get("elongation", 1.0), axis_deg=el.get("axis_deg", 0.0))
    trans, specks = None, []
    if "channel_plate" in prm:
        q = prm["channel_plate"]
        trans = channel_plate_transmission((rows, cols), period_px=q["period_px"], depth=q["depth"],
                                           angle_deg=q["angle_deg"], phase_rad=q["phase_rad"])
    dust_t = None
    if "dust" in prm:
        q = prm["dust"]
        dust_t, specks = dust_transmission((rows, cols), rng, n=q["n"], radius_px=q["radius_px"],
                                           opacity=q["opacity"], center_px=s_centre, within_px=s_radius)
        trans = dust_t if trans is None else trans * dust_t
    scene = _scene(pattern, shape=(rows, cols), rng=rng, spot_sigma_px=sigma, intensities=photons,
                   screen_radius_px=s_radius, screen_center_px=s_centre, gun=gun,
                   background_photons=background_photons, background_gradient=background_gradient,
                   transmission=trans, shape_fn=shape_fn)
    camera = {"bit_depth": bit_depth, "gain_adu_per_e": gain, "offset_adu": offset, "read_noise_e": read_noise_e,
              "noise": True, "shape": [rows, cols]}
    truth = _truth(pattern, scene, np.zeros((rows, cols), np.uint8), camera)
    for i, s in enumerate(truth["spots"]):
        s["peak_photons"] = float(scene.peak[i])
        s["obscured"] = False
        r, c = int(round(s["y"])), int(round(s["x"]))
        if trans is not None and 0 <= r < rows and 0 <= c < cols:
            s["background_per_px"] *= float(trans[r, c])
            if dust_t is not None and dust_t[r, c] < 0.5:  # under dust that takes half its light or more
                s["obscured"], s["hidden"], s["partly_hidden"] = True, True, False
    truth["dust"] = specks
    truth["spot_shape"] = shape_fn.to_dict() if isinstance(shape_fn, SpotShape) else {"profile": "gaussian"}
    light, masks = scene.mu, dict(scene.masks)

    # 3. the camera's view
    h, out_shape = np.eye(3), (rows, cols)
    if "keystone" in prm:
        q = prm["keystone"]
        h = keystone_homography(tilt_deg=q["tilt_deg"], azimuth_deg=q["azimuth_deg"],
                                distance_px=q["distance_radii"] * s_radius, center_px=s_centre)
    if "cut_screen" in prm:
        cx, cy = map_points(h, [s_centre])[0]
        top_left, out_shape = _cut_window(prm["cut_screen"], (cx, cy), s_radius, (rows, cols))
        prm["cut_screen"]["top_left_rc"] = list(top_left)
        h = np.array([[1.0, 0, -top_left[1]], [0, 1.0, -top_left[0]], [0, 0, 1.0]]) @ h
    if "keystone" in prm:
        light = warp_image(light, h, shape=out_shape)
        masks = {k: warp_image(m, h, shape=out_shape, order=0) for k, m in masks.items()}
    elif "cut_screen" in prm:
        (r0, c0), (nr, nc) = prm["cut_screen"]["top_left_rc"], out_shape
        light = light[r0:r0 + nr, c0:c0 + nc]
        masks = {k: m[r0:r0 + nr, c0:c0 + nc].copy() for k, m in masks.items()}
    if "keystone" in prm or "cut_screen" in prm:
        truth = map_truth(truth, h, shape=out_shape)
    if "glare" in prm:
        light = _glare(light, truth, prm["glare"], map_points(h, [s_centre])[0], s_radius, background_photons)

    # 4. the sensor
    image = expose(light, rng, gain_adu_per_e=gain, offset_adu=offset, read_noise_e=read_noise_e,
                   bit_depth=bit_depth, bloom="saturated_spots" in prm)
    if "hot_pixels" in prm:
        q = prm["hot_pixels"]
        image, rc = add_hot_pixels(image, rng, n=int(round(q["per_megapixel"] * image.size / 1e6)), level=q["level"])
        truth["hot_pixels"] = [{"x": int(c), "y": int(r), "adu": int(image[r, c])} for r, c in rc]
    if "cosmic_rays" in prm:
        q = prm["cosmic_rays"]
        image, tracks = add_cosmic_rays(image, rng, n=int(round(q["per_megapixel"] * image.size / 1e6)),
                                        length_px=q["length_px"], charge_e=q["charge_e"], gain_adu_per_e=gain)
        truth["cosmic_rays"] = tracks
    _flag_saturated(truth["spots"], image >= full)

    # 5. the file
    encoded = None
    if "jpeg" in prm:
        from ..io import load_image

        q = prm["jpeg"]
        lit = [sp["peak_photons"] + sp["background_per_px"] for sp, b in zip(truth["spots"], boosted)
               if not (b or sp["hidden"])]
        ref = max(lit) if lit else float(np.percentile(light, 99.9))
        white = offset + q["white_fraction"] * min(full - offset, gain * ref)
        encoded = to_colour_jpeg(image, quality=q["quality"], black_adu=offset, white_adu=white, gamma=q["gamma"])
        _flag_saturated(truth["spots"], image >= white)  # the tone curve clips there
        truth["camera"]["jpeg"] = {"quality": q["quality"], "black_adu": offset, "white_adu": white,
                                   "gamma": q["gamma"], "channel_gains": [0.3, 1.0, 0.12]}
        image = np.array(load_image(encoded).data)  # the luminance the analysis reads from the file
    truth["effects"] = prm
    return Photograph(image=image, truth=json_safe(truth), masks=masks, encoded=encoded)


def _photons(pattern: Pattern, intensities, rng) -> np.ndarray:
    if intensities is None:
        return default_intensities(pattern, rng)
    out = np.asarray(intensities(pattern) if callable(intensities) else intensities, dtype=np.float64)
    if out.shape != (len(pattern),):
        raise ParameterError(f"`intensities` must give {len(pattern)} photon counts (one per beam of the final "
                             f"pattern), got shape {out.shape}; pass a callable when the effects change the beams.")
    return out


def _brightest_clear(pattern, photons, s_centre, s_radius, gun, sigma, shape, n: int) -> np.ndarray:
    """The `n` brightest beams well inside the screen, the frame and clear of the gun."""
    xy = pattern.xy_px
    ok = np.hypot(xy[:, 0] - s_centre[0], xy[:, 1] - s_centre[1]) < 0.85 * s_radius - 6 * sigma
    ok &= (xy[:, 0] > 8 * sigma) & (xy[:, 0] < shape[1] - 8 * sigma)
    ok &= (xy[:, 1] > 8 * sigma) & (xy[:, 1] < shape[0] - 8 * sigma)
    if gun is not None:
        ok &= gun.signed_distance(xy[:, 0], xy[:, 1], pattern.geometry.center_px) > 6 * sigma
    order = np.argsort(-np.where(ok, photons, -np.inf))[: max(n, 0)]
    pick = np.zeros(len(xy), bool)
    pick[order[ok[order]]] = True
    return pick


def _cut_window(q: dict, centre, radius: float, shape) -> tuple[tuple[int, int], tuple[int, int]]:
    """Window of the frame whose edge cuts `cut_fraction` of the screen's diameter off one side."""
    rows, cols = shape
    cx, cy = centre
    cut = 2.0 * radius * float(q["cut_fraction"])
    side = q["side"]
    if side == "right":
        c1 = int(np.clip(round(cx + radius - cut), 64, cols))
        return (0, 0), (rows, c1)
    if side == "left":
        c0 = int(np.clip(round(cx - radius + cut), 0, cols - 64))
        return (0, c0), (rows, cols - c0)
    if side == "bottom":
        r1 = int(np.clip(round(cy + radius - cut), 64, rows))
        return (0, 0), (r1, cols)
    if side == "top":
        r0 = int(np.clip(round(cy - radius + cut), 0, rows - 64))
        return (r0, 0), (rows - r0, cols)
    raise ParameterError(f"`cut_screen` side must be left, right, top or bottom, got {side!r}.")


def _glare(light, truth, q, centre, radius, background_photons):
    """Add the glare patch to `light`, and its light to each spot's background in `truth`."""
    a = math.radians(q["direction_deg"])
    gx = centre[0] + q["offset_radii"] * radius * math.cos(a)
    gy = centre[1] - q["offset_radii"] * radius * math.sin(a)
    sig = (q["sigma_radii"] * radius, q["aspect"] * q["sigma_radii"] * radius)
    amp = q["peak_over_background"] * background_photons
    truth["glare"] = {"center_px": [gx, gy], "sigma_px": list(sig), "angle_deg": q["angle_deg"],
                      "photons_per_px": amp}
    out = add_glare(light, center_px=(gx, gy), sigma_px=sig, photons_per_px=amp, angle_deg=q["angle_deg"])
    added = out - light  # smooth over hundreds of pixels: its value at the nearest pixel is the spot's
    rows, cols = added.shape
    for s in truth["spots"]:
        r, c = int(round(s["y"])), int(round(s["x"]))
        if 0 <= r < rows and 0 <= c < cols:
            s["background_per_px"] += float(added[r, c])
    return out


def _flag_saturated(spots: list[dict], full: np.ndarray) -> None:
    rows, cols = full.shape
    for s in spots:
        r, c = int(round(s["y"])), int(round(s["x"]))
        s["saturated"] = bool(not s["hidden"] and 0 <= r < rows and 0 <= c < cols and full[r, c])


# --------------------------------------------------------------------------- scoring


def score_spots(truth: dict, xy_px, *, tol_px: float = 2.0, min_peak_snr: float = 5.0) -> dict:
    """Recall, precision and localisation of measured spots against a frame's truth.

    A truth spot counts (is *visible*) when it is neither hidden nor partly hidden
    and its expected peak stands `min_peak_snr` above the pixel noise:
    peak / √(b + r² + q²/12), with b the background photons per pixel at the spot,
    r the read noise (electrons) and q the quantisation step in photons (the ADU
    step, or the JPEG's grey level). The peak is the truth's ``peak_photons``, else
    that of a Gaussian, photons / (2π (σ² + 1/12)).

    Parameters
    ----------
    truth : dict
        A frame's truth (``truth`` of a Photograph or SyntheticImage).
    xy_px : (N, 2) array_like
        Measured (x, y), pixels.
    tol_px : float, keyword-only
        A measurement within this distance of a truth spot matches it.
    min_peak_snr : float, keyword-only
        Least peak signal-to-noise of a visible truth spot.

    Returns
    -------
    dict
        ``recall`` (visible spots with a measurement within `tol_px`),
        ``precision`` (measurements within `tol_px` of any truth spot, over all),
        ``n_visible``, ``n_found``, ``n_detected``, ``n_false``, and over the found
        visible spots ``error_px`` (per-coordinate error, distance/√2) and
        ``bound_px`` (:func:`analysis.spots.localization_bound_px`, ML).

    Examples
    --------
    >>> t = {"camera": {"read_noise_e": 3.0, "gain_adu_per_e": 4.0},
    ...      "spots": [{"x": 10.0, "y": 10.0, "hidden": False, "partly_hidden": False, "photons": 5000.0,
    ...                 "sigma_px": 2.0, "background_per_px": 40.0}]}
    >>> s = score_spots(t, [[10.5, 10.0], [40.0, 40.0]])
    >>> print(s["recall"], s["precision"], s["n_false"])
    1.0 0.5 1
    """
    from ..spots import localization_bound_px

    spots = truth["spots"]
    cam = truth["camera"]
    step = 1.0 / cam["gain_adu_per_e"]
    if "jpeg" in cam:
        step = (cam["jpeg"]["white_adu"] - cam["jpeg"]["black_adu"]) / 255.0 / cam["gain_adu_per_e"]
    t = np.array([[s["x"], s["y"]] for s in spots], dtype=np.float64).reshape(-1, 2)
    b2 = np.array([s["background_per_px"] for s in spots]) + cam["read_noise_e"] ** 2 + step**2 / 12
    sig = np.array([s["sigma_px"] for s in spots])
    photons = np.array([s["photons"] for s in spots])
    peak = np.array([s.get("peak_photons", s["photons"] / (2 * math.pi * (s["sigma_px"] ** 2 + 1 / 12)))
                     for s in spots])
    shown = np.array([not (s["hidden"] or s["partly_hidden"]) for s in spots], bool)
    visible = shown & (peak / np.sqrt(b2) >= min_peak_snr) & (photons > 0)
    m = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    if len(t) and len(m):
        d = np.hypot(m[:, None, 0] - t[None, :, 0], m[:, None, 1] - t[None, :, 1])  # (N, K)
    else:
        d = np.full((len(m), len(t)), np.inf)
    matched = (d <= tol_px).any(axis=1) if len(t) else np.zeros(len(m), bool)
    nearest = d.min(axis=0) if len(m) else np.full(len(t), np.inf)
    found = visible & (nearest <= tol_px)
    err = nearest[found] / math.sqrt(2.0)
    bound = (localization_bound_px(photons[found], sig[found], b2[found]) if found.any() else np.zeros(0))
    n_vis, n_det = int(visible.sum()), len(m)
    return {"recall": float(found.sum() / n_vis) if n_vis else float("nan"),
            "precision": float(matched.sum() / n_det) if n_det else float("nan"),
            "n_visible": n_vis, "n_found": int(found.sum()), "n_detected": n_det, "n_false": int((~matched).sum()),
            "error_px": err, "bound_px": np.asarray(bound, dtype=np.float64)}
