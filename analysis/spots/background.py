"""Smooth background and per-pixel noise: :class:`BackgroundEstimate` and
:func:`estimate_background` (clipped block statistics, a 3×3 median over blocks,
cubic interpolation to pixels, and the variance per unit signal).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import ImageError, ParameterError
from ._common import _as_float_image, _check_mask, _fill_nan_grid, _interp_matrix, _nanmedian


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
    # the raw statistics of every block (level, noise, kept count, usable) and of the dark
    # pixels (level, variance), for a second estimate of the same frame (`reuse`)
    _blocks: tuple | None = field(default=None, repr=False)
    _dark: tuple | None = field(default=None, repr=False)

    def __iter__(self):
        return iter((self.background, self.noise))

    def variance(self, signal_adu: np.ndarray) -> np.ndarray:
        """Variance of pixels holding extra `signal_adu` over the background."""
        v = self.noise**2
        if self.gain_adu:
            v = v + self.gain_adu * np.clip(signal_adu, 0.0, None)
        return v


def estimate_background(image, mask=None, *, block_px: int = 32, exclude=None,
                        dark_mask=None, reuse=None) -> BackgroundEstimate:
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
        The camera frame, any real dtype.
    mask : (M, N) array_like of bool, optional
        Valid pixels (the screen without the gun shadow); default all.
    block_px : int, keyword-only
        Block size; the background must be smooth on this scale.
    exclude : (M, N) array_like of bool, optional, keyword-only
        Further pixels to leave out (e.g. around spots already found).
    dark_mask : (M, N) array_like of bool, optional, keyword-only
        Pixels that see no electrons (outside the screen) for the dark level.
    reuse : BackgroundEstimate, optional, keyword-only
        An estimate of the same image with the same `mask`, `block_px` and `dark_mask`
        but no `exclude` (or less of it): blocks without excluded pixels, and the dark
        level, are taken from it instead of measured again.

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
    k = max(1, int(math.sqrt(m * n / 40_000)))  # ≈ 40 000 pixels on a regular grid
    sample = img[::k, ::k][valid[::k, ::k]]
    if sample.size == 0:
        sample = img[valid]
    step = 1.0 if np.allclose(sample, np.rint(sample)) else 1e-6 * max(float(np.ptp(sample)), 1e-12)
    pad = np.full((gm * b, gn * b), np.nan, dtype=np.float32)
    np.copyto(pad[:m, :n], img, where=valid, casting="unsafe")
    blocks = pad.reshape(gm, b, gn, b).transpose(0, 2, 1, 3).reshape(gm * gn, b * b)
    old = reuse._blocks if (reuse is not None and reuse._blocks is not None and reuse.block_px == b
                           and reuse.background.shape == img.shape) else None
    if old is not None and exclude is not None:
        # only blocks that lost pixels to `exclude` are measured again
        ex = np.zeros((gm * b, gn * b), bool)
        ex[:m, :n] = _check_mask(exclude, img.shape, "exclude") & _check_mask(mask, img.shape)
        redo = np.flatnonzero(ex.reshape(gm, b, gn, b).any(axis=(1, 3)).ravel())
        mean, sd, kn, good = (a.copy() for a in old)
        if len(redo):
            mean[redo], sd[redo], kn[redo], good[redo] = _block_stats(blocks[redo], b, step)
    else:
        mean, sd, kn, good = _block_stats(blocks, b, step)  # (memory-bound: a second thread does not help)
    raw = (mean, sd, kn, good)
    good = good & (kn >= 16)
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

    dark_level, gain, dark = None, None, None
    if reuse is not None and reuse._dark is not None and dark_mask is not None:
        dark = reuse._dark
    elif dark_mask is not None:
        dm = _check_mask(dark_mask, img.shape, "dark_mask")
        if dm.sum() >= 200:
            dv = img[dm]
            dq = dv[:: max(1, len(dv) // 50_000)]  # median and MAD from ≤ 10⁵ pixels are plenty
            d_med = float(np.median(dq))
            d_sd = 1.4826 * float(np.median(np.abs(dq - d_med)))
            inl = np.abs(dv - d_med) < 5 * max(d_sd, 0.5)
            dark = (float(dv[inl].mean()), float(dv[inl].var()))
    if dark is not None:
        dark_level, dark_var = dark
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
    return BackgroundEstimate(background, noise, gain, dark_level, b, raw, dark)


def _block_stats(blocks: np.ndarray, b: int, step: float):
    """Clipped mean, noise, kept count and usability of each b×b block, given as the rows of
    `blocks` ((K, b²) float32, row-major pixels, NaN = invalid)."""
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


def _nan_median3(g: np.ndarray) -> np.ndarray:
    p = np.pad(g, 1, mode="constant", constant_values=np.nan)
    stack = np.stack([p[i:i + g.shape[0], j:j + g.shape[1]] for i in range(3) for j in range(3)])
    return _nanmedian(stack, 0)
