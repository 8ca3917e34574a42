"""The forward LEED pattern: every beam of a substrate and its overlayer domains
that reaches the screen, with its indices, momentum, exit angle and image position.

Conventions are those of :mod:`analysis.simulate` (crystallographic reciprocal
quantities, no 2π; ``(b1, b2) = M (a1, a2)``; x right, y down).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..errors import NetError, ParameterError
from ..nets import Net2D, reciprocal
from ..optics import ScreenGeometry, momentum_to_pixels, wavelength_A
from ..superstructure import beam_label

__all__ = ["Pattern", "forward_pattern", "hk_label"]

@dataclass(frozen=True, eq=False)
class Pattern:
    """Every beam that reaches the screen at one energy.

    Attributes
    ----------
    hk : (K, 2) ndarray of float64
        Fractional indices in the substrate reciprocal basis (a1*, a2*).
    g_par : (K, 2) ndarray of float64
        Parallel momentum transfer in the surface (x, y) axes of the optics,
        after the sample azimuth; Å⁻¹, no 2π.
    xy_px : (K, 2) ndarray of float64
        (x, y) image position of each beam, pixels.
    theta_deg : (K,) ndarray of float64
        Polar exit angle.
    integer : (K,) ndarray of bool
        True for integer-order (substrate) beams.
    domains : (K, D) ndarray of bool
        Which overlayer domains produce each beam. An integer-order beam also
        lists the domains whose net contains it (every domain of a
        commensurate overlayer); a beam of the bare substrate alone has an
        all-False row.
    energy_eV : float
    geometry : ScreenGeometry
    substrate : Net2D
        The (unrotated) substrate net, Å.
    overlayers : (D, 2, 2) ndarray of float64
        The domain matrices, in the order of the `domains` columns.
    azimuth_deg : float
        Sample azimuth used.
    k_in_par : (2,) ndarray of float64
        Parallel incident momentum, Å⁻¹, no 2π (zeros at normal incidence).
    """

    hk: np.ndarray
    g_par: np.ndarray
    xy_px: np.ndarray
    theta_deg: np.ndarray
    integer: np.ndarray
    domains: np.ndarray
    energy_eV: float
    geometry: ScreenGeometry
    substrate: Net2D
    overlayers: np.ndarray
    azimuth_deg: float = 0.0
    k_in_par: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(2))

    def __post_init__(self):
        for name in ("hk", "g_par", "xy_px", "theta_deg", "integer", "domains", "overlayers", "k_in_par"):
            a = np.array(getattr(self, name))
            a.flags.writeable = False
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return int(self.hk.shape[0])

    @property
    def n_domains(self) -> int:
        """Number of overlayer domains D."""
        return int(self.domains.shape[1])

    def labels(self, *, max_denominator: int = 12) -> list[str]:
        """Index labels like ``"(1/2, 0)"`` for every beam (see :func:`hk_label`).

        Parameters
        ----------
        max_denominator : int, keyword-only
            Largest denominator written as a fraction.

        Returns
        -------
        list of str
            One label per beam.
        """
        return [hk_label(h, k, max_denominator=max_denominator) for h, k in self.hk]


def hk_label(h: float, k: float, *, max_denominator: int = 12) -> str:
    """Beam label with simple fractions, e.g. ``(1/2, -1/3)``; decimals when irrational.

    Parameters
    ----------
    h, k : float
        Beam indices in the substrate's reciprocal basis.
    max_denominator : int, keyword-only
        Largest denominator written as a fraction.

    Returns
    -------
    str
        The label.

    Examples
    --------
    >>> hk_label(0.5, -1 / 3), hk_label(1.0, 0.0), hk_label(0.1234567, 0.0)
    ('(1/2, -1/3)', '(1, 0)', '(0.1235, 0)')
    """

    return beam_label(h, k, sep=", ", max_denominator=max_denominator)


def _rotation(angle_deg: float) -> np.ndarray:
    """Counter-clockwise rotation acting on column vectors."""
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    return np.array([[c, -s], [s, c]])


def _check_matrices(overlayers) -> np.ndarray:
    mats = [np.asarray(m, dtype=np.float64) for m in overlayers]
    for i, m in enumerate(mats):
        if m.shape != (2, 2) or not np.all(np.isfinite(m)):
            raise NetError(f"`overlayers[{i}]` must be a finite 2×2 matrix, got {np.asarray(overlayers[i]).tolist()}.")
        if abs(np.linalg.det(m)) < 1e-9:
            raise NetError(f"`overlayers[{i}]` is singular (det 0): {m.tolist()}.")
    return np.array(mats, dtype=np.float64).reshape(-1, 2, 2)


_MAX_CANDIDATES = 4_000_000


def _net_points(basis: np.ndarray, g_max: float) -> np.ndarray:
    """Integer coordinates n with |n @ basis| ≤ g_max; basis rows in Å⁻¹.

    |n_i| ≤ g_max |r_i| where r_i are the rows of inv(basis).T (the real-space
    vectors dual to `basis`), which bounds the search box exactly.
    """
    dual = np.linalg.inv(basis).T
    n1 = int(math.floor(g_max * np.linalg.norm(dual[0]) + 1e-9))
    n2 = int(math.floor(g_max * np.linalg.norm(dual[1]) + 1e-9))
    if (2 * n1 + 1) * (2 * n2 + 1) > _MAX_CANDIDATES:
        raise ParameterError(f"Too many beams to enumerate ({(2 * n1 + 1) * (2 * n2 + 1)} candidates for a net "
                             f"with rows {np.round(basis, 6).tolist()} Å⁻¹); lower the energy or check the matrix.")
    i, j = np.meshgrid(np.arange(-n1, n1 + 1), np.arange(-n2, n2 + 1), indexing="ij")
    n = np.column_stack([i.ravel(), j.ravel()]).astype(np.float64)
    g = n @ basis
    return n[np.einsum("ij,ij->i", g, g) <= g_max * g_max * (1 + 1e-12)]


def _merge(hk: np.ndarray, tol: float) -> np.ndarray:
    """Group label of each row; rows closer than `tol` (max-norm, index units) share one."""
    if len(hk) == 0:
        return np.zeros(0, dtype=np.int64)
    pairs = cKDTree(hk).query_pairs(r=tol, p=np.inf, output_type="ndarray")
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(hk), len(hk)))
    return connected_components(graph, directed=False)[1]


def forward_pattern(substrate: Net2D, overlayers: Sequence = (), *, energy_eV: float,
                    geometry: ScreenGeometry, azimuth_deg: float = 0.0, k_in_par=None,
                    merge_tol: float = 1e-6, relativistic: bool = False) -> Pattern:
    """Every beam of a substrate plus overlayer domains that reaches the screen.

    Parameters
    ----------
    substrate : Net2D
        Real-space (1×1) net in Å.
    overlayers : sequence of (2, 2) array_like of float
        One matrix M per domain, ``(b1, b2) = M (a1, a2)``; may be fractional or
        irrational (incommensurate). Empty for the clean surface.
    energy_eV : float, keyword-only
        Electron energy, eV.
    geometry : ScreenGeometry, keyword-only
        The camera model.
    azimuth_deg : float, keyword-only
        Counter-clockwise rotation of the sample's surface axes relative to the
        surface frame of the optics.
    k_in_par : (2,) array_like, optional
        Parallel component of the incident wave vector in the optics' surface
        axes, Å⁻¹ without 2π; None for normal incidence.
    merge_tol : float, keyword-only
        Beams whose fractional indices agree within this (each component) are
        one beam.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.

    Returns
    -------
    Pattern
        Beams sorted by |g| then by azimuth; the enumeration is bounded by the
        screen acceptance, sin θ = λ |g + k_in∥| ≤ sin(acceptance).

    Raises
    ------
    ParameterError
        Bad energy, geometry or tolerance. NetError: bad matrix.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> geom = ScreenGeometry(512.0, 512.0, 600.0)
    >>> p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=100.0, geometry=geom)
    >>> print(len(p), int(p.integer.sum()), round(float(p.theta_deg[p.integer][1]), 3))
    37 9 28.671
    """
    if not isinstance(substrate, Net2D):
        raise NetError(f"`substrate` must be a Net2D, got {type(substrate).__name__}.")
    if not isinstance(geometry, ScreenGeometry):
        raise ParameterError(f"`geometry` must be a ScreenGeometry, got {type(geometry).__name__}.")
    if not (merge_tol > 0 and math.isfinite(merge_tol)):
        raise ParameterError(f"`merge_tol` must be a small positive number, got {merge_tol}.")
    lam = wavelength_A(energy_eV, relativistic=relativistic)
    kin = np.zeros(2) if k_in_par is None else np.asarray(k_in_par, dtype=np.float64).reshape(-1)
    if kin.shape != (2,) or not np.all(np.isfinite(kin)):
        raise ParameterError(f"`k_in_par` must be two finite numbers (Å⁻¹), got {k_in_par!r}.")
    if lam * np.hypot(*kin) >= 1.0:
        raise ParameterError(f"`k_in_par` {kin.tolist()} exceeds the incident momentum 1/λ = {1 / lam:.4g} Å⁻¹.")
    mats = _check_matrices(overlayers)
    g_max = math.sin(math.radians(geometry.acceptance_deg)) / lam + float(np.hypot(*kin))

    a_star = reciprocal(substrate).vectors  # rows a1*, a2*, Å⁻¹, no 2π
    blocks = [_net_points(a_star, g_max)]
    owner = [np.full(len(blocks[0]), -1)]
    for d, m in enumerate(mats):
        m_inv_t = np.linalg.inv(m).T
        n = _net_points(m_inv_t @ a_star, g_max)  # b* = (M⁻¹)ᵀ a*
        blocks.append(n @ m_inv_t)  # hk = n (M⁻¹)ᵀ
        owner.append(np.full(len(n), d))
    hk_all = np.vstack(blocks)
    own = np.concatenate(owner)
    group = _merge(hk_all, merge_tol)
    n_groups = int(group.max()) + 1 if len(group) else 0
    first = np.full(n_groups, len(hk_all))
    np.minimum.at(first, group, np.arange(len(hk_all)))  # substrate rows come first
    hk = hk_all[first]
    integer = np.zeros(n_groups, dtype=bool)
    integer[group[own < 0]] = True
    dom = np.zeros((n_groups, len(mats)), dtype=bool)
    dom[group[own >= 0], own[own >= 0]] = True
    hk = np.where(integer[:, None], np.rint(hk), hk)

    g_par = (hk @ a_star) @ _rotation(azimuth_deg).T
    xy, visible = momentum_to_pixels(g_par + kin, energy_eV, geometry, relativistic=relativistic)
    keep = visible & np.all(np.isfinite(xy), axis=1)
    gm = np.hypot(g_par[:, 0], g_par[:, 1])
    order = np.lexsort((np.round(np.arctan2(g_par[:, 1], g_par[:, 0]) % (2 * np.pi), 9), np.round(gm, 9)))
    order = order[keep[order]]
    k_out = g_par[order] + kin
    sin_t = np.clip(lam * np.hypot(k_out[:, 0], k_out[:, 1]), 0.0, 1.0)
    return Pattern(hk=hk[order], g_par=g_par[order], xy_px=xy[order], theta_deg=np.degrees(np.arcsin(sin_t)),
                   integer=integer[order], domains=dom[order].reshape(len(order), len(mats)),
                   energy_eV=float(energy_eV), geometry=geometry, substrate=substrate, overlayers=mats,
                   azimuth_deg=float(azimuth_deg), k_in_par=kin)

