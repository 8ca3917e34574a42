"""Which detections can be diffraction spots: the shape test.

A diffraction spot on the screen is imaged through the same optics as every other spot, so
its width is the instrument's point-spread width (broadened, never narrowed, by disorder and
small domains). A detection much narrower than that is no spot: a hot pixel, a cosmic-ray hit,
a one-pixel compression artefact. One much wider, or one whose fit found no peak at all, is
background structure (glare, the rim of a shadow, a ripple of the diffuse background).

`judge_spots` returns, for each row of a `SpotTable`, either an empty reason (kept) or the
reason it is rejected; `split_table` separates the two.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError
from ..profiles import GAUSSIAN
from ._common import _nanmedian
from .fit import FLAG_FIT_FAILED

__all__ = ["MIN_SIGMA_PX", "MIN_LOCAL_SNR", "FAINT_UNEXPLAINED_SNR", "REJECT_NARROW", "REJECT_WIDE", "REJECT_NO_PEAK",
           "REJECT_FLAT", "REJECT_FAINT_UNEXPLAINED", "judge_spots", "local_snr", "split_table"]

REJECT_NARROW = "narrower than the spots (hot pixel or cosmic ray)"
REJECT_WIDE = "wider than a spot (background structure)"
REJECT_NO_PEAK = "no spot-shaped peak (the fit failed)"
REJECT_FLAT = "does not stand out of its own surroundings (background structure)"
REJECT_FAINT_UNEXPLAINED = "faint, and on none of the fitted nets"

# A detection between the detection limit (matched-filter SNR 5) and this cannot be told from
# background structure by its shape: on the independent validation renders the fitted widths
# and peak heights of such detections overlap those of true faint spots. Where a fitted net
# predicts a beam, one faint detection is good evidence; where none does, it was found by a
# search of the whole screen (some 10⁴ spot-sized patches, over glow gradients and shadow
# edges a smooth background model follows only to a few per cent), and it must stand out
# more before it is reported as a spot. Our choice of the bound; spots placed by hand stay.
FAINT_UNEXPLAINED_SNR = 8.0

# Local contrast: the light inside 1.5 σ over a plane fitted to the ring 3–5 σ around it, in
# units of its noise. A spot at the detection limit (matched-filter SNR 5) gives about 4 ± 1
# here; a ripple of the diffuse background, as wide as its ring, gives about 0.
MIN_LOCAL_SNR = 3.0

# A Gaussian spot of σ < 0.7 px puts more than a third of its light into one pixel: it cannot
# be told from a hot pixel, and no LEED camera is set up to undersample its spots that much.
MIN_SIGMA_PX = 0.7


def judge_spots(table, sigma_px: float, *, narrow: float = 0.5, wide: float = 3.5) -> np.ndarray:
    """The reason each detection is not a spot ('' when it is one).

    Parameters
    ----------
    table : SpotTable
        Detections with fitted widths (`fwhm_radial_px`, `fwhm_tangential_px`) and flags.
    sigma_px : float
        The spots' measured Gaussian σ (px), from the bright isolated spots.
    narrow, wide : float, keyword-only
        A detection whose geometric-mean σ is below `narrow` × `sigma_px` (or below
        `MIN_SIGMA_PX`), or above `wide` × `sigma_px`, is rejected. A real spot's fitted
        width scatters by some 15 % at SNR 5 and tails widen bright spots; 0.5 and 3.5 leave
        room for both.

    Returns
    -------
    reasons : (K,) ndarray of object (str)
        Why each spot is rejected; ``""`` for a spot kept.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> t = SimpleNamespace(fwhm_radial_px=np.array([4.7, 0.9, 30.0]), fwhm_tangential_px=np.array([4.7, 0.9, 25.0]),
    ...                     flags=np.zeros(3, np.uint8), peak_snr=np.array([20.0, 300.0, 6.0]))
    >>> [r.split(" (")[0] for r in judge_spots(t, 2.0)]
    ['', 'narrower than the spots', 'wider than a spot']
    """
    s = float(sigma_px)
    if not (math.isfinite(s) and s > 0):
        raise ParameterError(f"`sigma_px` must be a positive number of pixels, got {sigma_px!r}.")
    fwhm = np.sqrt(np.asarray(table.fwhm_radial_px, float) * np.asarray(table.fwhm_tangential_px, float))
    sig = GAUSSIAN.sigma_of_fwhm(fwhm)
    flags = np.asarray(table.flags)
    fitted = (flags & FLAG_FIT_FAILED) == 0
    reasons = np.full(len(sig), "", dtype=object)
    # a saturated spot is fitted on its wings (spots.saturated): its width is its own too
    too_narrow = fitted & (sig < max(narrow * s, MIN_SIGMA_PX))
    reasons[too_narrow] = REJECT_NARROW
    reasons[fitted & (sig > wide * s)] = REJECT_WIDE
    reasons[~fitted] = REJECT_NO_PEAK
    return reasons


def local_snr(image: np.ndarray, valid: np.ndarray, noise: np.ndarray, rc: np.ndarray, sigma_px: float, *,
              ring_sigma_px: float | None = None) -> np.ndarray:
    """Significance of each spot against its own surroundings (NaN where too little is valid).

    Parameters
    ----------
    image : (M, N) ndarray of float
        The frame (ADU), background included: only differences to the ring are used.
    valid : (M, N) ndarray of bool
        Pixels on the screen, off the gun shadow, finite.
    noise : (M, N) ndarray of float
        Noise per pixel (ADU, 1 σ).
    rc : (K, 2) ndarray of float
        Spot centres (row, col), px.
    sigma_px : float
        The spots' Gaussian σ, px.
    ring_sigma_px : float, optional, keyword-only
        σ that sets the ring (default `sigma_px`): the long axis of an elongated spread,
        so that the ring clears the spot's own light along it.

    Returns
    -------
    (K,) ndarray of float64
        (sum of image − ring plane inside 1.5 σ) / its standard deviation.

    Examples
    --------
    >>> yy, xx = np.mgrid[:41, :41]
    >>> flat = 100.0 + 0.5 * xx  # a sloping background...
    >>> spot = flat + 50.0 * np.exp(-((yy - 20) ** 2 + (xx - 20) ** 2) / (2 * 2.0 ** 2))
    >>> ok, n = np.ones((41, 41), bool), np.full((41, 41), 5.0)
    >>> bool(local_snr(spot, ok, n, np.array([[20.0, 20.0]]), 2.0)[0] > 20)
    True
    >>> bool(abs(local_snr(flat, ok, n, np.array([[20.0, 20.0]]), 2.0)[0]) < 1e-6)  # ...is no spot
    True
    """
    s = float(sigma_px)
    s_ring = s if ring_sigma_px is None else max(float(ring_sigma_px), s)
    r_in, r1, r2 = 1.5 * s, 3.0 * s_ring, 5.0 * s_ring
    h = int(math.ceil(r2)) + 1
    m, n = image.shape
    rc = np.asarray(rc, float).reshape(-1, 2)
    out = np.full(len(rc), np.nan)
    if len(rc) == 0:
        return out
    # every spot's (2h + 1)² window at once; pixels off the frame count as invalid
    o = np.arange(-h, h + 1)
    ir, ic = np.rint(rc[:, 0]).astype(np.int64), np.rint(rc[:, 1]).astype(np.int64)
    rr, cc = ir[:, None, None] + o[None, :, None], ic[:, None, None] + o[None, None, :]
    inside = (rr >= 0) & (rr < m) & (cc >= 0) & (cc < n)
    rr, cc = np.clip(rr, 0, m - 1), np.clip(cc, 0, n - 1)
    win = image[rr, cc].astype(np.float64)
    v = valid[rr, cc] & inside
    dy, dx = rr - rc[:, 0, None, None], cc - rc[:, 1, None, None]
    d = np.hypot(dy, dx)
    ap, ring = (d <= r_in) & v, (d >= r1) & (d <= r2) & v
    k, q = ap.sum(axis=(1, 2)), ring.sum(axis=(1, 2))
    ok = (k >= 3) & (q >= 10)
    if not ok.any():
        return out
    nz = _nanmedian(np.where(ap, noise[rr, cc], np.nan).reshape(len(rc), -1), 1)
    basis = (np.ones_like(dy), dy, dx)

    def plane(use):
        """Least-squares plane b0 + b1 dy + b2 dx on the `use` pixels of each window."""
        a = np.stack([np.stack([np.sum(use * bi * bj, axis=(1, 2)) for bj in basis], -1) for bi in basis], -2)
        y = np.stack([np.sum(use * bi * win, axis=(1, 2)) for bi in basis], -1)
        a = a + 1e-9 * np.eye(3)[None]
        coef = np.linalg.solve(a, y[:, :, None])[:, :, 0]
        return coef[:, 0, None, None] + coef[:, 1, None, None] * dy + coef[:, 2, None, None] * dx

    base = plane(ring.astype(np.float64))
    low = ring & (win - base < 3.0 * nz[:, None, None])  # a neighbour's light in the ring is left out
    nl = low.sum(axis=(1, 2))
    redo = (nl >= 10) & (nl < q)
    if redo.any():
        base = np.where(redo[:, None, None], plane(low.astype(np.float64)), base)
    excess = np.sum(np.where(ap, win - base, 0.0), axis=(1, 2))
    snr = excess / np.maximum(nz * np.sqrt(k * (1.0 + k / np.maximum(q, 1))), 1e-12)
    out[ok] = snr[ok]
    return out


def split_table(table, keep: np.ndarray):
    """(kept, rejected) SpotTables: the rows of `table` where `keep` is True, and the others.

    Parameters
    ----------
    table : SpotTable
        The spots.
    keep : (K,) ndarray of bool
        Which rows to keep.

    Returns
    -------
    kept, rejected : SpotTable
        The rows where `keep` is True, and the others.
    """
    keep = np.asarray(keep, bool)
    return table.select(keep), table.select(~keep)
