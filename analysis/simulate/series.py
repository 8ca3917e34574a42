"""Energy series: smooth synthetic I(V) curves and frames rendered one energy at a time."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from ..nets import Net2D
from ..optics import ScreenGeometry
from .pattern import Pattern, forward_pattern
from .render import SyntheticImage, render_image

__all__ = ["LayerIV", "render_series"]

@dataclass(frozen=True)
class LayerIV:
    """Smooth synthetic I(V) curves from a stack of identical layers.

    Each beam peaks where the electron's perpendicular momentum change matches
    a multiple of the layer spacing (kinematic condition, inner potential
    included): k_⊥,in + k_⊥,out = n / d, with k = √((E + V0) / 150.41) Å⁻¹ (no
    2π). Peaks are Lorentzians of half-width `half_width_eV` on a weak floor,
    damped by exp(−B k²); each beam gets its own random strengths per order
    (from `seed`), so curves differ between beams but not between frames.

    Attributes
    ----------
    layer_spacing_A, inner_potential_eV, half_width_eV, debye_waller_A2, photons : float
    seed : int
    """

    layer_spacing_A: float = 1.8
    inner_potential_eV: float = 10.0
    half_width_eV: float = 5.0
    debye_waller_A2: float = 0.15
    photons: float = 30000.0
    seed: int = 0

    def __call__(self, pattern: Pattern) -> np.ndarray:
        """Photons per beam of `pattern` at its energy; (K,) ndarray of float64."""
        from ..optics import H2_OVER_2ME_EV_A2

        e = pattern.energy_eV + self.inner_potential_eV
        g2 = np.einsum("ij,ij->i", pattern.g_par, pattern.g_par)
        out = np.zeros(len(pattern))
        for n in range(1, 16):
            # energy where k + sqrt(k² − g²) = n/d  →  k = ((n/d)² + g²) / (2 n/d)
            q = n / self.layer_spacing_A
            k_peak = (q * q + g2) / (2.0 * q)
            e_peak = H2_OVER_2ME_EV_A2 * k_peak**2
            amp = self._strength(pattern.hk, n)
            out += amp / (1.0 + ((e - e_peak) / self.half_width_eV) ** 2)
        k2 = e / H2_OVER_2ME_EV_A2
        scale = np.where(pattern.integer, 1.0, 0.35)
        return self.photons * scale * (0.03 + out) * np.exp(-self.debye_waller_A2 * k2)

    def _strength(self, hk: np.ndarray, n: int) -> np.ndarray:
        """Per-beam, per-order strength in [0.2, 1), a fixed function of (hk, n, seed)."""
        key = np.rint(np.asarray(hk) * 840).astype(np.int64)  # 840 = lcm(1..8): fractions stay distinct
        h = (key[:, 0] * 73856093) ^ (key[:, 1] * 19349663) ^ (n * 83492791) ^ (self.seed * 2654435761)
        return 0.2 + 0.8 * ((h % 1_000_003) / 1_000_003.0)


def render_series(substrate: Net2D, overlayers: Sequence = (), energies_eV: Iterable[float] = (), *,
                  geometry: ScreenGeometry, rng: np.random.Generator,
                  intensity_fn: Callable[[Pattern], np.ndarray] | None = None,
                  pattern_kw: dict | None = None, **render_kw) -> Iterator[tuple[Pattern, SyntheticImage]]:
    """Render an energy series one frame at a time.

    Parameters
    ----------
    substrate : Net2D
        Real-space (1×1) net in Å.
    overlayers : sequence of (2, 2) array_like of float
        One matrix per domain (as for :func:`forward_pattern`).
    energies_eV : iterable of float
        The energy of each frame, eV.
    geometry : ScreenGeometry, keyword-only
        The camera model.
    rng : numpy.random.Generator, keyword-only
        Shared by all frames (noise differs frame to frame, reproducibly).
    intensity_fn : callable(Pattern) -> (K,) photons, optional
        Per-beam intensities at each energy; default ``LayerIV()``.
    pattern_kw : dict, optional
        Extra keywords for :func:`forward_pattern` (azimuth_deg, k_in_par...).
    **render_kw
        Passed to :func:`render_image` (shape, spot_sigma_px, gun, bit_depth...).

    Yields
    ------
    (Pattern, SyntheticImage)
        One frame per energy; only one frame is held at a time.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> frames = render_series(parse_substrate("Cu(100)"), (), [80.0, 90.0], shape=(64, 64),
    ...                        geometry=ScreenGeometry(32.0, 32.0, 30.0), rng=np.random.default_rng(1))
    >>> [round(im.truth["energy_eV"]) for _, im in frames]
    [80, 90]
    """
    fn = LayerIV() if intensity_fn is None else intensity_fn
    for e in energies_eV:
        pat = forward_pattern(substrate, overlayers, energy_eV=float(e), geometry=geometry, **(pattern_kw or {}))
        yield pat, render_image(pat, rng=rng, intensities=fn(pat), **render_kw)
