"""From a camera frame to measured spots: screen and gun-shadow masks, smooth
background with a per-pixel noise map, matched-filter detection in units of
the local noise, and sub-pixel refinement by a 2-D Gaussian fit.

Conventions
-----------
Inside this module pixel arrays are (row, col); ``rc`` columns are (row, col)
in pixels with the centre of the top-left pixel at (0, 0). At the edges
(``to_records``, ``to_dict``) positions are named ``x`` (column) and ``y`` (row).
Image angles are counter-clockwise on the screen from +x (so they grow as y
decreases), as in :mod:`analysis.optics`.

Pipeline (:func:`measure_image`): :func:`find_screen` → :func:`find_gun_shadow`
→ :func:`estimate_background` → :func:`find_spots` (detect, fit, subtract, detect
again on the residual, refit neighbours jointly, split close pairs) → a second
background pass with the spots masked out → :func:`find_spots` again.
"""

from __future__ import annotations

import dataclasses
import math
import os
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as ndi

from .errors import ImageError, ParameterError

__all__ = [
    "ScreenMask",
    "ShadowMask",
    "BackgroundEstimate",
    "SpotTable",
    "Measurement",
    "FLAG_SATURATED",
    "FLAG_NEAR_EDGE",
    "FLAG_FIT_FAILED",
    "FLAG_SPLIT",
    "FLAG_NAMES",
    "find_screen",
    "find_gun_shadow",
    "estimate_background",
    "find_spots",
    "measure_image",
    "localization_bound_px",
    "disk_mask",
]

FLAG_SATURATED = 1  # a pixel near the centre is at full scale (it is left out of the fit)
FLAG_NEAR_EDGE = 2  # a masked pixel lies within 3 σ of the centre
FLAG_FIT_FAILED = 4  # the Gaussian fit did not converge; centre from the filtered peak
FLAG_SPLIT = 8  # one of a close pair separated by a two-spot fit
FLAG_NAMES = {FLAG_SATURATED: "saturated", FLAG_NEAR_EDGE: "near_mask_edge",
              FLAG_FIT_FAILED: "fit_failed", FLAG_SPLIT: "split_pair"}
_FWHM = 2.0 * math.sqrt(2.0 * math.log(2.0))
_FLAG_BLEND = 128  # internal: residual peak beside the spot (cleared before the table)


# --------------------------------------------------------------------------- helpers


def _as_float_image(image) -> np.ndarray:
    from .io import LoadedImage

    if isinstance(image, LoadedImage):
        image = image.data
    a = np.asarray(image)
    if a.ndim != 2 or min(a.shape) < 8:
        raise ImageError(f"`image` must be a 2-D array at least 8×8 px, got shape {a.shape}.")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == bool):
        raise ImageError(f"`image` must hold numbers, got dtype {a.dtype}.")
    a = np.asarray(a, dtype=np.float64)
    if not np.all(np.isfinite(a)):
        raise ImageError("`image` contains NaN or infinite pixels; load it with analysis.io.load_image.")
    return a


def _saturation_of(image) -> float | None:
    from .io import LoadedImage

    if isinstance(image, LoadedImage):
        return image.saturation_level
    dt = np.asarray(image).dtype
    if np.issubdtype(dt, np.unsignedinteger):
        return float(np.iinfo(dt).max)
    return None


def _check_mask(mask, shape, name="mask") -> np.ndarray:
    if mask is None:
        return np.ones(shape, dtype=bool)
    m = np.asarray(mask)
    if m.shape != tuple(shape):
        raise ParameterError(f"`{name}` must have the image shape {tuple(shape)}, got {m.shape}.")
    return m.astype(bool, copy=False)


def disk_mask(shape, center_rc, radius_px: float, *, axes_px=None, angle_deg: float = 0.0) -> np.ndarray:
    """Boolean disk (or ellipse) of pixels whose centres lie inside it.

    Parameters
    ----------
    shape : (M, N)
    center_rc : (row, col) of the centre, pixels.
    radius_px : float
        Radius (used when `axes_px` is None).
    axes_px : (a, b), optional
        Semi-axes of an ellipse; `a` along image angle `angle_deg`.

    Returns
    -------
    (M, N) ndarray of bool

    Examples
    --------
    >>> int(disk_mask((11, 11), (5, 5), 2.0).sum())
    13
    """
    a, b = (radius_px, radius_px) if axes_px is None else axes_px
    t = math.radians(angle_deg)
    ct, st = math.cos(t), math.sin(t)
    # row by row the ellipse is an interval of columns: with u = c cos t − r sin t (along a, y up)
    # and v = c sin t + r cos t, (u/a)² + (v/b)² ≤ 1 is A c² + B c + C ≤ 0 for each row offset r
    r = np.arange(shape[0], dtype=np.float64) - center_rc[0]
    qa = (ct / a) ** 2 + (st / b) ** 2
    qb = 2.0 * r * (-st * ct / a**2 + st * ct / b**2)
    qc = r * r * ((st / a) ** 2 + (ct / b) ** 2) - 1.0
    disc = qb * qb - 4.0 * qa * qc
    with np.errstate(invalid="ignore"):
        root = np.sqrt(disc)
    lo = np.where(disc >= 0, (-qb - root) / (2 * qa), np.inf) + center_rc[1]
    hi = np.where(disc >= 0, (-qb + root) / (2 * qa), -np.inf) + center_rc[1]
    c = np.arange(shape[1], dtype=np.float64)[None, :]
    eps = 1e-9 * max(a, b, 1.0)  # pixel centres exactly on the rim count as inside
    return (c >= lo[:, None] - eps) & (c <= hi[:, None] + eps)


def _block_reduce_mean(a: np.ndarray, f: int) -> np.ndarray:
    m, n = (a.shape[0] // f) * f, (a.shape[1] // f) * f
    return a[:m, :n].reshape(m // f, f, n // f, f).mean(axis=(1, 3))


def _interp_matrix(n_out: int, n_blocks: int, block: int) -> np.ndarray:
    """(n_out, n_blocks) cubic (Catmull–Rom) interpolation weights from block centres to
    pixels; linear extrapolation beyond the outer centres is avoided by clamping."""
    centres = (np.arange(n_blocks) + 0.5) * block - 0.5
    x = np.clip(np.arange(n_out, dtype=np.float64), centres[0], centres[-1])
    w = np.zeros((n_out, n_blocks))
    if n_blocks == 1:
        w[:, 0] = 1.0
        return w
    i = np.clip(np.searchsorted(centres, x, side="right") - 1, 0, n_blocks - 2)
    t = (x - centres[i]) / block
    rows = np.arange(n_out)
    coef = [0.5 * (-t ** 3 + 2 * t * t - t), 0.5 * (3 * t ** 3 - 5 * t * t + 2),
            0.5 * (-3 * t ** 3 + 4 * t * t + t), 0.5 * (t ** 3 - t * t)]
    for off, cf in zip((-1, 0, 1, 2), coef):
        np.add.at(w, (rows, np.clip(i + off, 0, n_blocks - 1)), cf)
    return w


def _fill_nan_grid(g: np.ndarray) -> np.ndarray:
    """Fill NaN cells by repeated averaging of valid neighbours."""
    g = g.copy()
    if np.all(np.isnan(g)):
        return g
    kernel = np.ones((3, 3))
    for _ in range(max(g.shape) + 2):
        bad = np.isnan(g)
        if not bad.any():
            break
        v = np.where(bad, 0.0, g)
        s = ndi.convolve(v, kernel, mode="nearest")
        n = ndi.convolve((~bad).astype(float), kernel, mode="nearest")
        fill = bad & (n > 0)
        g[fill] = s[fill] / n[fill]
    return g


def _fit_conic_ellipse(x: np.ndarray, y: np.ndarray):
    """Least-squares ellipse through points (x right, y down). Returns (xc, yc, a, b, angle_deg) or None."""
    xm, ym = x.mean(), y.mean()
    sc = max(np.std(x), np.std(y), 1e-9)
    u, v = (x - xm) / sc, (y - ym) / sc
    d = np.column_stack([u * u, u * v, v * v, u, v])
    coef, *_ = np.linalg.lstsq(d, np.ones_like(u), rcond=None)
    a_, b_, c_, d_, e_ = coef
    m = np.array([[a_, b_ / 2], [b_ / 2, c_]])
    if np.linalg.det(m) <= 0:
        return None
    centre = np.linalg.solve(2 * m, [-d_, -e_])
    k = 1.0 + centre @ m @ centre
    if k <= 0:
        return None
    w, vec = np.linalg.eigh(m / k)
    if np.any(w <= 0):
        return None
    axes = 1.0 / np.sqrt(w)  # semi-axes along the eigenvectors, in scaled units
    i = int(np.argmax(axes))
    ang = math.degrees(math.atan2(-vec[1, i], vec[0, i]))  # y down -> counter-clockwise angle
    return (xm + sc * centre[0], ym + sc * centre[1], sc * axes[i], sc * axes[1 - i], ang)


# --------------------------------------------------------------------------- screen


@dataclass(frozen=True, eq=False)
class ScreenMask:
    """The visible screen.

    Attributes
    ----------
    mask : (M, N) ndarray of bool
        True on the screen (shrunk by `margin_px`).
    center_rc : (2,) ndarray of float64
        (row, col) of the screen centre.
    semi_axes_px : (2,) ndarray of float64
        (a, b), a ≥ b; `a` along image angle `angle_deg`.
    angle_deg : float
        Image angle of the a-axis, counter-clockwise from +x.
    source : str
        ``"auto"`` (found in the image), ``"user"`` (given circle/ellipse) or
        ``"frame"`` (no screen edge found: the whole frame is used).
    dark_level, bright_level : float
        Typical values outside and on the screen (ADU).
    margin_px : float
    """

    mask: np.ndarray
    center_rc: np.ndarray
    semi_axes_px: np.ndarray
    angle_deg: float
    source: str
    dark_level: float
    bright_level: float
    margin_px: float = 0.0

    @property
    def radius_px(self) -> float:
        """Geometric-mean radius √(ab)."""
        return float(math.sqrt(self.semi_axes_px[0] * self.semi_axes_px[1]))

    def to_dict(self) -> dict:
        return {"center_px": [float(self.center_rc[1]), float(self.center_rc[0])],
                "radius_px": self.radius_px, "semi_axes_px": [float(v) for v in self.semi_axes_px],
                "angle_deg": float(self.angle_deg), "source": self.source, "margin_px": float(self.margin_px)}


def find_screen(image, *, circle_xyr=None, ellipse=None, margin_px: float = 3.0) -> ScreenMask:
    """Find the glowing screen (a disk or slight ellipse) in the frame.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
    circle_xyr : (x, y, r), optional, keyword-only
        User circle in pixels; overrides the automatic search.
    ellipse : (x, y, a, b, angle_deg), optional, keyword-only
        User ellipse; overrides the automatic search.
    margin_px : float, keyword-only
        The mask is shrunk by this many pixels inside the edge.

    Returns
    -------
    ScreenMask

    Examples
    --------
    >>> img = 10.0 + 100.0 * disk_mask((200, 240), (90.0, 130.0), 70.0)
    >>> s = find_screen(img)
    >>> print(s.source, np.round(s.center_rc, 1).tolist(), round(s.radius_px, 1))
    auto [90.0, 130.0] 70.0
    """
    img = _as_float_image(image)
    shape = img.shape
    if circle_xyr is not None or ellipse is not None:
        if ellipse is None:
            x, y, r = (float(v) for v in circle_xyr)
            ellipse = (x, y, r, r, 0.0)
        x, y, a, b, ang = (float(v) for v in ellipse)
        if not (a > 0 and b > 0 and all(map(math.isfinite, (x, y, a, b, ang)))):
            raise ParameterError(f"Screen circle/ellipse must have finite centre and positive radii, got {ellipse}.")
        if a < b:
            a, b, ang = b, a, ang + 90.0
        mask = disk_mask(shape, (y, x), 0, axes_px=(max(a - margin_px, 0.5), max(b - margin_px, 0.5)),
                         angle_deg=ang)
        if not mask.any():
            raise ParameterError(f"The screen circle/ellipse {ellipse} does not cover any pixel of the "
                                 f"{shape[1]}×{shape[0]} image.")
        inside = img[mask]
        outside = img[~disk_mask(shape, (y, x), 0, axes_px=(a + margin_px, b + margin_px), angle_deg=ang)]
        dark = float(np.median(outside)) if outside.size else float(np.percentile(img, 1))
        return ScreenMask(mask, np.array([y, x]), np.array([a, b]), ang % 180.0, "user", dark,
                          float(np.median(inside)), float(margin_px))
    return _auto_screen(img, margin_px)


def _frame_screen(img: np.ndarray, margin_px: float) -> ScreenMask:
    m, n = img.shape
    mask = np.zeros((m, n), bool)
    e = int(math.ceil(margin_px))
    mask[e:m - e, e:n - e] = True
    return ScreenMask(mask, np.array([(m - 1) / 2, (n - 1) / 2]), np.array([n / 2, m / 2]) if n >= m else
                      np.array([m / 2, n / 2]), 0.0 if n >= m else 90.0, "frame",
                      float(np.percentile(img, 1)), float(np.median(img)), float(margin_px))


def _auto_screen(img: np.ndarray, margin_px: float) -> ScreenMask:
    m, n = img.shape
    f = max(1, int(round(max(m, n) / 256)))
    small = ndi.gaussian_filter(_block_reduce_mean(img, f), 1.0)
    # the levels come from a copy with the spots taken out (a grey opening wider than a spot):
    # hundreds of bright spots would otherwise fill the histogram between the dark frame and
    # the diffuse screen, and Otsu would split spots from screen instead of screen from frame
    w = max(5, int(math.ceil(24.0 / f)) | 1)  # about 24 px of the frame: several σ of a wide spot
    flat = ndi.grey_opening(small, size=w)
    levels = _screen_levels(flat)
    if levels is None:
        return _frame_screen(img, margin_px)
    lo, hi, noise_lo = levels
    # Otsu may split the screen's own radial falloff; the screen is everything clearly
    # above the dark level, so lower the threshold towards it
    t = lo + max(6.0 * noise_lo, 0.1 * (hi - lo))
    bright = flat > t
    if bright.mean() > 0.99 or bright.mean() < 0.02:
        return _frame_screen(img, margin_px)
    lab, nlab = ndi.label(ndi.binary_opening(bright, iterations=2))
    if nlab == 0:
        return _frame_screen(img, margin_px)
    sizes = ndi.sum_labels(np.ones_like(lab), lab, index=np.arange(1, nlab + 1))
    comp = lab == (1 + int(np.argmax(sizes)))
    hull = ndi.binary_fill_holes(comp)  # rough: the ray search below finds the true edge
    rr, cc = np.nonzero(hull)
    if rr.size < 50:
        return _frame_screen(img, margin_px)
    yc, xc = rr.mean(), cc.mean()
    cov = np.cov(np.vstack([cc - xc, rr - yc]))
    r0 = 2.0 * math.sqrt(math.sqrt(max(np.linalg.det(cov), 1e-12)))  # uniform disk: var = r²/4
    cut = _cut_circle(hull)
    if cut is not None:  # the frame cuts the screen: its moments say little, its rim says more
        yc, xc, r0 = cut
    # refine at full resolution: steepest drop along rays around the rough edge
    yc, xc, r0 = yc * f + (f - 1) / 2, xc * f + (f - 1) / 2, r0 * f
    nray = 360
    phi = np.linspace(0, 2 * np.pi, nray, endpoint=False)
    span = max(12.0, 0.08 * r0)
    rad = r0 + np.arange(-span, span + 0.5, 0.5)
    xs = xc + np.cos(phi)[:, None] * rad[None, :]
    ys = yc - np.sin(phi)[:, None] * rad[None, :]
    prof = ndi.map_coordinates(img, [ys.ravel(), xs.ravel()], order=1, mode="nearest").reshape(xs.shape)
    prof = ndi.gaussian_filter(prof, (1.0, 1.0), mode=("wrap", "nearest"))  # 1° × 0.5 px
    # edge = outermost crossing of the level halfway between inside and outside (scanning
    # from the dark side, so bright spots inside the screen do not matter)
    third = max(3, rad.size // 3)
    inner = np.median(prof[:, :third], axis=1)
    outer = np.median(prof[:, -third:], axis=1)
    mid = 0.5 * (inner + outer)
    above = prof >= mid[:, None]
    j = rad.size - 1 - np.argmax(above[:, ::-1], axis=1)  # last sample at or above mid
    edge_step = np.median(inner) - lo
    ok = above.any(axis=1) & (j < rad.size - 1) & (j > 0) & (inner - outer > 0.3 * edge_step)
    inside_ray = np.ones(nray, bool)
    jj = np.clip(j, 0, rad.size - 2)
    p0, p1 = prof[np.arange(nray), jj], prof[np.arange(nray), jj + 1]
    frac = np.clip((p0 - mid) / np.where(p0 - p1 > 1e-12, p0 - p1, 1.0), 0.0, 1.0)
    redge = rad[jj] + frac * (rad[1] - rad[0])
    ex, ey = xc + np.cos(phi) * redge, yc - np.sin(phi) * redge
    sel = ok & inside_ray
    fit = None
    for _ in range(4):
        if sel.sum() < 20:
            break
        fit = _fit_conic_ellipse(ex[sel], ey[sel])
        if fit is None:
            break
        x0, y0, a, b, ang = fit
        t_ = math.radians(ang)
        u = (ex - x0) * math.cos(t_) - (ey - y0) * math.sin(t_)
        v = (ex - x0) * math.sin(t_) + (ey - y0) * math.cos(t_)
        res = (np.hypot(u / a, v / b) - 1.0) * math.sqrt(a * b)
        mad = 1.4826 * np.median(np.abs(res[sel])) + 0.3
        sel = ok & (np.abs(res) < 3.0 * mad)
    # the edge must be seen all round, where the rays cross it inside the frame (a screen
    # wider than the image shows at most the rim of its dense middle, and not on most rays)
    rx, ry = xc + np.cos(phi) * r0, yc - np.sin(phi) * r0
    seen = (rx > 1) & (rx < n - 2) & (ry > 1) & (ry < m - 2)
    if fit is None or seen.sum() < 20 or (sel & seen).sum() < 0.5 * seen.sum():
        return _frame_screen(img, margin_px)
    x0, y0, a, b, ang = fit
    mask = disk_mask((m, n), (y0, x0), 0, axes_px=(max(a - margin_px, 0.5), max(b - margin_px, 0.5)),
                     angle_deg=ang)
    # the screen may run off the frame; that is fine, the mask is clipped by the array
    outside = ~disk_mask((m, n), (y0, x0), 0, axes_px=(a + margin_px, b + margin_px), angle_deg=ang)
    sub = (slice(None, None, 4), slice(None, None, 4))
    dark = float(np.median(img[sub][outside[sub]])) if outside[sub].sum() > 100 else lo
    bright_level = float(np.median(img[sub][mask[sub]])) if mask[sub].any() else hi
    return ScreenMask(mask, np.array([y0, x0]), np.array([a, b]), float(ang % 180.0), "auto", dark,
                      bright_level, float(margin_px))


def _screen_levels(flat: np.ndarray):
    """(dark, screen, dark noise) levels of a spot-free coarse frame, or None with no dark side.

    The dark side of a screen edge is the unlit frame: flat (its spread well below the step)
    and as dark as the darkest pixels. When Otsu splits the screen itself (a dense middle from
    a fainter rim, with dark corners or no dark side at all), its dark class fails that test;
    the split is tried once more within the dark class, so a few dark corners are still found.
    """
    from skimage.filters import threshold_otsu

    vals = flat.ravel()
    floor = float(np.percentile(vals, 1.0))
    sub = vals
    for _ in range(2):  # a third split would only carve the screen's own falloff
        if sub.size < 16 or float(np.ptp(sub)) <= 0.0:
            return None
        dark = vals < float(threshold_otsu(sub))
        if not 0.02 <= dark.mean() <= 0.98:
            return None
        lo, hi = float(np.median(vals[dark])), float(np.median(vals[~dark]))
        noise_lo = 1.4826 * float(np.median(np.abs(vals[dark] - lo))) + 1e-12
        if hi - lo >= 25.0 * noise_lo and lo - floor <= 0.1 * (hi - lo):
            return lo, hi, noise_lo
        sub = vals[dark]
    return None


def _border_band(shape, w: int) -> np.ndarray:
    band = np.ones(shape, bool)
    band[w:-w, w:-w] = False
    return band


def _cut_circle(hull: np.ndarray):
    """(row, col, radius) of a circle through the outer rim of `hull` where it lies inside the
    frame, when `hull` touches the frame border (else None).

    Per degree seen from the centroid only the outermost rim pixel counts, so the sides of a
    gun arm running off the screen drop out; a few rounds of trimming drop what is left.
    """
    if not (hull[0].any() or hull[-1].any() or hull[:, 0].any() or hull[:, -1].any()):
        return None
    rr, cc = np.nonzero(hull)
    yc, xc = rr.mean(), cc.mean()
    rim = hull & ~ndi.binary_erosion(hull, border_value=1)  # the frame border is no rim
    rr, cc = np.nonzero(rim)
    d = np.hypot(rr - yc, cc - xc)
    k = (np.degrees(np.arctan2(rr - yc, cc - xc)) % 360.0).astype(np.int64) % 360
    far = np.full(360, -1.0)
    np.maximum.at(far, k, d)
    # a degree whose hull reaches the frame border has no rim inside the frame
    edge = np.zeros(360, bool)
    br, bc = np.nonzero(hull & _border_band(hull.shape, 2))
    edge[(np.degrees(np.arctan2(br - yc, bc - xc)) % 360.0).astype(np.int64) % 360] = True
    keep = (d >= far[k]) & ~edge[k]
    rr, cc = rr[keep].astype(float), cc[keep].astype(float)
    use = np.ones(rr.size, bool)
    fit = None
    for _ in range(4):
        if use.sum() < 30:
            break
        # x² + y² = 2 a x + 2 b y + c is linear in (a, b, c); the centre is (a, b)
        sol, *_ = np.linalg.lstsq(np.column_stack([2 * cc[use], 2 * rr[use], np.ones(use.sum())]),
                                  cc[use] ** 2 + rr[use] ** 2, rcond=None)
        r2 = sol[2] + sol[0] ** 2 + sol[1] ** 2
        if r2 <= 0:
            break
        fit = (float(sol[1]), float(sol[0]), math.sqrt(r2))
        res = np.abs(np.hypot(cc - fit[1], rr - fit[0]) - fit[2])
        use = res < max(2.0, 3.0 * 1.4826 * float(np.median(res[use])))
    return fit


# --------------------------------------------------------------------------- gun shadow


@dataclass(frozen=True, eq=False)
class ShadowMask:
    """The electron-gun shadow: a dark disk near the centre plus its holder arm.

    Attributes
    ----------
    mask : (M, N) ndarray of bool
        True under the shadow (grown by `margin_px`).
    center_rc : (2,) ndarray of float64 or None
        (row, col) of the gun disk; None when no shadow was found.
    radius_px : float
        Radius of the disk (0 when unknown).
    arm_angle_deg : float or None
        Image direction from the disk centre along the arm, counter-clockwise from +x.
    arm_width_px : float
        Full width of the arm (0 for none).
    source : str
        ``"auto"``, ``"user"``, ``"polygon"`` or ``"none"``.
    """

    mask: np.ndarray
    center_rc: np.ndarray | None
    radius_px: float
    arm_angle_deg: float | None
    arm_width_px: float
    source: str
    margin_px: float = 0.0

    def to_dict(self) -> dict:
        c = None if self.center_rc is None else [float(self.center_rc[1]), float(self.center_rc[0])]
        return {"center_px": c, "radius_px": float(self.radius_px),
                "arm_angle_deg": None if self.arm_angle_deg is None else float(self.arm_angle_deg),
                "arm_width_px": float(self.arm_width_px), "source": self.source,
                "margin_px": float(self.margin_px)}


def _disk_arm_mask(shape, center_rc, radius, arm_angle_deg, arm_width) -> np.ndarray:
    r = np.arange(shape[0], dtype=np.float64)[:, None] - center_rc[0]
    c = np.arange(shape[1], dtype=np.float64)[None, :] - center_rc[1]
    m = r * r + c * c <= radius * radius
    if arm_angle_deg is not None and arm_width > 0:
        ux, uy = math.cos(math.radians(arm_angle_deg)), -math.sin(math.radians(arm_angle_deg))
        along = c * ux + r * uy
        across = np.abs(c * uy - r * ux)
        m |= (along >= 0) & (across <= arm_width / 2.0)
    return m


def find_gun_shadow(image, screen: ScreenMask | None = None, *, disk_xyr=None, arm_angle_deg=None,
                    arm_width_px=None, polygon_xy=None, margin_px: float = 3.0) -> ShadowMask:
    """Find the dark gun disk and its holder arm on the screen.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
    screen : ScreenMask, optional
        Default: :func:`find_screen` of `image`.
    disk_xyr : (x, y, r), optional, keyword-only
        User disk; with `arm_angle_deg` and `arm_width_px` it overrides the search
        (the arm runs from the disk centre to the frame edge).
    polygon_xy : (P, 2) array_like of (x, y), optional, keyword-only
        User polygon; overrides everything else.
    margin_px : float, keyword-only
        The shadow mask is grown by this many pixels.

    Returns
    -------
    ShadowMask
        With ``source == "none"`` and an empty mask when no dark region is found.

    Examples
    --------
    >>> img = 10.0 + 100.0 * disk_mask((200, 200), (100, 100), 90.0)
    >>> img[disk_mask((200, 200), (100, 100), 12.0)] = 10.0
    >>> img[95:106, 100:] = 10.0            # arm towards +x
    >>> g = find_gun_shadow(img)
    >>> print(g.source, bool(np.abs(g.center_rc - 100).max() < 1), abs((g.arm_angle_deg + 180) % 360 - 180) < 2)
    auto True True
    """
    img = _as_float_image(image)
    shape = img.shape
    grow = int(math.ceil(margin_px))
    if polygon_xy is not None:
        from skimage.draw import polygon as _polygon

        p = np.asarray(polygon_xy, dtype=np.float64)
        if p.ndim != 2 or p.shape[1] != 2 or len(p) < 3 or not np.all(np.isfinite(p)):
            raise ParameterError(f"`polygon_xy` must be at least 3 finite (x, y) points, got shape {p.shape}.")
        mask = np.zeros(shape, bool)
        rr, cc = _polygon(p[:, 1], p[:, 0], shape)
        mask[rr, cc] = True
        if grow:
            mask = ndi.binary_dilation(mask, iterations=grow)
        cen = np.array([p[:, 1].mean(), p[:, 0].mean()])
        return ShadowMask(mask, cen, 0.0, None, 0.0, "polygon", float(margin_px))
    if disk_xyr is not None:
        x, y, r = (float(v) for v in disk_xyr)
        w = 0.0 if arm_width_px is None else float(arm_width_px)
        if not (r >= 0 and w >= 0 and all(map(math.isfinite, (x, y, r, w)))):
            raise ParameterError(f"Gun disk must be finite with radius ≥ 0, got {disk_xyr} and arm width {w}.")
        mask = _disk_arm_mask(shape, (y, x), r + margin_px, arm_angle_deg, w + 2 * margin_px if w > 0 else 0)
        return ShadowMask(mask, np.array([y, x]), r, None if arm_angle_deg is None else float(arm_angle_deg),
                          w, "user", float(margin_px))
    screen = find_screen(img) if screen is None else screen
    return _auto_gun(img, screen, margin_px)


def _none_shadow(shape, margin_px) -> ShadowMask:
    return ShadowMask(np.zeros(shape, bool), None, 0.0, None, 0.0, "none", float(margin_px))


def _nan_percentile(a: np.ndarray, q: float) -> np.ndarray:
    """``np.nanpercentile(a, q, axis=-1)`` (linear interpolation) by one sort; all-NaN rows give NaN."""
    srt = np.sort(a, axis=-1)  # NaN last
    n = np.sum(np.isfinite(srt), axis=-1)
    pos = (q / 100.0) * np.maximum(n - 1, 0)
    i0 = np.floor(pos).astype(np.int64)
    i1 = np.minimum(i0 + 1, np.maximum(n - 1, 0))
    v0 = np.take_along_axis(srt, i0[..., None], -1)[..., 0]
    v1 = np.take_along_axis(srt, i1[..., None], -1)[..., 0]
    return np.where(n > 0, v0 + (pos - i0) * (v1 - v0), np.nan)


def _auto_gun(img: np.ndarray, screen: ScreenMask, margin_px: float) -> ShadowMask:
    m, n = img.shape
    f = max(1, int(round(max(m, n) / 256)))
    small = ndi.gaussian_filter(_block_reduce_mean(img, f), 1.0)
    scr = screen.mask[: small.shape[0] * f: f, : small.shape[1] * f: f][: small.shape[0], : small.shape[1]]
    if scr.sum() < 100:
        return _none_shadow(img.shape, margin_px)
    # local screen level: a high percentile per coarse block, so dark shadows do not pull it down,
    # of the pixels below the spots (a dense bright pattern would otherwise lift it above the
    # diffuse background between the spots, which then reads as shadow)
    b = max(8, min(small.shape) // 12)
    gm, gn = -(-small.shape[0] // b), -(-small.shape[1] // b)
    on = small[scr]
    med = float(np.median(on))
    cut = med + 5.0 * max(1.4826 * float(np.median(np.abs(on - med))), 1e-12)
    pad = np.full((gm * b, gn * b), np.nan)
    pad[: small.shape[0], : small.shape[1]] = np.where(scr & (small <= cut), small, np.nan)
    blocks = pad.reshape(gm, b, gn, b).transpose(0, 2, 1, 3).reshape(gm, gn, b * b)
    cnt = np.sum(np.isfinite(blocks), axis=2)
    import warnings

    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN blocks outside the screen
        lev = _nan_percentile(np.where(cnt[..., None] > 0.1 * b * b, blocks, np.nan), 75.0) \
            if np.any(cnt > 0.1 * b * b) else np.full((gm, gn), np.nan)
    lev = _fill_nan_grid(lev)
    if np.all(np.isnan(lev)):
        return _none_shadow(img.shape, margin_px)
    level = _interp_matrix(small.shape[0], gm, b) @ lev @ _interp_matrix(small.shape[1], gn, b).T
    dark = screen.dark_level
    thr = dark + 0.5 * (level - dark)
    cand = (small < thr) & scr
    cand = ndi.binary_opening(cand, iterations=1)
    lab, nlab = ndi.label(cand)
    if nlab == 0:
        return _none_shadow(img.shape, margin_px)
    dist = ndi.distance_transform_edt(cand)
    idx = np.arange(1, nlab + 1)
    rmax = ndi.maximum(dist, lab, idx)
    pos = np.array(ndi.maximum_position(dist, lab, idx), dtype=np.float64).reshape(-1, 2)
    sc = np.array([screen.center_rc[0] / f, screen.center_rc[1] / f])
    rs = screen.radius_px / f
    dcen = np.hypot(pos[:, 0] - sc[0], pos[:, 1] - sc[1])
    ok = (rmax >= 2.0) & (dcen < 0.6 * rs) & (rmax < 0.5 * rs)
    if not ok.any():
        return _none_shadow(img.shape, margin_px)
    score = np.where(ok, rmax - 0.05 * dcen, -np.inf)
    k = int(np.argmax(score))
    comp = lab == idx[k]
    disk_r = float(rmax[k])
    # disk centre: centroid of what survives an opening by a disk of 0.8 r (the arm is narrower)
    q = int(math.ceil(disk_r)) + 3
    r0c, c0c = int(pos[k][0]) - q, int(pos[k][1]) - q
    crop = np.zeros((2 * q + 1, 2 * q + 1), bool)
    rs0, cs0 = max(r0c, 0), max(c0c, 0)
    rs1, cs1 = min(r0c + 2 * q + 1, comp.shape[0]), min(c0c + 2 * q + 1, comp.shape[1])
    crop[rs0 - r0c: rs1 - r0c, cs0 - c0c: cs1 - c0c] = comp[rs0:rs1, cs0:cs1]
    rad_o = max(1.0, 0.8 * disk_r)
    o = np.arange(-int(rad_o), int(rad_o) + 1)
    se = o[:, None] ** 2 + o[None, :] ** 2 <= rad_o**2
    core_d = ndi.binary_opening(crop, structure=se)
    disk_c = (np.array([np.mean(v) for v in np.nonzero(core_d)]) + [r0c, c0c]) if core_d.any() else pos[k]
    # arm: component pixels well outside the disk
    rr, cc = np.nonzero(comp)
    d = np.hypot(rr - disk_c[0], cc - disk_c[1])
    arm = d > disk_r * 1.6 + 2
    arm_angle, arm_w = None, 0.0
    if arm.sum() > 3 * disk_r:
        vy, vx = (rr[arm] - disk_c[0]).mean(), (cc[arm] - disk_c[1]).mean()
        arm_angle = math.degrees(math.atan2(-vy, vx)) % 360.0
        length = d[arm].max() - (disk_r * 1.6 + 2)
        arm_w = float(arm.sum() / max(length, 1.0)) * f
    # full-resolution mask: dark pixels near the component, grown by the margin
    grow = int(math.ceil(margin_px))
    near_s = ndi.binary_dilation(comp, iterations=2)
    rs_, cs_ = np.nonzero(near_s)
    pad_ = grow + 3
    r0_, r1_ = max(0, rs_.min() * f - pad_), min(m, (rs_.max() + 1) * f + pad_)
    c0_, c1_ = max(0, cs_.min() * f - pad_), min(n, (cs_.max() + 1) * f + pad_)
    rows_s = np.clip(np.arange(r0_, r1_) // f, 0, small.shape[0] - 1)
    cols_s = np.clip(np.arange(c0_, c1_) // f, 0, small.shape[1] - 1)
    near = near_s[np.ix_(rows_s, cols_s)]
    core = comp[np.ix_(rows_s, cols_s)]
    thr_c = thr[np.ix_(rows_s, cols_s)]
    sm = ndi.gaussian_filter(img[r0_:r1_, c0_:c1_], 1.0)
    fine = (sm < thr_c) & near
    lab2, n2 = ndi.label(fine)
    if n2:
        keep = np.unique(lab2[core])
        keep = keep[keep > 0]
        fine = np.isin(lab2, keep) if keep.size else fine
    fine = ndi.binary_fill_holes(fine)
    if grow:
        fine = ndi.binary_dilation(np.pad(fine, grow), iterations=grow)[grow:-grow, grow:-grow]
    mask = np.zeros((m, n), bool)
    mask[r0_:r1_, c0_:c1_] = fine
    if mask.sum() > 0.4 * screen.mask.sum():  # a gun shadow is a disk and an arm, not most of the screen
        return _none_shadow(img.shape, margin_px)
    centre = (disk_c + 0.5) * f - 0.5
    return ShadowMask(mask, centre, disk_r * f, arm_angle, arm_w, "auto", float(margin_px))


# --------------------------------------------------------------------------- background


@dataclass(frozen=True, eq=False)
class BackgroundEstimate:
    """Smooth background and per-pixel noise; unpacks as ``background, noise``.

    Attributes
    ----------
    background : (M, N) ndarray of float64
        Expected background (ADU) on the valid pixels (extrapolated elsewhere).
    noise : (M, N) ndarray of float64
        Standard deviation of a background pixel (ADU).
    gain_adu : float or None
        Variance per unit signal above the dark level (ADU per detected photon
        for a shot-noise-limited camera); None when it could not be measured.
    dark_level : float or None
        Level outside the screen (ADU), when there are such pixels.
    block_px : int
    """

    background: np.ndarray
    noise: np.ndarray
    gain_adu: float | None
    dark_level: float | None
    block_px: int

    def __iter__(self):
        return iter((self.background, self.noise))

    def variance(self, signal_adu: np.ndarray) -> np.ndarray:
        """Variance of pixels holding extra `signal_adu` over the background."""
        v = self.noise**2
        if self.gain_adu:
            v = v + self.gain_adu * np.clip(signal_adu, 0.0, None)
        return v


_POOL = None
_POOL_PID = None


def _forget_pool() -> None:
    """In a forked child the parent's executor has no threads: drop it (a new one is made on use)."""
    global _POOL, _POOL_PID
    _POOL, _POOL_PID = None, None


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


def _pool():
    """A second thread for array work that releases the GIL (numpy, ndimage).

    Never inherited across a fork (Dash background jobs, gunicorn and Celery workers fork):
    the child forgets the parent's executor and makes its own; the process id is checked too,
    for forks that bypass the `os.register_at_fork` hooks.
    """
    global _POOL, _POOL_PID
    if _POOL is None or _POOL_PID != os.getpid():
        from concurrent.futures import ThreadPoolExecutor

        _POOL = ThreadPoolExecutor(max_workers=2, thread_name_prefix="recinet-arrays")
        _POOL_PID = os.getpid()
    return _POOL


def _block_stats(pad: np.ndarray, b: int, step: float):
    """Clipped mean, noise, kept count and usability of each b×b block of `pad` (NaN = invalid),
    blocks in row-major order."""
    gm, gn = pad.shape[0] // b, pad.shape[1] // b
    blocks = pad.reshape(gm, b, gn, b).transpose(0, 2, 1, 3).reshape(gm * gn, b * b)
    # quartiles (only used to set the clip limits) from every fourth pixel of a block
    sub = blocks.reshape(-1, b // 2, 2, b)[:, :, 0, ::2].reshape(len(blocks), -1) if b % 2 == 0 and b >= 16 \
        else blocks
    srt = np.sort(sub, axis=1)  # NaN last
    cnt = np.sum(np.isfinite(srt), axis=1)
    good = np.sum(np.isfinite(blocks), axis=1) >= max(16, b * b // 8)
    ci = np.clip(cnt - 1, 0, None)
    q = lambda p: np.take_along_axis(srt, np.rint(p * ci).astype(np.int64)[:, None], 1)[:, 0]  # noqa: E731
    med, q25, q75 = q(0.5), q(0.25), q(0.75)
    # first width from the interquartile range (spots sit above q75 in a block); at least
    # one quantisation step so integer images with little noise are not clipped to nothing
    s0 = np.maximum((q75 - q25) / 1.349, step)
    lo, hi = med - 5.0 * s0 - 0.5 * step, med + 3.0 * s0 + 0.5 * step
    with np.errstate(invalid="ignore"):
        keep = (blocks >= lo[:, None]) & (blocks <= hi[:, None])
        kn = keep.sum(axis=1)
        vals = np.where(keep, blocks, 0.0).astype(np.float64)
        mean = vals.sum(axis=1) / np.maximum(kn, 1)
        var = np.maximum((vals * vals).sum(axis=1) - kn * mean * mean, 0.0) / np.maximum(kn - 1, 1)
        # noise from differences of horizontal neighbours: a smooth gradient across the block
        # does not count as noise (independent pixels: Var(a − b) = 2 Var)
        pair = keep[:, :-1] & keep[:, 1:] & ((np.arange(b * b - 1) % b) != b - 1)[None, :]
        nd = pair.sum(axis=1)
        dv = 0.5 * np.where(pair, (blocks[:, 1:] - blocks[:, :-1]).astype(np.float64) ** 2, 0.0).sum(axis=1)
        var = np.where(nd >= 16, dv / np.maximum(nd, 1), var)
    # a one-sided 3σ clip of a normal sample lowers its variance by ≈ 1.5 % and its mean by 0.015 σ
    var = var * 1.015
    sd = np.sqrt(var)
    mean = mean + 0.015 * sd
    return mean, sd, kn, good


def estimate_background(image, mask=None, *, block_px: int = 32, exclude=None,
                        dark_mask=None) -> BackgroundEstimate:
    """Smooth (inelastic) background and local noise, robust to the spots.

    Each `block_px` square block gives a clipped mean and standard deviation of
    its valid pixels (values more than 3 σ above the block median are left out,
    so spots barely count); empty blocks are filled from their neighbours, a
    3×3 median over blocks removes blocks crowded with spots, and bilinear
    interpolation between block centres gives the per-pixel maps. The variance
    per unit of signal (`gain_adu`) is measured from how block variance grows
    with block level above the dark level of `dark_mask` pixels.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
    mask : (M, N) array_like of bool, optional
        Valid pixels (the screen without the gun shadow); default all.
    block_px : int, keyword-only
        Block size; the background must be smooth on this scale.
    exclude : (M, N) array_like of bool, optional, keyword-only
        Further pixels to leave out (e.g. around spots already found).
    dark_mask : (M, N) array_like of bool, optional, keyword-only
        Pixels that see no electrons (outside the screen) for the dark level.

    Returns
    -------
    BackgroundEstimate
        Unpacks as ``background, noise`` ((M, N) float64 arrays, ADU).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> img = rng.normal(100.0, 5.0, (128, 128)); img[60:63, 60:63] += 500.0
    >>> bg, noise = estimate_background(img)
    >>> print(abs(bg.mean() - 100) < 0.5, abs(noise.mean() - 5) < 0.3)
    True True
    """
    img = _as_float_image(image)
    m, n = img.shape
    valid = _check_mask(mask, img.shape)
    if exclude is not None:
        valid = valid & ~_check_mask(exclude, img.shape, "exclude")
    if valid.sum() < 64:
        raise ImageError(f"Too few valid pixels ({int(valid.sum())}) to estimate the background.")
    b = int(block_px)
    if b < 4:
        raise ParameterError(f"`block_px` must be at least 4, got {block_px}.")
    gm, gn = -(-m // b), -(-n // b)
    sample = img[valid][:: max(1, int(valid.sum()) // 20000)]
    step = 1.0 if np.allclose(sample, np.rint(sample)) else 1e-6 * max(float(np.ptp(sample)), 1e-12)
    pad = np.full((gm * b, gn * b), np.nan, dtype=np.float32)
    pad[:m, :n] = np.where(valid, img, np.nan)
    mean, sd, kn, good = _block_stats(pad, b, step)  # (memory-bound: a second thread does not help)
    good &= kn >= 16
    lev = np.where(good, mean, np.nan).reshape(gm, gn)
    sig = np.where(good, sd, np.nan).reshape(gm, gn)
    if np.all(np.isnan(lev)):
        raise ImageError("No image block has enough valid pixels to estimate the background.")
    # crowded blocks: a 3×3 median over valid blocks
    lev_s = _nan_median3(lev)
    sig_s = _nan_median3(sig)
    rep = np.isfinite(lev) & ((lev - lev_s) > 1.5 * sig_s)
    lev = np.where(rep, lev_s, lev)
    sig = np.where(np.isfinite(sig) & (sig > 1.5 * sig_s), sig_s, sig)
    lev_f, sig_f = _fill_nan_grid(lev), _fill_nan_grid(sig)
    # block means → values at block centres: a smooth f has mean ≈ f(centre) + b²/24 ∇²f
    if gm >= 3 and gn >= 3:
        p = np.pad(lev_f, 1, mode="edge")
        lap = (p[:-2, 1:-1] + p[2:, 1:-1] + p[1:-1, :-2] + p[1:-1, 2:] - 4 * lev_f)
        lev_f = lev_f - lap / 24.0
    wr, wc = _interp_matrix(m, gm, b), _interp_matrix(n, gn, b)
    background = wr @ lev_f @ wc.T
    noise = np.sqrt(np.maximum(wr @ (sig_f**2) @ wc.T, 1e-12))

    dark_level, gain = None, None
    if dark_mask is not None:
        dm = _check_mask(dark_mask, img.shape, "dark_mask")
        if dm.sum() >= 200:
            dv = img[dm]
            dq = dv[:: max(1, len(dv) // 50_000)]  # median and MAD from ≤ 10⁵ pixels are plenty
            d_med = float(np.median(dq))
            d_sd = 1.4826 * float(np.median(np.abs(dq - d_med)))
            inl = np.abs(dv - d_med) < 5 * max(d_sd, 0.5)
            dark_level = float(dv[inl].mean())
            dark_var = float(dv[inl].var())
            L, V = lev.ravel(), sig.ravel() ** 2
            use = np.isfinite(L) & (L - dark_level > 3.0 * math.sqrt(dark_var + 1e-12) + 1.0)
            if use.sum() >= 5:
                ratio = (V[use] - dark_var) / (L[use] - dark_level)
                g = float(np.median(ratio))
                gain = g if g > 0 else None
    if gain is None:
        L, V = lev.ravel(), sig.ravel() ** 2
        use = np.isfinite(L)
        if use.sum() >= 10 and np.ptp(L[use]) > 0.3 * np.median(L[use]):
            A = np.column_stack([L[use], np.ones(use.sum())])
            coef, *_ = np.linalg.lstsq(A, V[use], rcond=None)
            gain = float(coef[0]) if coef[0] > 0 else None
    return BackgroundEstimate(background, noise, gain, dark_level, b)


def _nan_median3(g: np.ndarray) -> np.ndarray:
    p = np.pad(g, 1, mode="constant", constant_values=np.nan)
    stack = np.stack([p[i:i + g.shape[0], j:j + g.shape[1]] for i in range(3) for j in range(3)])
    with np.errstate(all="ignore"):
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmedian(stack, axis=0)


# --------------------------------------------------------------------------- spots


@dataclass(frozen=True, eq=False)
class SpotTable:
    """Measured spots, one row each.

    Attributes
    ----------
    rc : (K, 2) ndarray of float64
        Sub-pixel centres (row, col), pixels.
    sigma_rc : (K, 2) ndarray of float64
        1-σ uncertainty of `rc` from the fit (row, col), pixels.
    intensity : (K,) ndarray of float64
        Integrated, background-subtracted intensity 2π A σ_r σ_t (ADU).
    amplitude : (K,) ndarray of float64
        Fitted peak height above the local background (ADU).
    peak_snr : (K,) ndarray of float64
        `amplitude` over the local background noise per pixel.
    snr : (K,) ndarray of float64
        Detection significance: matched-filter response in units of its local noise.
    fwhm_radial_px, fwhm_tangential_px : (K,) ndarray of float64
        Full widths at half maximum along and across the direction to `center_rc`.
    background : (K,) ndarray of float64
        Local background level under the spot (ADU).
    flags : (K,) ndarray of uint8
        Bit set of FLAG_SATURATED, FLAG_NEAR_EDGE, FLAG_FIT_FAILED, FLAG_SPLIT.
    center_rc : (2,) ndarray of float64
        Reference point for radial/tangential.
    """

    rc: np.ndarray
    sigma_rc: np.ndarray
    intensity: np.ndarray
    amplitude: np.ndarray
    peak_snr: np.ndarray
    snr: np.ndarray
    fwhm_radial_px: np.ndarray
    fwhm_tangential_px: np.ndarray
    background: np.ndarray
    flags: np.ndarray
    center_rc: np.ndarray = field(default_factory=lambda: np.zeros(2))

    def __post_init__(self):
        for name in ("rc", "sigma_rc", "intensity", "amplitude", "peak_snr", "snr", "fwhm_radial_px",
                     "fwhm_tangential_px", "background", "flags", "center_rc"):
            a = np.array(getattr(self, name))
            a.flags.writeable = False
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return int(self.rc.shape[0])

    @property
    def xy(self) -> np.ndarray:
        """(K, 2) (x, y) pixel positions."""
        return self.rc[:, ::-1].copy()

    def select(self, keep) -> "SpotTable":
        """Rows where `keep` (bool or index array)."""
        k = np.asarray(keep)
        return SpotTable(**{n: getattr(self, n)[k] for n in _ROW_FIELDS}, center_rc=self.center_rc)

    def to_records(self) -> list[dict]:
        """One JSON-safe dict per spot with ``x``, ``y``, ``sigma_x``, ``sigma_y``..."""
        out = []
        for i in range(len(self)):
            fl = int(self.flags[i])
            out.append({
                "x": float(self.rc[i, 1]), "y": float(self.rc[i, 0]),
                "sigma_x": float(self.sigma_rc[i, 1]), "sigma_y": float(self.sigma_rc[i, 0]),
                "intensity": float(self.intensity[i]), "amplitude": float(self.amplitude[i]),
                "peak_snr": float(self.peak_snr[i]), "snr": float(self.snr[i]),
                "fwhm_radial_px": float(self.fwhm_radial_px[i]),
                "fwhm_tangential_px": float(self.fwhm_tangential_px[i]),
                "background": float(self.background[i]),
                "flags": [name for bit, name in FLAG_NAMES.items() if fl & bit],
            })
        return out


_ROW_FIELDS = ("rc", "sigma_rc", "intensity", "amplitude", "peak_snr", "snr", "fwhm_radial_px",
               "fwhm_tangential_px", "background", "flags")


def _empty_table(center_rc) -> SpotTable:
    z = np.zeros(0)
    return SpotTable(np.zeros((0, 2)), np.zeros((0, 2)), z, z, z, z, z, z, z, np.zeros(0, np.uint8),
                     np.asarray(center_rc, float))


def _gauss_kernel_norm(sigma: float) -> float:
    """√Σ g² of the separable, truncated, unit-sum Gaussian used by the matched filter."""
    rad = int(3.0 * sigma + 0.5)
    x = np.arange(-rad, rad + 1)
    g = np.exp(-0.5 * (x / sigma) ** 2)
    g /= g.sum()
    return float(np.sum(g * g))  # (Σ g1²)² = Σ g², so √Σ g² = Σ g1²


def _matched(res: np.ndarray, sigma: float) -> np.ndarray:
    rad = int(3.0 * sigma + 0.5)
    return _by_row_strips(lambda a: ndi.gaussian_filter(a, sigma, truncate=3.0, mode="constant"), res, rad)


def _by_row_strips(func, a: np.ndarray, halo: int) -> np.ndarray:
    """func(a) computed as two row strips in two threads (ndimage releases the GIL).

    `func` must be a local filter reaching at most `halo` rows; each strip
    carries that many rows of its neighbour, so the result equals func(a)
    exactly. Small images are done in one call.
    """
    m = a.shape[0]
    if m < 256 or a.size < 200_000 or halo >= m // 4:
        return func(a)
    h = m // 2
    top = _pool().submit(func, a[: h + halo])
    bottom = func(a[h - halo:])
    out = np.empty(a.shape, dtype=bottom.dtype)
    out[h:] = bottom[halo:]
    out[:h] = top.result()[:h]
    return out


def _maxima(s: np.ndarray, thr: float, valid: np.ndarray) -> np.ndarray:
    """(K, 2) int (row, col) of 3×3 local maxima of `s` at or above `thr` on valid pixels."""
    rc = np.argwhere((s >= thr) & valid)
    if len(rc):
        m, n = s.shape
        keep = np.ones(len(rc), bool)
        v = s[rc[:, 0], rc[:, 1]]
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                if dr == 0 and dc == 0:
                    continue
                r, c = rc[:, 0] + dr, rc[:, 1] + dc
                inside = (r >= 0) & (r < m) & (c >= 0) & (c < n)
                nb = np.where(inside, s[np.clip(r, 0, m - 1), np.clip(c, 0, n - 1)], -np.inf)
                keep &= v >= nb
        rc = rc[keep]
    if len(rc) > 1:  # plateaus: keep one per 2 px
        order = np.argsort(-s[rc[:, 0], rc[:, 1]])
        rc = rc[order]
        from scipy.spatial import cKDTree

        tree = cKDTree(rc)
        drop = np.zeros(len(rc), bool)
        for i, j in tree.query_pairs(1.5):
            drop[max(i, j)] = True  # i, j are in descending order of s
        rc = rc[~drop]
    return rc


class _Fitter:
    """Vectorised Levenberg–Marquardt fit of elliptical Gaussians with a local offset.

    Model (per spot, axes along the radial direction u and across it):
        A exp(−ρ²/2σ_r² − τ²/2σ_t²) + b,  ρ = (p − p0)·u,  τ = (p − p0)·u⊥.
    Pixel weights are 1/variance with variance = noise² + gain · model (IRLS).
    """

    def __init__(self, half: int):
        self.half = half
        o = np.arange(-half, half + 1, dtype=np.float64)
        self.dr, self.dc = np.meshgrid(o, o, indexing="ij")

    def patches(self, arrays, centres):
        """Gather (K, W, W) windows of each array around rounded `centres` (clamped at the edges)."""
        r0 = np.rint(centres[:, 0]).astype(np.int64)
        c0 = np.rint(centres[:, 1]).astype(np.int64)
        rr = r0[:, None, None] + self.dr.astype(np.int64)[None]
        cc = c0[:, None, None] + self.dc.astype(np.int64)[None]
        inside = (rr >= 0) & (rr < arrays[0].shape[0]) & (cc >= 0) & (cc < arrays[0].shape[1])
        rr_, cc_ = np.clip(rr, 0, arrays[0].shape[0] - 1), np.clip(cc, 0, arrays[0].shape[1] - 1)
        out = [a[rr_, cc_] for a in arrays]
        return r0, c0, inside, out, (rr, cc)

    def fit(self, data, noise2, w_ok, p, u, gain, *, n_iter=20, sigma_bounds=(0.4, 12.0), restart=False):
        """data, noise2, w_ok: (K, W, W); p: (K, 6) [A, dr0, dc0, log sr, log st, b] (offsets in window).

        Returns (p, covariance (K, 6, 6), reduced χ², model (K, W, W)). Spots leave the
        iteration as soon as their centre moves by less than 10⁻³ px, after three
        iterations; with `restart` (`p` is a previous solution) after one, and a lightly
        damped step below 10⁻³ px ends the fit even when it does not lower χ² (at the
        minimum, rounding and the reweighting reject such steps).
        """
        k = len(p)
        p = np.array(p, dtype=np.float64)
        lo, hi = math.log(sigma_bounds[0]), math.log(sigma_bounds[1])
        lam = np.full(k, 1e-2)
        act = np.arange(k)
        if isinstance(noise2, float) or np.ndim(noise2) == 0:
            noise2 = np.broadcast_to(noise2, data.shape)
        mdl, aux = self._model(p, u)  # model of the active spots at their current parameters
        for it in range(n_iter):
            if len(act) == 0:
                break
            d, n2, ok, uu = data[act], noise2[act], w_ok[act], u[act]
            pa = p[act]
            w = self._weights(mdl, pa, n2, ok, gain)
            chi2 = np.sum(w * (d - mdl) ** 2, axis=(1, 2))
            ka = len(act)
            jf = self._jac(aux, uu).reshape(ka, 6, -1)  # (K, 6, pixels)
            jtw = jf * w.reshape(ka, 1, -1)
            hmat = np.matmul(jtw, jf.transpose(0, 2, 1))
            grad = np.matmul(jtw, (d - mdl).reshape(ka, -1, 1))[:, :, 0]
            diag = np.einsum("kii->ki", hmat)
            hd = hmat + (lam[act, None] * np.maximum(diag, 1e-12))[:, :, None] * np.eye(6)[None]
            hd = hd + 1e-12 * np.eye(6)[None]
            try:
                step = np.linalg.solve(hd, grad[:, :, None])[:, :, 0]
            except np.linalg.LinAlgError:
                step = np.stack([np.linalg.lstsq(h, g, rcond=None)[0] for h, g in zip(hd, grad)])
            step[:, 1:3] = np.clip(step[:, 1:3], -1.5, 1.5)
            step[:, 3:5] = np.clip(step[:, 3:5], -0.5, 0.5)
            pn = pa + step
            pn[:, 3:5] = np.clip(pn[:, 3:5], lo, hi)
            mdl_n, aux_n = self._model(pn, uu)
            chi2_n = np.sum(w * (d - mdl_n) ** 2, axis=(1, 2))
            better = np.isfinite(chi2_n) & (chi2_n <= chi2)
            p[act] = np.where(better[:, None], pn, pa)
            small = np.abs(step[:, 1:3]).max(axis=1) < 1e-3
            flat = small & ~better & (lam[act] < 1.0) if restart else np.zeros(len(act), bool)
            lam[act] = np.where(better, np.maximum(lam[act] / 5, 1e-7), lam[act] * 10)
            b3 = better[:, None, None]
            mdl = np.where(b3, mdl_n, mdl)
            aux = tuple(np.where(b3, xn, x) for xn, x in zip(aux_n, aux))
            done = better & small | flat | (lam[act] > 1e6)
            if it >= (0 if restart else 2) and done.any():
                act, keep = act[~done], ~done
                mdl, aux = mdl[keep], tuple(x[keep] for x in aux)
        # covariance at the solution
        mdl, aux = self._model(p, u)
        w = self._weights(mdl, p, noise2, w_ok, gain)
        jf = self._jac(aux, u).reshape(k, 6, -1)
        hmat = np.matmul(jf * w.reshape(k, 1, -1), jf.transpose(0, 2, 1))
        try:
            cov = np.linalg.inv(hmat + 1e-12 * np.eye(6)[None])
        except np.linalg.LinAlgError:
            cov = np.full((k, 6, 6), np.nan)
        chi2 = np.sum(w * (data - mdl) ** 2, axis=(1, 2))
        npix = np.maximum(w_ok.reshape(k, -1).sum(axis=1) - 6, 1)
        return p, cov, chi2 / npix, mdl

    def _model(self, p, u):
        a, r0, c0, lsr, lst, b = (p[:, i, None, None] for i in range(6))
        ur, uc = u[:, 0, None, None], u[:, 1, None, None]
        x, y = self.dr[None] - r0, self.dc[None] - c0
        rho, tau = x * ur + y * uc, -x * uc + y * ur
        isr2, ist2 = np.exp(-2 * lsr), np.exp(-2 * lst)
        e = np.exp(-0.5 * (rho * rho * isr2 + tau * tau * ist2))
        return a * e + b, (a, e, rho, tau, isr2, ist2)

    @staticmethod
    def _weights(mdl, p, noise2, ok, gain):
        v = noise2 + gain * np.clip(mdl - p[:, 5, None, None], 0, None) if gain else noise2
        return np.where(ok, 1.0 / v, 0.0)

    @staticmethod
    def _jac(aux, u):
        a, e, rho, tau, isr2, ist2 = aux
        ur, uc = u[:, 0, None, None], u[:, 1, None, None]
        ae = a * e
        gr, gt = ae * rho * isr2, ae * tau * ist2
        jac = np.empty((e.shape[0], 6) + e.shape[1:])  # (K, 6, W, W): one contiguous plane per parameter
        jac[:, 0] = e
        np.subtract(gr * ur, gt * uc, out=jac[:, 1])
        np.add(gr * uc, gt * ur, out=jac[:, 2])
        np.multiply(gr, rho, out=jac[:, 3])
        np.multiply(gt, tau, out=jac[:, 4])
        jac[:, 5] = 1.0
        return jac


def _render(shape, rc, amp, sr, st, u, half) -> np.ndarray:
    """Sum of the fitted Gaussians (no offsets) as an image, each on a square window of
    half-width `half` around its rounded centre, or less where the Gaussian is below
    10⁻⁹ of its peak beyond."""
    out = np.zeros(shape)
    if len(rc) == 0:
        return out
    # exp(−6.5²/2) < 10⁻⁹: one very wide spot need not make every window wide
    h_own = np.minimum(half, np.ceil(6.5 * np.maximum(sr, st))).astype(np.int64)
    for h in np.unique(h_own):
        g = np.flatnonzero(h_own == h)
        h = int(h)
        _add_windows(out, rc[g], _gauss_windows(rc[g], amp[g], sr[g], st[g], u[g], h))
    return out


def _add_windows(out, rc, val):
    """Add (K, W, W) windows `val` centred on the rounded `rc` into the image `out`, in place."""
    w = val.shape[1]
    h = w // 2
    r0 = (np.rint(rc[:, 0]).astype(np.int64) - h).tolist()
    c0 = (np.rint(rc[:, 1]).astype(np.int64) - h).tolist()
    m, n = out.shape
    for k, (a, b) in enumerate(zip(r0, c0)):  # window by window: no index arrays
        if 0 <= a and a + w <= m and 0 <= b and b + w <= n:
            out[a:a + w, b:b + w] += val[k]
            continue
        ra, rb, ca, cb = max(a, 0), min(a + w, m), max(b, 0), min(b + w, n)
        if ra < rb and ca < cb:
            out[ra:rb, ca:cb] += val[k, ra - a:rb - a, ca - b:cb - b]


def find_spots(image, *, sigma_px: float = 2.0, min_snr: float = 5.0, mask=None, background=None,
               center_rc=None, saturation_level=None, split_pairs: bool = True,
               second_pass: bool = True) -> SpotTable:
    """Detect spots and measure them with sub-pixel Gaussian fits.

    Detection: the background-subtracted image is correlated with a Gaussian of
    the spot size (matched filter); local maxima whose response exceeds
    `min_snr` times its local noise are candidates. Each is fitted with an
    elliptical Gaussian (axes radial/tangential to `center_rc`) plus a local
    offset, weighted by the pixel variance (background noise plus shot noise of
    the spot). The fitted spots are subtracted and the residual searched again,
    so faint spots beside bright ones are found; neighbours are refitted with
    each other's models removed, and wide spots are tested for a close pair.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
    sigma_px : float, keyword-only
        Expected Gaussian σ of a spot, pixels (sets the filter and fit window).
    min_snr : float, keyword-only
        Detection threshold in units of the local noise of the matched-filter
        response (the detection significance, reported as ``snr``).
    mask : (M, N) array_like of bool, optional, keyword-only
        Valid pixels; masked pixels are never reported and never fitted.
    background : BackgroundEstimate, optional, keyword-only
        Default: :func:`estimate_background` of the image on `mask`.
    center_rc : (row, col), optional, keyword-only
        Reference for radial/tangential widths; default the image centre.
    saturation_level : float, optional, keyword-only
        Full-scale value; default from an unsigned-integer dtype or a LoadedImage.
    split_pairs, second_pass : bool, keyword-only

    Returns
    -------
    SpotTable

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> r, c = np.mgrid[:96, :96]
    >>> img = 50 + 400 * np.exp(-((r - 40.3) ** 2 + (c - 55.7) ** 2) / 8.0)
    >>> t = find_spots(rng.poisson(img).astype(float), sigma_px=2.0)
    >>> print(len(t), bool(np.abs(t.rc - [40.3, 55.7]).max() < 0.15))   # bound 0.028 px
    1 True
    """
    sat = _saturation_of(image) if saturation_level is None else float(saturation_level)
    img = _as_float_image(image)
    shape = img.shape
    if not (0.3 <= sigma_px <= 30 and math.isfinite(sigma_px)):
        raise ParameterError(f"`sigma_px` must be between 0.3 and 30 px, got {sigma_px}.")
    if not (min_snr > 0 and math.isfinite(min_snr)):
        raise ParameterError(f"`min_snr` must be positive, got {min_snr}.")
    valid = _check_mask(mask, shape)
    centre = np.array([(shape[0] - 1) / 2, (shape[1] - 1) / 2]) if center_rc is None else \
        np.asarray(center_rc, dtype=np.float64).reshape(2)
    bg = estimate_background(img, valid) if background is None else background
    if not isinstance(bg, BackgroundEstimate):
        raise ParameterError(f"`background` must be a BackgroundEstimate, got {type(bg).__name__}.")
    if not valid.any():
        return _empty_table(centre)
    noise = np.maximum(bg.noise, 1e-6)
    gain = bg.gain_adu
    res = np.where(valid, img - bg.background, 0.0).astype(np.float32)
    ok_fit = valid if sat is None else valid & (img < sat - 0.5)
    knorm = _gauss_kernel_norm(sigma_px)
    half = max(3, int(math.ceil(3.0 * sigma_px)))
    fitter = _Fitter(half)
    noise_f = (noise * knorm).astype(np.float32)

    # pass 1
    f1 = _matched(res, sigma_px)
    s1 = f1 / noise_f
    cand = _maxima(s1, min_snr, valid)
    spots = _fit_pass1(fitter, res, noise, ok_fit, valid, cand, s1, f1, centre, gain, sigma_px, shape, half)
    if gain is None and len(spots["rc"]):
        # no variance law from the background: measure it on the first fits, then refit those
        # with the new weights (detection does not use it; the residual search below does)
        g = _gain_from_spots(fitter, res, noise, ok_fit, spots, half, min_spots=3)  # a blend or two is outvoted
        if g is not None:
            gain, bg = g, dataclasses.replace(bg, gain_adu=g)
            spots = _refit_weighted(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape,
                                    half, crowded_too=not second_pass)
    hints = np.full((len(spots["rc"]), 3), np.nan)  # (row, col, amplitude) of a possible companion
    if second_pass and len(spots["rc"]):
        # pass 2: the matched-filter residual after removing every fitted spot. A Gaussian
        # filtered by a Gaussian is a Gaussian, so the filtered models are drawn directly.
        good = (spots["flags"] & FLAG_FIT_FAILED) == 0
        sub = _take(spots, good)
        sr2, st2 = np.hypot(sub["sr"], sigma_px), np.hypot(sub["st"], sigma_px)
        hf = max(half, int(math.ceil(3.5 * float(np.max(np.maximum(sr2, st2), initial=sigma_px)))))
        fm = _render(shape, sub["rc"], sub["amp"] * sub["sr"] * sub["st"] / (sr2 * st2), sr2, st2, sub["u"], hf)
        # model errors (≈ 3 % of the model) and the spot's own shot noise add variance
        sq = sub["sr"] / math.sqrt(2), sub["st"] / math.sqrt(2)
        sq2, tq2 = np.hypot(sq[0], sigma_px), np.hypot(sq[1], sigma_px)
        fm2 = _render(shape, sub["rc"], (0.03 * sub["amp"]) ** 2 * sq[0] * sq[1] / (sq2 * tq2), sq2, tq2,
                      sub["u"], hf)
        extra = fm2 + (gain * np.clip(fm, 0, None) if gain else 0.0)
        noise2_f = (knorm * np.sqrt(noise**2 + extra)).astype(np.float32)
        s2 = (f1 - fm) / noise2_f
        cand2 = _maxima(s2, min_snr, valid)
        if len(cand2):
            from scipy.spatial import cKDTree

            d, near = cKDTree(spots["rc"]).query(cand2, k=1)
            # residual peaks right beside a spot mean that spot may be a blend: test it as a pair,
            # starting the second member at the residual peak
            blend = d <= 3.0 * sigma_px
            spots["flags"][near[blend]] |= _FLAG_BLEND
            pairs_b = sorted(zip(cand2[blend].tolist(), near[blend].tolist()), key=lambda t: s2[t[0][0], t[0][1]])
            for (r, c), i in pairs_b:  # the strongest residual peak of a spot is written last
                hints[i] = (r, c, 2.0 * max(float(f1[r, c] - fm[r, c]), 0.0))
            cand2 = cand2[~blend]
        if len(cand2):
            mdl = _render(shape, sub["rc"], sub["amp"], sub["sr"], sub["st"], sub["u"], half)
            new = _fit_candidates(fitter, res - mdl, noise, ok_fit, valid, cand2, s2, centre, gain, sigma_px,
                                  mdl)
            spots = _concat(spots, new)
            hints = np.vstack([hints, np.full((len(new["rc"]), 3), np.nan)])
        spots = _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half,
                                  sweeps=60)
    if split_pairs and len(spots["rc"]):
        spots = _split_pairs(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half,
                             min_snr, hints)
    spots = _dedupe(spots, 0.75 * sigma_px)
    if gain is None and len(spots["rc"]):
        # too few clean first fits: measure it on the final (unsplit) spots and measure again
        g = _gain_from_spots(fitter, res, noise, ok_fit, _take(spots, (spots["flags"] & FLAG_SPLIT) == 0), half)
        if g is not None:
            return find_spots(img, sigma_px=sigma_px, min_snr=min_snr, mask=valid,
                              background=dataclasses.replace(bg, gain_adu=g), center_rc=centre,
                              saturation_level=sat, split_pairs=split_pairs, second_pass=second_pass)
    return _table(spots, img, bg, sat, valid, centre, sigma_px)


def _unit_radial(rc, centre):
    v = rc - centre[None]
    nrm = np.hypot(v[:, 0], v[:, 1])
    u = np.where(nrm[:, None] > 1e-9, v / np.maximum(nrm, 1e-9)[:, None], np.array([[1.0, 0.0]]))
    return u


def _fit_candidates(fitter, res, noise, ok_fit, valid, cand, snr_map, centre, gain, sigma_px, others=None):
    cand = np.asarray(cand, dtype=np.float64).reshape(-1, 2)
    k = len(cand)
    if k == 0:
        return _spots_dict(np.zeros((0, 2)), *(np.zeros(0) for _ in range(6)), np.zeros((0, 2)),
                           np.zeros((0, 2)), np.zeros(0, np.uint8))
    res64 = res.astype(np.float64) if res.dtype != np.float64 else res
    arrays = [res64, noise, ok_fit, valid] + ([others] if others is not None else [])
    r0, c0, inside, (data, nz, okp, vp, *om), _ = fitter.patches(arrays, cand)
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(om[0], 0.0, None) if (gain and om) else 0.0)
    u = _unit_radial(cand, centre)
    h = fitter.half
    amp0 = np.maximum(data[:, h, h], 1e-3)
    p = np.column_stack([amp0, np.zeros(k), np.zeros(k), np.full(k, math.log(sigma_px)),
                         np.full(k, math.log(sigma_px)), np.zeros(k)])
    p, cov, rchi2, _ = fitter.fit(data, nz2, okp, p, u, gain)
    return _from_fit(p, cov, r0, c0, u, snr_map[r0, c0], vp & inside, okp, sigma_px, h, cand)


def _fit_pass1(fitter, res, noise, ok_fit, valid, cand, s1, f1, centre, gain, sigma_px, shape, half):
    """Fit isolated candidates alone; candidates sharing a window start from the filter
    peaks and are fitted with each other's models removed."""
    cand = np.asarray(cand).reshape(-1, 2)
    crowded = np.zeros(len(cand), bool)
    if len(cand) > 1:
        amp = 2.0 * np.maximum(f1[cand[:, 0], cand[:, 1]], 0.0)
        idx = _crowded(cand.astype(float), amp, noise[cand[:, 0], cand[:, 1]], sigma_px, half)
        crowded[idx] = True
    spots = _fit_candidates(fitter, res, noise, ok_fit, valid, cand[~crowded], s1, centre, gain, sigma_px, None)
    if crowded.any():
        cc = cand[crowded].astype(np.float64)
        k = len(cc)
        ri, ci = cand[crowded, 0], cand[crowded, 1]
        init = _spots_dict(cc, 2.0 * np.maximum(f1[ri, ci], 1e-3), np.full(k, sigma_px), np.full(k, sigma_px),
                           np.zeros(k), s1[ri, ci].astype(float), np.zeros(k), _unit_radial(cc, centre),
                           np.full((k, 2), np.nan), np.zeros(k, np.uint8))
        spots = _concat(spots, init)
        spots = _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half,
                                  sweeps=60)
    return spots


def _crowded(rc, amp, nz, sigma_px, half) -> np.ndarray:
    """Indices of spots whose fit window reaches a neighbour's light (down to 0.1 noise)."""
    from scipy.spatial import cKDTree

    if len(rc) < 2:
        return np.zeros(0, int)
    reach = sigma_px * np.sqrt(2.0 * np.log(np.maximum(np.asarray(amp) / (0.1 * np.maximum(nz, 1e-12)), 1.0)))
    reach = np.minimum(reach, 12.0 * sigma_px)
    pairs = cKDTree(rc).query_pairs(float(half * 1.5 + reach.max()) + 1.0, output_type="ndarray")
    if len(pairs) == 0:
        return np.zeros(0, int)
    d = np.hypot(*(rc[pairs[:, 0]] - rc[pairs[:, 1]]).T)
    near = (d <= 2.0 * half + 1) | (d <= half * 1.5 + np.maximum(reach[pairs[:, 0]], reach[pairs[:, 1]]))
    return np.unique(pairs[near].ravel())


def _refit_weighted(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half, *,
                    crowded_too: bool):
    """Refit spots from their current solution after the weights changed (a new `gain`).

    Spots alone in their window are refitted in one batch; crowded ones only with
    `crowded_too` (else the joint refit that follows does it).
    """
    spots = {k: v.copy() for k, v in spots.items()}
    k = len(spots["rc"])
    ri = np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, shape[0] - 1)
    ci = np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, shape[1] - 1)
    nz_c = noise[ri, ci]
    alone = np.ones(k, bool)
    alone[_crowded(spots["rc"], spots["amp"], nz_c, sigma_px, half)] = False
    if alone.any():
        ids = np.flatnonzero(alone)
        # the model image only needs the spots themselves: nobody else reaches their windows
        mdl = _render(shape, spots["rc"][ids], spots["amp"][ids], spots["sr"][ids], spots["st"][ids],
                      spots["u"][ids], half)
        _refit_batch(fitter, res, noise, ok_fit, valid, spots, ids, nz_c[ids], mdl, gain, sigma_px, shape, half,
                     1e-3)
    if crowded_too and not alone.all():
        spots = _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half,
                                  sweeps=60)
    return spots


def _gain_from_spots(fitter, res, noise, ok_fit, spots, half, min_spots: int = 1):
    """Variance per unit signal from the fit residuals of bright spots: r² − noise² ≈ g · model;
    None from fewer than `min_spots` usable spots."""
    good = ((spots["flags"] & FLAG_FIT_FAILED) == 0)
    if good.sum() == 0:
        return None
    sub = _take(spots, good)
    mdl = _render(noise.shape, sub["rc"], sub["amp"], sub["sr"], sub["st"], sub["u"], half)
    _, _, inside, (data, own, nz, okp), _ = fitter.patches([res - mdl, mdl, noise, ok_fit], sub["rc"])
    r2 = (data - sub["off"][:, None, None]) ** 2 - nz**2
    use = okp & inside & (own > 5.0 * nz)
    if use.sum() < 30:
        return None
    # one estimate per spot, then the median: a badly fitted blend cannot dominate
    num = np.sum(np.where(use, own * r2, 0.0), axis=(1, 2))
    den = np.sum(np.where(use, own * own, 0.0), axis=(1, 2))
    ok = use.sum(axis=(1, 2)) >= 5
    if ok.sum() < max(min_spots, 1):
        return None
    per = num[ok] / den[ok]
    g = float(np.median(per) if len(per) >= 3 else np.min(per))
    return g if g > 0 else None


def _spots_dict(rc, amp, sr, st, off, snr, rchi2, u, sig, flags):
    return {"rc": rc, "amp": amp, "sr": sr, "st": st, "off": off, "snr": snr, "rchi2": rchi2, "u": u,
            "sig": sig, "flags": flags}


def _from_fit(p, cov, r0, c0, u, snr, vpatch, okp, sigma_px, h, cand, flags0=None):
    k = len(p)
    rc = np.column_stack([r0 + p[:, 1], c0 + p[:, 2]])
    sr, st = np.exp(p[:, 3]), np.exp(p[:, 4])
    with np.errstate(invalid="ignore"):
        sig = np.sqrt(np.abs(np.column_stack([cov[:, 1, 1], cov[:, 2, 2]])))
    # near a masked pixel: any invalid pixel within 3 σ of the centre
    d2 = (fitter_grid(h)[0][None] - p[:, 1, None, None]) ** 2 + (fitter_grid(h)[1][None] - p[:, 2, None, None]) ** 2
    near = np.any(~vpatch & (d2 <= (3 * sigma_px) ** 2), axis=(1, 2))
    # a spot cut by a mask edge may have its centre beyond the edge (it is then not reported)
    far = np.hypot(p[:, 1], p[:, 2]) > 0.5 * h
    failed = ~np.all(np.isfinite(p), axis=1) | (p[:, 0] <= 0) | (far & ~near) | \
        (np.hypot(p[:, 1], p[:, 2]) > h) | (np.maximum(sr, st) > 4.0 * sigma_px) | ~np.all(np.isfinite(sig), axis=1)
    flags = np.zeros(k, np.uint8) if flags0 is None else flags0.copy()
    flags[failed] |= FLAG_FIT_FAILED
    rc = np.where(failed[:, None], cand, rc)
    sr = np.where(failed, sigma_px, sr)
    st = np.where(failed, sigma_px, st)
    sig = np.where(failed[:, None], 0.5, sig)
    amp = np.where(failed, np.maximum(p[:, 0], 0.0), p[:, 0])
    flags[near] |= FLAG_NEAR_EDGE
    return _spots_dict(rc, amp, sr, st, p[:, 5], np.asarray(snr, float), np.zeros(k), u, sig, flags)


_GRIDS: dict = {}


def fitter_grid(h):
    if h not in _GRIDS:
        o = np.arange(-h, h + 1, dtype=np.float64)
        _GRIDS[h] = np.meshgrid(o, o, indexing="ij")
    return _GRIDS[h]


def _concat(a, b):
    return {k: np.concatenate([a[k], b[k]]) for k in a}


def _take(a, idx):
    return {k: v[idx] for k, v in a.items()}


def _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half, sweeps=2,
                      tol_px: float = 1e-3, max_refits: int = 6, max_fails: int = 2):
    """Refit spots that share a window, each with the others' models removed.

    Block Gauss–Seidel over the crowded spots: spots whose windows overlap are
    never in the same batch (a greedy colouring of the overlap graph), so every
    batch is fitted against its neighbours' newest models and pairs cannot
    swap back and forth from one sweep to the next. The model image is kept
    current by redrawing only the spots that changed. After a sweep only spots
    that changed, or that have a neighbour that changed, are fitted again; a
    spot has changed when its centre moved by `tol_px` or more, or its model by
    more than 2 % of the local noise. At most `sweeps` sweeps, and at most
    `max_refits` fits of any one spot (a spot that still changes after that
    many, typically a false detection on a sharp edge, keeps its last fit);
    a spot whose fit failed `max_fails` times is not fitted again.
    """
    if len(spots["rc"]) < 2:
        return spots
    shp = noise.shape
    ri = np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, shp[0] - 1)
    ci = np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, shp[1] - 1)
    crowded = _crowded(spots["rc"], spots["amp"], noise[ri, ci], sigma_px, half)
    if len(crowded) == 0:
        return spots
    spots = {k: v.copy() for k, v in spots.items()}
    mdl = _render(shape, spots["rc"], spots["amp"], spots["sr"], spots["st"], spots["u"], half)
    nb_ptr, nb_idx = _overlap_graph(spots["rc"][crowded], half)
    colour = _greedy_colours(nb_ptr, nb_idx)
    nz_c = noise[ri[crowded], ci[crowded]]
    active = np.ones(len(crowded), bool)
    refits = np.zeros(len(crowded), np.int64)
    fails = np.zeros(len(crowded), np.int64)
    for _ in range(sweeps):
        active &= (refits < max_refits) & (fails < max_fails)
        if not active.any():
            break
        changed = np.zeros(len(crowded), bool)
        for c in np.unique(colour[active]):
            batch = np.flatnonzero(active & (colour == c))
            changed[batch] = _refit_batch(fitter, res, noise, ok_fit, valid, spots, crowded[batch], nz_c[batch],
                                          mdl, gain, sigma_px, shape, half, tol_px)
        refits[active] += 1
        fails[active] += (spots["flags"][crowded[active]] & FLAG_FIT_FAILED) > 0
        active = changed.copy()
        active[nb_idx[np.repeat(changed, np.diff(nb_ptr))]] = True
    return spots


def _overlap_graph(rc, half):
    """CSR neighbour lists (ptr, idx) of spots whose (2 half + 1)² windows overlap, with
    3 px to spare for centres that move during the fits."""
    from scipy.spatial import cKDTree

    k = len(rc)
    pairs = cKDTree(rc).query_pairs(2.0 * half + 3.0, p=np.inf, output_type="ndarray") if k > 1 else \
        np.zeros((0, 2), int)
    a = np.concatenate([pairs[:, 0], pairs[:, 1]])
    b = np.concatenate([pairs[:, 1], pairs[:, 0]])
    order = np.argsort(a, kind="stable")
    ptr = np.zeros(k + 1, np.int64)
    np.cumsum(np.bincount(a, minlength=k), out=ptr[1:])
    return ptr, b[order]


def _greedy_colours(ptr, idx):
    """A colour per node such that no two neighbours share one (greedy, in index order)."""
    k = len(ptr) - 1
    col = np.full(k, -1, np.int64)
    for i in range(k):
        used = col[idx[ptr[i]:ptr[i + 1]]]
        used = used[used >= 0]
        if used.size == 0:
            col[i] = 0
            continue
        free = np.ones(used.max() + 2, bool)
        free[used] = False
        col[i] = int(np.argmax(free))
    return col


def _gauss_windows(rc, amp, sr, st, u, half):
    """(K, W, W) values of the spots' Gaussians on (2 half + 1)² windows around the rounded
    centres (axes σr along u and σt across it)."""
    o = np.arange(-half, half + 1)
    x = (np.rint(rc[:, 0]) - rc[:, 0])[:, None] + o[None, :]  # (K, W) row offsets from the centre
    y = (np.rint(rc[:, 1]) - rc[:, 1])[:, None] + o[None, :]
    # ρ²/σr² + τ²/σt² = a x² + 2 b x y + c y² with ρ = x ur + y uc, τ = −x uc + y ur
    ur, uc = u[:, 0], u[:, 1]
    ir2, it2 = 1.0 / np.square(sr), 1.0 / np.square(st)
    a = ur * ur * ir2 + uc * uc * it2
    b = ur * uc * (ir2 - it2)
    c = uc * uc * ir2 + ur * ur * it2
    arg = (-b[:, None] * x)[:, :, None] * y[:, None, :]
    arg += (-0.5 * a[:, None] * x * x)[:, :, None]
    arg += (-0.5 * c[:, None] * y * y)[:, None, :]
    val = np.exp(arg, out=arg)
    val *= np.asarray(amp, dtype=np.float64)[:, None, None]
    return val


def _refit_batch(fitter, res, noise, ok_fit, valid, spots, ids, nz_c, mdl, gain, sigma_px, shape, half, tol_px):
    """Refit spots `ids` (no two overlapping) against the current model image `mdl`, write the
    results into `spots` and redraw them in `mdl`; True where a spot changed."""
    sub = _take(spots, ids)
    own = _render_patches(fitter, sub, half)
    r0, c0, inside, (rp, nz, okp, vp, mp), _ = fitter.patches([res, noise, ok_fit, valid, mdl], sub["rc"])
    data = rp - mp + own
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(mp - own, 0.0, None) if gain else 0.0)  # the neighbours' shot noise
    p = np.column_stack([sub["amp"], sub["rc"][:, 0] - r0, sub["rc"][:, 1] - c0, np.log(sub["sr"]),
                         np.log(sub["st"]), sub["off"]])
    keep_failed = (sub["flags"] & FLAG_FIT_FAILED) > 0
    p, cov, _, _ = fitter.fit(data, nz2, okp, p, sub["u"], gain, n_iter=10, restart=True)
    new = _from_fit(p, cov, r0, c0, sub["u"], sub["snr"], vp & inside, okp, sigma_px, half, sub["rc"],
                    flags0=(sub["flags"] & ~np.uint8(FLAG_FIT_FAILED | FLAG_NEAR_EDGE)).astype(np.uint8))
    failed = (new["flags"] & FLAG_FIT_FAILED) > 0
    new["rc"] = np.where((keep_failed & failed)[:, None], sub["rc"], new["rc"])
    # a failed fit says little about the height: the neighbours see the residual peak instead
    # (a fit that went negative still reports no light, as a failed first fit does)
    h = fitter.half
    new["amp"] = np.where(failed & (new["amp"] > 0), np.maximum(data[:, h, h], 0.0), new["amp"])
    for key in spots:
        spots[key][ids] = new[key]
    moved = np.hypot(*(new["rc"] - sub["rc"]).T)
    # largest change of each model: amplitude, shift (max slope 0.61 A/σ) and width (max 0.74 A Δlog σ)
    dmodel = np.abs(new["amp"] - sub["amp"]) + np.maximum(new["amp"], sub["amp"]) * (
        0.61 * moved / np.minimum(np.minimum(new["sr"], new["st"]), np.minimum(sub["sr"], sub["st"]))
        + 0.74 * np.maximum(np.abs(np.log(new["sr"] / sub["sr"])), np.abs(np.log(new["st"] / sub["st"]))))
    changed = (moved >= tol_px) | (dmodel > 0.02 * nz_c) | (new["flags"] != sub["flags"])
    if changed.any():
        o = _take(sub, changed)
        n = _take(new, changed)
        _add_windows(mdl, o["rc"], -_gauss_windows(o["rc"], o["amp"], o["sr"], o["st"], o["u"], half))
        _add_windows(mdl, n["rc"], _gauss_windows(n["rc"], n["amp"], n["sr"], n["st"], n["u"], half))
    return changed


def _render_at(fitter, sub, r0, c0):
    """(K, W, W) model of each spot (no offset) on windows centred at integer (r0, c0)."""
    x = fitter.dr[None] - (sub["rc"][:, 0] - r0)[:, None, None]
    y = fitter.dc[None] - (sub["rc"][:, 1] - c0)[:, None, None]
    ur, uc = sub["u"][:, 0, None, None], sub["u"][:, 1, None, None]
    rho, tau = x * ur + y * uc, -x * uc + y * ur
    return sub["amp"][:, None, None] * np.exp(-0.5 * (rho**2 / sub["sr"][:, None, None] ** 2
                                                      + tau**2 / sub["st"][:, None, None] ** 2))


def _render_patches(fitter, sub, half):
    """(K, W, W) model of each spot on its own window (no offset)."""
    rc = sub["rc"]
    r0, c0 = np.rint(rc[:, 0]), np.rint(rc[:, 1])
    x = fitter.dr[None] - (rc[:, 0] - r0)[:, None, None]
    y = fitter.dc[None] - (rc[:, 1] - c0)[:, None, None]
    ur, uc = sub["u"][:, 0, None, None], sub["u"][:, 1, None, None]
    rho, tau = x * ur + y * uc, -x * uc + y * ur
    return sub["amp"][:, None, None] * np.exp(-0.5 * (rho**2 / sub["sr"][:, None, None] ** 2
                                                      + tau**2 / sub["st"][:, None, None] ** 2))


def _split_pairs(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half, min_snr,
                 hints=None):
    """Replace wide, bright spots by two spots when a two-Gaussian fit is much better."""
    good = (spots["flags"] & FLAG_FIT_FAILED) == 0
    if good.sum() == 0:
        return spots
    s_ref = float(np.median(np.sqrt(spots["sr"][good] * spots["st"][good]))) if good.sum() >= 5 else sigma_px
    s_ref = min(max(s_ref, 0.5 * sigma_px), 2.0 * sigma_px)
    smaj = np.maximum(spots["sr"], spots["st"])
    smin = np.minimum(spots["sr"], spots["st"])
    nz_c = noise[np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, shape[0] - 1),
                 np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, shape[1] - 1)]
    pk = spots["amp"] / nz_c
    wide = (smaj > 1.3 * s_ref) & (smaj > 1.2 * smin)
    cand = np.flatnonzero(good & (wide | ((spots["flags"] & _FLAG_BLEND) > 0)) & (pk > 2.0 * min_snr))
    if len(cand) == 0:
        return spots
    sub = _take(spots, cand)
    hint = np.full((len(cand), 3), np.nan) if hints is None else hints[cand]
    has = np.all(np.isfinite(hint), axis=1)
    # window: on the spot, or halfway to its companion's residual peak
    # (an elongated spot is more likely an even pair about its own centre: keep its window)
    shift = has & ~wide[cand]
    win = np.where(shift[:, None], 0.5 * (sub["rc"] + np.where(has[:, None], hint[:, :2], 0.0)), sub["rc"])
    mdl = _render(shape, spots["rc"], spots["amp"], spots["sr"], spots["st"], spots["u"], half)
    r0, c0, inside, (data, nz, okp, vp, mp), _ = fitter.patches([res - mdl, noise, ok_fit, valid, mdl], win)
    own = _render_at(fitter, sub, r0, c0)
    data = data + own
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(mp - own, 0.0, None) if gain else 0.0)
    k = len(cand)
    # one-spot chi² with the current parameters
    w1 = np.where(okp, 1.0 / (nz2 + (gain * np.clip(own, 0, None) if gain else 0.0)), 0.0)
    chi1 = np.sum(w1 * (data - own - sub["off"][:, None, None]) ** 2, axis=(1, 2))
    # two spots of common width s along the major axis
    along_r = sub["sr"] >= sub["st"]
    axis = np.where(along_r[:, None], sub["u"], np.column_stack([-sub["u"][:, 1], sub["u"][:, 0]]))
    sep = np.sqrt(np.maximum(smaj[cand] ** 2 - s_ref**2, 0.25)) * 1.0
    dr0, dc0 = sub["rc"][:, 0] - r0, sub["rc"][:, 1] - c0
    q = np.column_stack([sub["amp"] * 0.6, dr0 + axis[:, 0] * sep, dc0 + axis[:, 1] * sep,
                         sub["amp"] * 0.6, dr0 - axis[:, 0] * sep, dc0 - axis[:, 1] * sep,
                         np.full(k, math.log(s_ref)), sub["off"]])
    q, chi2 = _fit_pair(fitter, data, nz2, okp, q, gain)
    if has.any():  # also try the spot itself plus its companion at the residual peak; keep the better
        qh = np.column_stack([sub["amp"][has], dr0[has], dc0[has], np.maximum(hint[has, 2], 1e-3),
                              hint[has, 0] - r0[has], hint[has, 1] - c0[has], np.full(int(has.sum()),
                              math.log(s_ref)), sub["off"][has]])
        qh, ch = _fit_pair(fitter, data[has], nz2[has], okp[has], qh, gain)
        take = np.isfinite(ch) & (ch < chi2[has])
        idx = np.flatnonzero(has)[take]
        q[idx], chi2[idx] = qh[take], ch[take]
    s2 = np.exp(q[:, 6])
    a1, a2 = q[:, 0], q[:, 3]
    d = np.hypot(q[:, 1] - q[:, 4], q[:, 2] - q[:, 5])
    sig_pair = np.minimum(a1, a2) / nz[:, half, half] * math.sqrt(math.pi) * s2  # matched-filter significance
    accept = (chi1 - chi2 > np.maximum(30.0, 0.15 * chi1)) & (sig_pair >= min_snr) & (d > 0.8 * s2) & \
        (d < 2 * half) & np.isfinite(chi2) & (s2 < 1.5 * s_ref)
    if not accept.any():
        return spots
    keep = np.ones(len(spots["rc"]), bool)
    keep[cand[accept]] = False
    idx = np.flatnonzero(accept)
    new_rc = np.vstack([np.column_stack([r0[idx] + q[idx, 1], c0[idx] + q[idx, 2]]),
                        np.column_stack([r0[idx] + q[idx, 4], c0[idx] + q[idx, 5]])])
    m = len(idx)
    base = _take(sub, np.concatenate([idx, idx]))
    new = dict(base)
    new["rc"] = new_rc
    new["amp"] = np.concatenate([a1[idx], a2[idx]])
    new["sr"] = new["st"] = np.concatenate([s2[idx], s2[idx]])
    new["u"] = _unit_radial(new_rc, centre)
    new["sig"] = np.full((2 * m, 2), np.nan)
    new["flags"] = (base["flags"] | FLAG_SPLIT).astype(np.uint8)
    spots = _concat(_take(spots, keep), new)
    return spots


def _fit_pair(fitter, data, noise2, okp, q, gain, n_iter=30):
    """LM fit of two round Gaussians of common width plus offset: q = [A1, r1, c1, A2, r2, c2, log s, b]."""
    dr, dc = fitter.dr[None], fitter.dc[None]
    k = len(q)
    lam = np.full(k, 1e-2)

    def model(q):
        a1, r1, c1, a2, r2, c2, ls, b = (q[:, i, None, None] for i in range(8))
        is2 = np.exp(-2 * ls)
        x1, y1, x2, y2 = dr - r1, dc - c1, dr - r2, dc - c2
        e1 = np.exp(-0.5 * (x1 * x1 + y1 * y1) * is2)
        e2 = np.exp(-0.5 * (x2 * x2 + y2 * y2) * is2)
        return a1 * e1 + a2 * e2 + b, (a1, a2, e1, e2, x1, y1, x2, y2, is2)

    def weights(mdl, q):
        v = noise2 + (gain * np.clip(mdl - q[:, 7, None, None], 0, None) if gain else 0.0)
        return np.where(okp, 1.0 / v, 0.0)

    mdl, _ = model(q)
    w = weights(mdl, q)
    chi2 = np.sum(w * (data - mdl) ** 2, axis=(1, 2))
    for _ in range(n_iter):
        mdl, (a1, a2, e1, e2, x1, y1, x2, y2, is2) = model(q)
        jac = np.stack([e1, a1 * e1 * x1 * is2, a1 * e1 * y1 * is2, e2, a2 * e2 * x2 * is2, a2 * e2 * y2 * is2,
                        (a1 * e1 * (x1 * x1 + y1 * y1) + a2 * e2 * (x2 * x2 + y2 * y2)) * is2,
                        np.ones_like(e1)], axis=-1).reshape(k, -1, 8)
        ww = w.reshape(k, -1)
        res = (data - mdl).reshape(k, -1)
        jtw = jac * ww[:, :, None]
        hm = np.einsum("kpi,kpj->kij", jtw, jac)
        g = np.einsum("kpi,kp->ki", jtw, res)
        diag = np.einsum("kii->ki", hm)
        hd = hm + (lam[:, None] * np.maximum(diag, 1e-12))[:, :, None] * np.eye(8)[None]
        try:
            step = np.linalg.solve(hd + 1e-12 * np.eye(8)[None], g[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            break
        step[:, [1, 2, 4, 5]] = np.clip(step[:, [1, 2, 4, 5]], -1.5, 1.5)
        step[:, 6] = np.clip(step[:, 6], -0.5, 0.5)
        qn = q + step
        mn, _ = model(qn)
        cn = np.sum(w * (data - mn) ** 2, axis=(1, 2))
        better = np.isfinite(cn) & (cn <= chi2)
        q = np.where(better[:, None], qn, q)
        lam = np.where(better, np.maximum(lam / 5, 1e-7), lam * 10)
        mdl, _ = model(q)
        w = weights(mdl, q)
        chi2 = np.sum(w * (data - mdl) ** 2, axis=(1, 2))
    return q, chi2


def _dedupe(spots, dmin):
    from scipy.spatial import cKDTree

    if len(spots["rc"]) < 2:
        return spots
    pairs = cKDTree(spots["rc"]).query_pairs(dmin)
    if not pairs:
        return spots
    drop = np.zeros(len(spots["rc"]), bool)
    for i, j in pairs:
        drop[j if spots["amp"][i] >= spots["amp"][j] else i] = True
    return _take(spots, ~drop)


def _table(spots, img, bg, sat, valid, centre, sigma_px) -> SpotTable:
    rc = spots["rc"]
    shape = img.shape
    inside = (rc[:, 0] >= -0.5) & (rc[:, 0] <= shape[0] - 0.5) & (rc[:, 1] >= -0.5) & (rc[:, 1] <= shape[1] - 0.5)
    ri = np.clip(np.rint(rc[:, 0]).astype(int), 0, shape[0] - 1)
    ci = np.clip(np.rint(rc[:, 1]).astype(int), 0, shape[1] - 1)
    keep = inside & valid[ri, ci] & (spots["amp"] > 0)
    spots = _take(spots, keep)
    rc, ri, ci = spots["rc"], ri[keep], ci[keep]
    flags = spots["flags"] & np.uint8(0x7F)
    if sat is not None and len(rc):
        h = max(1, int(round(1.5 * sigma_px)))
        o = np.arange(-h, h + 1)
        rr = np.clip(ri[:, None, None] + o[None, :, None], 0, shape[0] - 1)
        cc = np.clip(ci[:, None, None] + o[None, None, :], 0, shape[1] - 1)
        flags[np.max(img[rr, cc], axis=(1, 2)) >= sat - 0.5] |= FLAG_SATURATED
    nz = bg.noise[ri, ci]
    amp, sr, st = spots["amp"], spots["sr"], spots["st"]
    sig = spots["sig"]
    # split spots get their uncertainty from the refit; fall back to a shot/background estimate
    miss = ~np.all(np.isfinite(sig), axis=1)
    if miss.any():
        sig[miss] = (np.sqrt(sr * st) / np.maximum(amp / nz, 1e-3))[miss, None] * np.ones((1, 2))
    return SpotTable(rc=rc, sigma_rc=sig, intensity=2 * math.pi * amp * sr * st, amplitude=amp,
                     peak_snr=amp / np.maximum(nz, 1e-12), snr=spots["snr"], fwhm_radial_px=_FWHM * sr,
                     fwhm_tangential_px=_FWHM * st, background=bg.background[ri, ci] + spots["off"],
                     flags=flags, center_rc=np.asarray(centre, float))


# --------------------------------------------------------------------------- whole image


@dataclass(frozen=True, eq=False)
class Measurement:
    """Everything measured on one frame by :func:`measure_image`.

    Attributes
    ----------
    spots : SpotTable
    screen : ScreenMask
    gun : ShadowMask
    background : BackgroundEstimate
    valid : (M, N) ndarray of bool
        Pixels searched (screen without the shadow).
    sigma_px : float
        Spot σ used by the filter (given, or measured from the first pass).
    """

    spots: SpotTable
    screen: ScreenMask
    gun: ShadowMask
    background: BackgroundEstimate
    valid: np.ndarray
    sigma_px: float

    def to_dict(self) -> dict:
        return {"spots": self.spots.to_records(), "screen": self.screen.to_dict(), "gun": self.gun.to_dict(),
                "sigma_px": float(self.sigma_px),
                "gain_adu": self.background.gain_adu, "dark_level": self.background.dark_level}


def measure_image(image, *, sigma_px: float | None = 2.0, min_snr: float = 5.0, screen=None, gun=None,
                  center_rc=None, saturation_level=None, block_px: int | None = None, **spot_kw) -> Measurement:
    """Screen → gun shadow → background → spots, in one call.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
    sigma_px : float or None, keyword-only
        Spot σ; None measures it from a first detection pass.
    min_snr : float, keyword-only
    screen : ScreenMask, dict or None, keyword-only
        A ScreenMask, or keyword arguments for :func:`find_screen` (e.g.
        ``{"circle_xyr": (x, y, r)}``); None finds it.
    gun : ShadowMask, dict or None, keyword-only
        Likewise for :func:`find_gun_shadow` (``{"disk_xyr": ..., "arm_angle_deg": ...}``).
    center_rc : (row, col), optional
        Reference for radial/tangential widths; default the gun-disk centre
        when found, else the screen centre.
    block_px : int, optional, keyword-only
        Background block size; default one 16th of the shorter side, 16–32 px (a
        small frame's diffuse background varies on a shorter scale in pixels).

    Returns
    -------
    Measurement

    Examples
    --------
    >>> rng = np.random.default_rng(2)
    >>> r, c = np.mgrid[:160, :160]
    >>> screen = (r - 80) ** 2 + (c - 80) ** 2 < 70**2
    >>> lam = 5 + (40 + 300 * np.exp(-((r - 60.2) ** 2 + (c - 90.6) ** 2) / 8)) * screen
    >>> m = measure_image(rng.poisson(lam).astype(float))
    >>> print(m.screen.source, len(m.spots), np.round(m.spots.xy, 1).tolist())
    auto 1 [[90.6, 60.2]]
    """
    sat = _saturation_of(image) if saturation_level is None else float(saturation_level)
    img = _as_float_image(image)
    if isinstance(screen, ScreenMask):
        scr = screen
    else:
        scr = find_screen(img, **(screen or {}))
    if isinstance(gun, ShadowMask):
        gsh = gun
    else:
        gsh = find_gun_shadow(img, scr, **(gun or {}))
    valid = scr.mask & ~gsh.mask
    if valid.sum() < 64:
        raise ImageError("The screen minus the gun shadow leaves fewer than 64 pixels to search.")
    dark = None
    if scr.source != "frame":
        a, b = scr.semi_axes_px
        dark = ~disk_mask(img.shape, scr.center_rc, 0, axes_px=(a + 3 + scr.margin_px, b + 3 + scr.margin_px),
                          angle_deg=scr.angle_deg) & ~gsh.mask
        if dark.sum() < 200:
            dark = None
    if center_rc is None:
        center_rc = gsh.center_rc if gsh.center_rc is not None else scr.center_rc
    if block_px is None:
        block_px = int(min(max(min(img.shape) // 16, 16), 32))
    bg = estimate_background(img, valid, block_px=block_px, dark_mask=dark)
    s = 2.0 if sigma_px is None else float(sigma_px)
    # detection only: where the spots are and roughly how bright
    res = np.where(valid, img - bg.background, 0.0).astype(np.float32)
    rc1, amp1, snr1 = _detect(res, bg, valid, s, min_snr)
    if sigma_px is None:  # the spot size from the brightest isolated spots
        s_new = _sigma_from_bright(res, bg, valid, None if sat is None else img < sat - 0.5, rc1, snr1, s,
                                   np.asarray(center_rc, float))
        if s_new is not None:
            s = s_new
            if abs(math.log(s / 2.0)) > math.log(1.3):  # a filter matched to the real spot size
                rc1, amp1, snr1 = _detect(res, bg, valid, s, min_snr)
    # second background pass with the spots masked out, out to where a spot falls below ½ σ of noise
    excl = np.zeros(img.shape, bool)
    if len(rc1):
        nz = bg.noise[rc1[:, 0].astype(int), rc1[:, 1].astype(int)]
        rad = s * np.sqrt(2.0 * np.log(np.maximum(2.0 * amp1 / np.maximum(nz, 1e-9), 1.0))) + 1.0
        excl = _disks(img.shape, rc1, np.clip(rad, 2.5 * s, 12 * s))
    bg2 = estimate_background(img, valid, block_px=block_px, exclude=excl, dark_mask=dark) \
        if (valid & ~excl).sum() > 64 else bg
    spots = find_spots(img, sigma_px=s, min_snr=min_snr, mask=valid, background=bg2, center_rc=center_rc,
                       saturation_level=sat, **spot_kw)
    return Measurement(spots, scr, gsh, bg2, valid, s)


def _detect(res, bg, valid, s, min_snr):
    """Matched-filter maxima (row, col), rough amplitudes and detection SNR (no fitting)."""
    noise_f = np.maximum(bg.noise, 1e-6) * _gauss_kernel_norm(s)
    f1 = _matched(res, s)
    snr = f1 / noise_f
    rc = _maxima(snr, min_snr, valid)
    if not len(rc):
        return rc, np.zeros(0), np.zeros(0)
    return rc, 2.0 * f1[rc[:, 0], rc[:, 1]], snr[rc[:, 0], rc[:, 1]]


def _sigma_from_bright(res, bg, valid, unsaturated, rc, snr, s0, centre_rc, n_max: int = 40):
    """Median Gaussian σ (px) of up to `n_max` bright, isolated spots; None when fewer than 3 fit.

    Spots closer than 6 σ₀ to another detection are left out (their fits pull
    on each other); the window is the one :func:`find_spots` uses for σ₀.
    """
    if len(rc) < 3:
        return None
    from scipy.spatial import cKDTree

    d, _ = cKDTree(rc).query(rc, k=2)
    pick = np.flatnonzero((d[:, 1] > 6.0 * s0) & (snr > 15.0))
    pick = pick[np.argsort(-snr[pick])][:n_max]
    if len(pick) < 3:
        return None
    ok_fit = valid if unsaturated is None else valid & unsaturated
    half = max(3, int(math.ceil(3.0 * s0)))
    fit = _fit_candidates(_Fitter(half), res, np.maximum(bg.noise, 1e-6), ok_fit, valid, rc[pick].astype(float),
                          np.zeros(res.shape, np.float32), centre_rc, bg.gain_adu, s0)
    noise_at = bg.noise[rc[pick, 0], rc[pick, 1]]
    good = (fit["flags"] == 0) & (fit["amp"] > 10.0 * np.maximum(noise_at, 1e-9))
    if good.sum() < 3:
        return None
    return float(min(max(np.median(np.sqrt(fit["sr"][good] * fit["st"][good])), 0.5), 20.0))


def _disks(shape, rc, rad) -> np.ndarray:
    out = np.zeros(shape, bool)
    for (r, c), q in zip(rc, rad):
        h = int(math.ceil(q))
        r0, r1 = max(0, int(r) - h), min(shape[0], int(r) + h + 2)
        c0, c1 = max(0, int(c) - h), min(shape[1], int(c) + h + 2)
        if r0 >= r1 or c0 >= c1:
            continue
        yy, xx = np.ogrid[r0:r1, c0:c1]
        out[r0:r1, c0:c1] |= (yy - r) ** 2 + (xx - c) ** 2 <= q * q
    return out


# --------------------------------------------------------------------------- bounds


def localization_bound_px(photons, sigma_px, background_per_px, *, pixel_px: float = 1.0,
                          kind: str = "ml") -> np.ndarray:
    """Best attainable 1-D localisation error of a Gaussian spot on a pixel grid.

    s = spot σ, a = pixel size, N = photons, b² = background photons per pixel,
    s_a² = s² + a²/12.

    * ``"thompson"`` — Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002):
      ⟨Δx²⟩ = s_a²/N + 8π s⁴ b² / (a² N²).
    * ``"ls"`` — Mortensen et al., Nat. Methods 7, 377 (2010), least squares:
      Var = (s_a²/N) (16/9 + 8π s_a² b² / (N a²)).
    * ``"ml"`` — same paper, maximum likelihood (the Cramér–Rao bound):
      Var = (s_a²/N) / (−∫₀¹ t ln t / (t + τ) dt), τ = 2π s_a² b² / (N a²).

    Parameters
    ----------
    photons, sigma_px, background_per_px : float or ndarray (broadcast)
        b² in photons per pixel (add the read-noise variance in photons² for a camera).

    Returns
    -------
    ndarray of float64
        Standard deviation per coordinate, pixels.

    Examples
    --------
    >>> print(np.round([localization_bound_px(2000, 2.0, 10.0, kind=k) for k in ("thompson", "ls", "ml")], 5))
    [0.0552  0.06839 0.06181]
    """
    n = np.asarray(photons, dtype=np.float64)
    s = np.asarray(sigma_px, dtype=np.float64)
    b2 = np.asarray(background_per_px, dtype=np.float64)
    n, s, b2 = np.broadcast_arrays(n, s, b2)
    a = float(pixel_px)
    if np.any(n <= 0) or np.any(s <= 0) or np.any(b2 < 0) or a <= 0:
        raise ParameterError("Bound needs photons > 0, sigma_px > 0, background ≥ 0 and pixel_px > 0.")
    sa2 = s * s + a * a / 12.0
    if kind == "thompson":
        var = sa2 / n + 8 * np.pi * s**4 * b2 / (a * a * n * n)
    elif kind == "ls":
        var = sa2 / n * (16.0 / 9.0 + 8 * np.pi * sa2 * b2 / (n * a * a))
    elif kind == "ml":
        tau = 2 * np.pi * sa2 * b2 / (n * a * a)
        # −∫₀¹ t ln t /(t + τ) dt, t = e^(−u), is ∫₀^∞ e^(−u) u / (1 + τ e^u) du: Gauss–Laguerre
        x, w = np.polynomial.laguerre.laggauss(100)
        t = tau.reshape(-1, 1)
        with np.errstate(over="ignore"):
            integral = (w[None, :] * x[None, :] / (1.0 + t * np.exp(x[None, :]))).sum(axis=1).reshape(tau.shape)
        var = sa2 / n / integral
    else:
        raise ParameterError(f"`kind` must be 'thompson', 'ls' or 'ml', got {kind!r}.")
    return np.sqrt(var)
