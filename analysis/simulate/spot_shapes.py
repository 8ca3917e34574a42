"""Spot shapes the renderer can draw besides the round Gaussian: tailed and elongated spots.

A real diffraction spot is the instrument's response (a near-Gaussian core set by the
gun's energy spread, beam divergence and focus) convolved with the surface's own
spot profile. Finite ordered domains and disorder give that profile long,
Lorentzian-like wings; steps or small anisotropic domains widen it along one
direction only. :class:`SpotShape` draws both, alone or together, with the same
``pixel_integrals(rc, sigma, amount, half)`` interface as
:data:`analysis.profiles.GAUSSIAN`, so :func:`analysis.simulate.render._spots_image`
takes either.

Shapes (ρ along the unit vector ``u`` at image angle `axis_deg`, τ across it, both
pixels; σ the width given per spot):

* Gaussian core:  p ∝ exp(−½ (ρ² / (e σ)² + τ² / σ²)),  e = `elongation`.
* Tailed (Moffat): p ∝ (1 + ρ² / (e α)² + τ² / α²)^(−β), with α chosen so that the
  full width at half maximum equals the Gaussian's of the same σ:
  α = σ √(2 ln 2) / √(2^(1/β) − 1). β → ∞ is the Gaussian; β = 1.5 … 3 are the
  wings seen on real screens; the fraction of the light beyond radius R is
  (1 + R²/α²)^(1−β) for a round spot.

Both are normalised to unit volume over the plane and integrated over each pixel
by the midpoint rule on an s × s sub-pixel grid (symmetric about the pixel centre,
so a spot's centre of light stays where it was put).
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError
from ..profiles import GAUSSIAN

__all__ = ["SpotShape", "moffat_alpha_px"]

_LN2 = math.log(2.0)


def moffat_alpha_px(sigma_px, beta: float):
    """Moffat width α (pixels) whose FWHM equals a Gaussian's of width `sigma_px`.

    Parameters
    ----------
    sigma_px : float or ndarray of float
        The Gaussian σ, pixels.
    beta : float
        The Moffat exponent (> 0).

    Returns
    -------
    float or ndarray of float64
        α, pixels.

    Examples
    --------
    >>> a = moffat_alpha_px(2.0, 2.5)
    >>> fwhm_moffat = 2 * a * np.sqrt(2 ** (1 / 2.5) - 1)
    >>> print(round(float(fwhm_moffat / (2 * np.sqrt(2 * np.log(2)) * 2.0)), 12))
    1.0
    """
    return np.asarray(sigma_px, dtype=np.float64) * math.sqrt(2.0 * _LN2) / math.sqrt(2.0 ** (1.0 / beta) - 1.0)


class SpotShape:
    """A tailed and/or elongated spot, drawn by sub-pixel integration.

    Parameters
    ----------
    tail_beta : float or None, keyword-only
        Moffat exponent β > 1 of the wings; None for a Gaussian.
    elongation : float, keyword-only
        Width along `axis_deg` over the width across it (≥ 1 widens along the axis).
    axis_deg : float, keyword-only
        Image angle of the long axis, counter-clockwise from +x (y up on the screen).
    supersample : int, keyword-only
        Sub-pixels per pixel side for the midpoint rule.
    max_half_px : int, keyword-only
        Cap on the half-width of a spot's window (the heaviest wings are cut there;
        the truth's photon counts are what lands inside).

    Examples
    --------
    >>> shape = SpotShape(tail_beta=2.5)
    >>> r, c, v = shape.pixel_integrals(np.array([[20.3, 30.6]]), np.array([2.0]), np.array([1000.0]),
    ...                                 shape.half_px(2.0))
    >>> rr, cc = np.meshgrid(r[0], c[0], indexing="ij")
    >>> w = v[0] / v[0].sum()
    >>> print(round(float((w * rr).sum()), 2), round(float((w * cc).sum()), 2), v.sum() > 985)
    20.3 30.6 True
    """

    __slots__ = ("tail_beta", "elongation", "axis_deg", "supersample", "max_half_px")

    def __init__(self, *, tail_beta: float | None = None, elongation: float = 1.0, axis_deg: float = 0.0,
                 supersample: int = 4, max_half_px: int = 120):
        if tail_beta is not None and not (1.05 <= float(tail_beta) <= 50.0):
            raise ParameterError(f"`tail_beta` must be in [1.05, 50] (or None), got {tail_beta!r}.")
        if not (1.0 <= float(elongation) <= 20.0):
            raise ParameterError(f"`elongation` must be in [1, 20], got {elongation!r}.")
        if not math.isfinite(float(axis_deg)):
            raise ParameterError(f"`axis_deg` must be finite, got {axis_deg!r}.")
        if int(supersample) < 1 or int(supersample) > 16:
            raise ParameterError(f"`supersample` must be 1 … 16, got {supersample!r}.")
        self.tail_beta = None if tail_beta is None else float(tail_beta)
        self.elongation = float(elongation)
        self.axis_deg = float(axis_deg)
        self.supersample = int(supersample)
        self.max_half_px = int(max_half_px)

    def __repr__(self) -> str:
        return (f"SpotShape(tail_beta={self.tail_beta}, elongation={self.elongation}, "
                f"axis_deg={self.axis_deg}, supersample={self.supersample})")

    def to_dict(self) -> dict:
        """The shape as plain numbers (for a frame's truth).

        Returns
        -------
        dict
            ``tail_beta``, ``elongation``, ``axis_deg``, ``supersample``.
        """
        return {"tail_beta": self.tail_beta, "elongation": self.elongation, "axis_deg": self.axis_deg,
                "supersample": self.supersample}

    def half_px(self, sigma_max: float) -> int:
        """Half-width of the windows for spots up to width `sigma_max` (pixels).

        Gaussian: 6 e σ. Tailed: where a round spot keeps all but 0.5 % of its light,
        R = α √(200^(1/(β−1)) − 1), times e; both capped at `max_half_px`.

        Parameters
        ----------
        sigma_max : float
            Largest spot σ, pixels.

        Returns
        -------
        int
            The half-width, pixels.
        """
        reach = 6.0 * sigma_max
        if self.tail_beta is not None:
            alpha = float(moffat_alpha_px(sigma_max, self.tail_beta))
            reach = max(reach, alpha * math.sqrt(200.0 ** (1.0 / (self.tail_beta - 1.0)) - 1.0))
        return int(min(math.ceil(reach * self.elongation), self.max_half_px))

    def density(self, drow, dcol, sigma):
        """Unit-volume spot values at offsets (pixels) from its centre.

        Parameters
        ----------
        drow, dcol : ndarray of float64
            Row and column offsets, broadcast against `sigma`.
        sigma : ndarray of float64
            Width σ across the long axis, pixels.

        Returns
        -------
        ndarray of float64
            Photons per pixel² for one photon.
        """
        a = math.radians(self.axis_deg)
        ur, uc = -math.sin(a), math.cos(a)  # long axis as (row, col): image angles grow as rows fall
        rho = drow * ur + dcol * uc
        tau = -drow * uc + dcol * ur
        e = self.elongation
        if self.tail_beta is None:
            q = (rho / (e * sigma)) ** 2 + (tau / sigma) ** 2
            return np.exp(-0.5 * q) / (2.0 * math.pi * e * sigma * sigma)
        b = self.tail_beta
        alpha = moffat_alpha_px(sigma, b)
        q = (rho / (e * alpha)) ** 2 + (tau / alpha) ** 2
        return (b - 1.0) / (math.pi * e * alpha * alpha) * (1.0 + q) ** (-b)

    def pixel_integrals(self, rc, sigma, amount, half: int):
        """Spots integrated over each pixel of a (2 `half` + 1)² window.

        Parameters
        ----------
        rc : (K, 2) ndarray of float64
            Spot centres (row, col), pixels.
        sigma : (K,) ndarray of float64
            Widths σ (across the long axis), pixels.
        amount : (K,) ndarray of float64
            Volume of each spot (photons).
        half : int
            Half-width of the windows, pixels.

        Returns
        -------
        rows, cols : (K, W) ndarray of int64
            Pixel rows and columns of each window (around the rounded centre).
        values : (K, W, W) ndarray of float64
            The pixel integrals.
        """
        if self.tail_beta is None and self.elongation == 1.0:
            return GAUSSIAN.pixel_integrals(rc, sigma, amount, half)
        rc = np.asarray(rc, dtype=np.float64).reshape(-1, 2)
        sigma = np.asarray(sigma, dtype=np.float64)
        amount = np.asarray(amount, dtype=np.float64)
        k, w, s = len(rc), 2 * half + 1, self.supersample
        centre = np.rint(rc).astype(np.int64)
        o = np.arange(-half, half + 1)
        rows, cols = centre[:, :1] + o, centre[:, 1:] + o
        sub = (np.arange(s) + 0.5) / s - 0.5  # sub-pixel midpoints, symmetric about the centre
        fine = (o[:, None] + sub[None, :]).ravel()  # (W s,)
        values = np.empty((k, w, w))
        step = max(1, 3_000_000 // (w * s) ** 2)
        for i in range(0, k, step):  # chunks keep the (k, W s, W s) block small
            sl = slice(i, i + step)
            dr = (centre[sl, 0] - rc[sl, 0])[:, None] + fine[None, :]  # (k, W s)
            dc = (centre[sl, 1] - rc[sl, 1])[:, None] + fine[None, :]
            d = self.density(dr[:, :, None], dc[:, None, :], sigma[sl, None, None])
            values[sl] = d.reshape(-1, w, s, w, s).mean(axis=(2, 4))
        return rows, cols, values * amount[:, None, None]
