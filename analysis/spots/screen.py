"""The glowing screen: :class:`ScreenMask`, :func:`find_screen` (a user circle or
ellipse, or the automatic search: Otsu levels on a spot-free coarse copy, then the
steepest drop along rays fitted by an ellipse) and :func:`disk_mask`, the pixel
disk or ellipse every mask here is drawn with.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from ..errors import ParameterError
from ._common import _as_float_image, _block_reduce_mean


def disk_mask(shape, center_rc, radius_px: float, *, axes_px=None, angle_deg: float = 0.0) -> np.ndarray:
    """Boolean disk (or ellipse) of pixels whose centres lie inside it.

    Parameters
    ----------
    shape : (M, N) tuple of int
        Shape of the image.
    center_rc : (row, col)
        The centre, pixels.
    radius_px : float
        Radius (used when `axes_px` is None).
    axes_px : (a, b), optional, keyword-only
        Semi-axes of an ellipse, pixels; `a` along image angle `angle_deg`.
    angle_deg : float, keyword-only
        Direction of the ellipse's `a` axis on the image, degrees.

    Returns
    -------
    (M, N) ndarray of bool
        True inside.

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
        The camera frame, any real dtype.
    circle_xyr : (x, y, r), optional, keyword-only
        User circle in pixels; overrides the automatic search.
    ellipse : (x, y, a, b, angle_deg), optional, keyword-only
        User ellipse; overrides the automatic search.
    margin_px : float, keyword-only
        The mask is shrunk by this many pixels inside the edge.

    Returns
    -------
    ScreenMask
        The mask of the screen's pixels, its centre, semi-axes and how it was found.

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
    found = None
    for _ in range(2):  # a third split would only carve the screen's own falloff
        if sub.size < 16 or float(np.ptp(sub)) <= 0.0:
            break
        dark = vals < float(threshold_otsu(sub))
        if not 0.02 <= dark.mean() <= 0.98:
            break
        lo, hi = float(np.median(vals[dark])), float(np.median(vals[~dark]))
        noise_lo = 1.4826 * float(np.median(np.abs(vals[dark] - lo))) + 1e-12
        # a step of ten times the dark side's spread is no falloff of the screen's own (there the
        # "dark" class spreads over most of the step); a dim 8-bit rim may be only ~20 × above it
        if hi - lo >= 10.0 * noise_lo and lo - floor <= 0.1 * (hi - lo):
            if found is not None and noise_lo >= 0.5 * found[2]:
                break  # the split only cut the frame's own noise: keep the first
            found = (lo, hi, noise_lo)
            # a dim, vignetted rim can fall into the first dark class with the frame, which then
            # spreads over the rim's level: a second split of it finds the flat frame underneath
        elif found is not None:
            break
        sub = vals[dark]
    return found


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
