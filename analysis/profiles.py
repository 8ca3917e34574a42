"""Spot profiles: the shape of one diffraction spot on the pixel grid.

One class per profile family. A profile gives its values at pixel centres on a
square window (model images of fitted spots), its values and derivatives with
respect to its parameters on a fit window (the Levenberg–Marquardt spot fit in
:mod:`analysis.spots.fit`), its exact integral over each pixel (the renderer in
:mod:`analysis.simulate`), and the closed forms the spot search needs (volume,
widths, reach, the profile seen through the matched filter). A new profile
(tailed, elongated) is a new class with the same methods.

Conventions
-----------
Pixel arrays are (row, col); ``rc`` columns are (row, col) in pixels with the
centre of the top-left pixel at (0, 0). A spot's axes are the unit vector ``u``
(row, col), the radial direction for a LEED spot, and u⊥ = (−u_c, u_r) across
it. All parameter and derivative arrays have one row per spot (K spots).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import erf

__all__ = ["GaussianProfile", "GAUSSIAN"]

_FWHM = 2.0 * math.sqrt(2.0 * math.log(2.0))


class GaussianProfile:
    """Elliptical 2-D Gaussian with axes along `u` and across it.

    f(p) = A exp(−ρ²/2σ_r² − τ²/2σ_t²),  ρ = (p − p0)·u,  τ = (p − p0)·u⊥,

    with p0 the centre (row, col) and A the peak height. Its volume is 2π A σ_r σ_t.
    Fit parameters, one row per spot, in this order (:attr:`n_params` columns):
    A, row and col of the centre, log σ_r, log σ_t.

    Examples
    --------
    >>> g = GaussianProfile()
    >>> rc, u = np.array([[10.3, 20.6]]), np.array([[0.6, 0.8]])
    >>> w = g.window(rc, np.array([100.0]), np.array([2.0]), np.array([1.5]), u, 12)
    >>> print(w.shape, round(float(w.sum()), 6), round(float(g.volume(100.0, 2.0, 1.5)), 6))
    (1, 25, 25) 1884.955592 1884.955592
    """

    __slots__ = ()

    #: number of fit parameters (A, row, col, log σ_r, log σ_t)
    n_params = 5
    #: columns of the centre (row, col) and of the log widths in a parameter row
    centre_params = slice(1, 3)
    log_width_params = slice(3, 5)
    #: largest |∂f/∂x| σ / A (at one σ: e^−½ ≈ 0.607) and largest |∂f/∂ log σ| / A
    #: (at √2 σ: 2/e ≈ 0.736), rounded up: bounds on how far a model moves
    max_slope = 0.61
    max_log_width_slope = 0.74

    def evaluate(self, p, u, dr, dc):
        """Values on a fit window, and the state :meth:`derivatives` needs.

        Parameters
        ----------
        p : (K, P) ndarray of float64, P ≥ 5
            A, centre (row, col) as offsets from the window centre in pixels,
            log σ_r, log σ_t (further columns are ignored).
        u : (K, 2) ndarray of float64
            Unit vectors (row, col) of the σ_r axis.
        dr, dc : (W, W) ndarray of float64
            Row and column offsets of the window pixels from the window centre.

        Returns
        -------
        values : (K, W, W) ndarray of float64
            The spots' values at the pixel centres of each window.
        state : tuple of ndarray
            Per-spot arrays (leading axis K) for :meth:`derivatives`.

        Examples
        --------
        >>> g = GaussianProfile()
        >>> o = np.arange(-3.0, 4.0); dr, dc = np.meshgrid(o, o, indexing="ij")
        >>> v, _ = g.evaluate(np.array([[5.0, 0.0, 0.0, 0.0, 0.0]]), np.array([[1.0, 0.0]]), dr, dc)
        >>> print(float(v[0, 3, 3]), round(float(v[0, 3, 4]), 4))
        5.0 3.0327
        """
        a, r0, c0, lsr, lst = (p[:, i, None, None] for i in range(5))
        ur, uc = u[:, 0, None, None], u[:, 1, None, None]
        x, y = dr[None] - r0, dc[None] - c0
        rho, tau = x * ur + y * uc, -x * uc + y * ur
        isr2, ist2 = np.exp(-2 * lsr), np.exp(-2 * lst)
        e = np.exp(-0.5 * (rho * rho * isr2 + tau * tau * ist2))
        return a * e, (a, e, rho, tau, isr2, ist2)

    def derivatives(self, state, u, out=None):
        """∂f/∂(A, row, col, log σ_r, log σ_t) from the `state` of :meth:`evaluate`.

        Parameters
        ----------
        state : tuple of ndarray
            As returned by :meth:`evaluate`.
        u : (K, 2) ndarray of float64
            Unit vector of each spot's radial direction (row, col).
        out : (K, 5, W, W) ndarray of float64, optional
            Written in place (may be a view of a larger array).

        Returns
        -------
        (K, 5, W, W) ndarray of float64
            One contiguous plane per parameter.

        Examples
        --------
        >>> g = GaussianProfile()
        >>> o = np.arange(-4.0, 5.0); dr, dc = np.meshgrid(o, o, indexing="ij")
        >>> p, u = np.array([[50.0, 0.3, -0.2, 0.7, 0.4]]), np.array([[0.6, 0.8]])
        >>> jac = g.derivatives(g.evaluate(p, u, dr, dc)[1], u)
        >>> h = 1e-6 * np.eye(5)
        >>> num = np.stack([(g.evaluate(p + h[i], u, dr, dc)[0] - g.evaluate(p - h[i], u, dr, dc)[0]) / 2e-6
        ...                 for i in range(5)], axis=1)
        >>> print(bool(np.allclose(jac, num, atol=1e-6)))
        True
        """
        a, e, rho, tau, isr2, ist2 = state
        ur, uc = u[:, 0, None, None], u[:, 1, None, None]
        ae = a * e
        gr, gt = ae * rho * isr2, ae * tau * ist2
        if out is None:
            out = np.empty((e.shape[0], 5) + e.shape[1:])
        out[:, 0] = e
        np.subtract(gr * ur, gt * uc, out=out[:, 1])
        np.add(gr * uc, gt * ur, out=out[:, 2])
        np.multiply(gr, rho, out=out[:, 3])
        np.multiply(gt, tau, out=out[:, 4])
        return out

    def window(self, rc, amp, sigma_r, sigma_t, u, half: int, *, centre_rc=None):
        """Values at pixel centres on square windows of (2 `half` + 1)² pixels.

        Parameters
        ----------
        rc : (K, 2) ndarray of float64
            Spot centres (row, col), pixels.
        amp, sigma_r, sigma_t : (K,) ndarray of float64
            Peak heights and widths (pixels) along `u` and across it.
        u : (K, 2) ndarray of float64
            Unit vector of each spot's radial direction (row, col).
        half : int
            Half-width of the windows, pixels.
        centre_rc : (K, 2) ndarray of int, optional
            Window centres (row, col); default the rounded `rc`.

        Returns
        -------
        (K, W, W) ndarray of float64
            The values, W = 2 `half` + 1.
        """
        o = np.arange(-half, half + 1)
        at = np.rint(rc) if centre_rc is None else centre_rc
        x = (at[:, 0] - rc[:, 0])[:, None] + o[None, :]  # (K, W) row offsets from the centre
        y = (at[:, 1] - rc[:, 1])[:, None] + o[None, :]
        # ρ²/σr² + τ²/σt² = a x² + 2 b x y + c y² with ρ = x ur + y uc, τ = −x uc + y ur
        ur, uc = u[:, 0], u[:, 1]
        ir2, it2 = 1.0 / np.square(sigma_r), 1.0 / np.square(sigma_t)
        a = ur * ur * ir2 + uc * uc * it2
        b = ur * uc * (ir2 - it2)
        c = uc * uc * ir2 + ur * ur * it2
        arg = (-b[:, None] * x)[:, :, None] * y[:, None, :]
        arg += (-0.5 * a[:, None] * x * x)[:, :, None]
        arg += (-0.5 * c[:, None] * y * y)[:, None, :]
        val = np.exp(arg, out=arg)
        val *= np.asarray(amp, dtype=np.float64)[:, None, None]
        return val

    def window_half_px(self, sigma_r, sigma_t) -> np.ndarray:
        """Half-width (int64, pixels) beyond which a spot is below 10⁻⁹ of its peak (exp(−6.5²/2)).

        Parameters
        ----------
        sigma_r, sigma_t : ndarray of float64
            Widths along and across the spot's direction, pixels.

        Returns
        -------
        ndarray of int64
            The half-width, pixels.
        """
        return np.ceil(6.5 * np.maximum(sigma_r, sigma_t)).astype(np.int64)

    def reach_px(self, sigma, ratio):
        """Distance (pixels) at which a spot of width `sigma` falls to 1/`ratio` of its peak
        (0 where `ratio` ≤ 1): σ √(2 ln ratio).

        Parameters
        ----------
        sigma : float or ndarray of float64
            Spot width σ, pixels.
        ratio : float or ndarray of float64
            Peak over the level sought.

        Returns
        -------
        ndarray of float64
            The distance, pixels.
        """
        return sigma * np.sqrt(2.0 * np.log(np.maximum(ratio, 1.0)))

    def volume(self, amp, sigma_r, sigma_t):
        """Integral 2π A σ_r σ_t of the spot over the plane.

        Parameters
        ----------
        amp : ndarray of float64
            Peak heights.
        sigma_r, sigma_t : ndarray of float64
            Widths along and across the spot's direction, pixels.

        Returns
        -------
        ndarray of float64
            The volume (peak units × px²).
        """
        return 2 * math.pi * amp * sigma_r * sigma_t

    def round_unit_values(self, d2, sigma):
        """Round unit-volume spot at squared distances `d2` (px²) from its centre:
        exp(−d²/2σ²) / (2πσ²), σ = `sigma` (px); the template of a profile-fitted intensity.

        Parameters
        ----------
        d2 : ndarray of float64
            Squared distances from the centre, px².
        sigma : float or ndarray of float64
            The width σ, pixels.

        Returns
        -------
        ndarray of float64
            The values, per px².

        Examples
        --------
        >>> d2 = np.add.outer(np.arange(-12.0, 13.0) ** 2, np.arange(-12.0, 13.0) ** 2)
        >>> v = GaussianProfile().round_unit_values(d2, 1.5)
        >>> print(round(float(v.sum()), 9), bool(v[12, 12] == 1 / (2 * np.pi * 1.5 ** 2)))
        1.0 True
        """
        return np.exp(-d2 / (2.0 * sigma * sigma)) / (2.0 * math.pi * sigma * sigma)

    def fwhm(self, sigma):
        """Full width at half maximum along an axis of width `sigma`.

        Parameters
        ----------
        sigma : float or ndarray of float64
            Width σ, pixels.

        Returns
        -------
        float or ndarray of float64
            FWHM = 2 √(2 ln 2) σ, pixels.
        """
        return _FWHM * sigma

    def sigma_of_fwhm(self, fwhm):
        """The width `sigma` whose full width at half maximum is `fwhm` (inverse of :meth:`fwhm`).

        Parameters
        ----------
        fwhm : float or ndarray of float64
            Full width at half maximum, pixels.

        Returns
        -------
        float or ndarray of float64
            σ, pixels.
        """
        return fwhm / _FWHM

    def filtered(self, amp, sigma_r, sigma_t, sigma_px: float):
        """(A, σ_r, σ_t) of the spot convolved with a unit-sum round Gaussian of σ `sigma_px`
        (the matched filter): a Gaussian again.

        Parameters
        ----------
        amp : ndarray of float64
            Peak heights.
        sigma_r, sigma_t : ndarray of float64
            Widths along and across the spot's direction, pixels.
        sigma_px : float
            σ of the filter, pixels.

        Returns
        -------
        tuple of ndarray of float64
            (A, σ_r, σ_t) of the filtered spot.
        """
        sr2, st2 = np.hypot(sigma_r, sigma_px), np.hypot(sigma_t, sigma_px)
        return amp * sigma_r * sigma_t / (sr2 * st2), sr2, st2

    def squared(self, amp, sigma_r, sigma_t):
        """(A, σ_r, σ_t) of the square of the spot: a Gaussian again.

        Parameters
        ----------
        amp : ndarray of float64
            Peak heights.
        sigma_r, sigma_t : ndarray of float64
            Widths along and across the spot's direction, pixels.

        Returns
        -------
        tuple of ndarray of float64
            (A², σ_r/√2, σ_t/√2).
        """
        return amp**2, sigma_r / math.sqrt(2), sigma_t / math.sqrt(2)

    def pixel_integrals(self, rc, sigma, amount, half: int):
        """Round spots integrated exactly over each pixel of a (2 `half` + 1)² window.

        The weight of pixel c along one axis is ∫_{c−½}^{c+½} N(t; centre, σ) dt
        (error functions); a round Gaussian is the product of its two axes.

        Parameters
        ----------
        rc : (K, 2) ndarray of float64
            Spot centres (row, col), pixels.
        sigma : (K,) ndarray of float64
            Widths σ_r = σ_t, pixels.
        amount : (K,) ndarray of float64
            Volume of each spot (e.g. photons).
        half : int
            Half-width of the windows, pixels.

        Returns
        -------
        rows, cols : (K, W) ndarray of int64
            Pixel rows and columns of each window (around the rounded centre).
        values : (K, W, W) ndarray of float64
            `amount` × the pixel integrals of the unit-volume spot.

        Examples
        --------
        >>> g = GaussianProfile()
        >>> r, c, v = g.pixel_integrals(np.array([[4.2, 7.9]]), np.array([1.2]), np.array([500.0]), 8)
        >>> print(r[0, 8], c[0, 8], round(float(v.sum()), 6))
        4 8 500.0
        """
        ri, wy = _pixel_weights(rc[:, 0], sigma, half)
        ci, wx = _pixel_weights(rc[:, 1], sigma, half)
        return ri, ci, amount[:, None, None] * wy[:, :, None] * wx[:, None, :]


def _pixel_weights(centre: np.ndarray, sigma: np.ndarray, half: int) -> tuple[np.ndarray, np.ndarray]:
    """1-D pixel integrals of unit Gaussians: indices (K, w) and weights (K, w)."""
    idx = np.rint(centre)[:, None].astype(np.int64) + np.arange(-half, half + 1)[None, :]
    z = 1.0 / (math.sqrt(2.0) * sigma[:, None])
    w = 0.5 * (erf((idx + 0.5 - centre[:, None]) * z) - erf((idx - 0.5 - centre[:, None]) * z))
    return idx, w


#: the profile the spot search fits and the renderer draws
GAUSSIAN = GaussianProfile()
