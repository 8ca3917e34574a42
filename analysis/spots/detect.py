"""Detection: the matched filter (a Gaussian of the spot size, run as two row strips
on large frames), its noise scale, and the local maxima above a significance
threshold.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

from ._common import _by_row_strips
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


def _detect(res, bg, valid, s, min_snr):
    """Matched-filter maxima (row, col), rough amplitudes and detection SNR (no fitting)."""
    noise_f = np.maximum(bg.noise, 1e-6) * _gauss_kernel_norm(s)
    f1 = _matched(res, s)
    snr = f1 / noise_f
    rc = _maxima(snr, min_snr, valid)
    if not len(rc):
        return rc, np.zeros(0), np.zeros(0)
    return rc, 2.0 * f1[rc[:, 0], rc[:, 1]], snr[rc[:, 0], rc[:, 1]]


def _residual_snr(f1, spots, noise, gain, knorm, sigma_px, half):
    """Matched-filter response `f1` less the filtered models of the fitted `spots`, in units
    of its local noise; returns (significance, filtered models), both (M, N).

    A profile seen through the matched filter is drawn directly (a Gaussian filtered by a
    Gaussian is a Gaussian). Model errors (≈ 3 % of the model) and the spots' own shot
    noise add to the background's variance.
    """
    shape = f1.shape
    a2, sr2, st2 = _PROFILE.filtered(spots["amp"], spots["sr"], spots["st"], sigma_px)
    hf = max(half, int(math.ceil(3.5 * float(np.max(np.maximum(sr2, st2), initial=sigma_px)))))
    fm = _render(shape, spots["rc"], a2, sr2, st2, spots["u"], hf)
    err = _PROFILE.filtered(*_PROFILE.squared(0.03 * spots["amp"], spots["sr"], spots["st"]), sigma_px)
    fm2 = _render(shape, spots["rc"], *err, spots["u"], hf)
    extra = fm2 + (gain * np.clip(fm, 0, None) if gain else 0.0)
    noise2_f = (knorm * np.sqrt(noise**2 + extra)).astype(np.float32)
    return (f1 - fm) / noise2_f, fm
