"""Spot widths: an oriented elliptical Gaussian fitted to each spot on a window sized to it.

The spot search (:mod:`analysis.spots.fit`) fits every spot on a window of ±3 σ of the
*common* spot width, with its axes held radial and tangential: right for locating spots,
too tight for a spot broadened by small domains, which then reaches past its window.
:func:`fit_spot_widths` refits each spot with

    f(x, y) = A exp(−½ dᵀ C⁻¹ d) + b₀ + b_x Δx + b_y Δy,   d = (x − x₀, y − y₀),

where C = R(φ) diag(σ₁², σ₂²) R(φ)ᵀ is a free covariance (two widths and the image
angle φ of the long axis), and the tilted plane takes the local diffuse background. The
window grows with the spot (±3.5 σ₁) and the neighbours' light is subtracted first
(their own fits of a first pass). Reported: full widths at half maximum along the
ellipse axes, and along and across the direction from the pattern centre (the FWHM
of the spot's marginal profile along that direction: 2√(2 ln 2) √(uᵀ C u)).

Pixels: (x, y) at the edges, x right, y down; image angles counter-clockwise on the
screen from +x (y up), as in :mod:`analysis.optics`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ImageError, ParameterError
from ..timelimit import check_time

__all__ = ["SpotWidths", "fit_spot_widths", "FWHM_PER_SIGMA"]

#: FWHM of a Gaussian over its σ: 2 √(2 ln 2)
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

_MAX_HALF_PX = 40


@dataclass(frozen=True, eq=False)
class SpotWidths:
    """Oriented widths of K spots.

    Attributes
    ----------
    xy_px : (K, 2) ndarray of float64
        Centres from the oriented fit, (x, y) pixels (the input where the fit failed).
    cov_px2 : (K, 2, 2) ndarray of float64
        Covariance C of each Gaussian in (x, y_down) pixel axes, px².
    fwhm_major_px, fwhm_minor_px : (K,) ndarray of float64
        FWHM along the long and the short axis of the ellipse.
    angle_deg : (K,) ndarray of float64
        Image angle of the long axis, counter-clockwise from +x, in [0, 180).
    fwhm_radial_px, fwhm_tangential_px : (K,) ndarray of float64
        FWHM of the marginal profile along the direction from `center_xy` and across it.
    amplitude : (K,) ndarray of float64
        Fitted peak height above the local plane (image units).
    ok : (K,) ndarray of bool
        The fit converged to a peak inside its window with finite widths.
    center_xy : (2,) ndarray of float64
        Reference point of radial / tangential, (x, y) pixels.
    """

    xy_px: np.ndarray
    cov_px2: np.ndarray
    fwhm_major_px: np.ndarray
    fwhm_minor_px: np.ndarray
    angle_deg: np.ndarray
    fwhm_radial_px: np.ndarray
    fwhm_tangential_px: np.ndarray
    amplitude: np.ndarray
    ok: np.ndarray
    center_xy: np.ndarray

    def __post_init__(self):
        for name in self.__dataclass_fields__:
            a = np.array(getattr(self, name))
            a.flags.writeable = False
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return int(self.xy_px.shape[0])

    def radial_unit(self) -> np.ndarray:
        """(K, 2) unit vectors (x, y_down) from `center_xy` to each spot ((1, 0) at the centre).

        Returns
        -------
        (K, 2) ndarray of float64
            Unit vectors (x, y).
        """
        return _radial_units(self.xy_px, self.center_xy)


def _radial_units(xy, center_xy):
    v = np.asarray(xy, float) - np.asarray(center_xy, float)[None]
    n = np.hypot(v[:, 0], v[:, 1])
    return np.where(n[:, None] > 1e-9, v / np.maximum(n, 1e-9)[:, None], np.array([[1.0, 0.0]]))


def _cov(ls1, ls2, phi):
    """(K, 2, 2) covariance in (x, y_down) from log σ₁, log σ₂ and the image angle φ (rad, y up)."""
    c, s = np.cos(phi), -np.sin(phi)  # long axis as (x, y_down)
    s1, s2 = np.exp(2 * ls1), np.exp(2 * ls2)
    return np.stack([np.stack([c * c * s1 + s * s * s2, c * s * (s1 - s2)], -1),
                     np.stack([c * s * (s1 - s2), s * s * s1 + c * c * s2], -1)], -2)


def _model(p, dx, dy):
    """Oriented Gaussian plus plane on offsets (dx, dy) from the window centre; p as in _fit_one."""
    a, x0, y0, ls1, ls2, phi, b0, bx, by = p
    ls1, ls2 = min(max(ls1, -2.0), 6.0), min(max(ls2, -2.0), 6.0)  # keeps trial steps finite (σ 0.14–400 px)
    cv = _cov(np.array([ls1]), np.array([ls2]), np.array([phi]))[0]
    det = cv[0, 0] * cv[1, 1] - cv[0, 1] ** 2
    ix, ixy, iy = cv[1, 1] / det, -cv[0, 1] / det, cv[0, 0] / det
    u, v = dx - x0, dy - y0
    return a * np.exp(-0.5 * (ix * u * u + 2 * ixy * u * v + iy * v * v)) + b0 + bx * dx + by * dy


def _fit_one(data, ok, dx, dy, sigma0, half):
    """Least-squares fit on one window; returns (p, converged)."""
    from scipy.optimize import least_squares

    d, x, y = data[ok], dx[ok], dy[ok]
    if d.size < 15:
        return None
    edge = np.maximum(np.abs(dx), np.abs(dy)) >= half - 0.5
    b0 = float(np.median(data[ok & edge])) if np.any(ok & edge) else float(np.min(d))
    a0 = max(float(data[half, half]) - b0 if ok[half, half] else float(d.max()) - b0, 1e-6)
    p0 = np.array([a0, 0.0, 0.0, math.log(sigma0), math.log(sigma0) - 0.05, 0.3, b0, 0.0, 0.0])
    scale = max(float(np.std(d)), 1e-9)

    def res(p):
        return (_model(p, x, y) - d) / scale

    try:  # Levenberg–Marquardt (MINPACK): unbounded; the result is checked afterwards
        r = least_squares(res, p0, method="lm", x_scale="jac", max_nfev=400)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not (np.all(np.isfinite(r.x)) and abs(r.x[1]) < half and abs(r.x[2]) < half and
            max(r.x[3], r.x[4]) < math.log(2.0 * half) and min(r.x[3], r.x[4]) > math.log(0.3)):
        return None
    return r.x if r.status > 0 else None


def fit_spot_widths(image, xy_px, *, sigma_px: float, center_xy, mask=None, saturation_level=None,
                    widths_px=None) -> SpotWidths:
    """Fit an oriented elliptical Gaussian to each spot (see the module docstring).

    Parameters
    ----------
    image : (M, N) array_like of real
        The frame, background included (a tilted plane per window takes it).
    xy_px : (K, 2) array_like of float
        Spot centres (x, y), pixels, e.g. ``SpotTable.xy``.
    sigma_px : float, keyword-only
        The spots' common Gaussian σ (px): the smallest window and the starting width.
    center_xy : (x, y), keyword-only
        The pattern centre: the reference of radial and tangential.
    mask : (M, N) array_like of bool, optional, keyword-only
        Valid pixels (screen minus gun shadow); others are left out of the fits.
    saturation_level : float, optional, keyword-only
        Pixels at or above it are left out (a clipped core would widen the fit).
    widths_px : (K,) array_like of float, optional, keyword-only
        A first guess of each spot's σ (px), e.g. from the spot search; default `sigma_px`.

    Returns
    -------
    SpotWidths
        Major, minor, radial and tangential FWHM of each spot (pixels), its axis angle and amplitude, and whether the fit held.

    Examples
    --------
    >>> yy, xx = np.mgrid[:64, :64].astype(float)
    >>> phi = np.radians(30.0); c, s = np.cos(phi), -np.sin(phi)   # long axis at 30°, y down
    >>> u, v = (xx - 30.4) * c + (yy - 33.2) * s, -(xx - 30.4) * s + (yy - 33.2) * c
    >>> img = 10 + 0.1 * xx + 500 * np.exp(-0.5 * (u ** 2 / 4.0 ** 2 + v ** 2 / 2.0 ** 2))
    >>> w = fit_spot_widths(img, [[30.0, 33.0]], sigma_px=2.0, center_xy=(0.0, 0.0))
    >>> print(np.round([w.fwhm_major_px[0] / FWHM_PER_SIGMA, w.fwhm_minor_px[0] / FWHM_PER_SIGMA,
    ...                 w.angle_deg[0]], 4).tolist(), bool(w.ok[0]))
    [4.0, 2.0, 30.0] True
    """
    img = np.asarray(image)
    if img.ndim != 2 or not np.issubdtype(img.dtype, np.number):
        raise ImageError(f"`image` must be a 2-D array of real numbers, got shape {img.shape}.")
    img = img.astype(np.float64, copy=False)
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    s0 = float(sigma_px)
    if not (0.3 <= s0 <= 30.0 and math.isfinite(s0)):
        raise ParameterError(f"`sigma_px` must be between 0.3 and 30 px, got {sigma_px!r}.")
    cen = np.asarray(center_xy, dtype=np.float64).reshape(2)
    valid = np.ones(img.shape, bool) if mask is None else np.asarray(mask, bool)
    if valid.shape != img.shape:
        raise ParameterError(f"`mask` must have the image's shape {img.shape}, got {valid.shape}.")
    if saturation_level is not None:
        valid = valid & (img < float(saturation_level) - 0.5)
    k = len(xy)
    guess = np.full(k, s0) if widths_px is None else np.clip(np.asarray(widths_px, float).reshape(k), s0, 6 * s0)
    params = np.full((k, 9), np.nan)
    # pass 1: each spot alone; pass 2: the neighbours' pass-1 models subtracted (only where one is near)
    for pas in (1, 2):
        near = _neighbours(xy, params, guess, pas)
        for i in range(k):
            if pas == 2 and not near[i]:
                continue
            if i % 16 == 0:
                check_time()  # a caller's time limit (web job, CLI) stops the work between spots
            sig = guess[i] if pas == 1 or not np.isfinite(params[i, 3]) else max(math.exp(params[i, 3]), s0)
            p = _fit_window(img, valid, xy, params, i, sig, s0, subtract=pas == 2)
            if p is not None:
                params[i] = p
    return _assemble(xy, params, cen)


def _neighbours(xy, params, guess, pas):
    """Which spots have another spot within reach of their window (pass 2 only)."""
    k = len(xy)
    if pas == 1 or k < 2:
        return np.zeros(k, bool)
    from scipy.spatial import cKDTree

    s = np.where(np.isfinite(params[:, 3]), np.exp(np.nan_to_num(params[:, 3])), guess)
    reach = np.minimum(np.ceil(3.5 * s) + 3.0 * s, 2 * _MAX_HALF_PX)
    d, _ = cKDTree(xy).query(xy, k=2)
    return d[:, 1] < reach + reach.max()


def _fit_window(img, valid, xy, params, i, sig, s0, *, subtract):
    m, n = img.shape
    p = None
    for _ in range(3):  # grow the window until it holds ±3.5 σ of the long axis
        half = int(min(max(math.ceil(3.5 * sig), math.ceil(3.0 * s0), 4), _MAX_HALF_PX))
        c0, r0 = int(round(xy[i, 0])), int(round(xy[i, 1]))
        o = np.arange(-half, half + 1)
        rr, cc = r0 + o[:, None], c0 + o[None, :]
        inside = (rr >= 0) & (rr < m) & (cc >= 0) & (cc < n)
        rr_, cc_ = np.clip(rr, 0, m - 1), np.clip(cc, 0, n - 1)
        data = img[rr_, cc_].copy()
        ok = inside & valid[rr_, cc_]
        dx = np.broadcast_to(o[None, :].astype(float), data.shape)
        dy = np.broadcast_to(o[:, None].astype(float), data.shape)
        if subtract:
            data -= _others(params, xy, i, cc, rr)
        q = _fit_one(data, ok, dx, dy, sig, half)
        if q is None:
            return p
        q = q.copy()
        q[1] += c0 - xy[i, 0]  # offsets from the window centre → from the given centre
        q[2] += r0 - xy[i, 1]
        p = q
        s_long = math.exp(max(q[3], q[4]))
        if 3.5 * s_long <= half + 0.5 or half >= _MAX_HALF_PX:
            break
        sig = s_long
    return p


def _others(params, xy, i, cc, rr):
    """The pass-1 Gaussians of every other fitted spot on the window (x = cc, y = rr)."""
    out = np.zeros(np.broadcast(cc, rr).shape)
    for j in range(len(xy)):
        if j == i or not np.isfinite(params[j, 0]):
            continue
        a, x0, y0 = params[j, 0], xy[j, 0] + params[j, 1], xy[j, 1] + params[j, 2]
        s_long = math.exp(max(params[j, 3], params[j, 4]))
        if math.hypot(x0 - cc.mean(), y0 - rr.mean()) > 4.0 * s_long + cc.shape[1]:
            continue
        pj = np.array([a, 0.0, 0.0, params[j, 3], params[j, 4], params[j, 5], 0.0, 0.0, 0.0])
        out = out + _model(pj, cc - x0, rr - y0)
    return out


def _assemble(xy, params, cen) -> SpotWidths:
    k = len(xy)
    good = np.all(np.isfinite(params), axis=1)
    p = np.where(good[:, None], params, np.array([0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0]))
    ls1, ls2, phi = p[:, 3], p[:, 4], p[:, 5]
    swap = ls2 > ls1  # the long axis first
    ls1, ls2 = np.where(swap, ls2, ls1), np.where(swap, ls1, ls2)
    phi = np.where(swap, phi + 0.5 * np.pi, phi)
    cov = _cov(ls1, ls2, phi)
    cent = xy + p[:, 1:3]
    moved = np.hypot(p[:, 1], p[:, 2])
    ok = good & (p[:, 0] > 0) & (moved < 3.0 * np.exp(ls1) + 1.0) & (np.exp(ls1) < 0.9 * _MAX_HALF_PX / 3.5)
    u = _radial_units(np.where(ok[:, None], cent, xy), cen)
    t = np.column_stack([-u[:, 1], u[:, 0]])
    var_r = np.einsum("ki,kij,kj->k", u, cov, u)
    var_t = np.einsum("ki,kij,kj->k", t, cov, t)
    nan = np.full(k, np.nan)
    return SpotWidths(
        xy_px=np.where(ok[:, None], cent, xy),
        cov_px2=np.where(ok[:, None, None], cov, np.nan),
        fwhm_major_px=np.where(ok, FWHM_PER_SIGMA * np.exp(ls1), nan),
        fwhm_minor_px=np.where(ok, FWHM_PER_SIGMA * np.exp(ls2), nan),
        angle_deg=np.where(ok, np.mod(np.degrees(phi), 180.0), nan),
        fwhm_radial_px=np.where(ok, FWHM_PER_SIGMA * np.sqrt(var_r), nan),
        fwhm_tangential_px=np.where(ok, FWHM_PER_SIGMA * np.sqrt(var_t), nan),
        amplitude=np.where(ok, p[:, 0], nan),
        ok=ok,
        center_xy=cen,
    )
