"""Frames whose fractional-order spots are broadened by finite ordered domains.

Forward model (not the inverse formula of :mod:`analysis.domain_size`): the overlayer is
an ensemble of domains of N₁ × N₂ overlayer cells (parallelograms along b1, b2), with
random relative positions (antiphase), so their intensities add. A domain's beam
profile is the squared sum of its cells' phase factors,

    |S(Δk)|² = Π_j sin²(π N_j x_j) / sin²(π x_j),   x_j = b_j · Δk  (cycles, no 2π),

with Δk the momentum from the beam's centre. The ensemble may hold several sizes N
(equal numbers of domains of each); its profile is the sum of theirs. On the camera,
Δk = J⁻¹ Δp with J the camera model's local derivative at the spot
(:func:`analysis.optics.pixel_derivatives`), and the result is convolved with the
instrument response, the round Gaussian of σ = the spot width given to the renderer,
which alone draws the integer-order beams (the substrate is taken as perfectly ordered).
The profile is evaluated on an s × s sub-pixel grid, convolved there, and summed into
pixels; each spot keeps the volume it is given (inside its window).

The truth says the domain sizes: L_j = N_j |b_j| (Å) for each size in the ensemble.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError
from ..optics import pixel_derivatives, pixels_to_momentum
from ..profiles import GAUSSIAN
from .pattern import Pattern
from .render import SyntheticImage, _camera_levels, _check_render_inputs, _expose, _scene, _truth

__all__ = ["DomainBroadening", "render_domain_image"]


class DomainBroadening:
    """Spot shape for :func:`analysis.simulate.render._spots_image`: integer beams round Gaussians,
    fractional beams the finite-domain profile convolved with them (see the module docstring).

    Parameters
    ----------
    pattern : Pattern
    cells : sequence of (N1, N2)
        Domain sizes of the ensemble in overlayer cells along b1 and b2.
    supersample : int, keyword-only
        Sub-pixels per pixel side.
    max_half_px : int, keyword-only
        Cap on a spot's window half-width.
    """

    def __init__(self, pattern: Pattern, cells, *, supersample: int = 4, max_half_px: int = 60):
        c = np.asarray(cells, dtype=np.float64).reshape(-1, 2)
        if len(c) == 0 or not np.all(np.isfinite(c)) or np.any(c < 2) or np.any(c > 5000) or \
                np.any(c != np.round(c)):
            raise ParameterError(f"`cells` must be pairs of whole numbers of cells (2 to 5000), got {cells!r}.")
        if len(pattern.overlayers) == 0:
            raise ParameterError("Domain broadening needs an overlayer in the pattern.")
        self.pattern = pattern
        self.cells = c.astype(np.int64)
        self.supersample = int(supersample)
        self.max_half_px = int(max_half_px)
        # g_par = hk @ G (rows of G: the rotated a1*, a2*, Å⁻¹)
        self.g_basis = np.linalg.lstsq(pattern.hk, pattern.g_par, rcond=None)[0]
        self.matrices = np.asarray(pattern.overlayers, dtype=np.float64)

    def sizes_A(self) -> np.ndarray:
        """(S, 2) domain extents N_j |b_j| in Å, per size of the ensemble (domain 0's net).

        Returns
        -------
        (S, 2) ndarray of float64
            Extents along b1 and b2, Å.
        """
        b = self.matrices[0] @ np.asarray(self.pattern.substrate.vectors, float)
        return self.cells * np.hypot(b[:, 0], b[:, 1])[None]

    def half_px(self, sigma_max: float) -> int:
        """Window half-width: 6 σ plus five times the smallest domain's FWHM in pixels at the centre.

        Parameters
        ----------
        sigma_max : float
            Largest instrument σ of the spots, pixels.

        Returns
        -------
        int
            The half-width, pixels.
        """
        geom, e = self.pattern.geometry, self.pattern.energy_eV
        _, jac, _ = pixel_derivatives(np.zeros((1, 2)), e, geom)
        px_per_invA = float(np.sqrt(abs(np.linalg.det(jac[0]))))
        b = self.matrices[0] @ np.asarray(self.pattern.substrate.vectors, float)
        lmin = float((self.cells * np.hypot(b[:, 0], b[:, 1])[None]).min())
        dom_px = 0.886 / lmin * px_per_invA * 1.5  # 1.5: spots off-centre spread more on this camera
        return int(min(math.ceil(6.0 * sigma_max + 5.0 * dom_px), self.max_half_px))

    def pixel_integrals(self, rc, sigma, amount, half: int):
        """As :meth:`analysis.profiles.GaussianProfile.pixel_integrals`, fractional beams broadened.

        Parameters
        ----------
        rc : (K, 2) ndarray of float64
            Spot centres (row, col), pixels.
        sigma : (K,) ndarray of float64
            Instrument widths σ, pixels.
        amount : (K,) ndarray of float64
            Volume of each spot (photons).
        half : int
            Half-width of the windows, pixels.

        Returns
        -------
        rows, cols : (K, W) ndarray of int64
            Pixel rows and columns of each window.
        values : (K, W, W) ndarray of float64
            The pixel integrals.
        """
        from scipy.ndimage import gaussian_filter

        rc = np.asarray(rc, dtype=np.float64).reshape(-1, 2)
        sigma = np.asarray(sigma, dtype=np.float64)
        amount = np.asarray(amount, dtype=np.float64)
        rows, cols, values = GAUSSIAN.pixel_integrals(rc, sigma, amount, half)
        geom, e = self.pattern.geometry, self.pattern.energy_eV
        k0 = pixels_to_momentum(rc[:, ::-1], e, geom)
        _, jac, _ = pixel_derivatives(k0, e, geom)
        hk = k0 @ np.linalg.inv(self.g_basis)
        s = self.supersample
        w = 2 * half + 1
        centre = np.rint(rc).astype(np.int64)
        fine = ((np.arange(w * s) + 0.5) / s - 0.5) - half  # sub-pixel midpoints, offsets from the window centre
        for i in range(len(rc)):
            if np.allclose(hk[i], np.round(hk[i]), atol=1e-6) or not np.all(np.isfinite(jac[i])):
                continue  # an integer-order beam: the instrument alone
            ov = np.einsum("dij,j->di", self.matrices, hk[i])
            mine = np.flatnonzero(np.all(np.abs(ov - np.round(ov)) < 1e-6, axis=1))
            if len(mine) == 0:
                continue
            dx = (centre[i, 1] - rc[i, 1]) + fine  # x offsets of the sub-pixel columns from the spot
            dy = (centre[i, 0] - rc[i, 0]) + fine
            px = np.stack(np.meshgrid(dx, dy, indexing="xy"), axis=-1)  # (W s, W s, 2) (x, y_down)
            dk = px @ np.linalg.inv(jac[i]).T  # Δk, Å⁻¹
            dhk = dk @ np.linalg.inv(self.g_basis)
            prof = np.zeros(px.shape[:2])
            for d in mine:
                x = dhk @ self.matrices[d].T  # phases along b1, b2 in cycles
                for n1, n2 in self.cells:
                    prof += _dirichlet(x[..., 0], n1) * _dirichlet(x[..., 1], n2)
            prof = gaussian_filter(prof, sigma[i] * s, mode="constant", truncate=6.0)
            pix = prof.reshape(w, s, w, s).sum(axis=(1, 3))
            tot = pix.sum()
            if tot > 0:
                values[i] = amount[i] * pix / tot
        return rows, cols, values


def _dirichlet(x, n: int):
    """sin²(π n x) / sin²(π x), = n² at integer x (the squared sum of n phase factors)."""
    sx = np.sin(np.pi * x)
    small = np.abs(sx) < 1e-9
    with np.errstate(invalid="ignore", divide="ignore"):
        v = (np.sin(np.pi * n * x) / np.where(small, 1.0, sx)) ** 2
    return np.where(small, float(n * n), v)


def render_domain_image(pattern: Pattern, *, cells, rng: np.random.Generator, shape=(512, 512),
                        spot_sigma_px: float = 1.5, intensities=None, screen_radius_px: float | None = None,
                        gun=None, background_photons: float = 40.0, background_gradient=(0.12, -0.08),
                        read_noise_e: float = 3.0, bit_depth: int = 16, noise: bool = True,
                        supersample: int = 4) -> SyntheticImage:
    """Render `pattern` with fractional beams broadened by domains of `cells` (module docstring).

    Parameters
    ----------
    pattern : Pattern
        With at least one overlayer.
    cells : (N1, N2) or sequence of them, keyword-only
        Domain sizes in overlayer cells along b1, b2 (equal numbers of domains of each size).
    rng : numpy.random.Generator, keyword-only
        Source of every random number.
    shape : (rows, cols), keyword-only
        Size of the frame.
    spot_sigma_px : float, keyword-only
        The instrument response (σ of the integer beams), pixels.
    intensities : (K,) array_like, optional, keyword-only
        Photons per beam (as for :func:`analysis.simulate.render_image`).
    screen_radius_px : float, optional, keyword-only
        As for :func:`analysis.simulate.render_image`.
    gun : GunShadow or None, keyword-only
        The gun shadow; None (default) for none.
    background_photons : float, keyword-only
        Diffuse background at the pattern centre, photons per pixel.
    background_gradient : (gx, gy), keyword-only
        Relative change of the background per screen radius along x and y.
    read_noise_e : float, keyword-only
        Gaussian read noise, electrons.
    bit_depth : {8, 16}, keyword-only
        Bits per pixel.
    noise : bool, keyword-only
        False renders the rounded expected value.
    supersample : int, keyword-only
        Sub-samples per pixel and axis for the broadened spots.

    Returns
    -------
    SyntheticImage
        ``truth["domain_size"]``: ``cells``, ``size_A`` (per size, along b1 and b2),
        ``instrument_sigma_px`` and ``model``.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.optics import ScreenGeometry
    >>> from analysis.simulate import forward_pattern
    >>> p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=90.0,
    ...                     geometry=ScreenGeometry(128.0, 128.0, 150.0))
    >>> im = render_domain_image(p, cells=(8, 8), rng=np.random.default_rng(0), shape=(256, 256), noise=False)
    >>> print(np.round(im.truth["domain_size"]["size_A"], 2).tolist())
    [[40.9, 40.9]]
    """
    _check_render_inputs(pattern, rng, bit_depth)
    c = np.asarray(cells).reshape(-1, 2)
    shape_fn = DomainBroadening(pattern, c, supersample=supersample)
    scene = _scene(pattern, shape=shape, rng=rng, spot_sigma_px=spot_sigma_px, intensities=intensities,
                   screen_radius_px=screen_radius_px, screen_center_px=None, gun=gun,
                   background_photons=background_photons, background_gradient=background_gradient,
                   shape_fn=shape_fn)
    gain, offset = _camera_levels(bit_depth, None, None)
    image, gain = _expose(scene.mu, rng, gain=gain, offset=offset, read_noise_e=read_noise_e, bit_depth=bit_depth,
                          saturate=False, noise=noise)
    camera = {"bit_depth": bit_depth, "gain_adu_per_e": gain, "offset_adu": offset,
              "read_noise_e": read_noise_e, "noise": bool(noise), "shape": list(scene.mu.shape)}
    truth = _truth(pattern, scene, image, camera)
    truth["domain_size"] = {"cells": shape_fn.cells.tolist(), "size_A": shape_fn.sizes_A().tolist(),
                            "instrument_sigma_px": float(spot_sigma_px),
                            "model": "antiphase domains of N1 x N2 overlayer cells, intensities added, "
                                     "convolved with the instrument Gaussian"}
    return SyntheticImage(image=image, truth=truth, masks=scene.masks)
