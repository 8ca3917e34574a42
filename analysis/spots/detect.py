"""Detection: the matched filter (a Gaussian of the spot size, run as two row strips
on large frames), its noise scale (measured at the spot scale where pixels are
correlated), the local maxima above a significance threshold, the residual search
beside fitted spots, and the dark patches (dust) the background must not follow.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

from ._common import _by_row_strips, _nanmedian
from .fit import _PROFILE, _render


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


_WHITE_HP: dict = {}


def _highpass_width(snr: np.ndarray, valid: np.ndarray, sigma_px: float) -> float:
    """Robust width of `snr` less its own mean over a box of ±4 σ (normalised over the valid
    pixels), over what independent pixels give through the same filters (1.0 for them).

    The high pass removes what a smooth background model leaves (a bright diffuse background
    the blocks cannot follow reads as a wide spread of the significance, not as noise). The
    reference is a field of independent normal pixels (fixed seed, 256², cached per σ)
    filtered the same way. Width: half the 15.87–84.13 percentile range.
    """
    w = 2 * int(round(4.0 * sigma_px)) + 1

    def width(z, ok):
        num = ndi.uniform_filter(np.where(ok, z, 0.0).astype(np.float32), w)
        den = ndi.uniform_filter(ok.astype(np.float32), w)
        use = ok & (den > 0.98)
        if use.sum() < 200:
            return float("nan")
        hp = (z - num / np.maximum(den, 1e-6))[use]
        hp = hp[:: max(1, hp.size // 200_000)]
        q16, q84 = np.percentile(hp, [15.87, 84.13])
        return 0.5 * float(q84 - q16)

    key = round(float(sigma_px), 2)
    if key not in _WHITE_HP:
        white = np.random.default_rng(12345).standard_normal((256, 256)).astype(np.float32)
        ok = np.ones(white.shape, bool)
        _WHITE_HP[key] = width(_matched(white, sigma_px) / np.float32(_gauss_kernel_norm(sigma_px)), ok)
    return width(snr, valid) / _WHITE_HP[key]


def _spot_scale_noise(f1: np.ndarray, snr: np.ndarray, valid: np.ndarray, sigma_px: float, block_px: int = 64):
    """The noise of the matched-filter response measured on the image, where pixels are not
    independent; None where they are. Returns an (M, N) float32 map (image units) or None.

    Demosaicing and lossy compression correlate neighbouring pixels, and JPEG flattens its
    8×8 blocks, so neither the differences of neighbours nor the independent-pixel law
    (pixel noise × √Σg²) gives the noise of the filtered image: it survives the filter's
    averaging far better, and a threshold set for independent pixels lets thousands of
    noise peaks through. `snr` (the response over the independent-pixel prediction) is
    centred on zero with width 1 over the background of a raw frame, and noise spreads it
    evenly to both sides. Its spread below and above the median (the 15.87th and 84.13th
    percentiles) is read; pixels count as correlated when the spread below exceeds 1.2,
    the spread above is within 25 % of it and the median within a quarter of it of zero.
    Spots only add light: a frame crowded with bright spots (whose background is hard to
    read) spreads the response upwards far more than downwards, and is no case of
    correlated noise; nor is a background the blocks cannot follow, which the same width
    read after a high pass (:func:`_highpass_width`, which must exceed 1.5: JPEG gives 3–5,
    a bright diffuse background up to 1.35) leaves out. Then the response's own
    width is measured per `block_px` block (1.4826 × median absolute deviation; a 3×3
    median over blocks, cubic interpolation between block centres).
    """
    k = max(1, int(math.sqrt(snr.size / 200_000)))  # ≤ 200 000 pixels on a regular grid
    v = snr[::k, ::k][valid[::k, ::k]]
    if v.size < 200:
        return None
    q16, med, q84 = (float(q) for q in np.percentile(v, [15.87, 50.0, 84.13]))
    lower, upper = med - q16, q84 - med
    if not (lower > 1.2 and upper < 1.25 * lower and abs(med) < 0.25 * lower):
        return None
    if not _highpass_width(snr, valid, sigma_px) > 1.5:  # the spread is the background's, not noise
        return None
    from ._common import _fill_nan_grid, _interp_matrix
    from .background import _nan_median3

    m, n = f1.shape
    b = int(min(block_px, max(16, min(m, n) // 8)))
    gm, gn = -(-m // b), -(-n // b)
    pad = np.full((gm * b, gn * b), np.nan, np.float32)
    pad[:m, :n] = np.where(valid, f1, np.nan)
    blocks = pad.reshape(gm, b, gn, b).transpose(0, 2, 1, 3).reshape(gm * gn, b * b)
    cnt = np.sum(np.isfinite(blocks), axis=1)
    bm = _nanmedian(blocks, 1)
    wid = 1.4826 * _nanmedian(np.abs(blocks - bm[:, None]), 1)
    wid = np.where((cnt >= b * b // 8) & (wid > 0), wid, np.nan).reshape(gm, gn)
    wid = _fill_nan_grid(_nan_median3(wid))
    if np.all(np.isnan(wid)):
        return None
    wr, wc = _interp_matrix(m, gm, b), _interp_matrix(n, gn, b)
    return np.maximum(wr @ wid @ wc.T, 1e-6).astype(np.float32)


def _detect(res, bg, valid, s, min_snr):
    """Matched-filter maxima (row, col), rough amplitudes and detection SNR (no fitting), the
    (M, N) float32 significance map itself and, where pixels are correlated, the pixel
    noise it implies ((M, N) float64: :func:`_spot_scale_noise` over √Σg²; else None)."""
    knorm = _gauss_kernel_norm(s)
    noise = np.maximum(bg.noise, 1e-6)
    noise_f = (noise * knorm).astype(np.float32)
    f1 = _matched(res, s)
    snr = f1 / noise_f
    nf = _spot_scale_noise(f1, snr, valid, s)
    noise = None
    if nf is not None:
        snr = f1 / nf
        noise = nf.astype(np.float64) / knorm
    rc = _maxima(snr, min_snr, valid)
    if not len(rc):
        return rc, np.zeros(0), np.zeros(0), snr, noise
    return rc, 2.0 * f1[rc[:, 0], rc[:, 1]], snr[rc[:, 0], rc[:, 1]], snr, noise


def _residual_snr(f1, spots, noise, gain, knorm, sigma_px, half, model_var_f=None):
    """Matched-filter response `f1` less the filtered models of the fitted `spots`, in units
    of its local noise; returns (significance, filtered models), both (M, N).

    A profile seen through the matched filter is drawn directly (a Gaussian filtered by a
    Gaussian is a Gaussian). Model errors (≈ 3 % of the model) and the spots' own shot
    noise add to the background's variance, and so does `model_var_f` ((M, N): the
    variance of further model terms as seen through the filter), when given.
    """
    shape = f1.shape
    a2, sr2, st2 = _PROFILE.filtered(spots["amp"], spots["sr"], spots["st"], sigma_px)
    hf = max(half, int(math.ceil(3.5 * float(np.max(np.maximum(sr2, st2), initial=sigma_px)))))
    fm = _render(shape, spots["rc"], a2, sr2, st2, spots["u"], hf)
    err = _PROFILE.filtered(*_PROFILE.squared(0.03 * spots["amp"], spots["sr"], spots["st"]), sigma_px)
    fm2 = _render(shape, spots["rc"], *err, spots["u"], hf)
    d = f1 - fm
    out = (d / (knorm * noise)).astype(np.float32)
    # the extra variance lives on the spots' windows (and under the further terms): only there
    # is the noise drawn again
    near = fm2 > 0
    if model_var_f is not None:
        near |= model_var_f > 0
    idx = np.flatnonzero(near)
    if idx.size:
        extra = fm2.ravel()[idx] + (gain * np.clip(fm.ravel()[idx], 0, None) if gain else 0.0)
        var_f = knorm**2 * (noise.ravel()[idx] ** 2 + extra)
        if model_var_f is not None:
            var_f = var_f + model_var_f.ravel()[idx]
        out.ravel()[idx] = d.ravel()[idx] / np.sqrt(var_f)
    return out, fm


def _dark_patches(res, f1, valid, s, min_snr, noise):
    """(M, N) bool: valid pixels of patches darker than the background by `min_snr` in
    matched-filter units (light missing over a spot's area, π σ² px at least) and than their own
    surroundings (a ring 4–7 σ out) by 0.9 × the pixel noise on average, widened by 3 σ so
    their edges go too; None when there are none. `res` is the background-subtracted image,
    `f1` its matched filter (σ = `s`), `noise` the pixel noise.

    A patch that reaches the mask's edge is the penumbra of the gun shadow or of the rim
    (the masks cover the core only): it is left out, or the blocks beside the shadow would
    lose the pixels that say how the background rises towards the pattern's centre.
    """
    nz = noise
    snr = f1 / (np.maximum(nz, 1e-6) * _gauss_kernel_norm(s)).astype(np.float32)
    dark = (snr < -min_snr) & valid
    if not dark.any():
        return None
    lab, nlab = ndi.label(dark, structure=np.ones((3, 3)))
    size = np.bincount(lab.ravel(), minlength=nlab + 1)
    m, n = res.shape
    r_in, r_out = max(2, int(round(4.0 * s))), max(4, int(round(7.0 * s)))
    keep = np.zeros(nlab + 1, bool)
    for k, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None or size[k] < math.pi * s * s:  # smaller than a spot: noise
            continue
        if sl[0].start < 2 or sl[1].start < 2 or sl[0].stop > m - 2 or sl[1].stop > n - 2:
            continue  # at the frame's edge
        r0, r1 = max(sl[0].start - r_out, 0), sl[0].stop + r_out
        c0, c1 = max(sl[1].start - r_out, 0), sl[1].stop + r_out
        own = lab[r0:r1, c0:c1] == k
        ok = valid[r0:r1, c0:c1]
        if (ndi.binary_dilation(own, iterations=2) & ~ok).any():
            continue  # reaches the mask's edge: a penumbra
        ring = ndi.binary_dilation(own, iterations=r_out) & ~ndi.binary_dilation(own, iterations=r_in) & ok
        if ring.sum() < 10:
            continue
        # darker than its own surroundings by 0.9 of the pixel noise on average: a speck on the
        # screen; a dip that a smooth background leaves beside a narrow glare sits in a wide
        # region read too high, and its surroundings are as dark as itself
        z = res[r0:r1, c0:c1] / np.maximum(nz[r0:r1, c0:c1], 1e-6)
        keep[k] = float(z[own].mean()) - float(np.median(z[ring])) < -0.9
    dark &= keep[lab]
    if not dark.any():
        return None
    return ndi.binary_dilation(dark, iterations=max(1, int(round(3.0 * s)))) & valid
