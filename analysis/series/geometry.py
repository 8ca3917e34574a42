"""The screen geometry of a series, fitted from the beam positions of many frames at once.

:func:`fit_series_geometry` fits the centre, the scale (per √eV), the distortion and the
rotation of :class:`analysis.optics.ScreenGeometry` to beams measured at their own
energies, with uncertainties (:class:`SeriesCalibration`). The tracker predicts the
beams of a frame from the current geometry and refits it as frames arrive.
Positions are (x, y) pixels; parallel momenta are Å⁻¹ without 2π.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import FitError, ParameterError
from ..optics import H2_OVER_2ME_EV_A2, ScreenGeometry, momentum_to_pixels

__all__ = ["SeriesCalibration", "fit_series_geometry"]


_GEOM_PARAMS = ("center_x_px", "center_y_px", "scale_px", "distortion", "rotation_deg")
_FIT_GROUPS = {"center": ("center_x_px", "center_y_px"), "scale": ("scale_px",),
               "distortion": ("distortion",), "rotation": ("rotation_deg",)}


@dataclass(frozen=True, eq=False)
class SeriesCalibration:
    """Screen geometry fitted from the beam positions of a whole series.

    Attributes
    ----------
    geometry : ScreenGeometry
        The fitted geometry (parameters not fitted keep their starting values).
    uncertainty : dict of str to float
        One-standard-deviation uncertainty of each fitted parameter (same names and
        units as the ScreenGeometry fields).
    rms_px : float
        Root-mean-square distance between measured and fitted positions, px.
    n_points : int
        Beam positions used.
    n_frames : int
        Frames that contributed.
    """

    geometry: ScreenGeometry
    uncertainty: dict
    rms_px: float
    n_points: int
    n_frames: int

    @property
    def scale_px_sqrt_eV_A(self) -> float:
        """Camera scale per √eV: r·√E / |g| for a distant camera, in px·√eV·Å.

        A beam with |g| (Å⁻¹, no 2π) lands at r = this / √E pixels from the centre.
        """
        return self.geometry.scale_px * math.sqrt(H2_OVER_2ME_EV_A2)

    def to_dict(self) -> dict:
        """JSON-safe summary; ``"geometry"`` can be read back by ScreenGeometry.from_dict.

        Returns
        -------
        dict
            Plain JSON types.
        """
        unc = dict(self.uncertainty)
        if "scale_px" in unc:
            unc["scale_px_sqrt_eV_A"] = unc["scale_px"] * math.sqrt(H2_OVER_2ME_EV_A2)
        return {"geometry": self.geometry.to_dict(), "uncertainty": unc, "rms_px": self.rms_px,
                "scale_px_sqrt_eV_A": self.scale_px_sqrt_eV_A, "n_points": self.n_points,
                "n_frames": self.n_frames}


def fit_series_geometry(energy_eV, g_par, xy_px, *, initial: ScreenGeometry,
                        fit: Sequence[str] = ("center", "scale", "distortion", "rotation"),
                        f_scale_px: float = 1.0) -> SeriesCalibration:
    """Fit the screen geometry to beam positions measured at many energies at once.

    Every point is one beam in one frame; the model is
    :func:`analysis.optics.momentum_to_pixels`, so the radius of a beam falls as 1/√E
    (distant camera) with the distortion d = R/L bending it at large angles.

    Parameters
    ----------
    energy_eV : (P,) array_like of float
        Energy of each point, eV.
    g_par : (P, 2) array_like of float
        Parallel momentum of the beam, Å⁻¹ without 2π.
    xy_px : (P, 2) array_like of float
        Measured (x, y) position, pixels.
    initial : ScreenGeometry, keyword-only
        Starting values (and the fixed values of what is not fitted).
    fit : sequence of {"center", "scale", "distortion", "rotation"}, keyword-only
    f_scale_px : float, keyword-only
        Residual size beyond which points count less (robust soft-L1 loss), px.

    Returns
    -------
    SeriesCalibration
        The camera model fitted over all frames, its uncertainties and the residual RMS (pixels).

    Raises
    ------
    FitError
        Fewer points than twice the number of parameters, or no convergence.

    Examples
    --------
    >>> truth = ScreenGeometry(130.0, 120.0, 400.0, distortion=0.2, rotation_deg=3.0)
    >>> e = np.repeat(np.linspace(60, 200, 8), 4)
    >>> g = np.tile([[0.36, 0.0], [0.0, 0.36], [-0.36, 0.0], [0.25, -0.25]], (8, 1))
    >>> xy = np.vstack([momentum_to_pixels(g[i:i + 1], e[i], truth)[0] for i in range(len(e))])
    >>> cal = fit_series_geometry(e, g, xy, initial=ScreenGeometry(125.0, 125.0, 380.0))
    >>> print(round(cal.geometry.center_x_px, 3), round(cal.geometry.scale_px, 2), round(cal.geometry.distortion, 4))
    130.0 400.0 0.2
    """
    from scipy.optimize import least_squares

    e = np.asarray(energy_eV, dtype=np.float64).reshape(-1)
    g = np.asarray(g_par, dtype=np.float64).reshape(-1, 2)
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    if not (e.size == g.shape[0] == xy.shape[0]):
        raise ParameterError(f"`energy_eV`, `g_par` and `xy_px` must have one row per point, got "
                             f"{e.size}, {g.shape[0]} and {xy.shape[0]}.")
    unknown = set(fit) - set(_FIT_GROUPS)
    if unknown:
        raise ParameterError(f"Unknown `fit` items {sorted(unknown)}; use {sorted(_FIT_GROUPS)}.")
    names = [p for key in ("center", "scale", "distortion", "rotation") if key in fit for p in _FIT_GROUPS[key]]
    ok = np.all(np.isfinite(xy), axis=1) & np.isfinite(e) & (e > 0)
    e, g, xy = e[ok], g[ok], xy[ok]
    if e.size * 2 < 2 * len(names) or e.size < 3:
        raise FitError(f"Too few beam positions ({e.size}) to fit the screen geometry ({', '.join(names)}).")
    base = initial.to_dict()
    x0 = np.array([base[n] for n in names])
    lo = np.array([0.0 if n == "distortion" else 1e-6 if n == "scale_px" else -np.inf for n in names])
    hi = np.array([0.95 if n == "distortion" else np.inf for n in names])
    x0 = np.clip(x0, lo + 1e-9 * (np.isfinite(lo)), hi - 1e-9 * (np.isfinite(hi)))

    def geom_of(p):
        d = dict(base)
        d.update(zip(names, p))
        return ScreenGeometry.from_dict(d)

    # λ ∝ 1/√E, so the beams at their own energies land where the momenta scaled by
    # √(E_ref / E) land at E_ref: one energy per call, the same model.
    e_ref = 100.0
    g_ref = g * np.sqrt(e_ref / e)[:, None]

    def resid(p):
        try:
            model, _ = momentum_to_pixels(g_ref, e_ref, geom_of(p))
        except ParameterError:
            return np.full(2 * e.size, 1e6)
        r = (model - xy).ravel()
        return np.where(np.isfinite(r), r, 1e3)

    # exact derivatives of the model (optics.project_derivatives: d/d ln s for the scale)
    from ..optics import GEOMETRY_PARAMETERS, project_derivatives, wavelength_A

    lam_ref = wavelength_A(e_ref)
    cols = [GEOMETRY_PARAMETERS.index("log_scale" if n == "scale_px" else n) for n in names]
    i_scale = names.index("scale_px") if "scale_px" in names else None

    def jac(p):
        try:
            g = geom_of(p)
        except ParameterError:
            return np.zeros((2 * e.size, len(names)))
        _, _, dg = project_derivatives(g_ref, lam_ref, g)
        j = dg[:, :, cols].reshape(-1, len(names))
        if i_scale is not None:
            j[:, i_scale] /= g.scale_px
        return np.where(np.isfinite(j), j, 0.0)

    x_scale = np.array([1.0 if n.endswith("_px") and n != "scale_px" else
                        max(abs(base["scale_px"]) * 0.01, 1.0) if n == "scale_px" else
                        0.01 if n == "distortion" else 0.1 for n in names])
    try:
        sol = least_squares(resid, x0, jac=jac, bounds=(lo, hi), loss="soft_l1", f_scale=f_scale_px,
                            x_scale=x_scale, max_nfev=200 * len(names))
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise FitError(f"Screen-geometry fit failed ({exc}).") from None
    if not np.all(np.isfinite(sol.x)):
        raise FitError("Screen-geometry fit did not converge (non-finite parameters).")
    r = resid(sol.x).reshape(-1, 2)
    dist = np.hypot(r[:, 0], r[:, 1])
    inl = dist <= max(5.0 * f_scale_px, 3.0 * float(np.median(dist)) + 1e-9)
    # plain Jacobian of the residuals (the solver's is scaled by the robust loss)
    j = jac(sol.x).reshape(-1, 2, len(names))[inl].reshape(-1, len(names))
    dof = max(2 * int(inl.sum()) - len(names), 1)
    s2 = float(np.sum(r[inl] ** 2)) / dof
    try:
        cov = np.linalg.pinv(j.T @ j) * s2
        unc = {n: float(np.sqrt(max(cov[i, i], 0.0))) for i, n in enumerate(names)}
    except np.linalg.LinAlgError:  # pragma: no cover
        unc = {n: float("nan") for n in names}
    n_frames = int(np.unique(np.round(e, 6)).size)
    return SeriesCalibration(geom_of(sol.x), unc, float(np.sqrt(np.mean(dist[inl] ** 2))), int(e.size), n_frames)


_REFIT_POINTS = 2000  # points in the refits while tracking (the final calibration: track._CALIBRATION_POINTS)


def _refit(pts_e, pts_g, pts_xy, geom, fit) -> ScreenGeometry:
    e, g, xy = np.concatenate(pts_e), np.vstack(pts_g), np.vstack(pts_xy)
    if e.size > _REFIT_POINTS:  # a fixed random subset: the prediction needs no more
        pick = np.sort(np.random.default_rng(0).choice(e.size, _REFIT_POINTS, replace=False))
        e, g, xy = e[pick], g[pick], xy[pick]
    try:
        return fit_series_geometry(e, g, xy, initial=geom, fit=fit).geometry
    except FitError:
        return geom


def _predict(g, e, geom, shape):
    xy, vis = momentum_to_pixels(g, e, geom)
    rows, cols = shape
    inside = vis & np.all(np.isfinite(xy), axis=1)
    inside &= (xy[:, 0] >= -0.5) & (xy[:, 0] <= cols - 0.5) & (xy[:, 1] >= -0.5) & (xy[:, 1] <= rows - 0.5)
    return xy, inside
