"""Camera fits and refits: the least-squares fit of the camera model (optionally with the
substrate's reciprocal basis, or jointly with an overlayer basis) to spots of known
indices, the refit of a substrate reading with every spot an overlayer model explains,
and the readings with the distortion R/L held or set from the fractional-order spots.

The fits use the exact derivatives of the camera model
(:func:`analysis.optics.project_derivatives`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from types import SimpleNamespace
from typing import TYPE_CHECKING

import numpy as np

from ..nets import Net2D
from ..optics import ScreenGeometry, local_jacobian, pixels_to_momentum, project, project_derivatives, wavelength_A
from .matching import _rational_residual
from .overlayers import OverlayerModel, model_indices

if TYPE_CHECKING:  # annotations only
    from .substrate import SubstrateFit


def _bounded_lm(fun, jac, x0: np.ndarray, lo: np.ndarray, hi: np.ndarray, *, max_iter: int = 100,
                rtol: float = 1e-10) -> tuple[np.ndarray, np.ndarray]:
    """Levenberg–Marquardt for small problems with box bounds (steps projected onto the box).

    Minimises ½|fun(x)|² with Marquardt's scaling (damping ∝ diag JᵀJ, like
    ``x_scale="jac"``). Stops when a step lowers the cost by less than `rtol`
    relatively or moves no parameter by more than `rtol` of its scale.
    Returns (x, J(x)).

    Examples
    --------
    >>> t = np.linspace(0, 1, 20); y = 2.0 * np.exp(-1.5 * t)
    >>> f = lambda p: p[0] * np.exp(-p[1] * t) - y
    >>> jf = lambda p: np.column_stack([np.exp(-p[1] * t), -p[0] * t * np.exp(-p[1] * t)])
    >>> x, _ = _bounded_lm(f, jf, np.array([1.0, 0.5]), np.array([-9.0, 0.0]), np.array([9.0, 9.0]))
    >>> print(np.round(x, 6))
    [2.  1.5]
    """
    x = np.clip(np.asarray(x0, dtype=np.float64), lo, hi)
    r = fun(x)
    cost = float(r @ r)
    j = jac(x)
    mu = 1e-3
    for _ in range(max_iter):
        jtj = j.T @ j
        g = j.T @ r
        d = np.maximum(np.diag(jtj), 1e-12 * max(float(np.max(np.diag(jtj))), 1e-300))
        # a parameter held at a bound by a gradient pushing it out stays there this step (the
        # step of the others is then a true descent step, not a clipped one: no zig-zag)
        held = ((x <= lo) & (g > 0)) | ((x >= hi) & (g < 0))
        free = ~held
        accepted = False
        for _ in range(12):
            step = np.zeros_like(x)
            try:
                step[free] = -np.linalg.solve((jtj + mu * np.diag(d))[np.ix_(free, free)], g[free])
            except np.linalg.LinAlgError:
                mu *= 10.0
                continue
            # the linear model's own forecast of the gain, |r|² − |r + J s|²: when even that is
            # below the tolerance the fit has converged (an accepted step would gain no more, and
            # smaller steps less)
            if -(2.0 * float(g @ step) + float(step @ jtj @ step)) <= rtol * max(cost, 1e-300):
                break
            x_new = np.clip(x + step, lo, hi)
            r_new = fun(x_new)
            c_new = float(r_new @ r_new)
            if c_new < cost:
                accepted = True
                break
            mu *= 4.0
        if not accepted:
            break
        moved = np.abs(x_new - x) <= rtol * (np.abs(x) + 1e-8)
        gain = cost - c_new
        x, r, cost = x_new, r_new, c_new
        j = jac(x)
        mu = max(mu / 3.0, 1e-12)
        if gain <= rtol * max(cost, 1e-300) or moved.all():
            break
    return x, j


_GEOM_COLUMN = {"center_x_px": 0, "center_y_px": 1, "scale_px": 2, "rotation_deg": 3, "distortion": 4,
                "incidence_x": 7, "incidence_y": 8, "perspective_x": 9, "perspective_y": 10}

#: Prior width of the incidence (sin θ of the specular beam): a sample aligned to within
#: about 2° of normal incidence (common practice). A fitted incidence of this size costs
#: as much as one spot coordinate off by `_INCIDENCE_PRIOR_PX`.
_INCIDENCE_PRIOR = math.sin(math.radians(2.0))
_INCIDENCE_PRIOR_PX = 1.0
#: Prior width of the perspective (keystone) term: a camera within about 10° of the screen axis
#: at a few screen radii (tan 10° / 3 ≈ 0.06; common practice for a viewport camera).
_PERSPECTIVE_PRIOR = 0.06
#: The free names that carry a prior, with its width.
_PRIORS = {"incidence_x": _INCIDENCE_PRIOR, "incidence_y": _INCIDENCE_PRIOR,
           "perspective_x": _PERSPECTIVE_PRIOR, "perspective_y": _PERSPECTIVE_PRIOR}
#: The camera's off-axis terms, freed when enough spots carry them.
OFF_AXIS = ("incidence_x", "incidence_y", "perspective_x", "perspective_y")
_MIN_SPOTS_FOR_INCIDENCE = 12


@dataclass(frozen=True, eq=False)
class _OverlayerTerms:
    """Spot indices as functions of a free overlayer basis B₀ (rows b1*, b2*, hk units):
    hk_i = h_i + u_i B₀ T_i, with h_i integer (the substrate beam a satellite sits on, or the
    beam itself), u_i integer (the overlayer beam; 0 for substrate beams) and T_i the
    transposed-inverse substrate operation that turns domain 0 into the spot's domain."""

    h: np.ndarray  # (K, 2)
    u: np.ndarray  # (K, 2)
    t: np.ndarray  # (K, 2, 2)
    b0: np.ndarray  # (2, 2) start

    def hk(self, b0: np.ndarray) -> np.ndarray:
        return self.h + np.einsum("ka,ab,kbc->kc", self.u, b0, self.t)

    def d_hk(self) -> np.ndarray:
        """∂hk_c/∂B₀[a, b] as (K, 2, 4) (hk is linear in B₀)."""
        return np.einsum("ka,kbc->kcab", self.u, self.t).reshape(len(self.u), 2, 4)


def _refine(xy, hk, energy_eV, geom, lattice, free, fit_lattice, *, rtol: float = 1e-10,
            overlayer: _OverlayerTerms | None = None):
    """Fit geometry (and optionally the reciprocal basis) to spots of known indices.

    `free` names ScreenGeometry fields; ``"ellipticity"`` fits the axis ratio
    and its direction through (e1, e2) = (ε − 1)(cos 2β, sin 2β), which stays
    smooth at ε = 1. Fields are dropped when the spots cannot carry them.
    `rtol` is the relative cost change that ends the fit (looser for trial stages).
    With `overlayer` the indices are not fixed: its basis B₀ is fitted jointly with
    the camera (satellites at other radii then pin the distortion); `hk` is ignored.
    """
    base = geom.to_dict()
    # with a free lattice its own orientation replaces the camera rotation
    names = [n for n in free if not (fit_lattice and n == "rotation_deg")]
    if "ellipticity" in names and len(xy) < 6:
        names.remove("ellipticity")
    ell = "ellipticity" in names
    if ell:
        names.remove("ellipticity")
    n_geo = len(names) + (2 if ell else 0)
    lat0 = lattice.ravel().copy()

    def unpack(p):
        d = dict(base)
        for n, v in zip(names, p[: len(names)]):
            d[n] = float(np.exp(v)) if n == "scale_px" else float(v)
        if ell:
            e1, e2 = p[len(names)], p[len(names) + 1]
            d["ellipticity"] = 1.0 + math.hypot(e1, e2)
            d["ellipse_deg"] = math.degrees(0.5 * math.atan2(e2, e1)) % 180.0
        lat = p[n_geo:n_geo + 4].reshape(2, 2) if fit_lattice else lattice
        return d, lat

    n_lat = 4 if fit_lattice else 0

    def hk_of(p):
        return hk if overlayer is None else overlayer.hk(p[n_geo + n_lat:].reshape(2, 2))

    p0 = [math.log(base[n]) if n == "scale_px" else base[n] for n in names]
    lo = [0.0 if n == "distortion" else -0.1 if n.startswith("incidence_") else -0.3 if n.startswith("perspective_")
          else -np.inf for n in names]
    hi = [0.9 if n == "distortion" else 0.1 if n.startswith("incidence_") else 0.3 if n.startswith("perspective_")
          else np.inf for n in names]
    if ell:
        e, b = base["ellipticity"] - 1.0, math.radians(2 * base["ellipse_deg"])
        p0 += [e * math.cos(b), e * math.sin(b)]
        lo += [-0.3, -0.3]
        hi += [0.3, 0.3]
    if fit_lattice:
        p0 += list(lat0)
        lo += [-np.inf] * 4
        hi += [np.inf] * 4
    if overlayer is not None:
        p0 += list(overlayer.b0.ravel())
        lo += [-np.inf] * 4
        hi += [np.inf] * 4
        d_hk_b0 = overlayer.d_hk()
    p0 = np.clip(np.array(p0, dtype=float), np.array(lo) + 1e-12, np.array(hi) - 1e-12)

    lam = wavelength_A(energy_eV)

    with_prior = [i for i, n in enumerate(names) if n in _PRIORS]
    w_prior = np.array([_INCIDENCE_PRIOR_PX / _PRIORS[names[i]] for i in with_prior])

    def resid(p):  # the camera fields as a plain namespace: no validation in the loop
        d, lat = unpack(p)
        r = np.nan_to_num((project(hk_of(p) @ lat, lam, SimpleNamespace(**d))[0] - xy).ravel(), nan=1e3)
        return np.concatenate([r, w_prior * p[with_prior]]) if with_prior else r

    cols = [_GEOM_COLUMN[n] for n in names] + ([5, 6] if ell else [])

    def jac(p):  # exact derivatives of the camera model (see optics.pixel_derivatives)
        d, lat = unpack(p)
        hk_p = hk_of(p)
        xy_, d_k, d_g = project_derivatives(hk_p @ lat, lam, SimpleNamespace(**d))
        parts = [d_g[:, :, cols]]
        if fit_lattice:  # k_j = Σ_i hk_i L_ij  →  ∂k_j/∂L_ij = hk_i
            parts.append(np.einsum("kab,ki->kaib", d_k, hk_p).reshape(len(hk_p), 2, 4))
        if overlayer is not None:  # ∂k_j/∂B₀[q] = Σ_c ∂hk_c/∂B₀[q] L_cj
            parts.append(np.einsum("kij,kjq->kiq", d_k, np.einsum("kcq,cj->kjq", d_hk_b0, lat)))
        j = np.concatenate(parts, axis=2).reshape(2 * len(hk_p), -1)
        j[~np.isfinite(xy_.ravel())] = 0.0
        if with_prior:  # the prior's rows
            prior = np.zeros((len(with_prior), j.shape[1]))
            prior[np.arange(len(with_prior)), with_prior] = w_prior
            j = np.vstack([j, prior])
        return np.nan_to_num(j)

    if len(xy) * 2 <= len(p0):
        return geom, lattice, np.zeros((len(xy), 2)), {}
    x, j_fit = _bounded_lm(resid, jac, p0, np.array(lo, float), np.array(hi, float), rtol=rtol)
    d_fit, lat = unpack(x)
    g_fit = ScreenGeometry(**d_fit)
    res = resid(x)[: 2 * len(xy)].reshape(-1, 2)
    dof = max(res.size - len(p0), 1)
    s2 = float(np.sum(res**2)) / dof
    sig = {}
    try:
        cov = np.linalg.pinv(j_fit.T @ j_fit) * s2
        sd = np.sqrt(np.clip(np.diag(cov), 0, None))
        for n, sd_n in zip(names, sd[: len(names)]):
            sig[n] = float(sd_n * (g_fit.scale_px if n == "scale_px" else 1.0))
        if ell:
            sig["ellipticity"] = float(math.hypot(sd[len(names)], sd[len(names) + 1]))
        if fit_lattice:
            sig.update(_lattice_sigma(lat, cov[n_geo:n_geo + 4, n_geo:n_geo + 4]))
    except np.linalg.LinAlgError:  # pragma: no cover
        pass
    return g_fit, lat, res, sig


def _lattice_sigma(lat: np.ndarray, cov: np.ndarray, n_mc: int = 400) -> dict:
    """σ of a, b (Å), γ (deg) of the real net from the reciprocal basis covariance (Monte Carlo)."""
    rng = np.random.default_rng(0)
    try:
        draws = rng.multivariate_normal(lat.ravel(), cov, size=n_mc, method="eigh")
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover
        return {}
    real = np.linalg.inv(draws.reshape(-1, 2, 2)).transpose(0, 2, 1)  # each draw's real net, rows a, b
    a, b = np.linalg.norm(real[:, 0], axis=1), np.linalg.norm(real[:, 1], axis=1)
    g = np.degrees(np.arccos(np.clip(np.einsum("ij,ij->i", real[:, 0], real[:, 1]) / (a * b), -1, 1)))
    s = np.std(np.column_stack([a, b, g]), axis=0, ddof=1)
    return {"a_A": float(s[0]), "b_A": float(s[1]), "gamma_deg": float(s[2])}


def _overlayer_terms(hk: np.ndarray, model: OverlayerModel, a_star: np.ndarray, tol_g: float,
                     trusted: np.ndarray) -> tuple[_OverlayerTerms, np.ndarray] | None:
    """Each explained spot as h + u B₀ T (see :class:`_OverlayerTerms`), satellites included.

    Returns (terms, used) with `used` the spots kept, or None when the domains are not
    images of domain 0 under substrate operations.
    """
    mats = [np.asarray(m, dtype=np.float64) for m in model.domains]
    b0 = np.linalg.inv(mats[0]).T
    inv_b0 = np.linalg.inv(b0)
    pt = []  # per domain: (P, T) with B_d = P B₀ T, P the identity or the row swap
    for m in mats:
        b_d = np.linalg.inv(m).T
        for p in (np.eye(2), np.array([[0.0, 1.0], [1.0, 0.0]])):
            t = inv_b0 @ p @ b_d
            if np.all(np.abs(t - np.rint(t)) <= 1e-6):
                pt.append((p, np.rint(t)))
                break
        else:
            return None
    by = model.explained_by
    k = len(hk)
    h, u, t = np.zeros((k, 2)), np.zeros((k, 2)), np.tile(np.eye(2), (k, 1, 1))
    used = np.zeros(k, bool)
    ints = (by == -2) & trusted
    h[ints], used[ints] = np.rint(hk[ints]), True
    steps = np.array([(1, 0), (0, 1), (1, 1), (1, -1), (-1, 0), (0, -1), (-1, -1), (-1, 1)], dtype=np.float64)
    for i in np.flatnonzero((by >= 0) & trusted):
        d = int(by[i])
        p, t_d = pt[d]
        b_d = p @ b0 @ t_d
        n = np.rint(hk[i] @ mats[d].T)
        if np.hypot(*((n @ b_d - hk[i]) @ a_star)) <= tol_g:  # a beam of the layer itself
            u[i], t[i], used[i] = n @ p, t_d, True
            continue
        for v_n in steps:  # a satellite: a substrate beam plus a first-order layer beam
            sh = hk[i] - v_n @ b_d
            if np.hypot(*((sh - np.rint(sh)) @ a_star)) <= tol_g:
                h[i], u[i], t[i], used[i] = np.rint(sh), v_n @ p, t_d, True
                break
    return _OverlayerTerms(h[used], u[used], t[used], b0), used


def refine_with_model(xy_px: np.ndarray, energy_eV: float, fit: SubstrateFit, model: OverlayerModel, *,
                      fit_lattice: bool = False, reliable: np.ndarray | None = None) -> SubstrateFit:
    """Refit the camera model with every spot the model explains (integer and fractional).

    Fractional spots at other radii than the integer ones pin the distortion
    and the centre; the reciprocal basis is kept unless `fit_lattice`. An
    irrational (incommensurate) model has no exact indices: its basis is fitted
    with the camera, satellites included. Only `reliable` spots (default all) enter the fit.

    Parameters
    ----------
    xy_px : (K, 2) ndarray of float
        Spot positions (x, y), pixels.
    energy_eV : float
        Electron energy, eV.
    fit : SubstrateFit
        The substrate reading to refine.
    model : OverlayerModel
        The overlayer model whose spots join the fit.
    fit_lattice : bool, keyword-only
        Fit the reciprocal basis too.
    reliable : (K,) ndarray of bool, optional, keyword-only
        Spots whose centres are trusted.

    Returns
    -------
    SubstrateFit
        The refined reading (`fit` itself when too few spots are explained).
    """
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    trusted = np.ones(len(xy), bool) if reliable is None else np.asarray(reliable, dtype=bool)
    lat = fit.reciprocal_net.vectors
    free = ("center_x_px", "center_y_px", "rotation_deg") if fit.scale_source == "calibration" else \
        ("center_x_px", "center_y_px", "scale_px", "rotation_deg", "distortion", "ellipticity")
    if int(trusted.sum()) >= _MIN_SPOTS_FOR_INCIDENCE:  # many spots at several radii tell a tilt from a shift
        free = free + OFF_AXIS[:2]  # (a keystone the substrate reading found is kept)
    joint = None
    if model.kind == "incommensurate":
        tol_g = float(model.details.tol_g if model.details is not None else
                      2.5 / (fit.geometry.scale_px * wavelength_A(energy_eV)))
        joint = _overlayer_terms(fit.hk, model, lat, tol_g, trusted)
    if joint is not None:
        terms, use = joint
        if use.sum() < 6:
            return fit
        geom, lat2, res, sig = _refine(xy[use], None, energy_eV, fit.geometry, lat, free, fit_lattice,
                                       overlayer=terms)
    else:
        hk_model = model_indices(fit.hk, model)
        use = np.all(np.isfinite(hk_model), axis=1) & trusted
        if use.sum() < 4:
            return fit
        geom, lat2, res, sig = _refine(xy[use], hk_model[use], energy_eV, fit.geometry, lat, free, fit_lattice)
    hk = pixels_to_momentum(xy, energy_eV, geom) @ np.linalg.inv(lat2)
    d_int = (hk - np.rint(hk)) @ lat2
    tol_g = 2.5 / (geom.scale_px * wavelength_A(energy_eV))
    # spots the refitted camera puts on integer positions join the substrate (within at most 1.5 ×
    # the matching tolerance: a poor refit must not swallow the fractional-order spots)
    loose = 3 * fit.residual_px / (geom.scale_px * wavelength_A(energy_eV))
    near = np.hypot(d_int[:, 0], d_int[:, 1]) <= min(max(tol_g, loose), 1.5 * tol_g)
    integer = fit.integer | near  # a refit never demotes the substrate's own beams
    net = Net2D(np.linalg.inv(lat2).T, label=fit.net.label)
    return dataclasses.replace(fit, geometry=geom, reciprocal_net=Net2D(lat2), net=net, hk=hk, integer=integer,
                               a_star_px=lat2 @ local_jacobian(energy_eV, geom).T,
                               residual_px=float(np.sqrt(np.mean(np.sum(res**2, axis=1)))),
                               sigma={**fit.sigma, **sig},
                               notes=fit.notes + ("camera refitted with the fractional-order spots",))


def _distortion_open(fit: SubstrateFit) -> bool:
    """True when the integer spots all sit on one ring, which cannot fix R/L (two rings can)."""
    ii = np.flatnonzero(fit.integer)
    if len(ii) < 3:
        return True
    r_int = np.linalg.norm(np.rint(fit.hk[ii]) @ fit.reciprocal_net.vectors, axis=1)
    return bool(r_int.max() / max(r_int.min(), 1e-12) <= 1.05)


def _with_distortion(xy: np.ndarray, energy_eV: float, fit: SubstrateFit, d: float, note: str) -> SubstrateFit:
    """The same reading refitted with R/L held at `d`."""
    ii = np.flatnonzero(fit.integer)
    lat = fit.reciprocal_net.vectors
    g0 = dataclasses.replace(fit.geometry, distortion=float(d))
    g1, _, res, _ = _refine(xy[ii], np.rint(fit.hk[ii]), energy_eV, g0, lat,
                            ("center_x_px", "center_y_px", "scale_px", "rotation_deg"), False)
    hk = pixels_to_momentum(xy, energy_eV, g1) @ np.linalg.inv(lat)
    return dataclasses.replace(fit, geometry=g1, hk=hk, a_star_px=lat @ local_jacobian(energy_eV, g1).T,
                               notes=fit.notes + (note,))


def _distortion_from_fractions(xy: np.ndarray, energy_eV: float, fit: SubstrateFit, tol_px: float,
                               grid=np.arange(0.0, 0.61, 0.04)) -> SubstrateFit:
    """Fix R/L with the fractional spots when the integer spots sit at too few radii.

    For each trial distortion the camera is refitted to the integer spots; the
    one that puts the other spots closest to simple fractions (denominators
    ≤ 8) wins. Kept only if it clearly improves on the integer-spot fit.
    """
    ii = np.flatnonzero(fit.integer)
    frac = np.flatnonzero(~fit.integer)
    if len(frac) < 4 or len(ii) < 3:
        return fit
    lat = fit.reciprocal_net.vectors
    hk_int = np.rint(fit.hk[ii])
    if not _distortion_open(fit):
        return fit  # several rings of integer spots fix the distortion themselves

    def trial(d):
        g0 = dataclasses.replace(fit.geometry, distortion=float(d))
        g1, _, res, _ = _refine(xy[ii], hk_int, energy_eV, g0, lat, ("center_x_px", "center_y_px", "scale_px",
                                                                     "rotation_deg"), False, rtol=1e-7)
        hk = pixels_to_momentum(xy, energy_eV, g1) @ np.linalg.inv(lat)
        return float(np.median(_rational_residual(hk[frac], lat))), g1, hk

    results = [trial(d) for d in grid]
    k = int(np.argmin([r[0] for r in results]))
    step = float(grid[1] - grid[0]) if len(grid) > 1 else 0.0
    fine = [d for d in np.arange(grid[k] - step + 0.01, grid[k] + step - 0.005, 0.01) if d >= 0 and abs(d - grid[k]) > 1e-9]
    results += [trial(d) for d in fine]  # then in steps of 0.01 around the best
    k = int(np.argmin([r[0] for r in results]))
    here = trial(fit.geometry.distortion)
    if results[k][0] >= 0.7 * here[0]:
        return fit
    _, g1, hk = results[k]
    integer = np.zeros(len(xy), bool)
    integer[ii] = True
    return dataclasses.replace(fit, geometry=g1, hk=hk, a_star_px=lat @ local_jacobian(energy_eV, g1).T,
                               notes=fit.notes + (f"distortion R/L = {g1.distortion:.2f} set from the "
                                                  "fractional-order spots",))
