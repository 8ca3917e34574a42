"""Saturated spots: the pixels a fit may use beside a clipped core, and one spot per
clipped region, measured on its unsaturated wings.

A spot brighter than the camera's full scale is clipped flat at its core; on a CCD the
excess charge also runs up and down the core's columns (blooming), filling them to full
scale, and the last pixel of each run holds what is left over, above the spot's own
profile. The core, its bloom and the pixels next to either say nothing true about the
spot's profile; its wings do. The matched filter, which sees all of that light, finds
peaks along the bloom and at the ends of the runs: every detection inside a clipped
region's reach is the one spot, and it is fitted once on its wings.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

from .fit import FLAG_FIT_FAILED, _Fitter, _concat, _fit_candidates, _take

_EIGHT = np.ones((3, 3), bool)


def _clipped(img: np.ndarray, valid: np.ndarray, sat: float | None):
    """(M, N) bool: valid pixels at full scale and their eight neighbours (a bloom run's last,
    partly filled pixel lies next to it); None when nothing is clipped."""
    if sat is None:
        return None
    full = valid & (img >= sat - 0.5)
    if not full.any():
        return None
    return ndi.binary_dilation(full, structure=_EIGHT) & valid


def _merge_saturated(res, noise, ok_fit, valid, clipped, spots, snr_map, orient, gain, sigma_px, s_long):
    """Replace the detections inside each clipped region's reach by one spot fitted on the
    region's unsaturated wings.

    Parameters
    ----------
    res, noise : (M, N) ndarray
        Background-subtracted image and pixel noise.
    ok_fit, valid : (M, N) ndarray of bool
        Pixels a fit may use (valid, not `clipped`), and the valid ones.
    clipped : (M, N) ndarray of bool
        From :func:`_clipped`.
    spots : dict of arrays
        Spot records (:mod:`.fit`).
    snr_map : (M, N) ndarray
        Detection significance (for the merged spot's ``snr``).
    orient : (2,) centre or _FixedAxis
        Axes of the fits.
    gain : float or None
        Variance per unit signal.
    sigma_px, s_long : float
        The spots' σ and that of their long axis (px).

    Returns
    -------
    dict of arrays
        The spots, one per clipped region that held any detection.

    The region's reach is the clipped pixels grown by 3 σ (long axis). The fit starts at
    the centroid of the clipped pixels (blooming runs symmetrically up and down, so the
    centroid stays near the spot) on a window reaching 3 σ beyond the clipped core's
    half-width. Where that fit finds nothing as wide as half the spots' σ or with a peak
    of half the clipped level (a clipped hot pixel has no wings), the detections there are
    marked as failed fits (no spot-shaped peak); where it fails, the detection nearest
    the centroid stays as it was.
    """
    if not len(spots["rc"]):
        return spots
    lab, n = ndi.label(clipped, structure=_EIGHT)
    if n == 0:
        return spots
    m, nn = res.shape
    reach = int(math.ceil(3.0 * s_long))
    ri = np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, m - 1)
    ci = np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, nn - 1)
    drop = np.zeros(len(ri), bool)
    failed = np.zeros(len(ri), bool)
    new = []
    for k, sl in enumerate(ndi.find_objects(lab), start=1):
        if sl is None:
            continue
        r0, r1 = max(sl[0].start - reach, 0), min(sl[0].stop + reach, m)
        c0, c1 = max(sl[1].start - reach, 0), min(sl[1].stop + reach, nn)
        region = ndi.binary_dilation(lab[r0:r1, c0:c1] == k, iterations=reach)
        inbox = (ri >= r0) & (ri < r1) & (ci >= c0) & (ci < c1)
        members = np.flatnonzero(inbox)
        members = members[region[ri[members] - r0, ci[members] - c0]]
        if len(members) == 0:
            continue
        rr, cc = np.nonzero(lab[sl] == k)
        cen = np.array([[rr.mean() + sl[0].start, cc.mean() + sl[1].start]])
        half = int(min(math.ceil(0.5 * (sl[1].stop - sl[1].start) + 3.0 * s_long), 40))
        fit = _fit_candidates(_Fitter(max(half, 3)), res, noise, ok_fit, valid, cen, snr_map, orient, gain,
                              sigma_px)
        box_ok = (sl[0].start - sigma_px <= fit["rc"][0, 0] <= sl[0].stop + sigma_px) and \
            (sl[1].start - sigma_px <= fit["rc"][0, 1] <= sl[1].stop + sigma_px)
        drop[members] = True
        # a clipped spot's peak, read from its wings, reaches at least near the clipped level; a
        # clipped hot pixel has no wings: its fit is faint, or narrower than half the spots' σ
        wide_enough = math.sqrt(fit["sr"][0] * fit["st"][0]) >= 0.5 * sigma_px
        bright_enough = fit["amp"][0] >= 0.5 * float(np.max(res[sl][lab[sl] == k]))  # the clipped level
        if (fit["flags"][0] & FLAG_FIT_FAILED) == 0 and box_ok and wide_enough and bright_enough:
            fit["snr"] = np.array([float(np.max(spots["snr"][members]))])
            new.append(fit)
        elif (fit["flags"][0] & FLAG_FIT_FAILED) == 0 and not (wide_enough and bright_enough):
            drop[members] = False  # no spot around the clipped pixels: what was found there is none
            failed[members] = True
        else:
            near = members[np.argmin(np.hypot(*(spots["rc"][members] - cen).T))]
            drop[near] = False
    spots = dict(spots, flags=np.where(failed, spots["flags"] | FLAG_FIT_FAILED, spots["flags"]).astype(np.uint8))
    out = _take(spots, ~drop)
    for f in new:
        out = _concat(out, {key: f[key].astype(out[key].dtype, copy=False) for key in out})
    return out
