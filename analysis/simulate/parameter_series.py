"""Parameter series with exact truth: a temperature series through an order–disorder
transition and an exposure series in which one superstructure gives way to another.

The intensities come from models chosen *not* to be the form the analysis fits:

* :class:`OrderDisorderModel` — a superstructure beam goes with the square of the long-range
  order, (1 − T/Tc′)^(2β) averaged over a Gaussian spread of local transition
  temperatures Tc′ (finite domains round the transition), plus short-range-order
  intensity that peaks at Tc and fades either side; every beam is damped by a
  Debye–Waller factor exp(−c·T·q²) with q the whole momentum transfer; the diffuse
  background rises with T; fractional spots broaden near Tc.
* :class:`ExposureModel` — coverage θ(L) = θ_sat (1 − e^(−L/L₀)); the first phase's
  beams grow as its ordered fraction, peak at its ideal coverage and vanish where the
  second phase takes over; the second phase's beams grow until θ_sat.

:func:`render_parameter_series` renders the frames one at a time with
:func:`analysis.simulate.render_image`, with an optional slow drift of the pattern
centre; each frame's truth holds the parameter, the centre and every beam's photons.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..nets import Net2D
from ..optics import ScreenGeometry, wavelength_A
from .pattern import Pattern, forward_pattern
from .render import SyntheticImage, render_image

__all__ = ["OrderDisorderModel", "ExposureModel", "render_parameter_series"]


def _q2(pattern: Pattern) -> np.ndarray:
    """Squared whole momentum transfer of each beam in back-reflection, Å⁻² (no 2π)."""
    k = 1.0 / wavelength_A(pattern.energy_eV)
    g2 = np.einsum("ij,ij->i", pattern.g_par, pattern.g_par)
    kz_out = np.sqrt(np.clip(k * k - g2, 0.0, None))
    return g2 + (k + kz_out) ** 2


@dataclass(frozen=True)
class OrderDisorderModel:
    """Beam photons and spot widths of an overlayer against temperature.

    Attributes
    ----------
    tc : float
        Mean transition temperature, K.
    beta : float
        Order-parameter exponent used to draw the long-range order.
    rounding : float
        Relative spread (σ / Tc) of the local transition temperatures.
    short_range : float
        Peak short-range-order intensity at Tc, as a share of the fully ordered beam.
    short_range_width : float
        Its half-width, relative to Tc.
    debye_waller : float
        c in exp(−c · T · q²), Å² per K.
    photons_integer, photons_fractional : float
        Photons of an integer and of a fractional beam at T = 0 before damping.
    background_photons : float
        Diffuse background at the centre at T = 0, photons per pixel.
    background_rise : float
        Relative rise of the background per Tc of temperature.
    spot_sigma_px : float
        Spot σ of ordered beams; fractional spots widen by up to `broadening` × near Tc.
    broadening : float
    """

    tc: float = 400.0
    beta: float = 0.125
    rounding: float = 0.01
    short_range: float = 0.04
    short_range_width: float = 0.03
    debye_waller: float = 2.0e-5
    photons_integer: float = 40000.0
    photons_fractional: float = 30000.0
    background_photons: float = 20.0
    background_rise: float = 0.8
    spot_sigma_px: float = 1.6
    broadening: float = 0.5

    def order_squared(self, t: float) -> float:
        """⟨m²⟩: (1 − T/Tc′)^(2β) averaged over Tc′ ~ N(Tc, (rounding·Tc)²).

        Parameters
        ----------
        t : float
            Temperature, K.

        Returns
        -------
        float
            ⟨m²⟩ in [0, 1].
        """
        w = self.rounding * self.tc
        if w <= 0:
            return max(1.0 - t / self.tc, 0.0) ** (2 * self.beta)
        u = np.linspace(-5.0, 5.0, 401)
        tcs = self.tc + w * u
        wt = np.exp(-0.5 * u * u)
        m2 = np.clip(1.0 - t / tcs, 0.0, None) ** (2 * self.beta)
        return float(np.sum(wt * m2) / np.sum(wt))

    def fractional_share(self, t: float) -> float:
        """Fractional beam photons relative to full order (long- plus short-range order).

        Parameters
        ----------
        t : float
            Temperature, K.

        Returns
        -------
        float
            The share (1 at full order).
        """
        sro = self.short_range * math.exp(-abs(t - self.tc) / (self.short_range_width * self.tc))
        return self.order_squared(t) + sro

    def __call__(self, pattern: Pattern, t: float) -> tuple[np.ndarray, np.ndarray, float]:
        """(photons (K,), spot σ (K,), background photons per px) at temperature `t`."""
        dw = np.exp(-self.debye_waller * t * _q2(pattern))
        frac = ~pattern.integer
        ph = np.where(frac, self.photons_fractional * self.fractional_share(t), self.photons_integer) * dw
        near = math.exp(-abs(t - self.tc) / (0.05 * self.tc))
        sig = np.where(frac, self.spot_sigma_px * (1.0 + self.broadening * near), self.spot_sigma_px)
        bg = self.background_photons * (1.0 + self.background_rise * t / self.tc)
        return ph, sig, bg


@dataclass(frozen=True)
class ExposureModel:
    """Beam photons of two phases against exposure (dose, L).

    Attributes
    ----------
    theta_sat, dose_scale : float
        Coverage θ(L) = theta_sat · (1 − exp(−L / dose_scale)), ML.
    theta_first : float
        Ideal coverage of the first phase (its beams peak there).
    theta_switch : (float, float)
        Coverage window over which the first phase's beams vanish and the second's appear.
    photons_integer, photons_fractional, background_photons, spot_sigma_px : float
    """

    theta_sat: float = 0.36
    dose_scale: float = 3.0
    theta_first: float = 0.25
    theta_switch: tuple = (0.28, 0.30)
    photons_integer: float = 40000.0
    photons_fractional: float = 30000.0
    background_photons: float = 25.0
    spot_sigma_px: float = 1.6

    def coverage(self, dose: float) -> float:
        """Coverage after `dose`: θ_sat (1 − exp(−dose / dose_scale)).

        Parameters
        ----------
        dose : float
            Exposure, in the unit of ``dose_scale`` (e.g. L).

        Returns
        -------
        float
            Coverage, monolayers.
        """
        return self.theta_sat * (1.0 - math.exp(-dose / self.dose_scale))

    def shares(self, dose: float) -> tuple[float, float]:
        """(first phase, second phase) beam strength relative to a complete layer.

        Parameters
        ----------
        dose : float
            Exposure, in the unit of ``dose_scale`` (e.g. L).

        Returns
        -------
        tuple of float
            The two shares, each in [0, 1].
        """
        th = self.coverage(dose)
        lo, hi = self.theta_switch
        first = min(th / self.theta_first, 1.0) ** 2
        fade = float(np.clip((hi - th) / (hi - lo), 0.0, 1.0))
        grow = float(np.clip((th - lo) / (hi - lo), 0.0, 1.0))
        second = grow * min((th - lo) / (self.theta_sat - lo), 1.0) if th > lo else 0.0
        return first * fade, max(second, 0.0) ** 0.5 * grow

    def __call__(self, pattern: Pattern, dose: float) -> tuple[np.ndarray, np.ndarray, float]:
        """(photons (K,), spot σ (K,), background) with overlayer 0 the first phase, 1 the second."""
        a, b = self.shares(dose)
        d = pattern.domains
        first = (~pattern.integer) & d[:, 0]
        second = (~pattern.integer) & d[:, 1] & ~d[:, 0]
        ph = np.where(pattern.integer, self.photons_integer, 0.0)
        ph = np.where(first, self.photons_fractional * a, ph)
        ph = np.where(second, self.photons_fractional * b, ph)
        return ph, np.full(len(pattern), self.spot_sigma_px), self.background_photons


def render_parameter_series(substrate: Net2D, overlayers: Sequence, values: Iterable[float], *, model,
                            energy_eV: float, geometry: ScreenGeometry, rng: np.random.Generator,
                            drift_px_per_frame=(0.0, 0.0), shape=(256, 256), **render_kw
                            ) -> Iterator[tuple[float, SyntheticImage]]:
    """Render a parameter series one frame at a time.

    Parameters
    ----------
    substrate : Net2D
        Real-space (1×1) net in Å.
    overlayers : sequence of (2, 2) matrices
        Every superstructure that shows in the series (for :class:`ExposureModel`: the
        first phase, then the second; each given as one domain matrix, its rotated
        domains added by the pattern's symmetry only if listed).
    values : iterable of float
        The parameter of each frame (K for :class:`OrderDisorderModel`, L for
        :class:`ExposureModel`).
    model : callable(Pattern, value) -> (photons, sigma_px, background_photons), keyword-only
        Per frame: photons and σ (px) of each beam, and the diffuse background.
    energy_eV : float, keyword-only
        Electron energy, eV.
    geometry : ScreenGeometry, keyword-only
        The camera at frame 0.
    rng : numpy.random.Generator, keyword-only
        Shared by all frames.
    drift_px_per_frame : (dx, dy), keyword-only
        The pattern centre moves by this much each frame (the screen does not).
    shape : (rows, cols), keyword-only
        Size of each frame.
    **render_kw
        Passed to :func:`render_image` (gun, bit_depth, …).

    Yields
    ------
    (value, SyntheticImage)
        ``truth`` gains ``"parameter"``, ``"center_px"`` and ``"model_photons"`` (K,).

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> m = OrderDisorderModel(tc=300.0)
    >>> sub, geom = parse_substrate("Cu(100)"), ScreenGeometry(64.0, 64.0, 60.0)
    >>> frames = list(render_parameter_series(sub, [[[2, 0], [0, 2]]], [100.0, 350.0], model=m, energy_eV=150.0,
    ...                                       geometry=geom, rng=np.random.default_rng(0), shape=(128, 128)))
    >>> [round(im.truth["parameter"]) for _, im in frames], m.order_squared(350.0) < 1e-9 < m.order_squared(100.0)
    ([100, 350], True)
    """
    if not callable(model):
        raise ParameterError(f"`model` must be callable (pattern, value), got {type(model).__name__}.")
    dx, dy = (float(v) for v in drift_px_per_frame)
    screen_centre = geometry.center_px
    mats = [np.asarray(m, dtype=np.float64) for m in overlayers]
    for i, v in enumerate(values):
        geom = dataclasses.replace(geometry, center_x_px=geometry.center_x_px + dx * i,
                                   center_y_px=geometry.center_y_px + dy * i)
        pat = forward_pattern(substrate, mats, energy_eV=float(energy_eV), geometry=geom)
        photons, sigma, bg = model(pat, float(v))
        im = render_image(pat, shape=shape, rng=rng, intensities=photons, spot_sigma_px=sigma,
                          background_photons=bg, screen_center_px=screen_centre, **render_kw)
        im.truth["parameter"] = float(v)
        im.truth["center_px"] = list(geom.center_px)
        im.truth["model_photons"] = photons.tolist()
        yield float(v), im
