"""The spots' point-spread function, measured on the frame's own bright isolated spots:
its width σ (iterated until the fit window suits it) and, when every spot shares a long
axis fixed in the image, that axis and the elongation (:func:`_psf_from_bright`).
"""

from __future__ import annotations

import math

import numpy as np

from .accept import MIN_SIGMA_PX
from .fit import _FixedAxis, _Fitter, _fit_candidates


def _psf_from_bright(res, bg, valid, unsaturated, rc, snr, s0, centre_rc, n_max: int = 40, n_iter: int = 5):
    """The spots' point-spread width and shape from up to `n_max` bright, isolated spots:
    (σ px, long-axis image angle ° or None, elongation ≥ 1); None when fewer than 3 fit.

    σ is the median Gaussian σ (geometric mean of the two axes). The spots are fitted on
    the window :func:`find_spots` uses for a trial σ, starting from `s0`; while the median
    width differs from the trial by more than 10 %, the trial becomes that median and the
    spots are fitted again (a window of ±3 σ₀ cuts a spot twice as wide down to its core,
    and its local offset takes up the wings, so one pass reads wide spots too narrow).
    Spots closer than 6 trial σ to another detection are left out (their fits pull on each
    other), and so are detections with half their 3×3 light in one pixel and fits narrower
    than a spot can be (hot pixels, cosmic rays), and fits too faint to
    measure a width: a matched-filter significance A √π σ / noise below 35 (a peak 10 × the
    noise for σ = 2 px).

    The shape: second moments of each spot's light (:func:`_moments`). When the spots share
    a long axis fixed in the image (median ellipticity (λ₁ − λ₂)/(λ₁ + λ₂) ≥ 0.22, i.e. an
    elongation √(λ₁/λ₂) ≥ 1.25, and more coherent in the image than along the radius), the
    spots are fitted again with their axes held along it, and σ and the elongation are the
    medians of those fits. Otherwise the axes stay radial (angle None).
    """
    if len(rc) < 3:
        return None
    from scipy.spatial import cKDTree

    d, _ = cKDTree(rc).query(rc, k=2)
    # a detection holding more than half the light of its 3×3 neighbourhood in one pixel is
    # narrower than any spot (σ ≥ 0.7 px puts at most 0.36 there): a hot pixel or a cosmic ray.
    # Left out before the brightest are chosen, or a frame with many of them measures them
    m, n = res.shape
    r0, c0 = np.clip(rc[:, 0], 1, m - 2), np.clip(rc[:, 1], 1, n - 2)
    box = sum(res[r0 + i, c0 + j] for i in (-1, 0, 1) for j in (-1, 0, 1))
    sharp = res[rc[:, 0], rc[:, 1]] > 0.5 * np.maximum(box, 1e-12)
    ok_fit = valid if unsaturated is None else valid & unsaturated
    noise = np.maximum(bg.noise, 1e-6)
    zeros = np.zeros(res.shape, np.float32)
    centre_rc = np.asarray(centre_rc, float)

    def fit_bright(s, orient):
        e = orient.elongation if isinstance(orient, _FixedAxis) else 1.0
        pick = np.flatnonzero((d[:, 1] > 6.0 * s * math.sqrt(e)) & (snr > 15.0) & ~sharp)
        pick = pick[np.argsort(-snr[pick])][:n_max]
        if len(pick) < 3:
            return None
        half = max(3, int(math.ceil(3.0 * s * math.sqrt(e))))
        fit = _fit_candidates(_Fitter(half), res, noise, ok_fit, valid, rc[pick].astype(float), zeros, orient,
                              bg.gain_adu, s)
        noise_at = noise[rc[pick, 0], rc[pick, 1]]
        width = np.sqrt(fit["sr"] * fit["st"])
        # hot pixels and cosmic rays are often the brightest detections of a sparse frame: a fit
        # narrower than MIN_SIGMA_PX is one of them, never a diffraction spot (spots.accept)
        good = (fit["flags"] == 0) & (fit["amp"] * math.sqrt(math.pi) * width > 35.0 * noise_at) & \
            (width >= MIN_SIGMA_PX)
        return (fit, good, width) if good.sum() >= 3 else None

    s, found, last = float(s0), None, None
    for _ in range(n_iter):
        got = fit_bright(s, centre_rc)
        if got is None:
            break
        last = got
        found = float(min(max(np.median(got[2][got[1]]), 0.5), 20.0))
        if abs(math.log(found / s)) < math.log(1.1):
            break
        s = found
    if found is None:
        return None
    fit, good, _ = last
    eps_img, eps_rad, axis_rc = _ellipticity(res, valid, fit["rc"][good], fit["off"][good], found, centre_rc)
    if not (eps_img >= 0.22 and eps_img > eps_rad):
        return found, None, 1.0
    s, e = found, math.sqrt((1 + eps_img) / (1 - eps_img))
    for _ in range(3):
        got = fit_bright(s, _FixedAxis(axis_rc, e))
        if got is None:
            break
        fit, good, width = got
        s_new = float(min(max(np.median(width[good]), 0.5), 20.0))
        e_new = float(np.clip(np.median(fit["sr"][good] / fit["st"][good]), 1.0, 10.0))
        done = abs(math.log(s_new / s)) < 0.02 and abs(math.log(e_new / e)) < 0.02
        s, e = s_new, e_new
        if done:
            break
    if e < 1.25:
        return s, None, 1.0
    return s, math.degrees(math.atan2(-axis_rc[0], axis_rc[1])) % 180.0, e


def _ellipticity(res, valid, rc, off, sigma_px, centre_rc):
    """Shared elongation of spots from the second moments of their light.

    Each spot's light (`res` less its local offset `off`) is weighted with a round Gaussian
    of σ_w = 2 `sigma_px` about its centre; for a Gaussian spot of covariance C the weighted
    second moments are M = (C⁻¹ + σ_w⁻² I)⁻¹, so C = (M⁻¹ − σ_w⁻² I)⁻¹. Returns the median
    ellipticity vector's length in the image frame and in each spot's radial frame (0 for a
    round spread, (λ₁ − λ₂)/(λ₁ + λ₂) for a shared one), and the image-frame long axis as a
    (row, col) unit vector.
    """
    sw = 2.0 * sigma_px
    h = max(3, int(math.ceil(4.0 * sigma_px)))
    o = np.arange(-h, h + 1, dtype=np.float64)
    e_img, e_rad = [], []
    for (r, c), b in zip(rc, off):
        ir, ic = int(round(r)), int(round(c))
        if ir - h < 0 or ic - h < 0 or ir + h >= res.shape[0] or ic + h >= res.shape[1]:
            continue
        win = res[ir - h:ir + h + 1, ic - h:ic + h + 1].astype(np.float64) - b
        ok = valid[ir - h:ir + h + 1, ic - h:ic + h + 1]
        dr, dc = o[:, None] + ir - r, o[None, :] + ic - c
        w = np.where(ok, np.exp(-0.5 * (dr * dr + dc * dc) / sw**2) * win, 0.0)
        tot = w.sum()
        if tot <= 0 or ok.mean() < 0.9:
            continue
        m = np.array([[np.sum(w * dr * dr), np.sum(w * dr * dc)], [np.sum(w * dr * dc), np.sum(w * dc * dc)]]) / tot
        try:
            prec = np.linalg.inv(m) - np.eye(2) / sw**2
            if np.linalg.det(prec) <= 0 or prec[0, 0] <= 0:
                continue
            cov = np.linalg.inv(prec) - np.eye(2) / 12.0  # less the pixel's own box
        except np.linalg.LinAlgError:
            continue
        tr = cov[0, 0] + cov[1, 1]
        if tr <= 0:
            continue
        e_img.append(((cov[0, 0] - cov[1, 1]) / tr, 2 * cov[0, 1] / tr))
        u = np.array([r, c]) - centre_rc
        u = u / max(np.hypot(*u), 1e-9)
        rot = np.array([u, [-u[1], u[0]]])
        cr = rot @ cov @ rot.T
        e_rad.append(((cr[0, 0] - cr[1, 1]) / tr, 2 * cr[0, 1] / tr))
    if len(e_img) < 3:
        return 0.0, 0.0, np.array([1.0, 0.0])
    mi, mr = np.median(np.array(e_img), axis=0), np.median(np.array(e_rad), axis=0)
    th = 0.5 * math.atan2(mi[1], mi[0])  # from the row axis towards the column axis
    return float(np.hypot(*mi)), float(np.hypot(*mr)), np.array([math.cos(th), math.sin(th)])
