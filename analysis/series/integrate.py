"""Integrated spot intensities in one frame, and the per-beam flags of a series.

:func:`integrate_spots` sums a spot's aperture (or fits a fixed-width Gaussian profile)
over a local background (the robust mean of an annulus, or a fitted plane), flags
saturated, masked and off-screen apertures and states a counting-statistics
uncertainty. The helpers cut small windows of a frame around many points at once
(masks through a summed-area table) and give the clipped background statistics the
tracker's refinement uses too. The flag bits (:data:`FLAG_NAMES`) are shared by the
whole series code. Pixel arrays are (row, col) inside; positions at the API are (x, y).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import ImageError, ParameterError
from ..profiles import GAUSSIAN

__all__ = [
    "SpotIntegrals",
    "integrate_spots",
    "FLAG_OFF_SCREEN",
    "FLAG_MASKED",
    "FLAG_SATURATED",
    "FLAG_CROWDED",
    "FLAG_NOT_REFINED",
    "FLAG_NAMES",
    "BLOCKING_FLAGS",
]


FLAG_OFF_SCREEN = 1  # beyond the acceptance, outside the image or its aperture crosses the edge
FLAG_MASKED = 2  # the aperture touches masked pixels (gun shadow, holder arm, outside the screen)
FLAG_SATURATED = 4  # a pixel in the aperture is at the saturation level
FLAG_CROWDED = 8  # another beam is closer than one aperture diameter
FLAG_NOT_REFINED = 16  # too weak to refine: integrated at the predicted position (kept)
FLAG_NAMES = {FLAG_OFF_SCREEN: "off_screen", FLAG_MASKED: "masked", FLAG_SATURATED: "saturated",
              FLAG_CROWDED: "crowded", FLAG_NOT_REFINED: "not_refined"}
# Flags that leave a point out of the curves (empty CSV cells).
BLOCKING_FLAGS = FLAG_OFF_SCREEN | FLAG_MASKED | FLAG_SATURATED | FLAG_CROWDED


@functools.lru_cache(maxsize=16)
def _disk_offsets(hi_px: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, int, np.ndarray]:
    """Pixel offsets (dy, dx) with dy² + dx² ≤ hi², sorted by dd = dy² + dx².

    Sorted by distance, every disk or annulus about the centre pixel is one contiguous
    column range of a gather (a view, no copy). Returns read-only (n,) int64 arrays
    dy, dx, dd, the half-width h of the enclosing square and the (n,) flat indices of
    the offsets in that (2h+1)² square (row-major).
    """
    n = int(math.floor(hi_px))
    o = np.arange(-n, n + 1, dtype=np.int64)
    dy, dx = np.repeat(o, o.size), np.tile(o, o.size)
    dd = dy * dy + dx * dx
    keep = np.flatnonzero(dd <= hi_px * hi_px)
    keep = keep[np.argsort(dd[keep], kind="stable")]
    out = (dy[keep], dx[keep], dd[keep], n, keep)
    for a in (out[0], out[1], out[2], out[4]):
        a.flags.writeable = False
    return out


@functools.lru_cache(maxsize=16)
def _disk_basis(hi_px: float) -> np.ndarray:
    """(3, n) float64 rows dy, dx, 1 of :func:`_disk_offsets` (for d² as a matrix product)."""
    dy, dx = _disk_offsets(hi_px)[:2]
    b = np.vstack([dy, dx, np.ones(dy.size)]).astype(np.float64)
    b.flags.writeable = False
    return b


@functools.lru_cache(maxsize=16)
def _square_offsets(half: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Offsets (dy, dx) of a (2h+1)² square in row-major order, and the flat indices of its
    border ring (distance from the centre ≥ h − 1.5 px)."""
    o = np.arange(-half, half + 1, dtype=np.int64)
    dy, dx = np.repeat(o, o.size), np.tile(o, o.size)
    ring = np.flatnonzero(dy * dy + dx * dx >= (half - 1.5) ** 2)
    for a in (dy, dx, ring):
        a.flags.writeable = False
    return dy, dx, ring


@functools.lru_cache(maxsize=16)
def _neighbour_columns(hi_px: float, n: int) -> np.ndarray:
    """(4 n,) columns of the 4 nearest neighbours of the first `n` pixels of
    :func:`_disk_offsets` (`hi_px`): all up-neighbours first, then down, left and right (one
    contiguous block per direction); a neighbour outside the disk is the pixel itself."""
    dy, dx = _disk_offsets(hi_px)[:2]
    at = {(int(a), int(b)): i for i, (a, b) in enumerate(zip(dy, dx))}
    out = np.array([[at.get((int(dy[i]) + a, int(dx[i]) + b), i) for i in range(n)]
                    for a, b in ((-1, 0), (1, 0), (0, -1), (0, 1))], dtype=np.int64).reshape(4 * n)
    out.flags.writeable = False
    return out


# A spot (σ ≥ 1 px) has no pixel above twice its second-brightest 4-neighbour (at worst, centred
# on a pixel, every neighbour holds exp(−1/2σ²) ≥ 0.61 of the peak); a hot pixel or a cosmic
# ray hit of one or two pixels does. Besides, it must stand this many background σ out.
_SPIKE_RATIO = 2.0
_SPIKE_SIGMAS = 6.0


def _despike(data: np.ndarray, n: int, hi_px: float, bg: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """The first `n` columns of the disk pixels `data` (K, ≥ n) with single-pixel spikes (hot
    pixels, cosmic-ray hits) replaced by their second-brightest 4-neighbour."""
    k = data.shape[0]
    p = data[:, :n]
    nb = np.take(data, _neighbour_columns(hi_px, n), axis=1).reshape(k, 4, n)  # up, down, left, right
    hi1, lo1 = np.maximum(nb[:, 0], nb[:, 1]), np.minimum(nb[:, 0], nb[:, 1])
    hi2, lo2 = np.maximum(nb[:, 2], nb[:, 3]), np.minimum(nb[:, 2], nb[:, 3])
    second = np.maximum(np.minimum(hi1, hi2, out=hi1), np.maximum(lo1, lo2, out=lo1), out=hi1)
    b = np.where(np.isfinite(bg), bg, 0.0)[:, None]
    noise = _SPIKE_SIGMAS * np.where(np.isfinite(sd), sd, 0.0)[:, None]
    spike = p - b > _SPIKE_RATIO * np.maximum(second - b, 0.0) + noise
    if not spike.any():
        return p
    return np.where(spike, second, p)


def _despike_windows(data: np.ndarray, bg: np.ndarray, sd: np.ndarray, rounds: int = 3) -> None:
    """Spikes that are the brightest pixel of their (K, w, w) window replaced in place by
    their second-brightest 4-neighbour (:func:`_despike`'s test), up to `rounds` per window.

    Only a spike brighter than the spot's peak can pull the peak search off the spot, and
    such a spike is its window's brightest pixel; dimmer ones are cleaned where the aperture
    is summed. `bg` and `sd` (K,) are the background level and noise of each window.
    """
    k_all, w, _ = data.shape
    flat = data.reshape(k_all, -1)
    rows = np.arange(k_all)
    b_all = np.where(np.isfinite(bg), bg, 0.0)
    n_all = _SPIKE_SIGMAS * np.where(np.isfinite(sd), sd, 0.0)
    for _ in range(rounds):
        top = np.argmax(flat if rows.size == k_all else flat[rows], axis=1)  # no copy of every window
        r, c = top // w, top % w
        inner = (r > 0) & (r < w - 1) & (c > 0) & (c < w - 1)
        rows, r, c = rows[inner], r[inner], c[inner]
        if not rows.size:
            return
        nb = np.stack([data[rows, r - 1, c], data[rows, r + 1, c], data[rows, r, c - 1], data[rows, r, c + 1]])
        nb.sort(axis=0)
        second = nb[2]
        b = b_all[rows]
        spike = data[rows, r, c] - b > _SPIKE_RATIO * np.maximum(second - b, 0.0) + n_all[rows]
        rows, r, c = rows[spike], r[spike], c[spike]
        if not rows.size:
            return
        data[rows, r, c] = second[spike]


@dataclass(frozen=True, eq=False)
class _MaskMap:
    """A mask of usable pixels with a summed-area table of its unusable ones, so that
    windows holding no masked pixel skip the mask gather."""

    mask: np.ndarray  # (M, N) bool, C-contiguous
    blocked: np.ndarray  # (M + 1, N + 1) int64: unusable pixels above and left of each corner
    views: dict = field(default_factory=dict)  # window width -> sliding-window view of `mask`

    def windows(self, w: int) -> np.ndarray:
        """(M − w + 1, N − w + 1, w, w) read-only view of every w × w window of the mask."""
        if w not in self.views:
            from numpy.lib.stride_tricks import sliding_window_view

            self.views[w] = sliding_window_view(self.mask, (w, w))
        return self.views[w]

    def any_blocked(self, r0: np.ndarray, c0: np.ndarray, w: int) -> np.ndarray:
        """(K,) bool: the w × w window with top-left pixel (r0, c0) holds an unusable pixel
        (windows reaching beyond the image count as blocked)."""
        rows, cols = self.mask.shape
        inside = (r0 >= 0) & (c0 >= 0) & (r0 + w <= rows) & (c0 + w <= cols)
        a, b = np.where(inside, r0, 0), np.where(inside, c0, 0)
        t = self.blocked
        n = t[a + w, b + w] - t[a, b + w] - t[a + w, b] + t[a, b]
        return ~inside | (n > 0)


def _mask_map(mask: np.ndarray | None) -> _MaskMap | None:
    if mask is None or bool(mask.all()):
        return None
    m = np.ascontiguousarray(mask, dtype=bool)
    table = np.zeros((m.shape[0] + 1, m.shape[1] + 1), dtype=np.int64)
    np.cumsum(np.cumsum(~m, axis=0, dtype=np.int64), axis=1, out=table[1:, 1:])
    return _MaskMap(m, table)


def _take(frame, mask, centre: np.ndarray, half: int, cols: np.ndarray | None = None,
          layer: np.ndarray | None = None):
    """Pixels of the (2h+1)² squares about K integer centres (or the columns `cols` of them).

    Squares inside the image are gathered in one fancy-indexing step on a sliding-window
    view; the few that cross the image edge through clipped flat indices. `mask` is None,
    an (M, N) bool array or a :class:`_MaskMap`. `frame` is one (M, N) frame, or a sequence
    of frames of that shape with `layer` ((K,) int, sorted) numbering the frame of each
    centre: one gather per frame, the mask's part once for all.

    Returns ``data`` (K, n) float64 (0 outside the image), ``inside`` (K, n) bool or None
    when every pixel is inside, and ``usable`` (K, n) bool (inside and not masked), with
    n = (2h+1)² or ``len(cols)``.
    """
    from numpy.lib.stride_tricks import sliding_window_view

    frames = [frame] if layer is None else frame
    rows, ncols = frames[0].shape
    k = centre.shape[0]
    w = 2 * half + 1
    dy, dx, _ = _square_offsets(half)
    if cols is not None:
        dy, dx = dy[cols], dx[cols]
    n = dy.size
    r0, c0 = centre[:, 0] - half, centre[:, 1] - half
    full = (r0 >= 0) & (r0 + w <= rows) & (c0 >= 0) & (c0 + w <= ncols)
    fi, part = np.flatnonzero(full), np.flatnonzero(~full)

    def squares(img, sel):
        view = img.windows(w) if isinstance(img, _MaskMap) else sliding_window_view(img, (w, w))
        sq = view[r0[sel], c0[sel]].reshape(sel.size, w * w)
        return sq if cols is None else sq[:, cols]

    def edge(sel):
        rr = centre[sel, 0, None] + dy[None, :]
        cc = centre[sel, 1, None] + dx[None, :]
        ins = (rr >= 0) & (rr < rows) & (cc >= 0) & (cc < ncols)
        return np.where(ins, rr * ncols + cc, 0), ins

    def by_frame(sel):
        """(frame, slice of `sel`) pairs: where the sorted rows `sel` of each frame are."""
        if layer is None:
            return [(frame, slice(None))]
        cut = np.searchsorted(layer[sel], np.arange(len(frames) + 1))
        return [(img, slice(a, b)) for img, a, b in zip(frames, cut[:-1], cut[1:]) if b > a]

    inside = None
    if part.size == 0:
        sq = [squares(img, fi[at]) for img, at in by_frame(fi)]
        data = sq[0].astype(np.float64, copy=False) if len(sq) == 1 else np.concatenate(sq, dtype=np.float64)
    else:
        data = np.empty((k, n))
        for img, at in by_frame(fi):
            data[fi[at]] = squares(img, fi[at])
        idx, ins = edge(part)
        for img, at in by_frame(part):
            data[part[at]] = np.where(ins[at], img.reshape(-1).take(idx[at]), 0.0)
        inside = np.ones((k, n), dtype=bool)
        inside[part] = ins
    usable = np.ones((k, n), dtype=bool) if inside is None else inside.copy()
    if mask is None:
        return data, inside, usable
    if isinstance(mask, _MaskMap):
        near = mask.any_blocked(r0, c0, w)
        m = mask
    else:
        near = np.ones(k, dtype=bool)
        m = mask
    nf, npart = np.flatnonzero(near & full), np.flatnonzero(near & ~full)
    if nf.size:
        usable[nf] = squares(m, nf)
    if npart.size:
        idx, ins = edge(npart)
        usable[npart] = (m.mask if isinstance(m, _MaskMap) else m).reshape(-1).take(idx) & ins
    return data, inside, usable


@dataclass(eq=False)
class _Windows:
    """Small (K, w, w) cut-outs of one frame (or of several, see `layer`) around K points."""

    data: np.ndarray  # (K, w, w) float64 pixel values (0 outside the image)
    edge: np.ndarray | None  # (K, w, w) bool, pixel inside the image; None: every pixel is
    usable: np.ndarray  # (K, w, w) bool, inside the image and not masked
    row0: np.ndarray  # (K,) int64 image row of window pixel [0, 0]
    col0: np.ndarray  # (K,) int64 image column of window pixel [0, 0]
    layer: np.ndarray | None = None  # (K,) int64 frame each window was cut from; None: one frame

    @property
    def all_inside(self) -> bool:
        """Every window lies inside the image."""
        return self.edge is None

    @property
    def inside(self) -> np.ndarray:
        """(K, w, w) bool: pixel inside the image (made on demand when all are)."""
        return np.ones(self.data.shape, dtype=bool) if self.edge is None else self.edge

    @property
    def half(self) -> int:
        return (self.data.shape[1] - 1) // 2


def _extract(frame, rc: np.ndarray, half: int, mask: np.ndarray | None, layer: np.ndarray | None = None) -> _Windows:
    """(2h+1)² windows about the pixels nearest to (row, col) `rc` (K, 2), of one frame or, with
    `layer`, of the frames it numbers (as :func:`_take`)."""
    k = rc.shape[0]
    w = 2 * half + 1
    centre = np.rint(rc).astype(np.int64)
    data, inside, usable = _take(frame, mask, centre, half, layer=layer)
    return _Windows(data.reshape(k, w, w), None if inside is None else inside.reshape(k, w, w),
                    usable.reshape(k, w, w), centre[:, 0] - half, centre[:, 1] - half, layer)


def _robust(values: np.ndarray, select: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-row clipped mean, clipped standard deviation and the pixels kept, (K, n) in.

    Three passes of a 3σ clip (pixels of neighbouring spots and hot pixels drop out). The
    sums are float64 row dot products with the kept set (:func:`_rowdot`). A
    row whose kept set did not change in a pass has converged (the next pass would repeat it
    exactly), so the last pass runs only on the rows still changing.
    """
    k = values.shape[0]
    v = np.ascontiguousarray(values.reshape(k, -1))
    sel = select.reshape(k, -1)
    v2 = v * v

    def clip(v, v2, sel, keep):
        kf = keep.astype(np.float64)
        n = _count(keep).astype(np.float64)
        s1 = _rowdot(v, kf)
        s2 = _rowdot(v2, kf)
        mean = s1 / np.maximum(n, 1.0)
        sd = np.sqrt(np.maximum(s2 - s1 * mean, 0.0) / np.maximum(n - 1.0, 1.0))
        t = 3.0 * sd + 1e-12
        new = v >= (mean - t)[:, None]
        new &= v <= (mean + t)[:, None]
        new &= sel
        return mean, sd, new, n

    _, _, keep1, _ = clip(v, v2, sel, sel)
    mean, sd, keep, _ = clip(v, v2, sel, keep1)
    moving = np.flatnonzero(np.any(keep != keep1, axis=1))
    if moving.size:
        m3, s3, k3, _ = clip(v[moving], v2[moving], sel[moving], keep[moving])
        mean[moving], sd[moving], keep[moving] = m3, s3, k3
    n = _count(keep)
    return np.where(n > 0, mean, 0.0), np.where(n > 1, sd, np.inf), keep


@dataclass(frozen=True, eq=False)
class SpotIntegrals:
    """Integrated intensities of K spots in one frame.

    Attributes
    ----------
    intensity : (K,) ndarray of float64
        Background-subtracted sum over the aperture (or profile amplitude), frame units;
        NaN where the aperture leaves the image.
    sigma : (K,) ndarray of float64
        One-standard-deviation uncertainty from counting statistics (spot shot noise
        with the given gain, plus the measured background noise and the uncertainty of
        the background estimate).
    background_per_px : (K,) ndarray of float64
        Local background level under the spot centre, frame units per pixel.
    flags : (K,) ndarray of uint8
        Bit flags (:data:`FLAG_NAMES`): off screen, masked, saturated.
    n_aperture : (K,) ndarray of int64
        Pixels summed.
    """

    intensity: np.ndarray
    sigma: np.ndarray
    background_per_px: np.ndarray
    flags: np.ndarray
    n_aperture: np.ndarray


def _rowdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise dot product of two (K, n) arrays, (K,) float64 (one BLAS dot per row: about
    twice as fast as ``einsum("kn,kn->k")`` on the windows of a frame)."""
    return np.matmul(a[:, None, :], b[:, :, None])[:, 0, 0]


def _count(flags: np.ndarray) -> np.ndarray:
    """(K,) int64 count of the True values in each row of a (K, n) bool array: a byte sum
    in 16-bit accumulators when a row cannot overflow them (several times faster than
    ``count_nonzero(axis=1)`` on rows of a few hundred pixels)."""
    acc = np.uint16 if flags.shape[1] < 65536 else np.int64
    return flags.view(np.uint8).sum(axis=1, dtype=acc).astype(np.int64)


def _normal_equations(cols: list, wts: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares normal matrix (K, p, p) and right side (K, p) for the model
    ``y ≈ Σ_p c_p · cols[p]`` with per-pixel weights, every array (K, n)."""
    p = len(cols)
    k = y.shape[0]
    wc = [c * wts for c in cols]
    nmat = np.empty((k, p, p))
    for i in range(p):
        for j in range(i, p):
            nmat[:, i, j] = nmat[:, j, i] = _rowdot(wc[i], cols[j])
    rhs = np.column_stack([_rowdot(c, y) for c in wc])
    return nmat, rhs


def _disk_pixels(frame, mask, centre: np.ndarray, hi_px: float, window: _Windows | None):
    """:func:`_take` of the distance-sorted disk of radius `hi_px` about each centre, cut
    from the refinement windows where they hold it (no second pass over the frame); `frame`
    is the sequence of frames when ``window.layer`` numbers several."""
    dy, dx, _, sq_half, sq_cols = _disk_offsets(hi_px)
    if window is None:
        return _take(frame, mask, centre, sq_half, sq_cols)
    k = centre.shape[0]
    h = window.half
    w = 2 * h + 1
    sr, sc = centre[:, 0] - (window.row0 + h), centre[:, 1] - (window.col0 + h)
    held = np.maximum(np.abs(sr), np.abs(sc)) + sq_half <= h
    rows = np.flatnonzero(held)
    idx = (rows * (w * w) + (h + sr[rows]) * w + (h + sc[rows]))[:, None] + (dy * w + dx)[None, :]
    data = window.data.reshape(-1).take(idx)
    usable = window.usable.reshape(-1).take(idx)
    inside = None if window.all_inside else window.inside.reshape(-1).take(idx)
    if rows.size == k:
        return data, inside, usable
    rest = np.flatnonzero(~held)
    layer = None if window.layer is None else window.layer[rest]
    d2, i2, u2 = _take(frame, mask, centre[rest], sq_half, sq_cols, layer)
    out_d, out_u = np.empty((k, dy.size)), np.empty((k, dy.size), dtype=bool)
    out_d[rows], out_u[rows], out_d[rest], out_u[rest] = data, usable, d2, u2
    if inside is None and i2 is None:
        return out_d, None, out_u
    out_i = np.ones((k, dy.size), dtype=bool)
    if inside is not None:
        out_i[rows] = inside
    if i2 is not None:
        out_i[rest] = i2
    return out_d, out_i, out_u


def _integrate(frame, rc: np.ndarray, mask: np.ndarray | None, saturation_level: float | None, *,
               radius_px: float, annulus_px: tuple[float, float], background: str, method: str,
               spot_sigma_px, gain: float, window: _Windows | None = None) -> SpotIntegrals:
    """Integrate K spots at (row, col) `rc` straight from the frame (one gather of the disk
    of radius r_out + 0.75 px about each spot's nearest pixel).

    With `window` cut from several frames, `frame` is the sequence of them (see
    :func:`_disk_pixels`); `spot_sigma_px` is one σ for all spots or a (K,) σ per spot.
    """
    k = rc.shape[0]
    r_in, r_out = annulus_px
    scale = max(r_out, 1.0)
    # The nearest pixel is within √½ px of the sub-pixel centre, so with a margin of
    # 0.75 px the distance-sorted columns dd ≤ (R + m)² hold the aperture and
    # dd ≥ (r_in − m)² the annulus.
    margin = 0.75
    dy, dx, dd, _, _ = _disk_offsets(r_out + margin)
    centre = np.rint(rc).astype(np.int64)
    data, inside, usable = _disk_pixels(frame, mask, centre, r_out + margin, window)
    ofr, ofc = centre[:, 0] - rc[:, 0], centre[:, 1] - rc[:, 1]
    # d² = (ofr + dy)² + (ofc + dx)² as one small matrix product
    d2 = np.column_stack([2.0 * ofr, 2.0 * ofc, ofr * ofr + ofc * ofc]) @ _disk_basis(r_out + margin) + dd
    n_p = int(np.searchsorted(dd, (radius_px + margin) ** 2, side="right"))
    j_a = int(np.searchsorted(dd, max(r_in - margin, 0.0) ** 2, side="left"))
    a_data, a_use, a_d2 = data[:, j_a:], usable[:, j_a:], d2[:, j_a:]
    sel = (a_d2 >= r_in * r_in) & (a_d2 <= r_out * r_out) & a_use
    mean, sd, keep = _robust(a_data, sel)
    p_data = _despike(data, n_p, r_out + margin, mean, sd)
    p_use, p_d2 = usable[:, :n_p], d2[:, :n_p]
    ap = p_d2 <= radius_px * radius_px
    flags = np.zeros(k, dtype=np.uint8)
    if inside is None:
        apu = ap
        flags[np.any(ap & ~p_use, axis=1)] |= FLAG_MASKED
    else:
        p_in = inside[:, :n_p]
        apu = ap & p_in
        flags[np.any(ap & ~p_in, axis=1)] |= FLAG_OFF_SCREEN
        flags[np.any(apu & ~p_use, axis=1)] |= FLAG_MASKED
    if saturation_level is not None:
        flags[np.any(apu & (p_data >= saturation_level), axis=1)] |= FLAG_SATURATED
    apf = apu.astype(np.float64)
    n_ap = _count(apu)
    n_keep = _count(keep).astype(np.float64)
    p_dim = 1 if background == "annulus" else 3
    enough = n_keep >= max(6, 2 * p_dim)
    if p_dim == 1:  # the clipped mean is the least-squares constant on the kept pixels
        coef = mean[:, None]
        s2 = sd * sd
        s2 = np.where(np.isfinite(s2), s2, 0.0)
        sum_bg = mean * n_ap
        var_bg = s2 * n_ap * n_ap / np.maximum(n_keep, 1.0)
    else:
        dr, dc = ofr[:, None] + dy[None, :], ofc[:, None] + dx[None, :]
        wk = keep.astype(np.float64)
        a_x, a_y = (dc[:, j_a:] / scale), (dr[:, j_a:] / scale)
        nmat, rhs = _normal_equations([np.ones_like(a_x), a_x, a_y], wk, a_data)
        nmat = np.where(enough[:, None, None], nmat, np.eye(3)[None])
        ninv = np.linalg.inv(nmat)
        coef = np.einsum("kpq,kq->kp", ninv, rhs)
        resid = (a_data - coef[:, 0, None] - coef[:, 1, None] * a_x - coef[:, 2, None] * a_y) * wk
        s2 = _rowdot(resid, resid) / np.maximum(n_keep - 3, 1)
        u = np.column_stack([n_ap, _rowdot(apf, dc[:, :n_p]) / scale, _rowdot(apf, dr[:, :n_p]) / scale])
        sum_bg = np.einsum("kp,kp->k", coef, u)
        var_bg = s2 * np.einsum("kp,kpq,kq->k", u, ninv, u)
    if method == "aperture":
        inten = _rowdot(p_data, apf) - sum_bg
        var = gain * np.maximum(inten, 0.0) + n_ap * s2 + var_bg
    else:
        sg = np.asarray(np.nan if spot_sigma_px is None else spot_sigma_px, dtype=np.float64)
        if not np.all(sg > 0):
            raise ParameterError(f"The profile fit needs a spot width `spot_sigma_px` > 0, got {spot_sigma_px!r}.")
        sg = sg[:, None] if sg.ndim else float(sg)  # one σ per spot, or one for all
        dr, dc = ofr[:, None] + dy[None, :], ofc[:, None] + dx[None, :]
        in_ann = (d2 >= r_in * r_in) & (d2 <= r_out * r_out)
        lo_b, hi_b = mean - 3.0 * sd - 1e-9, mean + 3.0 * sd + 1e-9
        good_bg = in_ann & (data >= lo_b[:, None]) & (data <= hi_b[:, None])
        fit_px = (d2 <= r_out * r_out) & usable & ((d2 <= radius_px * radius_px) | good_bg)
        gauss = GAUSSIAN.round_unit_values(d2, sg)
        cols = [gauss, np.ones_like(d2)] + ([] if p_dim == 1 else [dc / scale, dr / scale])
        fit_f = fit_px.astype(np.float64)
        wts = fit_f / np.maximum(s2, 1e-12)[:, None]
        for _ in range(2):
            nf, rhs = _normal_equations(cols, wts, data)
            nf = np.where(enough[:, None, None], nf, np.eye(p_dim + 1)[None])
            nfi = np.linalg.inv(nf)
            cf = np.einsum("kpq,kq->kp", nfi, rhs)
            sig_model = np.maximum(cf[:, 0, None] * gauss, 0.0)
            wts = fit_f / (np.maximum(s2, 1e-12)[:, None] + gain * sig_model)
        inten = cf[:, 0]
        var = nfi[:, 0, 0]
        coef = cf[:, 1:]
    bad = ~enough | (n_ap == 0)
    inten = np.where(bad, np.nan, inten)
    flags[bad] |= FLAG_OFF_SCREEN
    sigma = np.sqrt(np.maximum(var, 0.0))
    return SpotIntegrals(inten, np.where(bad, np.nan, sigma), coef[:, 0], flags, n_ap.astype(np.int64))


def _default_annulus(radius_px: float) -> tuple[float, float]:
    """Annulus from r + 1.5 px out to an area about three times the aperture's."""
    r_in = radius_px + 1.5
    return r_in, math.sqrt(r_in * r_in + 3.0 * radius_px * radius_px)


def _check_integration(radius_px, annulus_px, background, method):
    if not (isinstance(radius_px, (int, float, np.floating)) and 0.5 <= radius_px <= 100):
        raise ParameterError(f"`radius_px` must be between 0.5 and 100 px, got {radius_px!r}.")
    ann = _default_annulus(float(radius_px)) if annulus_px is None else tuple(float(v) for v in annulus_px)
    if len(ann) != 2 or not (radius_px <= ann[0] < ann[1] <= 200):
        raise ParameterError(f"`annulus_px` must be (inner, outer) with radius ≤ inner < outer ≤ 200 px, "
                             f"got {annulus_px!r}.")
    if background not in ("annulus", "plane"):
        raise ParameterError(f"`background` must be 'annulus' or 'plane', got {background!r}.")
    if method not in ("aperture", "profile"):
        raise ParameterError(f"`method` must be 'aperture' or 'profile', got {method!r}.")
    return ann


def integrate_spots(frame: np.ndarray, xy_px, *, radius_px: float = 5.0, annulus_px=None,
                    background: str = "annulus", method: str = "aperture",
                    spot_sigma_px: float | None = None, mask: np.ndarray | None = None,
                    saturation_level: float | None = None, gain: float = 1.0) -> SpotIntegrals:
    """Integrated intensity of spots at known positions, with a local background.

    Parameters
    ----------
    frame : (M, N) ndarray
        One camera frame, any real dtype (frame units, e.g. ADU).
    xy_px : (K, 2) array_like of float
        Spot centres as (x, y) pixels.
    radius_px : float, keyword-only
        Aperture radius; pixels whose centre is within it are summed.
    annulus_px : (inner, outer), keyword-only
        Background annulus; default from `radius_px` (about three times the aperture area).
    background : {"annulus", "plane"}, keyword-only
        Robust mean of the annulus (outliers beyond 3σ dropped), or a plane fitted to it.
    method : {"aperture", "profile"}, keyword-only
        Background-subtracted aperture sum, or the amplitude of a fixed-width Gaussian
        (σ = `spot_sigma_px`) fitted together with the background model by weighted
        least squares over the disk of radius ``annulus_px[1]``.
    spot_sigma_px : float, optional, keyword-only
        Gaussian σ of the spots, pixels (needed by ``method="profile"``).
    mask : (M, N) ndarray of bool, optional
        True where pixels may be used (False under the gun shadow, off the screen).
    saturation_level : float, optional
        Pixel value of full scale; default: the dtype's maximum for integer frames.
    gain : float, keyword-only
        Frame units per detected count, for the shot noise of the spot (var = gain · I).

    Returns
    -------
    SpotIntegrals
        Intensities, their σ, local backgrounds and flags, one per spot.

    Examples
    --------
    >>> yy, xx = np.mgrid[0:64, 0:64]
    >>> img = 10.0 + 500.0 / (2 * np.pi * 4.0) * np.exp(-((xx - 30.3) ** 2 + (yy - 20.6) ** 2) / 8.0)
    >>> s = integrate_spots(img, [[30.3, 20.6]], radius_px=7.0)
    >>> print(abs(float(s.intensity[0]) - 500.0) < 2.0, round(float(s.background_per_px[0]), 2))
    True 10.0
    """
    frame = np.asarray(frame)
    if frame.ndim != 2:
        raise ImageError(f"`frame` must be a 2-D image, got shape {frame.shape}.")
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    if not np.all(np.isfinite(xy)):
        raise ParameterError("`xy_px` must be finite pixel positions.")
    ann = _check_integration(radius_px, annulus_px, background, method)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != frame.shape:
            raise ParameterError(f"`mask` is {mask.shape} but the frame is {frame.shape}.")
    if saturation_level is None and np.issubdtype(frame.dtype, np.integer):
        saturation_level = float(np.iinfo(frame.dtype).max)
    rc = xy[:, ::-1].copy()
    frame = np.ascontiguousarray(frame)
    mask = None if mask is None else np.ascontiguousarray(mask)
    return _integrate(frame, rc, mask, saturation_level, radius_px=float(radius_px), annulus_px=ann,
                      background=background, method=method, spot_sigma_px=spot_sigma_px, gain=float(gain))
