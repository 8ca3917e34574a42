"""Lattice points inside a momentum radius, and the momentum radius a screen accepts.

Momenta are crystallographic (Å⁻¹, no 2π): a beam of parallel momentum g leaves the
surface at sin θ = λ |g|, so a screen of half-angle θ_max sees |g| ≤ sin θ_max / λ.
Nets are (2, 2) arrays whose rows are basis vectors.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import ParameterError
from .optics import wavelength_A

__all__ = ["MAX_POINTS", "screen_g_max", "lattice_points"]

MAX_POINTS = 400_000  # candidates (the search box) at most; more means a net far finer than the screen


def screen_g_max(energy_eV: float, acceptance_deg: float, *, relativistic: bool = False) -> float:
    """Largest parallel momentum |g| (Å⁻¹, no 2π) that leaves within `acceptance_deg`: sin θ / λ.

    Parameters
    ----------
    energy_eV : float
        Beam energy (> 0).
    acceptance_deg : float
        Polar half-angle, degrees.
    relativistic : bool, keyword-only
        Use the relativistic wavelength (:func:`analysis.optics.wavelength_A`).

    Returns
    -------
    float
        |g|max in Å⁻¹ (no 2π).

    Examples
    --------
    >>> print(round(screen_g_max(100.0, 90.0), 6))  # 1 / λ at 100 eV
    0.815377
    """
    return math.sin(math.radians(acceptance_deg)) / wavelength_A(energy_eV, relativistic=relativistic)


def lattice_points(basis, g_max: float, *, metric=None, max_points: int = MAX_POINTS) -> np.ndarray:
    """Points ``n @ basis`` (n integer) of a net whose momentum is at most `g_max`.

    The integer coefficients are searched in the box that holds the disk
    (|n₁| ≤ ⌈g_max |c₂| / |det c|⌉ + 1 and likewise n₂, with ``c = basis @ metric``
    the basis in Å⁻¹), in lexicographic order of (n₁, n₂); the order is kept.

    Parameters
    ----------
    basis : (2, 2) array_like of float
        Rows span the net, in the units that `metric` turns into Å⁻¹ (e.g. beam
        indices with ``metric`` the substrate's reciprocal basis).
    g_max : float
        Momentum radius, Å⁻¹ (no 2π); points with ``|n @ basis @ metric| ≤ g_max`` are kept.
    metric : (2, 2) array_like of float, optional, keyword-only
        Rows: what a unit step along each coordinate of `basis` is in Å⁻¹.
        None: `basis` is in Å⁻¹ already.
    max_points : int, keyword-only
        Most candidates (the size of the search box) allowed.

    Returns
    -------
    (K, 2) ndarray of float64
        The points ``n @ basis`` in the units of `basis`; with the identity as
        `basis` they are the integer indices (h, k) themselves.

    Raises
    ------
    ParameterError
        When `g_max` is not a finite number ≥ 0, the basis is singular, or the
        search box holds more than `max_points` candidates (a net far finer than
        the radius: lower the energy or check the net).

    Examples
    --------
    >>> a_star = np.array([[0.5, 0.0], [0.0, 0.5]])  # a 2 Å square net, Å⁻¹
    >>> hk = lattice_points(np.eye(2), 0.5, metric=a_star)
    >>> print(len(hk), hk[:2].tolist())
    5 [[-1.0, 0.0], [0.0, -1.0]]
    >>> print(len(lattice_points(0.5 * np.eye(2), 0.75)))  # |g| ≤ 0.75 Å⁻¹ directly
    9
    """
    b = np.asarray(basis, dtype=np.float64)
    cart = b if metric is None else b @ np.asarray(metric, dtype=np.float64)
    g = float(g_max)
    if not (math.isfinite(g) and g >= 0.0):
        raise ParameterError(f"`g_max` must be a finite momentum ≥ 0 (Å⁻¹), got {g_max!r}.")
    area = abs(float(np.linalg.det(cart)))
    if not area > 0.0:
        raise ParameterError(f"The net's basis is singular (rows {np.round(cart, 6).tolist()} Å⁻¹).")
    n1 = int(math.ceil(g * np.linalg.norm(cart[1]) / area)) + 1
    n2 = int(math.ceil(g * np.linalg.norm(cart[0]) / area)) + 1
    count = (2 * n1 + 1) * (2 * n2 + 1)
    if count > max_points:
        raise ParameterError(f"Too many lattice points to enumerate ({count} candidates within |g| ≤ {g:.4g} Å⁻¹ "
                             f"for a net with rows {np.round(cart, 6).tolist()} Å⁻¹; at most {max_points}); "
                             "lower the energy or check the net.")
    i, j = np.meshgrid(np.arange(-n1, n1 + 1), np.arange(-n2, n2 + 1), indexing="ij")
    pts = np.column_stack([i.ravel(), j.ravel()]).astype(np.float64) @ b
    k = pts if metric is None else pts @ np.asarray(metric, dtype=np.float64)
    return pts[np.hypot(k[:, 0], k[:, 1]) <= g]
