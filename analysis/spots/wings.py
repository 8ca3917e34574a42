"""Wings of the spots: light beyond the fitted Gaussian, measured on the frame's own bright
spots and drawn under every spot before the search for faint spots beside bright ones.

A phosphor screen's halo, a lens's scatter or the spot's own profile (Lorentzian-like in
disordered layers) put more light far from a spot's centre than the fitted Gaussian
holds. After the Gaussian is removed that light is a ring around every bright spot,
and at a few per cent of a bright spot's peak it stands far above the noise: the search
for faint spots beside bright ones then reports the ring as spots. The point-spread is the
same for all spots, so its wings are measured once: the median, over bright isolated
spots, of the azimuthal mean of (image − background − fitted Gaussian) / peak,
in rings of ρ = r / σ. Where that profile is not significant the frame has no wings and
nothing is drawn.
"""

from __future__ import annotations

import math

import numpy as np

from ._common import _nanmedian
from .fit import FLAG_FIT_FAILED, FLAG_NEAR_EDGE, FLAG_SATURATED, _PROFILE

_RHO_EDGES = np.arange(0.0, 6.01, 0.5)  # rings of ρ = r / σ
_RHO_MID = 0.5 * (_RHO_EDGES[1:] + _RHO_EDGES[:-1])
_MAX_HALF_PX = 40


def _wing_profile(res, noise, valid, spots, n_max: int = 40):
    """Measured wing light per unit peak in rings of ρ = r/σ ((12,) float64), or None.

    Bright (peak ≥ 20 × noise), isolated (no other spot within 12 σ), unflagged spots, up
    to `n_max` of them. The profile counts when some ring beyond ρ = 2 holds at least 0.5 %
    of the peak and stands 4 standard errors (spread over the spots / √n) above zero, from
    at least 5 spots.
    """
    from scipy.spatial import cKDTree

    k = len(spots["rc"])
    if k < 5:
        return None
    s = np.sqrt(spots["sr"] * spots["st"])
    m, n = res.shape
    ri = np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, m - 1)
    ci = np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, n - 1)
    d, _ = cKDTree(spots["rc"]).query(spots["rc"], k=2)
    clean = (spots["flags"] & (FLAG_FIT_FAILED | FLAG_NEAR_EDGE | FLAG_SATURATED)) == 0
    pick = np.flatnonzero(clean & (d[:, 1] > 12.0 * s) & (spots["amp"] > 20.0 * noise[ri, ci]))
    pick = pick[np.argsort(-spots["amp"][pick])][:n_max]
    if len(pick) < 5:
        return None
    rows = []
    for i in pick:
        h = int(min(math.ceil(6.0 * s[i]), _MAX_HALF_PX))
        r0, c0 = ri[i], ci[i]
        if r0 - h < 0 or c0 - h < 0 or r0 + h >= m or c0 + h >= n:
            continue
        win = res[r0 - h:r0 + h + 1, c0 - h:c0 + h + 1].astype(np.float64)
        ok = valid[r0 - h:r0 + h + 1, c0 - h:c0 + h + 1]
        mdl = _PROFILE.window(spots["rc"][i:i + 1], spots["amp"][i:i + 1], spots["sr"][i:i + 1],
                              spots["st"][i:i + 1], spots["u"][i:i + 1], h)[0]
        o = np.arange(-h, h + 1)
        rho = np.hypot((r0 - spots["rc"][i, 0]) + o[:, None], (c0 - spots["rc"][i, 1]) + o[None, :]) / s[i]
        resid = (win - mdl) / spots["amp"][i]  # the offset took up some of the wings: not subtracted
        b = np.digitize(rho, _RHO_EDGES) - 1
        use = ok & (b >= 0) & (b < len(_RHO_MID))
        cnt = np.bincount(b[use], minlength=len(_RHO_MID))
        tot = np.bincount(b[use], weights=resid[use], minlength=len(_RHO_MID))
        rows.append(np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan))
    if len(rows) < 5:
        return None
    rows = np.array(rows)
    prof = _nanmedian(rows, 0)  # a ring no spot reaches (masked) stays NaN, then 0
    cnt = np.isfinite(rows).sum(axis=0)
    mean = np.nansum(rows, axis=0) / np.maximum(cnt, 1)
    sd = np.sqrt(np.nansum((rows - mean) ** 2, axis=0) / np.maximum(cnt, 1))  # as np.nanstd
    err = np.where(cnt > 0, 1.2533 * sd / math.sqrt(len(rows)), np.nan)  # standard error of a median
    far = _RHO_MID > 2.0
    if not np.any(far & (prof > 0.005) & (prof > 4.0 * np.nan_to_num(err, nan=np.inf))):
        return None
    return np.nan_to_num(prof)


def _wing_image(shape, spots, profile) -> np.ndarray:
    """(M, N) float32: peak × `profile`(r/σ) of every fitted spot, out to ρ = 6 (image units)."""
    out = np.zeros(shape, np.float32)
    m, n = shape
    s = np.sqrt(spots["sr"] * spots["st"])
    good = ((spots["flags"] & FLAG_FIT_FAILED) == 0) & (spots["amp"] > 0)
    for i in np.flatnonzero(good):
        h = int(min(math.ceil(6.0 * s[i]), _MAX_HALF_PX))
        r0, c0 = int(round(spots["rc"][i, 0])), int(round(spots["rc"][i, 1]))
        ra, rb, ca, cb = max(r0 - h, 0), min(r0 + h + 1, m), max(c0 - h, 0), min(c0 + h + 1, n)
        if ra >= rb or ca >= cb:
            continue
        rho = np.hypot(np.arange(ra, rb)[:, None] - spots["rc"][i, 0], np.arange(ca, cb)[None, :] - spots["rc"][i, 1])
        out[ra:rb, ca:cb] += (spots["amp"][i] * np.interp(rho / s[i], _RHO_MID, profile, right=0.0)).astype(np.float32)
    return out
