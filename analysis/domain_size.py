"""Spot widths in momentum and the mean size of ordered domains from them.

Widths in momentum
------------------
A spot's pixel covariance C (from :func:`analysis.spots.widths.fit_spot_widths`) maps to
momentum through the camera model's local derivative J = ∂(x, y)/∂(k_x, k_y) at the
spot (:func:`analysis.optics.pixel_derivatives`): C_k = J⁻¹ C J⁻ᵀ. Widths are reported
along the direction the image's radial direction maps to and across it, in Å⁻¹
(crystallographic, no 2π) and in per cent of |a*| of the substrate (the extent of
the first Brillouin zone along a*), as FWHM.

Domain size (method)
--------------------
An integer-order beam of a well-ordered substrate is as wide as the instrument lets it
be: its width is the instrument response. A fractional-order beam of an overlayer made
of finite domains is that response broadened by the domains' own interference function.
Both are taken as Gaussians, so widths add in quadrature (common practice in
diffraction line-profile analysis; an approximation: the true domain profile is not
Gaussian):

    w_dom² = w_frac² − w_int²        (FWHM, per direction, in pixels)

The instrument response is taken the same in pixels over the screen (the median of the
integer beams' widths, radial and tangential apart), and the excess is converted to
momentum, Δk (Å⁻¹, no 2π), through J at the fractional spot. The mean domain size along
that direction is the Scherrer-type relation in reciprocal-space form

    L = K / Δk,   K = 0.886,

P. Scherrer, Nachr. Ges. Wiss. Göttingen, Math.-Phys. Kl. (1918) 98 (cited from memory;
his relation τ = K λ / (β cos θ) is L = K / Δ(2 sin θ / λ) in reciprocal units). K = 0.886
is the FWHM of the interference function of a row of N cells, sin²(πNx)/sin²(πx), times
N (for large N), i.e. a domain of uniform extent L along the direction (this value is
checked numerically in tests/test_domain_size.py). In 2π units the same reads
L = 2π K / Δk₂π. Other domain-shape assumptions change K: for a geometric distribution of
domain sizes the profile is a Lorentzian and L_mean = 1 / (π Δk) (common practice; from
memory), about a third of the value above — the method is stated with every estimate.

A fractional beam no wider than 1.1 × the instrument width does not resolve its domains:
it only bounds the size from below, by the size at that width.

What the number means (measured on renders of :mod:`analysis.simulate.domain_spots`): for
domains of one size it is that size within ±8 % (8, 16, 30 cells); for elongated domains
it is the geometric mean of the two extents (8 × 16 cells: 58 Å for 57.8 Å); for a mixture
of sizes the large domains dominate the width, and the estimate lies above the
area-weighted mean size (equal numbers of 6 × 6 and 12 × 12 domains: 62 Å against an
area-weighted 55 Å and a number mean of 46 Å). Radial and tangential sizes follow the
image directions, not the domains' axes; :func:`sizes_along_axes` gives each domain's extents
along its own net vectors (8 × 16 cells, 41 × 82 Å: 43 × 85 Å).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import ParameterError
from .optics import ScreenGeometry, pixel_derivatives, pixels_to_momentum
from .spots.widths import FWHM_PER_SIGMA, SpotWidths

__all__ = ["SCHERRER_K", "RESOLVED_RATIO", "METHOD", "BeamWidths", "DomainSize", "widths_in_momentum",
           "domain_size", "sizes_along_axes", "interference_fwhm"]

#: FWHM × N of sin²(πNx)/sin²(πx) for large N (uniform domain extent); see the module docstring
SCHERRER_K = 0.886
#: a fractional beam must be this many times as wide as the instrument response to resolve domains
RESOLVED_RATIO = 1.1

METHOD = ("Widths as Gaussians in quadrature, w_dom² = w_frac² − w_int² (instrument response = median "
          "width of the integer beams, common practice); mean domain size L = K/Δk, K = 0.886 "
          "(Scherrer-type relation, P. Scherrer 1918, reciprocal form; K for a domain of uniform extent; "
          "Δk in Å⁻¹ without 2π).")


@dataclass(frozen=True, eq=False)
class BeamWidths:
    """Spot widths in pixels and in momentum.

    Attributes
    ----------
    pixels : SpotWidths
    fwhm_radial_invA, fwhm_tangential_invA : (K,) ndarray of float64
        FWHM along and across the direction the image radial maps to, Å⁻¹ (no 2π).
    fwhm_radial_bz_percent, fwhm_tangential_bz_percent : (K,) ndarray of float64
        The same in per cent of |a*|.
    invA_per_px_radial, invA_per_px_tangential : (K,) ndarray of float64
        Momentum per pixel along the image radial and tangential directions at each spot.
    a_star_invA : float
    energy_eV : float
    jacobian : (K, 2, 2) ndarray of float64 or None
        d(x, y_down)/d(k_x, k_y) at each spot, pixels per Å⁻¹.
    """

    pixels: SpotWidths
    fwhm_radial_invA: np.ndarray
    fwhm_tangential_invA: np.ndarray
    fwhm_radial_bz_percent: np.ndarray
    fwhm_tangential_bz_percent: np.ndarray
    invA_per_px_radial: np.ndarray
    invA_per_px_tangential: np.ndarray
    a_star_invA: float
    energy_eV: float
    jacobian: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class DomainSize:
    """Mean domain size from fractional-order beam widths.

    Attributes
    ----------
    size_A : float
        Median over the resolved fractional beams of √(L_r L_t), Å; NaN when none resolves.
    size_radial_A, size_tangential_A : float
        Medians of L along and across the radial direction, Å.
    spread_A : (2,) tuple of float
        25th and 75th percentiles of the per-beam √(L_r L_t), Å.
    lower_limit_A : float
        When no beam resolves: the size below which a beam would have been resolved (Å); else NaN.
    per_spot_A : (K,) ndarray of float64
        √(L_r L_t) per spot (NaN for integer beams and unresolved ones).
    instrument_fwhm_px : (2,) tuple of float
        Median radial and tangential FWHM of the integer beams, pixels.
    instrument_fwhm_invA : float
        The instrument response in momentum at the pattern centre (geometric mean), Å⁻¹;
        its inverse is the largest size the instrument can measure (order of magnitude).
    fractional_fwhm_px : (2,) tuple of float
        Median radial and tangential FWHM of the fractional beams, pixels.
    n_integer, n_fractional, n_resolved : int
    shape_factor : float
    method : str
    message : str
        One line for the user.
    """

    size_A: float
    size_radial_A: float
    size_tangential_A: float
    spread_A: tuple
    lower_limit_A: float
    per_spot_A: np.ndarray
    instrument_fwhm_px: tuple
    instrument_fwhm_invA: float
    fractional_fwhm_px: tuple
    n_integer: int
    n_fractional: int
    n_resolved: int
    shape_factor: float = SCHERRER_K
    method: str = METHOD
    message: str = ""
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """The estimate in plain JSON types (NaN as None), sizes in Å.

        Returns
        -------
        dict
            Sizes, widths, counts, method and message.
        """

        def f(v):
            v = float(v)
            return v if math.isfinite(v) else None

        return {"size_angstrom": f(self.size_A), "size_radial_angstrom": f(self.size_radial_A),
                "size_tangential_angstrom": f(self.size_tangential_A),
                "spread_angstrom": [f(v) for v in self.spread_A], "lower_limit_angstrom": f(self.lower_limit_A),
                "instrument_fwhm_px": [f(v) for v in self.instrument_fwhm_px],
                "instrument_fwhm_invA": f(self.instrument_fwhm_invA),
                "fractional_fwhm_px": [f(v) for v in self.fractional_fwhm_px],
                "n_integer": self.n_integer, "n_fractional": self.n_fractional, "n_resolved": self.n_resolved,
                "shape_factor": self.shape_factor, "method": self.method, "message": self.message}


def _jacobians(xy, energy_eV, geometry):
    k = pixels_to_momentum(xy, energy_eV, geometry)
    _, jac, _ = pixel_derivatives(k, energy_eV, geometry)
    return jac  # (K, 2, 2): d(x, y_down)/d(k_x, k_y)


def widths_in_momentum(widths: SpotWidths, *, energy_eV: float, geometry: ScreenGeometry,
                       a_star_invA: float) -> BeamWidths:
    """Convert pixel widths to momentum and per cent of |a*| (see the module docstring).

    Parameters
    ----------
    widths : SpotWidths
        The spots' pixel widths (:func:`analysis.spot_table.measure_widths`).
    energy_eV : float, keyword-only
        Electron energy, eV.
    geometry : ScreenGeometry, keyword-only
        The fitted camera model.
    a_star_invA : float, keyword-only
        |a*| of the substrate, Å⁻¹ (no 2π).

    Returns
    -------
    BeamWidths
        Widths in Å⁻¹ (no 2π) and in per cent of |a*|.

    Examples
    --------
    >>> from analysis.optics import ScreenGeometry, wavelength_A
    >>> g = ScreenGeometry(100.0, 100.0, 400.0)   # distant camera: 400 λ px per Å⁻¹ at the centre
    >>> w = SpotWidths(np.array([[100.0, 100.0]]), np.array([[[4.0, 0.0], [0.0, 4.0]]]), *(np.array([1.0]),) * 5,
    ...                np.array([1.0]), np.array([True]), np.array([100.0, 100.0]))
    >>> b = widths_in_momentum(w, energy_eV=100.0, geometry=g, a_star_invA=0.4)
    >>> expect = FWHM_PER_SIGMA * 2.0 / (400.0 * wavelength_A(100.0))
    >>> print(bool(np.isclose(b.fwhm_radial_invA[0], expect)), round(float(b.fwhm_radial_bz_percent[0]), 3))
    True 2.4
    """
    s = float(a_star_invA)
    if not (s > 0 and math.isfinite(s)):
        raise ParameterError(f"`a_star_invA` must be a positive number of Å⁻¹, got {a_star_invA!r}.")
    if not isinstance(geometry, ScreenGeometry):
        raise ParameterError(f"`geometry` must be a ScreenGeometry, got {type(geometry).__name__}.")
    k = len(widths)
    if k == 0:
        z = np.zeros(0)
        return BeamWidths(widths, z, z, z, z, z, z, s, float(energy_eV), np.zeros((0, 2, 2)))
    jac = _jacobians(widths.xy_px, float(energy_eV), geometry)
    with np.errstate(invalid="ignore"):
        jinv = np.linalg.inv(np.where(np.isfinite(jac), jac, np.eye(2)))
    jinv[~np.all(np.isfinite(jac), axis=(1, 2))] = np.nan
    u = widths.radial_unit()
    t = np.column_stack([-u[:, 1], u[:, 0]])
    er = np.einsum("kij,kj->ki", jinv, u)  # momentum per pixel along the image radial
    et = np.einsum("kij,kj->ki", jinv, t)
    per_r, per_t = np.hypot(er[:, 0], er[:, 1]), np.hypot(et[:, 0], et[:, 1])
    er_u = er / per_r[:, None]
    # the momentum direction across er_u
    et_u = np.column_stack([-er_u[:, 1], er_u[:, 0]])
    cov_k = np.einsum("kij,kjl,kml->kim", jinv, widths.cov_px2, jinv)
    w_r = FWHM_PER_SIGMA * np.sqrt(np.einsum("ki,kij,kj->k", er_u, cov_k, er_u))
    w_t = FWHM_PER_SIGMA * np.sqrt(np.einsum("ki,kij,kj->k", et_u, cov_k, et_u))
    return BeamWidths(widths, w_r, w_t, 100.0 * w_r / s, 100.0 * w_t / s, per_r, per_t, s, float(energy_eV), jac)


def domain_size(beams: BeamWidths, integer, fractional, *, shape_factor: float = SCHERRER_K,
                geometry: ScreenGeometry | None = None) -> DomainSize:
    """Mean domain size from the fractional beams' widths over the integer beams' (module docstring).

    Parameters
    ----------
    beams : BeamWidths
        The spots' widths in momentum (:func:`widths_in_momentum`).
    integer, fractional : (K,) array_like of bool
        Which spots are integer-order beams (the instrument response) and which are
        fractional-order beams of the overlayer.
    shape_factor : float, keyword-only
        K of L = K / Δk (default :data:`SCHERRER_K`).
    geometry : ScreenGeometry, optional, keyword-only
        For the instrument response in momentum at the pattern centre.

    Returns
    -------
    DomainSize
        With a one-line `message`; sizes are NaN when they cannot be measured.
    """
    px = beams.pixels
    ok = np.asarray(px.ok, bool)
    integ = np.asarray(integer, bool) & ok
    frac = np.asarray(fractional, bool) & ok
    kf = float(shape_factor)
    if not (kf > 0 and math.isfinite(kf)):
        raise ParameterError(f"`shape_factor` must be positive, got {shape_factor!r}.")
    n_i, n_f = int(integ.sum()), int(frac.sum())
    k = len(px)
    nan = float("nan")
    per = np.full(k, np.nan)
    if n_i < 2 or n_f < 1:
        why = (f"{n_i} integer beam{'s' if n_i != 1 else ''} with a width fit (2 needed for the instrument response)"
               if n_i < 2 else "no fractional-order beam with a width fit")
        return DomainSize(nan, nan, nan, (nan, nan), nan, per, (nan, nan), nan, (nan, nan), n_i, n_f, 0, kf,
                          message=f"No domain size: {why}.")
    wi_r = float(np.median(px.fwhm_radial_px[integ]))
    wi_t = float(np.median(px.fwhm_tangential_px[integ]))
    wf_r, wf_t = px.fwhm_radial_px[frac], px.fwhm_tangential_px[frac]
    res_r, res_t = wf_r > RESOLVED_RATIO * wi_r, wf_t > RESOLVED_RATIO * wi_t
    with np.errstate(invalid="ignore", divide="ignore"):
        dk_r = np.sqrt(np.clip(wf_r**2 - wi_r**2, 0, None)) * beams.invA_per_px_radial[frac]
        dk_t = np.sqrt(np.clip(wf_t**2 - wi_t**2, 0, None)) * beams.invA_per_px_tangential[frac]
        l_r, l_t = kf / dk_r, kf / dk_t
    both = res_r & res_t
    l_spot = np.sqrt(l_r * l_t)
    per[np.flatnonzero(frac)[both]] = l_spot[both]
    w_inst_k = nan
    if geometry is not None:
        jac = _jacobians(np.array([geometry.center_px]), beams.energy_eV, geometry)[0]
        step = np.sqrt(abs(np.linalg.det(np.linalg.inv(jac))))  # Å⁻¹ per px (geometric mean)
        w_inst_k = float(math.sqrt(wi_r * wi_t) * step)
    inst = (wi_r, wi_t)
    frac_w = (float(np.median(wf_r)), float(np.median(wf_t)))
    n_res = int(both.sum())
    if n_res == 0:
        # the size at which a beam would just have been resolved, at the fractional beams' median scale
        lim = math.sqrt(RESOLVED_RATIO**2 - 1.0)
        dk_lim = math.sqrt(wi_r * wi_t) * lim * float(np.median(np.sqrt(beams.invA_per_px_radial[frac] *
                                                                       beams.invA_per_px_tangential[frac])))
        low = kf / dk_lim
        return DomainSize(nan, nan, nan, (nan, nan), low, per, inst, w_inst_k, frac_w, n_i, n_f, 0, kf,
                          message=(f"Fractional beams are as sharp as the integer beams (instrument-limited): "
                                   f"domains larger than about {low:.0f} Å."))
    size = float(np.median(l_spot[both]))
    q25, q75 = np.percentile(l_spot[both], [25, 75])
    lr = float(np.median(l_r[res_r])) if res_r.any() else nan
    lt = float(np.median(l_t[res_t])) if res_t.any() else nan
    msg = (f"Mean domain size ≈ {size:.0f} Å (radial {lr:.0f} Å, tangential {lt:.0f} Å) from {n_res} "
           f"fractional beam{'s' if n_res != 1 else ''} against {n_i} integer beams.")
    return DomainSize(size, lr, lt, (float(q25), float(q75)), nan, per, inst, w_inst_k, frac_w, n_i, n_f, n_res,
                      kf, message=msg)


def sizes_along_axes(beams: BeamWidths, integer, domain_index, axes, *,
                     shape_factor: float = SCHERRER_K) -> list[dict]:
    """Mean domain extents along each overlayer domain's own net vectors b1, b2.

    The instrument response is subtracted as a covariance (Gaussians convolve by adding
    covariances): C_dom = C_spot − C_int in pixels, C_int the element-wise median of the integer
    beams' covariances; then C_k = J⁻¹ C_dom J⁻ᵀ and, along the unit vector b̂_j of the domain's
    net vector b_j (in the momentum frame), Δk_j = 2√(2 ln 2) √(b̂_jᵀ C_k b̂_j) and L_j = K / Δk_j.
    For domains of N₁ × N₂ cells (parallelograms along b1, b2) whose beam profile is the product of
    the interference functions of the two phases q·b_j, the marginal width along b̂_j holds N_j
    alone, so L_j = N_j |b_j| (Gaussian approximation). A beam counts along b_j when its width
    there exceeds the instrument's by :data:`RESOLVED_RATIO`.

    Parameters
    ----------
    beams : BeamWidths
        With its `jacobian`.
    integer : (K,) array_like of bool
        Integer-order beams (the instrument response).
    domain_index : (K,) array_like of int
        Domain of each fractional beam (0-based); −1 for the others.
    axes : (D, 2, 2) array_like of float
        Per domain, its net vectors b1, b2 as rows in the momentum frame's axes (Å; only their
        directions are used).
    shape_factor : float, keyword-only
        K of L = K / Δk (default the Scherrer-type factor :data:`SCHERRER_K`).

    Returns
    -------
    list of dict
        Per domain with resolved beams: ``domain`` (counting from 1), ``size_b1_angstrom``,
        ``size_b2_angstrom`` (NaN when no beam resolves along it), ``n_b1``, ``n_b2``.
    """
    px = beams.pixels
    ok = np.asarray(px.ok, bool)
    integ = np.asarray(integer, bool) & ok
    dom = np.asarray(domain_index, int)
    ax = np.asarray(axes, float).reshape(-1, 2, 2)
    if integ.sum() < 2 or beams.jacobian is None or len(ax) == 0:
        return []
    c_int = np.median(px.cov_px2[integ], axis=0)
    unit = ax / np.linalg.norm(ax, axis=2, keepdims=True)
    out = []
    for d in range(len(ax)):
        pick = np.flatnonzero((dom == d) & ok & np.all(np.isfinite(beams.jacobian), axis=(1, 2)))
        sizes = [[], []]
        for i in pick:
            jinv = np.linalg.inv(beams.jacobian[i])
            c_all = jinv @ px.cov_px2[i] @ jinv.T
            c_ins = jinv @ c_int @ jinv.T
            for j in range(2):
                e = unit[d, j]
                v_all, v_ins = float(e @ c_all @ e), float(e @ c_ins @ e)
                if v_all > RESOLVED_RATIO**2 * v_ins:
                    sizes[j].append(shape_factor / (FWHM_PER_SIGMA * math.sqrt(v_all - v_ins)))
        if sizes[0] or sizes[1]:
            out.append({"domain": d + 1,
                        "size_b1_angstrom": float(np.median(sizes[0])) if sizes[0] else float("nan"),
                        "size_b2_angstrom": float(np.median(sizes[1])) if sizes[1] else float("nan"),
                        "n_b1": len(sizes[0]), "n_b2": len(sizes[1])})
    return out


def interference_fwhm(n_cells: int, *, samples: int = 20001) -> float:
    """FWHM (in units of the reciprocal cell, i.e. of x) of sin²(πNx)/sin²(πx) for N = `n_cells`,
    found numerically; N × this tends to :data:`SCHERRER_K`.

    Parameters
    ----------
    n_cells : int
        N, the cells in a row.
    samples : int, keyword-only
        Sample points of the numerical search.

    Returns
    -------
    float
        The FWHM as a fraction of the reciprocal cell.

    Examples
    --------
    >>> print(round(interference_fwhm(200) * 200, 3))
    0.886
    """
    n = int(n_cells)
    if n < 2:
        raise ParameterError(f"`n_cells` must be at least 2, got {n_cells!r}.")
    x = np.linspace(1e-12, 1.0 / n, samples)
    f = (np.sin(np.pi * n * x) / (n * np.sin(np.pi * x))) ** 2
    i = int(np.argmax(f < 0.5))
    x0, x1, f0, f1 = x[i - 1], x[i], f[i - 1], f[i]
    return float(2.0 * (x0 + (0.5 - f0) * (x1 - x0) / (f1 - f0)))
