"""The electron-gun shadow: :class:`ShadowMask` and :func:`find_gun_shadow` (a user
disk and arm or polygon, or the automatic search for a dark disk and its holder arm
below the local screen level).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from ..errors import ParameterError
from ._common import _as_float_image, _block_reduce_mean, _fill_nan_grid, _interp_matrix
from .screen import ScreenMask, disk_mask, find_screen  # disk_mask: for the doctest


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


def find_gun_shadow(image, screen: ScreenMask | None = None, *, disk_xyr=None, arm_angle_deg=None,
                    arm_width_px=None, polygon_xy=None, margin_px: float = 3.0) -> ShadowMask:
    """Find the dark gun disk and its holder arm on the screen.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
        The camera frame, any real dtype.
    screen : ScreenMask, optional
        Default: :func:`find_screen` of `image`.
    disk_xyr : (x, y, r), optional, keyword-only
        User disk; with `arm_angle_deg` and `arm_width_px` it overrides the search
        (the arm runs from the disk centre to the frame edge).
    arm_angle_deg : float, optional, keyword-only
        Direction of the holder arm from the disk centre on the image, degrees.
    arm_width_px : float, optional, keyword-only
        Width of the holder arm, pixels.
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
    if polygon_xy is not None:
        from skimage.draw import polygon as _polygon

        p = np.asarray(polygon_xy, dtype=np.float64)
        if p.ndim != 2 or p.shape[1] != 2 or len(p) < 3 or not np.all(np.isfinite(p)):
            raise ParameterError(f"`polygon_xy` must be at least 3 finite (x, y) points, got shape {p.shape}.")
        mask = np.zeros(shape, bool)
        rr, cc = _polygon(p[:, 1], p[:, 0], shape)
        mask[rr, cc] = True
        mask = _grow(mask, margin_px)
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


def _grow(mask: np.ndarray, margin_px: float) -> np.ndarray:
    """`mask` grown by `margin_px` in every direction (Euclidean: repeated dilations by a
    cross would grow it by only margin/√2 along the diagonals).

    >>> m = np.zeros((9, 9), bool); m[4, 4] = True
    >>> g = _grow(m, 3.0)
    >>> bool(g[4, 1]), bool(g[2, 2]), bool(g[1, 1])
    (True, True, False)
    """
    if margin_px <= 0 or not mask.any():
        return mask
    return ndi.distance_transform_edt(~mask) <= margin_px


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
    with np.errstate(all="ignore"):  # all-NaN blocks outside the screen give NaN (no numpy nan-function)
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
    # each component's deepest pixel (the first in raster order among equals), from its own
    # pixels only (ndimage's per-label maximum sorts the whole label image)
    fr, fc = np.nonzero(lab)
    lv, dv = lab[fr, fc], dist[fr, fc]
    order = np.argsort(-dv, kind="stable")
    _, first = np.unique(lv[order], return_index=True)
    top = order[first]
    rmax = dv[top]
    pos = np.column_stack([fr[top], fc[top]]).astype(np.float64)
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
    fine = _grow(np.pad(fine, grow), margin_px)[grow:-grow, grow:-grow] if grow else fine
    mask = np.zeros((m, n), bool)
    mask[r0_:r1_, c0_:c1_] = fine
    if mask.sum() > 0.4 * screen.mask.sum():  # a gun shadow is a disk and an arm, not most of the screen
        return _none_shadow(img.shape, margin_px)
    centre = (disk_c + 0.5) * f - 0.5
    return ShadowMask(mask, centre, disk_r * f, arm_angle, arm_w, "auto", float(margin_px))
