"""Pattern centre and screen geometry from measured spots; calibration files.

* :func:`estimate_center_from_pairs` — at normal incidence the beams g and −g
  land point-symmetrically about the pattern centre (the camera model of
  :mod:`analysis.optics` is odd in k), so the centre is the common midpoint of
  spot pairs. Works without knowing any net.
* :func:`fit_geometry` — least-squares fit of the :class:`~analysis.optics.ScreenGeometry`
  parameters (centre, scale, distortion R/L, rotation, ellipticity) to spots of
  known parallel momentum, at one or several energies, with uncertainties.
* :func:`calibrate_from_reference` — the same from a clean, known substrate:
  it indexes the reference spots itself (integer beams only), then fits.
* :class:`Calibration` — a fitted geometry with its uncertainties, saved to and
  loaded from schema-versioned JSON and reused for later images (it lives in
  :mod:`analysis.calibration_file`; this module re-exports it).

Positions at this module's interface are (x, y) pixels (x right, y down, the
centre of the top-left pixel at (0, 0)), as in :mod:`analysis.optics`.
Momenta are crystallographic, Å⁻¹ without 2π.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial import cKDTree

from .calibration_file import CALIBRATION_SCHEMA, CALIBRATION_VERSION, Calibration
from .errors import FitError, ParameterError
from .lattice import lattice_points, screen_g_max
from .nets import Net2D, reciprocal
from .optics import ScreenGeometry, momentum_to_pixels, pixels_to_momentum, wavelength_A

__all__ = [
    "CenterEstimate",
    "GeometryFit",
    "Calibration",
    "estimate_center_from_pairs",
    "fit_geometry",
    "calibrate_from_reference",
    "CALIBRATION_SCHEMA",
    "CALIBRATION_VERSION",
    "GEOMETRY_PARAMETERS",
]

GEOMETRY_PARAMETERS = ("center_x_px", "center_y_px", "scale_px", "distortion", "rotation_deg", "ellipticity",
                       "ellipse_deg")


def _xy(xy_px, name="xy_px") -> np.ndarray:
    a = np.asarray(xy_px, dtype=np.float64)
    if a.ndim != 2 or a.shape[1] != 2 or not np.all(np.isfinite(a)):
        raise ParameterError(f"`{name}` must be a (K, 2) array of finite (x, y) pixels, got shape {a.shape}.")
    return a


# --------------------------------------------------------------------------- centre


@dataclass(frozen=True, eq=False)
class CenterEstimate:
    """Pattern centre from symmetric spot pairs.

    Attributes
    ----------
    center_xy : (2,) ndarray of float64
        (x, y) pixels.
    sigma_xy : (2,) ndarray of float64
        1-σ uncertainty of `center_xy`, pixels.
    pairs : (P, 2) ndarray of int
        Indices (i, j) of the spots paired as g, −g.
    rms_px : float
        RMS scatter of the pair midpoints about the centre (per coordinate).
    """

    center_xy: np.ndarray
    sigma_xy: np.ndarray
    pairs: np.ndarray
    rms_px: float

    @property
    def n_pairs(self) -> int:
        return int(len(self.pairs))


def estimate_center_from_pairs(xy_px, *, sigma_px=None, tol_px: float | None = None, initial_xy=None,
                               min_pairs: int = 3) -> CenterEstimate:
    """Centre of point symmetry of a spot pattern (pairs g, −g).

    Every pair of spots votes for its midpoint; the most-voted place is refined
    by pairing each spot with the spot nearest to its mirror image and
    averaging the pair midpoints (weighted by their uncertainties).

    Parameters
    ----------
    xy_px : (K, 2) array_like of float
        Spot positions (x, y), pixels.
    sigma_px : float or (K,) array_like, optional, keyword-only
        Position uncertainty per spot (px); default: from the midpoint scatter.
    tol_px : float, optional, keyword-only
        Largest mismatch of a pair; default 2 % of the pattern's extent, ≥ 3 px.
    initial_xy : (x, y), optional, keyword-only
        Start of the refinement instead of the vote (e.g. the gun-disk centre).
    min_pairs : int, keyword-only
        Fewest symmetric pairs accepted.

    Returns
    -------
    CenterEstimate
        The centre (x, y) in pixels, its uncertainty and the pairs used.

    Raises
    ------
    FitError
        Fewer than `min_pairs` symmetric pairs.

    Examples
    --------
    >>> g = np.array([[40.0, 0.0], [0.0, 40.0], [28.0, 28.0], [-12.0, 33.0], [50.0, -20.0]])
    >>> pts = np.vstack([g, -g]) + [300.0, 200.0]
    >>> est = estimate_center_from_pairs(pts)
    >>> print(np.round(est.center_xy, 6).tolist(), est.n_pairs)
    [300.0, 200.0] 5
    """
    p = _xy(xy_px)
    k = len(p)
    if k < 2 * min_pairs:
        raise FitError(f"Need at least {2 * min_pairs} spots to find symmetric pairs, got {k}.")
    sig = None
    if sigma_px is not None:
        sig = np.broadcast_to(np.asarray(sigma_px, dtype=np.float64), (k,)).astype(float)
        if not np.all(np.isfinite(sig) & (sig > 0)):
            raise ParameterError("`sigma_px` must be positive and finite.")
    extent = float(np.ptp(p, axis=0).max())
    tol = max(3.0, 0.02 * extent) if tol_px is None else float(tol_px)
    if not (tol > 0):
        raise ParameterError(f"`tol_px` must be positive, got {tol_px}.")
    tree = cKDTree(p)
    if initial_xy is None:
        sel = p if k <= 700 else p[np.random.default_rng(0).choice(k, 700, replace=False)]
        i, j = np.triu_indices(len(sel), 1)
        mids = 0.5 * (sel[i] + sel[j])
        # fine bins: the true centre collects the votes of every pair within the position noise,
        # while points of the half-net collect fewer
        bw = max(1.0, tol / 4.0)
        lo = p.min(axis=0) - tol
        nb = np.maximum(1, np.ceil((p.max(axis=0) + tol - lo) / bw).astype(int))
        idx = np.clip(((mids - lo) / bw).astype(int), 0, nb - 1)
        hist = np.zeros(nb[::-1])
        np.add.at(hist, (idx[:, 1], idx[:, 0]), 1.0)
        from scipy.ndimage import uniform_filter

        votes = uniform_filter(hist, size=3, mode="constant") * 9
        by, bx = np.unravel_index(int(np.argmax(votes)), votes.shape)
        box = (np.abs(idx[:, 0] - bx) <= 1) & (np.abs(idx[:, 1] - by) <= 1)
        c = mids[box].mean(axis=0)
    else:
        c = np.asarray(initial_xy, dtype=np.float64).reshape(2)
    pairs = np.zeros((0, 2), int)
    for it in range(8):
        d, j = tree.query(2.0 * c[None, :] - p, k=1, distance_upper_bound=tol)
        ok = np.isfinite(d)
        i_idx = np.flatnonzero(ok)
        j_idx = j[ok]
        # mutual partners, each pair once; a spot at the centre pairs with itself (skip it)
        mutual = np.zeros(len(i_idx), bool)
        partner = np.full(k, -1)
        partner[i_idx] = j_idx
        for n, (a, b) in enumerate(zip(i_idx, j_idx)):
            mutual[n] = a < b and partner[b] == a
        new_pairs = np.column_stack([i_idx[mutual], j_idx[mutual]]) if mutual.any() else np.zeros((0, 2), int)
        if len(new_pairs) < min_pairs:
            break
        pairs = new_pairs
        mids = 0.5 * (p[pairs[:, 0]] + p[pairs[:, 1]])
        w = np.ones(len(pairs)) if sig is None else 1.0 / (0.25 * (sig[pairs[:, 0]] ** 2 + sig[pairs[:, 1]] ** 2))
        c_new = (w[:, None] * mids).sum(axis=0) / w.sum()
        resid = mids - c_new
        rms = math.sqrt(float(np.mean(resid**2)))
        # a pair's mismatch |x_i + x_j − 2c| is ≈ 2.8 × the per-coordinate midpoint scatter
        tol_new = max(10.0 * rms, 1.0, 0.25 * tol)
        moved = float(np.hypot(*(c_new - c)))
        c = c_new
        if moved < 1e-6 and tol_new >= tol:
            break
        tol = min(tol, tol_new) if it >= 1 else tol
    if len(pairs) < min_pairs:
        raise FitError(f"Found {len(pairs)} symmetric spot pairs, need at least {min_pairs}; "
                       f"is the beam at normal incidence and are ±g spots visible?")
    mids = 0.5 * (p[pairs[:, 0]] + p[pairs[:, 1]])
    w = np.ones(len(pairs)) if sig is None else 1.0 / (0.25 * (sig[pairs[:, 0]] ** 2 + sig[pairs[:, 1]] ** 2))
    c = (w[:, None] * mids).sum(axis=0) / w.sum()
    resid = mids - c
    rms = math.sqrt(float(np.mean(resid**2)))
    n = len(pairs)
    emp = np.sqrt(np.sum(w[:, None] ** 2 * resid**2, axis=0)) / w.sum() * math.sqrt(n / max(n - 1, 1))
    if sig is not None:
        prop = np.full(2, 1.0 / math.sqrt(w.sum()))
        sigma = np.maximum(emp, prop) if n >= 3 else prop
    else:
        sigma = emp if n >= 3 else np.full(2, np.nan)
    return CenterEstimate(center_xy=c, sigma_xy=sigma, pairs=pairs, rms_px=rms)


# --------------------------------------------------------------------------- geometry fit

_INTERNAL = ("center_x_px", "center_y_px", "scale_px", "distortion", "rotation_deg", "e1", "e2")


def _geometry_from_internal(q: np.ndarray, acceptance_deg: float) -> ScreenGeometry:
    """Internal parameters → ScreenGeometry.

    The image map is s · E · R(rotation) with E = I + ½ [[e1, e2], [e2, −e1]]
    (a symmetric stretch, smooth through the round case). E has eigenvalues
    1 ± ½|e|; ScreenGeometry writes the same matrix as s' · U diag(q, 1) Uᵀ with
    s' = s (1 − ½|e|), q = (1 + ½|e|) / (1 − ½|e|) along β = ½ atan2(e2, e1).
    """
    cx, cy, s, d, rot, e1, e2 = (float(v) for v in q)
    e = math.hypot(e1, e2)
    e = min(e, 1.5)
    s_minor = s * (1.0 - 0.5 * e)
    ell = (1.0 + 0.5 * e) / (1.0 - 0.5 * e)
    beta = 0.5 * math.degrees(math.atan2(e2, e1)) if e > 0 else 0.0
    return ScreenGeometry(cx, cy, max(s_minor, 1e-9), distortion=min(max(d, 0.0), 0.999999), rotation_deg=rot,
                          ellipticity=ell, ellipse_deg=beta % 180.0, acceptance_deg=acceptance_deg)


def _internal_from_geometry(g: ScreenGeometry) -> np.ndarray:
    q_ = g.ellipticity
    if q_ < 1.0:  # same matrix with the axes swapped
        s_minor, q_, beta = g.scale_px * q_, 1.0 / q_, g.ellipse_deg + 90.0
    else:
        s_minor, beta = g.scale_px, g.ellipse_deg
    e = 2.0 * (q_ - 1.0) / (q_ + 1.0)
    s = s_minor / (1.0 - 0.5 * e)
    b = math.radians(2.0 * beta)
    return np.array([g.center_x_px, g.center_y_px, s, g.distortion, g.rotation_deg, e * math.cos(b),
                     e * math.sin(b)])


@dataclass(frozen=True, eq=False)
class GeometryFit:
    """Result of :func:`fit_geometry`.

    Attributes
    ----------
    geometry : ScreenGeometry
    uncertainty : dict of str to float
        1-σ uncertainty of each ScreenGeometry field in :data:`GEOMETRY_PARAMETERS`
        (0 for fixed ones; NaN for `ellipse_deg` of a round image).
    residuals_px : (K, 2) ndarray of float64
        Measured minus predicted (x, y).
    rms_px : float
        RMS residual per coordinate.
    energies_eV : tuple of float
        The distinct energies used.
    free : tuple of str
        Internal parameters that were fitted.
    """

    geometry: ScreenGeometry
    uncertainty: dict
    residuals_px: np.ndarray
    rms_px: float
    energies_eV: tuple
    free: tuple
    covariance: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))

    @property
    def n_spots(self) -> int:
        return int(len(self.residuals_px))

    def predict(self, k_par, energy_eV: float, **kw) -> np.ndarray:
        """(K, 2) (x, y) pixels of beams `k_par` (Å⁻¹, no 2π) at `energy_eV`.

        Parameters
        ----------
        k_par : (K, 2) array_like of float
            Outgoing parallel momentum, Å⁻¹ without 2π.
        energy_eV : float
            Electron energy, eV.
        **kw
            ``relativistic``, as for :func:`analysis.optics.momentum_to_pixels`.

        Returns
        -------
        (K, 2) ndarray of float64
            (x, y) pixels; NaN for beams that miss the screen.
        """
        return momentum_to_pixels(k_par, energy_eV, self.geometry, **kw)[0]


def _k_from(k_par, hk, substrate, n):
    if k_par is not None:
        k = np.asarray(k_par, dtype=np.float64)
    elif hk is not None and substrate is not None:
        if not isinstance(substrate, Net2D):
            raise ParameterError(f"`substrate` must be a Net2D (real space, Å), got {type(substrate).__name__}.")
        k = np.asarray(hk, dtype=np.float64).reshape(-1, 2) @ reciprocal(substrate).vectors
    else:
        raise ParameterError("Give the spots' momenta: `k_par`, or `hk` together with `substrate`.")
    if k.shape != (n, 2) or not np.all(np.isfinite(k)):
        raise ParameterError(f"Momenta must be a ({n}, 2) finite array (one per spot), got shape {k.shape}.")
    return k


def fit_geometry(xy_px, k_par=None, energy_eV=None, *, hk=None, substrate: Net2D | None = None,
                 initial: ScreenGeometry | None = None, fix=(), sigma_px=None, relativistic: bool = False,
                 acceptance_deg: float | None = None) -> GeometryFit:
    """Fit the screen geometry to spots of known parallel momentum.

    Parameters
    ----------
    xy_px : (K, 2) array_like of float
        Measured (x, y) pixels.
    k_par : (K, 2) array_like of float, optional
        Outgoing parallel momentum of each spot in surface axes, Å⁻¹ without 2π
        (e.g. ``hk @ reciprocal(net).vectors``). Or give `hk` and `substrate`.
    energy_eV : float or (K,) array_like
        Beam energy of each spot (several energies constrain the distortion best).
    hk : (K, 2) array_like, optional, keyword-only
        Indices in the substrate reciprocal basis.
    substrate : Net2D, optional, keyword-only
        Real-space net; its rotation on the image is fitted (`rotation_deg`).
    initial : ScreenGeometry, optional, keyword-only
        Start values (and the values of fixed parameters). Default: a linear
        fit of centre, scale and rotation with no distortion.
    fix : iterable of str, keyword-only
        Parameters held at `initial`: any of ``"center"``, ``"scale"``,
        ``"distortion"``, ``"rotation"``, ``"ellipticity"``. The distortion is
        also held when all spots share one exit angle (one ring, one energy).
    sigma_px : float or (K,) array_like, optional, keyword-only
        Position uncertainty per spot; default: from the residuals.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.
    acceptance_deg : float, optional, keyword-only
        Stored in the result (default `initial`'s, or 52°).

    Returns
    -------
    GeometryFit
        The camera model, its parameter uncertainties and the residuals (pixels).

    Raises
    ------
    FitError
        Too few spots for the free parameters, or the fit failed.

    Examples
    --------
    >>> true = ScreenGeometry(510.0, 495.0, 620.0, distortion=0.3, rotation_deg=17.0)
    >>> n = np.array([[i, j] for i in range(-3, 4) for j in range(-3, 4) if (i, j) != (0, 0)], float)
    >>> k = n * 0.39
    >>> xy = np.vstack([momentum_to_pixels(k, e, true)[0] for e in (80.0, 160.0)])
    >>> ok = np.all(np.isfinite(xy), axis=1)
    >>> fit = fit_geometry(xy[ok], np.vstack([k, k])[ok], np.repeat([80.0, 160.0], len(k))[ok],
    ...                    fix=("ellipticity",))
    >>> print(round(fit.geometry.scale_px, 3), round(fit.geometry.distortion, 4), round(fit.geometry.rotation_deg, 3))
    620.0 0.3 17.0
    """
    p = _xy(xy_px)
    n = len(p)
    k = _k_from(k_par, hk, substrate, n)
    if energy_eV is None:
        raise ParameterError("`energy_eV` is required (one value, or one per spot).")
    e = np.broadcast_to(np.asarray(energy_eV, dtype=np.float64), (n,)).astype(float)
    if not np.all(np.isfinite(e) & (e > 0)):
        raise ParameterError(f"`energy_eV` must be positive, got {np.unique(e).tolist()[:5]}.")
    fix = set(fix)
    unknown = fix - {"center", "scale", "distortion", "rotation", "ellipticity"}
    if unknown:
        raise ParameterError(f"Unknown names in `fix`: {sorted(unknown)}; use center, scale, distortion, "
                             f"rotation, ellipticity.")
    if initial is not None and not isinstance(initial, ScreenGeometry):
        raise ParameterError(f"`initial` must be a ScreenGeometry, got {type(initial).__name__}.")
    acc = acceptance_deg if acceptance_deg is not None else (initial.acceptance_deg if initial else 52.0)
    lam = np.array([wavelength_A(v, relativistic=relativistic) for v in e])
    kmag = np.hypot(k[:, 0], k[:, 1])
    if np.any(lam * kmag >= 1.0):
        raise ParameterError("Some momenta do not reach the screen at their energy (λ|k| ≥ 1).")
    if len(np.unique(np.round(lam * kmag, 4))) < 2:
        fix.add("distortion")  # one ring at one energy: the radial law cannot be told from the scale
    if initial is None:
        initial = _linear_start(p, k, lam, fix, acc)
    q0 = _internal_from_geometry(initial)
    free = [0, 1] * ("center" not in fix) + [2] * ("scale" not in fix) + [3] * ("distortion" not in fix) + \
        [4] * ("rotation" not in fix) + [5, 6] * ("ellipticity" not in fix)
    free = sorted(set(free))
    if n * 2 < len(free) + 1:
        raise FitError(f"{n} spots cannot fix {len(free)} geometry parameters; give more spots or `fix` some.")
    w = np.ones(n) if sigma_px is None else 1.0 / np.broadcast_to(np.asarray(sigma_px, float), (n,))
    if not np.all(np.isfinite(w) & (w > 0)):
        raise ParameterError("`sigma_px` must be positive and finite.")
    groups = [(ev, np.flatnonzero(e == ev)) for ev in np.unique(e)]

    def predict(q):
        g = _geometry_from_internal(q, 90.0)  # no acceptance cut while fitting
        out = np.empty_like(p)
        for ev, idx in groups:
            out[idx] = momentum_to_pixels(k[idx], ev, g, relativistic=relativistic)[0]
        return out

    def resid(x):
        q = q0.copy()
        q[free] = x
        r = predict(q) - p
        r = np.where(np.isfinite(r), r, 1e6)
        return (r * w[:, None]).ravel()

    lo = np.full(7, -np.inf)
    hi = np.full(7, np.inf)
    lo[2], lo[3], hi[3], lo[5], hi[5], lo[6], hi[6] = 1e-6, 0.0, 0.95, -1.0, 1.0, -1.0, 1.0
    x0 = np.clip(q0[free], lo[free] + 1e-12, hi[free] - 1e-12)
    try:
        sol = least_squares(resid, x0, bounds=(lo[free], hi[free]), x_scale="jac", method="trf",
                            xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=2000)
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise FitError(f"Geometry fit failed: {exc}.") from None
    q = q0.copy()
    q[free] = sol.x
    res = predict(q) - p
    if not np.all(np.isfinite(res)):
        raise FitError("Geometry fit failed: some spots fall off the screen for the fitted geometry.")
    dof = max(2 * n - len(free), 1)
    chi2 = float(np.sum((res * w[:, None]) ** 2))
    s2 = chi2 / dof if sigma_px is None else 1.0
    jac = sol.jac
    jtj = jac.T @ jac
    dscale = np.sqrt(np.maximum(np.diag(jtj), 1e-300))
    try:
        jn = jtj / np.outer(dscale, dscale)
        if np.linalg.cond(jn) > 1e12:
            raise np.linalg.LinAlgError
        cov_free = np.linalg.inv(jn) / np.outer(dscale, dscale) * s2
    except np.linalg.LinAlgError:  # some combination of parameters is not determined by these spots
        cov_free = np.full((len(free), len(free)), np.nan)
    cov = np.zeros((7, 7))
    cov[np.ix_(free, free)] = cov_free
    geom = dataclasses.replace(_geometry_from_internal(q, acc))
    unc = _propagate(q, cov, acc)
    rms = math.sqrt(float(np.mean(res**2)))
    return GeometryFit(geometry=geom, uncertainty=unc, residuals_px=-res, rms_px=rms,
                       energies_eV=tuple(float(v) for v in np.unique(e)),
                       free=tuple(_INTERNAL[i] for i in free), covariance=cov)


def _propagate(q, cov, acc) -> dict:
    """1-σ of each ScreenGeometry field by the delta method (numerical derivatives)."""

    def fields(qq):
        g = _geometry_from_internal(qq, acc)
        return np.array([g.center_x_px, g.center_y_px, g.scale_px, g.distortion, g.rotation_deg, g.ellipticity,
                         g.ellipse_deg])

    f0 = fields(q)
    jac = np.zeros((7, 7))
    for i in range(7):
        h = 1e-6 * max(1.0, abs(q[i]))
        qp, qm = q.copy(), q.copy()
        qp[i] += h
        qm[i] -= h
        d = fields(qp) - fields(qm)
        d[6] = (d[6] + 90.0) % 180.0 - 90.0
        jac[:, i] = d / (2 * h)
    var = np.einsum("ij,jk,ik->i", jac, cov, jac)
    out = {name: float(math.sqrt(max(v, 0.0))) for name, v in zip(GEOMETRY_PARAMETERS, var)}
    e = math.hypot(q[5], q[6])
    if e < 3.0 * math.sqrt(max(cov[5, 5] + cov[6, 6], 0.0)) or e == 0:
        out["ellipse_deg"] = float("nan")  # direction undefined for a round image
    del f0
    return out


def _linear_start(p, k, lam, fix, acc) -> ScreenGeometry:
    """Centre, scale and rotation from z = c + a w (complex), no distortion."""
    z = p[:, 0] - 1j * p[:, 1]  # y up
    wv = lam * (k[:, 0] + 1j * k[:, 1])
    a_mat = np.column_stack([np.ones_like(wv), wv])
    sol, *_ = np.linalg.lstsq(a_mat, z, rcond=None)
    c, a = sol
    if abs(a) == 0 or not np.isfinite(abs(a)):
        raise FitError("Cannot start the geometry fit: the spots do not move with their momenta.")
    return ScreenGeometry(float(c.real), float(-c.imag), float(abs(a)), rotation_deg=math.degrees(np.angle(a)),
                          acceptance_deg=acc)


# --------------------------------------------------------------------------- reference image


def calibrate_from_reference(xy_px, substrate: Net2D, energy_eV: float, *, center_xy=None, tol: float = 0.15,
                             max_order: int = 6, fix=(), relativistic: bool = False,
                             acceptance_deg: float = 52.0) -> tuple[GeometryFit, np.ndarray]:
    """Index the spots of a clean, known substrate and fit the geometry.

    The integer beams (h, k) of `substrate` are matched to the spots: every
    spot near the centre is tried as a first-order beam, which sets scale and
    rotation; the trial matching most spots is refined by :func:`fit_geometry`
    and re-matched until stable.

    Parameters
    ----------
    xy_px : (K, 2) array_like
        Spot positions (x, y) on the reference image.
    substrate : Net2D
        Real-space (1×1) net, Å.
    energy_eV : float
        Electron energy of the reference image, eV.
    center_xy : (x, y), optional, keyword-only
        Pattern centre, pixels. Default: :func:`estimate_center_from_pairs`.
    tol : float, keyword-only
        First match tolerance as a fraction of the first-order radius (it
        shrinks to 5 × the fit's RMS once a geometry is fitted).
    max_order : int, keyword-only
        Largest |h|, |k| of the integer beams tried.
    fix : iterable of str, keyword-only
        Passed to :func:`fit_geometry`; with fewer than 8 indexed spots the
        ellipticity is fixed too, with fewer than 6 also the distortion.
    relativistic : bool, keyword-only
        Use the relativistic wavelength.
    acceptance_deg : float, keyword-only
        Polar half-angle the screen accepts, degrees.

    Returns
    -------
    fit : GeometryFit
        The camera model fitted to the indexed spots, with its uncertainties.
    hk : (K, 2) ndarray of float64
        Assigned integer indices (NaN for unmatched spots).

    Raises
    ------
    FitError
        When fewer than 3 spots, or fewer than half of them, can be indexed, or
        the fit leaves residuals above 1 % of the first-order radius (≥ 1 px).
    """
    p = _xy(xy_px)
    if not isinstance(substrate, Net2D):
        raise ParameterError(f"`substrate` must be a Net2D (real space, Å), got {type(substrate).__name__}.")
    c = estimate_center_from_pairs(p).center_xy if center_xy is None else np.asarray(center_xy, float)
    astar = reciprocal(substrate).vectors
    lam = wavelength_A(energy_eV, relativistic=relativistic)
    # the beams up to order `max_order` on the screen (a hair beyond its edge: the test below decides)
    hk_all = lattice_points(np.eye(2), screen_g_max(energy_eV, acceptance_deg, relativistic=relativistic) + 1e-9,
                            metric=astar)
    hk_all = hk_all[np.all(np.abs(hk_all) <= max_order, axis=1) & np.any(hk_all != 0, axis=1)]
    kk = hk_all @ astar
    st = lam * np.hypot(kk[:, 0], kk[:, 1])
    keep = st < math.sin(math.radians(acceptance_deg))
    hk_all, kk = hk_all[keep], kk[keep]
    if len(hk_all) < 4:
        raise FitError(f"At {energy_eV} eV fewer than 4 beams of {substrate!r} reach the screen.")
    g1 = float(np.min(np.hypot(kk[:, 0], kk[:, 1])))
    first = np.flatnonzero(np.isclose(np.hypot(kk[:, 0], kk[:, 1]), g1, rtol=1e-6))
    d = p - c
    r = np.hypot(d[:, 0], d[:, 1])
    near = np.argsort(r)[: min(12, len(p))]
    tree = cKDTree(p)
    best = (0, None)
    for i in near:
        if r[i] < 1e-6:
            continue
        phi_i = math.atan2(-d[i, 1], d[i, 0])
        for j in first[:1]:  # one first-order beam suffices: the others are symmetry mates
            s = r[i] / (lam * g1)
            rot = math.degrees(phi_i - math.atan2(kk[j, 1], kk[j, 0]))
            g = ScreenGeometry(float(c[0]), float(c[1]), s, rotation_deg=rot, acceptance_deg=90.0)
            pred, _ = momentum_to_pixels(kk, energy_eV, g, relativistic=relativistic)
            ok = np.all(np.isfinite(pred), axis=1)
            dist, _ = tree.query(pred[ok], k=1, distance_upper_bound=tol * r[i])
            score = int(np.isfinite(dist).sum())
            if score > best[0]:
                best = (score, g)
    if best[1] is None or best[0] < 3:
        raise FitError(f"Could only index {best[0]} spots of the reference image as {substrate!r} at "
                       f"{energy_eV} eV; check the substrate, energy and spots.")
    geom = best[1]
    fit = None
    assign = np.full((len(p), 2), np.nan)
    tol_px = tol * geom.scale_px * lam * g1
    for _ in range(5):
        pred, _ = momentum_to_pixels(kk, energy_eV, geom, relativistic=relativistic)
        ok = np.all(np.isfinite(pred), axis=1)
        dist, idx = tree.query(pred[ok], k=1, distance_upper_bound=tol_px)
        m = np.isfinite(dist)
        spot_idx, beam_idx = idx[m], np.flatnonzero(ok)[m]
        # one beam per spot: the nearest
        order = np.argsort(dist[m])
        used, pairs = set(), []
        for o in order:
            if spot_idx[o] not in used:
                used.add(spot_idx[o])
                pairs.append((spot_idx[o], beam_idx[o]))
        if len(pairs) < 3:
            break
        sp, bm = np.array(pairs).T
        g_used = np.hypot(kk[bm, 0], kk[bm, 1])
        # spots on one ring (one |g|, one scattering angle) fix r(θ) at that angle only: the
        # distortion would trade freely against the scale, so it stays at its start value
        one_ring = float(g_used.max()) < 1.1 * float(g_used.min())
        nfix = set(fix) | ({"ellipticity"} if len(pairs) < 8 else set()) | \
            ({"distortion"} if len(pairs) < 6 or one_ring else set())
        fit = fit_geometry(p[sp], kk[bm], energy_eV, initial=dataclasses.replace(geom, acceptance_deg=acceptance_deg),
                           fix=tuple(nfix), relativistic=relativistic, acceptance_deg=acceptance_deg)
        geom = dataclasses.replace(fit.geometry, acceptance_deg=90.0)
        assign = np.full((len(p), 2), np.nan)
        assign[sp] = hk_all[bm]
        tol_px = max(5.0 * fit.rms_px, 1.0, 0.02 * geom.scale_px * lam * g1)
    if fit is None:
        raise FitError("Could not index enough spots of the reference image to fit the geometry.")
    n_ok = int(np.isfinite(assign[:, 0]).sum())
    r1 = fit.geometry.scale_px * lam * g1
    if n_ok < 0.5 * len(p) or fit.rms_px > max(1.0, 0.01 * r1):
        raise FitError(f"The reference spots do not index as {substrate!r} at {energy_eV} eV: {n_ok} of {len(p)} "
                       f"indexed, RMS {fit.rms_px:.2g} px; check the substrate and energy.")
    return fit, assign


#: Camera fields a calibration fixes for the images measured with it (the centre and the
#: azimuth are fitted again on each image, so their uncertainty is in that fit's own σ)
HELD_BY_CALIBRATION = ("scale_px", "distortion", "ellipticity", "ellipse_deg")


def _net_constants(xy_px: np.ndarray, hk: np.ndarray, energy_eV: float, geom: ScreenGeometry) -> np.ndarray:
    """(a, b, γ) of the real net whose reciprocal basis best maps `hk` onto the spots' momenta."""
    k = pixels_to_momentum(xy_px, energy_eV, geom)
    rec, *_ = np.linalg.lstsq(hk, k, rcond=None)
    real = np.linalg.inv(rec).T
    a, b = np.linalg.norm(real, axis=1)
    return np.array([a, b, math.degrees(math.acos(float(np.clip(real[0] @ real[1] / (a * b), -1, 1))))])


def _moved(geometry: ScreenGeometry, q: np.ndarray) -> ScreenGeometry:
    """`geometry` with its internal parameters set to `q` (incidence and keystone kept)."""
    g = _geometry_from_internal(q, geometry.acceptance_deg)
    return dataclasses.replace(g, incidence_x=geometry.incidence_x, incidence_y=geometry.incidence_y,
                               perspective_x=geometry.perspective_x, perspective_y=geometry.perspective_y)


#: The internal parameters (:func:`_internal_from_geometry`) a calibration holds: the mean
#: scale, the distortion and the ellipticity (e1, e2)
_HELD_INTERNAL = (2, 3, 5, 6)


def calibration_sigma(xy_px, hk, energy_eV: float, geometry: ScreenGeometry, uncertainty: dict,
                      covariance=None) -> dict:
    """σ of a, b (Å) and γ (deg) of a net measured through a calibration, from the
    calibration's own uncertainty alone (the fields it holds: :data:`HELD_BY_CALIBRATION`).

    With the calibration fit's `covariance` (internal parameters, as
    :attr:`GeometryFit.covariance`) the constants' derivatives are propagated through it,
    correlations included (the scale and the distortion are strongly anticorrelated in a
    calibration fit). Without it (an older file) each held field is moved by its 1-σ and
    the changes add in quadrature: an upper estimate. The statistical σ of the image's own
    fit adds to either in quadrature.

    Parameters
    ----------
    xy_px : (K, 2) array_like
        Substrate spots, (x, y) pixels.
    hk : (K, 2) array_like
        Their integer indices.
    energy_eV : float
        Electron energy, eV.
    geometry : ScreenGeometry
        The camera model the net was measured with.
    uncertainty : dict of str to float
        1-σ of the calibration's fields (:attr:`Calibration.uncertainty`).
    covariance : (7, 7) array_like, optional
        Covariance of the calibration fit's internal parameters.

    Returns
    -------
    dict
        ``a_A``, ``b_A``, ``gamma_deg``; empty when the spots cannot carry a net.

    Examples
    --------
    >>> from analysis.optics import momentum_to_pixels
    >>> g = ScreenGeometry(256.0, 256.0, 300.0)
    >>> hk = np.array([[1, 0], [0, 1], [-1, 0], [0, -1], [1, 1], [-1, -1]], float)
    >>> xy, _ = momentum_to_pixels(hk / 2.5, 100.0, g)
    >>> s = calibration_sigma(xy, hk, 100.0, g, {"scale_px": 3.0})  # a 1 % scale: a ≈ 1 % of 2.5 Å
    >>> print(round(s["a_A"], 3))
    0.025
    """
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
    if len(xy) < 3 or np.linalg.matrix_rank(hk) < 2:
        return {}
    base = _net_constants(xy, hk, energy_eV, geometry)
    cov = None if covariance is None else np.asarray(covariance, dtype=np.float64)
    if cov is not None and cov.shape == (7, 7) and np.all(np.isfinite(cov)):
        q0 = _internal_from_geometry(geometry)
        jac = np.zeros((3, len(_HELD_INTERNAL)))
        for n, i in enumerate(_HELD_INTERNAL):
            h = 1e-4 * q0[i] if i == 2 else 1e-5
            up, down = q0.copy(), q0.copy()
            up[i] += h
            down[i] -= h
            jac[:, n] = (_net_constants(xy, hk, energy_eV, _moved(geometry, up))
                         - _net_constants(xy, hk, energy_eV, _moved(geometry, down))) / (2 * h)
        held = cov[np.ix_(_HELD_INTERNAL, _HELD_INTERNAL)]
        sd = np.sqrt(np.clip(np.einsum("ij,jk,ik->i", jac, held, jac), 0.0, None))
        return {"a_A": float(sd[0]), "b_A": float(sd[1]), "gamma_deg": float(sd[2])}
    var = np.zeros(3)
    for name in HELD_BY_CALIBRATION:
        s = float(uncertainty.get(name) or 0.0)
        if not (math.isfinite(s) and s > 0):
            continue
        value = getattr(geometry, name) + s
        if name == "distortion":
            value = min(value, 0.95)
        try:
            moved = dataclasses.replace(geometry, **{name: value})
        except ParameterError:  # a field at the edge of its range: one-sided the other way
            moved = dataclasses.replace(geometry, **{name: getattr(geometry, name) - s})
        var += (_net_constants(xy, hk, energy_eV, moved) - base) ** 2
    sd = np.sqrt(var)
    return {"a_A": float(sd[0]), "b_A": float(sd[1]), "gamma_deg": float(sd[2])}
