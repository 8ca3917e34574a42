"""From measured spots to surface nets: pattern centre, substrate reciprocal net
through the camera model, fractional indices, overlayer matrices and domains.

Conventions: reciprocal nets crystallographic (Å⁻¹, no 2π); spot positions at
this module's edges are (x, y) pixels, x right, y down; a real-space
superstructure matrix M has ``overlayer = M @ substrate`` and the beams of a
domain with matrix M are ``hk = n @ inv(M).T`` (n integer) in substrate units;
a substrate point-group operation W acts on beam indices as ``hk @ inv(W).T``.

The overlayer score (stated, used for ranking)::

    score = E − U − 0.5·A − 1.0·(D − 1) − 0.5·|log2 det M|  (+ intensity term)

E: fractional spots explained, U: fractional spots unexplained, A: predicted
fractional spots absent inside the region where spots could be seen, D: domains
used. When two models predict the same spots (e.g. p(2×2) and three (2×1)
domains on a hexagonal net), only intensities can tell them apart: a multi-
domain model gains when letting each domain have its own population makes
the intensities of symmetry-equivalent beams agree clearly better (variance
ratio test); otherwise the simpler model wins and both are listed.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from types import SimpleNamespace

import numpy as np
from scipy.spatial import cKDTree

from ..calibration import estimate_center_from_pairs
from ..errors import FitError, NetError
from ..nets import Net2D, classify_net, point_group, reciprocal, reduce_net
from ..optics import (ScreenGeometry, local_jacobian, momentum_to_pixels, pixels_to_momentum, project,
                     project_derivatives, wavelength_A)
from ..superstructure import (
    classify_superstructure,
    coverage,
    hermite_normal_form,
    _same_lattice_fast,
    nice_matrix,
    same_lattice,
    wood_notation,
)

__all__ = [
    "SubstrateFit",
    "fit_substrate",
    "fractional_indices",
    "OverlayerModel",
    "find_overlayers",
    "evaluate_model",
    "model_from_matrix",
    "model_indices",
    "refine_with_model",
    "IndexResult",
    "index_pattern",
]

_ACCEPTANCE_PRIOR_DEG = 52.0  # screen half-angle, common practice (≈ 50–55°)
_DISTORTION_PRIOR = 0.2  # typical R/L of rear-view optics (an assumption); also tried when spots leave it open
_SCALE_PRIOR_SIGMA = 0.15  # relative (log) width: acceptance 48–56° and R/L 0–0.4 span ±15 % (common practice)


# --------------------------------------------------------------------------- substrate

@dataclass(frozen=True, eq=False)
class SubstrateFit:
    """The substrate reciprocal net found in an image, with the camera model.

    Attributes
    ----------
    geometry : ScreenGeometry
        Fitted camera model (centre, scale, distortion, rotation).
    reciprocal_net : Net2D
        Substrate reciprocal basis (a1*, a2*) in the surface frame of
        `geometry`, Å⁻¹, no 2π.
    net : Net2D
        Real-space substrate net (Å), the inverse of `reciprocal_net`.
    net_type : str
        One of the five plane nets.
    a_star_px : (2, 2) ndarray
        Rows a1*, a2* as (x, y) pixel displacements at the pattern centre
        (the local derivative of the camera model).
    hk : (K, 2) ndarray
        Fractional indices of every input spot in this basis.
    integer : (K,) ndarray of bool
        Spots indexed as integer-order substrate beams.
    residual_px : float
        RMS distance between integer spots and the model, pixels.
    sigma : dict
        One-σ uncertainties from the fit covariance (keys ``a_A``, ``b_A``,
        ``gamma_deg``, ``center_x_px``, ``center_y_px``, ``scale_px``), NaN
        for what was held fixed.
    scale_source : str
        ``"hint"`` (lattice constants assumed from the substrate given),
        ``"calibration"`` (camera scale known; lattice constants measured).
    score, confidence : float
        Ranking score and its share among the candidates (0..1).
    completeness : float
        Fraction of the predicted integer beams inside the seen region that were found.
    """

    geometry: ScreenGeometry
    reciprocal_net: Net2D
    net: Net2D
    net_type: str
    a_star_px: np.ndarray
    hk: np.ndarray
    integer: np.ndarray
    residual_px: float
    sigma: dict
    scale_source: str
    score: float = 0.0
    confidence: float = 1.0
    completeness: float = 0.0
    notes: tuple = ()


def _screen_xy(g: np.ndarray, energy_eV: float, geom: ScreenGeometry) -> np.ndarray:
    xy, _ = momentum_to_pixels(g, energy_eV, geom)
    return xy


def _int_points(a_star: np.ndarray, g_max: float) -> np.ndarray:
    """Integer (h, k) with |h a1* + k a2*| ≤ g_max, (K, 2) float."""
    area = abs(np.linalg.det(a_star))
    hmax = int(math.ceil(g_max * np.linalg.norm(a_star[1]) / area)) + 1
    kmax = int(math.ceil(g_max * np.linalg.norm(a_star[0]) / area)) + 1
    h, k = np.meshgrid(np.arange(-hmax, hmax + 1), np.arange(-kmax, kmax + 1), indexing="ij")
    hk = np.column_stack([h.ravel(), k.ravel()]).astype(np.float64)
    g = hk @ a_star
    return hk[np.hypot(g[:, 0], g[:, 1]) <= g_max]


def _match(pred: np.ndarray, obs_tree: cKDTree, tol, brightness: np.ndarray | None = None
           ) -> tuple[np.ndarray, np.ndarray]:
    """Observed spot for each prediction within tol (a number, or one per prediction):
    (pred index, obs index), one-to-one. The nearest spot, or with `brightness` the
    brightest one within tol (substrate beams outshine satellites crowding around them)."""
    ok = np.all(np.isfinite(pred), axis=1)
    if not ok.any():
        return np.zeros(0, int), np.zeros(0, int)
    tol_each = np.broadcast_to(np.asarray(tol, dtype=np.float64), (len(pred),))[ok]
    if brightness is not None:
        d = np.full(int(ok.sum()), np.inf)
        j = np.full(int(ok.sum()), obs_tree.n)
        for n, (p, t) in enumerate(zip(pred[ok], tol_each)):
            near = obs_tree.query_ball_point(p, t)
            if near:
                k = max(near, key=lambda q: brightness[q])
                j[n], d[n] = k, float(np.hypot(*(obs_tree.data[k] - p)))
    else:
        d, j = obs_tree.query(pred[ok], distance_upper_bound=float(tol_each.max()))
    idx = np.flatnonzero(ok)
    hit = np.isfinite(d) & (d <= tol_each)
    pi, oj, dd = idx[hit], j[hit], d[hit]
    order = np.argsort(dd)  # one-to-one: closest pairs first
    used_o, used_p, keep = set(), set(), []
    for t in order:
        if oj[t] in used_o or pi[t] in used_p:
            continue
        used_o.add(oj[t])
        used_p.add(pi[t])
        keep.append(t)
    keep = np.array(keep, dtype=int)
    return pi[keep], oj[keep]


def _seen(xy: np.ndarray, valid: np.ndarray | None, center: np.ndarray, r_max: float, r_min: float) -> np.ndarray:
    """Which predicted pixel positions lie where a spot could have been seen."""
    ok = np.all(np.isfinite(xy), axis=1)
    r = np.hypot(xy[:, 0] - center[0], xy[:, 1] - center[1])
    ok &= (r <= r_max) & (r >= r_min)
    if valid is not None:
        rows, cols = valid.shape
        safe = np.where(np.isfinite(xy), xy, -1.0)
        ok &= (safe[:, 0] >= 0) & (safe[:, 0] <= cols - 1) & (safe[:, 1] >= 0) & (safe[:, 1] <= rows - 1)
        ci = np.rint(safe[ok, 0]).astype(int)
        ri = np.rint(safe[ok, 1]).astype(int)
        ok[ok] &= valid[ri, ci]
    return ok


def _scale_prior(screen_radius_px: float | None) -> float | None:
    if screen_radius_px is None or not (screen_radius_px > 0):
        return None
    st = math.sin(math.radians(_ACCEPTANCE_PRIOR_DEG))
    ct = math.cos(math.radians(_ACCEPTANCE_PRIOR_DEG))
    d = _DISTORTION_PRIOR
    return float(screen_radius_px / (st * (1 - d) / (1 - d * ct)))


def _hint_variants(hint: Net2D) -> list[np.ndarray]:
    """Reciprocal bases to try: the hint, plus its mirror image when the net has no mirror."""
    a_star = reciprocal(hint).vectors
    out = [a_star]
    if classify_net(hint) == "oblique":
        out.append(a_star @ np.diag([1.0, -1.0]))
    return out


def fit_substrate(xy_px: np.ndarray, energy_eV: float, hint: Net2D, *, intensity: np.ndarray | None = None,
                  geometry: ScreenGeometry | None = None, center_px=None, center_guess=None,
                  screen_radius_px: float | None = None, screen_prior_sigma: float = _SCALE_PRIOR_SIGMA,
                  valid_mask: np.ndarray | None = None, fit_lattice: bool | None = None,
                  tol_px: float = 2.5, n_candidates: int = 12, max_results: int = 3) -> list[SubstrateFit]:
    """Find the substrate reciprocal net among the spots, ranked.

    Parameters
    ----------
    xy_px : (K, 2) ndarray
        Spot centres (x, y), pixels.
    energy_eV : float
    hint : Net2D
        The substrate's (1×1) real-space net (from :func:`analysis.nets.parse_substrate`).
    intensity : (K,) ndarray, optional
        Integrated intensities; integer-order beams are usually the brightest.
    geometry : ScreenGeometry, optional
        A known camera model (from a calibration or a reference image). Its
        scale and distortion are then kept and the lattice constants are
        measured; without it they are taken from `hint` and the camera scale
        is fitted.
    center_px : (x, y), optional
        The pattern centre if known; otherwise from symmetric pairs.
    center_guess : (x, y), optional
        Where to start pairing spots (e.g. the gun-disk centre).
    screen_radius_px : float, optional
        Radius of the visible screen; gives a scale prior when no geometry is known.
    screen_prior_sigma : float
        Relative width of that prior (wider when the radius is only the image frame's).
    valid_mask : (M, N) ndarray of bool, optional
        Pixels where a spot could be seen (screen minus gun shadow).
    fit_lattice : bool, optional
        Fit a*, b*, γ* freely (default: True when `geometry` is given).
    tol_px : float
        Final matching tolerance, pixels.

    Returns
    -------
    list of SubstrateFit
        Best first; several when readings compete (each with its confidence).

    Raises
    ------
    FitError
        Too few spots, or no reading of the hint's net fits.
    """
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    if len(xy) < 3:
        raise FitError(f"Need at least 3 spots to fit the substrate net, got {len(xy)}.")
    inten = np.ones(len(xy)) if intensity is None else np.clip(np.asarray(intensity, dtype=np.float64), 1e-9, None)
    if center_px is not None:
        center = np.asarray(center_px, dtype=np.float64)
    elif geometry is not None:
        center = np.array(geometry.center_px)
    else:
        center = None  # ±g pairs agree to about a pixel; a tight tolerance keeps dense patterns apart
        for guess, tol in ((None, max(3.0, 1.2 * tol_px)), (center_guess, max(3.0, 1.2 * tol_px)), (None, None)):
            try:  # the vote of all pair midpoints first (a gun disk may sit off the centre), then the guess
                center = estimate_center_from_pairs(xy, tol_px=tol, initial_xy=guess).center_xy
                break
            except FitError:
                continue
        if center is None:
            raise FitError(f"No spots pair up as g and −g among the {len(xy)} found: the pattern centre "
                           "cannot be found (set it by hand, or check that the beam hits at normal incidence).")
    fit_lattice = (geometry is not None) if fit_lattice is None else fit_lattice
    lam = wavelength_A(energy_eV)
    r = np.hypot(xy[:, 0] - center[0], xy[:, 1] - center[1])
    r_max = float(r.max()) * 1.03 + tol_px
    r_min = 0.0
    tree = cKDTree(xy)
    prior = geometry.scale_px if geometry is not None else _scale_prior(screen_radius_px)
    prior_sigma = 0.03 if geometry is not None else float(screen_prior_sigma)

    order = [i for i in np.argsort(r) if r[i] > 3 * tol_px]
    near = order[:n_candidates]
    bright = sorted(order, key=lambda i: -inten[i])[:n_candidates]
    cands = list(dict.fromkeys(near + bright))
    fits: list[SubstrateFit] = []
    tried_inv: list[np.ndarray] = []  # inverses of the start bases tried
    for a_star in _hint_variants(hint):
        short = _distinct_short_vectors(a_star)
        for i in cands:
            v = np.array([xy[i, 0] - center[0], center[1] - xy[i, 1]])  # y up
            for e in short:
                start = _similarity_basis(a_star, e, v)
                if tried_inv and _any_same_lattice(start, np.array(tried_inv), 0.08):
                    continue  # a symmetry-equivalent start was tried already
                tried_inv.append(np.linalg.inv(start))
                f = _try_substrate(xy, tree, inten, energy_eV, a_star, e, v, center, geometry, lam, tol_px,
                                   r_max, r_min, valid_mask, prior, prior_sigma, fit_lattice, hint)
                if f is not None and not any(_same_reading(f, g) for g in fits):
                    fits.append(f)
    if not fits:
        raise FitError(f"No reading of the {classify_net(hint)} substrate net "
                       f"({hint.label or 'given'}) fits the {len(xy)} spots.")
    fits.sort(key=lambda f: -f.score)
    scores = np.array([f.score for f in fits])
    conf = np.exp(scores - scores.max())
    conf /= conf.sum()
    return [dataclasses.replace(f, confidence=float(c)) for f, c in zip(fits, conf)][:max_results]


def _any_same_lattice(m: np.ndarray, inverses: np.ndarray, tol: float) -> bool:
    """Whether m spans the lattice of any basis whose inverse is in `inverses` (T, 2, 2)."""
    t = np.einsum("ij,tjk->tik", m, inverses)
    r = np.rint(t)
    det = r[:, 0, 0] * r[:, 1, 1] - r[:, 0, 1] * r[:, 1, 0]
    return bool(np.any(np.all(np.abs(t - r) <= tol, axis=(1, 2)) & (np.abs(np.abs(det) - 1) < 0.5)))


def _distinct_short_vectors(a_star: np.ndarray) -> list[np.ndarray]:
    """a1*, a2*, a1* ± a2*, dropping ones as long as an earlier one (equivalent by symmetry)."""
    out, lengths = [], []
    for e in (a_star[0], a_star[1], a_star[0] + a_star[1], a_star[0] - a_star[1]):
        ln = float(np.hypot(*e))
        if all(abs(ln - l0) > 1e-6 * ln for l0 in lengths):
            out.append(e)
            lengths.append(ln)
    return out


def _similarity_basis(a_star: np.ndarray, e: np.ndarray, v: np.ndarray) -> np.ndarray:
    """The reciprocal basis turned and scaled so that beam e lands on the spot vector v (px, y up)."""
    ang = math.atan2(v[1], v[0]) - math.atan2(e[1], e[0])
    k = float(np.hypot(*v)) / float(np.hypot(*e))
    c, s = math.cos(ang), math.sin(ang)
    return k * a_star @ np.array([[c, s], [-s, c]])


def _same_reading(f: SubstrateFit, g: SubstrateFit) -> bool:
    return bool(same_lattice(f.a_star_px, g.a_star_px, tol=0.05)
                and abs(f.geometry.center_x_px - g.geometry.center_x_px) < 3
                and abs(f.geometry.center_y_px - g.geometry.center_y_px) < 3)


def _try_substrate(xy, tree, inten, energy_eV, a_star, e, v, center, geometry, lam, tol_px, r_max, r_min,
                   valid_mask, prior, prior_sigma, fit_lattice, hint):
    """One reading: spot vector v (px, y up) is the beam e of the hint net."""
    rot = math.degrees(math.atan2(v[1], v[0]) - math.atan2(e[1], e[0]))
    k_px = float(np.hypot(*v)) / float(np.hypot(*e))  # px per Å⁻¹ at small angles
    if geometry is None:
        geom = ScreenGeometry(center[0], center[1], k_px / lam, distortion=0.0, rotation_deg=rot,
                              acceptance_deg=89.0)  # the first stage keeps d = 0 (small angles)
        free_geo = ("center_x_px", "center_y_px", "scale_px", "rotation_deg", "distortion")
    else:
        geom = dataclasses.replace(geometry, center_x_px=float(center[0]), center_y_px=float(center[1]),
                                   rotation_deg=rot, acceptance_deg=89.0)
        # keep the calibration's scale unless the spot says it is off by a lot (then no match)
        free_geo = ("center_x_px", "center_y_px", "rotation_deg")
    g_max = math.sin(math.radians(85.0)) / lam
    hk_all = _int_points(a_star, g_max)
    g_all = hk_all @ a_star
    vlen = float(np.hypot(*v))
    nn = _nn_spacing(tree)  # dense patterns need tight matching from the start
    wide = max(tol_px, min(0.12 * vlen, 0.35 * nn))
    first = free_geo[:4] if geometry is None else free_geo
    g_len = np.hypot(g_all[:, 0], g_all[:, 1]) * k_px / lam * lam  # predicted radii at small angles, px
    by_r = np.argsort(g_len)
    r_two = next((g_len[by_r[n]] for n in range(2, len(by_r))
                  if np.linalg.matrix_rank(hk_all[by_r[: n + 1]]) == 2), 2 * vlen)
    stages = [(max(tol_px, min(0.15 * vlen, 0.35 * nn)), max(1.25 * vlen, 1.1 * r_two), first),  # grow ring by ring
              (wide, 1.8 * vlen, free_geo), (wide, 2.6 * vlen, free_geo),
              (max(tol_px, min(0.06 * vlen, 0.3 * nn)), np.inf, free_geo), (tol_px, np.inf, free_geo)]
    pi = oj = np.zeros(0, int)
    lattice = a_star.copy()
    for n_stage, (tol, rad, free) in enumerate(stages):
        pred = _screen_xy(hk_all @ lattice, energy_eV, geom)
        rr = np.hypot(pred[:, 0] - geom.center_x_px, pred[:, 1] - geom.center_y_px)
        if n_stage in (1, 2):  # an unfitted distortion moves outer rings most (outwards in the model):
            pred = np.where((rr <= min(rad, 1.15 * r_max))[:, None], pred, np.nan)
            tol = np.maximum(0.12 * rr, tol)  # look wider, and take the brightest spot there
            pi, oj = _match(pred, tree, tol, brightness=inten)
        else:
            pred = np.where((rr <= min(rad, r_max))[:, None], pred, np.nan)
            pi, oj = _match(pred, tree, tol)
        if len(pi) < 2 or np.linalg.matrix_rank(hk_all[pi]) < 2:
            return None
        geom, lattice, _, _ = _refine(xy[oj], hk_all[pi], energy_eV, geom, lattice, free,
                                      fit_lattice and rad == np.inf, rtol=1e-6)
    pred = _screen_xy(hk_all @ lattice, energy_eV, geom)
    pi, oj = _match(pred, tree, tol_px)
    if len(pi) < 3:
        return None
    last = free_geo + (("ellipticity",) if geometry is None else ())
    geom, lattice, res, sig = _refine(xy[oj], hk_all[pi], energy_eV, geom, lattice, last, fit_lattice)
    pred = _screen_xy(hk_all @ lattice, energy_eV, geom)
    pi, oj = _match(pred, tree, tol_px)
    if len(pi) < 3:
        return None
    seen = _seen(pred, valid_mask, np.array(geom.center_px), r_max, r_min)
    n_pred = int(seen.sum())
    completeness = len(pi) / max(n_pred, len(pi))
    # scores
    g_obs = pixels_to_momentum(xy, energy_eV, geom)
    hk = g_obs @ np.linalg.inv(lattice)
    integer = np.zeros(len(xy), bool)
    integer[oj] = True
    frac_hk = hk[~integer]
    if len(frac_hk):
        tol_hk = 3 * tol_px / (geom.scale_px * lam * float(np.min(np.linalg.norm(lattice, axis=1)) ** -1)) / 1.0
        rational = np.array([_is_rational(h, 8, max(tol_hk, 0.02)) for h in frac_hk])
        indexable = (len(pi) + rational.sum()) / len(xy)
        # substrate beams should outshine the brightest of the rest (not just their median,
        # which many weak satellites would pull down)
        d_logi = float(np.median(np.log(inten[integer])) - np.log(np.percentile(inten[~integer], 90)))
    else:
        indexable, d_logi = 1.0, 0.0
    score = 4.0 * completeness + 2.0 * indexable + math.tanh(d_logi)
    if prior is not None:
        z = math.log(geom.scale_px / prior) / prior_sigma
        score -= 0.5 * z * z
    score -= float(np.sqrt(np.mean(res**2))) / tol_px  # prefer the tighter fit
    rec = Net2D(lattice)
    net = Net2D(np.linalg.inv(lattice).T, label=hint.label)
    jac = local_jacobian(energy_eV, geom)
    a_star_px = lattice @ jac.T
    notes = []
    if geometry is None:
        notes.append("lattice constants taken from the substrate given (camera scale fitted)")
    return SubstrateFit(geometry=dataclasses.replace(geom, acceptance_deg=(geometry.acceptance_deg if geometry
                                                                           else _ACCEPTANCE_PRIOR_DEG)),
                        reciprocal_net=rec, net=net, net_type=classify_net(net, tol=2e-3), a_star_px=a_star_px,
                        hk=hk, integer=integer, residual_px=float(np.sqrt(np.mean(np.sum(res**2, axis=1)))),
                        sigma=sig, scale_source="calibration" if geometry is not None else "hint",
                        score=float(score), completeness=float(completeness), notes=tuple(notes))


def _rational_residual(hk: np.ndarray, a_star: np.ndarray, max_den: int = 8) -> np.ndarray:
    """Distance (Å⁻¹) of each hk to the nearest fraction with denominator ≤ max_den."""
    best = np.full(len(hk), np.inf)
    for q in range(1, max_den + 1):
        d = (hk - np.rint(hk * q) / q) @ a_star
        best = np.minimum(best, np.hypot(d[:, 0], d[:, 1]))
    return best


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


def _nn_spacing(tree: cKDTree) -> float:
    """Median nearest-neighbour distance between spots, pixels."""
    if tree.n < 2:
        return np.inf
    d, _ = tree.query(tree.data, k=2)
    return float(np.median(d[:, 1]))


def _is_rational(hk: np.ndarray, max_den: int, tol: float) -> bool:
    for q in range(1, max_den + 1):
        if np.all(np.abs(hk * q - np.rint(hk * q)) <= tol * q):
            return True
    return False


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
        accepted = False
        for _ in range(12):
            try:
                step = -np.linalg.solve(jtj + mu * np.diag(d), g)
            except np.linalg.LinAlgError:
                mu *= 10.0
                continue
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


_GEOM_COLUMN = {"center_x_px": 0, "center_y_px": 1, "scale_px": 2, "rotation_deg": 3, "distortion": 4}


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
    lo = [0.0 if n == "distortion" else -np.inf for n in names]
    hi = [0.9 if n == "distortion" else np.inf for n in names]
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

    def resid(p):  # the camera fields as a plain namespace: no validation in the loop
        d, lat = unpack(p)
        return np.nan_to_num((project(hk_of(p) @ lat, lam, SimpleNamespace(**d))[0] - xy).ravel(), nan=1e3)

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
        return np.nan_to_num(j)

    if len(xy) * 2 <= len(p0):
        return geom, lattice, np.zeros((len(xy), 2)), {}
    x, j_fit = _bounded_lm(resid, jac, p0, np.array(lo, float), np.array(hi, float), rtol=rtol)
    d_fit, lat = unpack(x)
    g_fit = ScreenGeometry(**d_fit)
    res = resid(x).reshape(-1, 2)
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
    vals = []
    for d in draws:
        real = np.linalg.inv(d.reshape(2, 2)).T
        a, b = np.linalg.norm(real, axis=1)
        g = math.degrees(math.acos(np.clip(real[0] @ real[1] / (a * b), -1, 1)))
        vals.append((a, b, g))
    s = np.std(np.array(vals), axis=0, ddof=1)
    return {"a_A": float(s[0]), "b_A": float(s[1]), "gamma_deg": float(s[2])}


def fractional_indices(xy_px: np.ndarray, energy_eV: float, fit: SubstrateFit) -> np.ndarray:
    """(h, k) in the fitted substrate reciprocal basis for (x, y) pixel positions, (K, 2)."""
    g = pixels_to_momentum(np.asarray(xy_px, dtype=np.float64).reshape(-1, 2), energy_eV, fit.geometry)
    return g @ np.linalg.inv(fit.reciprocal_net.vectors)


# --------------------------------------------------------------------------- overlayer

@dataclass(frozen=True, eq=False)
class OverlayerModel:
    """One superstructure model for the fractional-order spots.

    Attributes
    ----------
    matrix : (2, 2) ndarray
        Real-space matrix of the first domain, substrate basis.
    domains : list of (2, 2) ndarray
        Every domain used (the first is `matrix`).
    domain_ops : list of str
        The substrate operation that makes each domain.
    kind : str
        none / commensurate / coincidence / incommensurate.
    wood : str or None
    wood_note : str
    coverage : float
        Adsorbates per substrate cell for one per overlayer cell.
    explained, unexplained, absent : int
        Fractional spots explained; fractional spots left unexplained;
        predicted fractional spots absent where they could have been seen.
    explained_by : (K,) ndarray of int
        For every input spot, the domain that explains it (−1 none, −2 substrate).
    score : float
    """

    matrix: np.ndarray
    domains: list
    domain_ops: list
    kind: str
    wood: str | None
    wood_note: str
    coverage: float
    explained: int
    unexplained: int
    absent: int
    explained_by: np.ndarray
    score: float
    total_domains: int = 1
    notes: tuple = ()
    details: dict = field(default_factory=dict)

    @property
    def n_domains(self) -> int:
        return len(self.domains)


def _snap_matrix(m: np.ndarray, tol: float, max_den: int) -> np.ndarray | None:
    """Each entry replaced by the closest fraction with denominator ≤ `max_den`, or None
    when one lies farther than `tol` from it (the closest p/q for each q is rint(x q)/q)."""
    m = np.asarray(m, dtype=np.float64)
    if np.all(np.abs(m - np.rint(m)) <= tol):
        return np.rint(m) + 0.0
    q = np.arange(1, max_den + 1, dtype=np.float64).reshape((-1,) + (1,) * m.ndim)
    cand = np.rint(m * q) / q
    err = np.abs(cand - m)
    k = np.argmin(err, axis=0)  # the smallest denominator among equally close ones
    best = np.take_along_axis(cand, k[None], 0)[0]
    if np.any(np.take_along_axis(err, k[None], 0)[0] > tol):
        return None
    return best + 0.0


def _lattice_points(b_star_hk: np.ndarray, a_star: np.ndarray, g_max: float) -> np.ndarray:
    """Points n @ B (hk units) of the lattice with basis rows B (hk), |g| ≤ g_max. (K, 2) hk."""
    cart = b_star_hk @ a_star
    area = abs(np.linalg.det(cart))
    n1 = int(math.ceil(g_max * np.linalg.norm(cart[1]) / area)) + 1
    n2 = int(math.ceil(g_max * np.linalg.norm(cart[0]) / area)) + 1
    if (2 * n1 + 1) * (2 * n2 + 1) > 400_000:
        raise FitError("The overlayer net is too fine to enumerate on this screen.")
    a, b = np.meshgrid(np.arange(-n1, n1 + 1), np.arange(-n2, n2 + 1), indexing="ij")
    n = np.column_stack([a.ravel(), b.ravel()]).astype(np.float64)
    hk = n @ b_star_hk
    g = hk @ a_star
    return hk[np.hypot(g[:, 0], g[:, 1]) <= g_max]


def _lattice_distance(hk: np.ndarray, m: np.ndarray, a_star: np.ndarray) -> np.ndarray:
    """Distance (Å⁻¹) of each spot to the nearest point of the reciprocal net of matrix m."""
    n = hk @ m.T  # hk = n @ inv(M).T  →  n = hk @ M.T
    d = (hk - np.rint(n) @ np.linalg.inv(m).T) @ a_star
    return np.hypot(d[:, 0], d[:, 1])


def _explained(hk: np.ndarray, m: np.ndarray, a_star: np.ndarray, tol_g: float) -> np.ndarray:
    """Which spots lie on the reciprocal net of matrix m (within tol_g, Å⁻¹)."""
    return _lattice_distance(hk, m, a_star) <= tol_g


def _refine_matrix(hk: np.ndarray, m: np.ndarray, a_star: np.ndarray, tol_g: float) -> np.ndarray:
    """Least-squares reciprocal basis of matrix m from the spots it explains."""
    prev = None
    for _ in range(3):
        ok = _explained(hk, m, a_star, tol_g)
        if prev is not None and np.array_equal(ok, prev):
            return m  # the same spots give the same fit
        prev = ok
        n = np.rint(hk[ok] @ m.T)
        if len(n) < 3 or np.linalg.matrix_rank(n) < 2:
            return m
        b_star, *_ = np.linalg.lstsq(n, hk[ok], rcond=None)  # hk ≈ n @ B*
        if abs(np.linalg.det(b_star)) < 1e-9:
            return m
        m = np.linalg.inv(b_star).T
    return m


def _dedupe_vectors(vecs: np.ndarray, a_star: np.ndarray, tol_g: float, n_keep: int,
                    kept_c: list | None = None, *, by_length: bool = True) -> list[np.ndarray]:
    """Up to `n_keep` vectors (shortest first, or in the given order), dropping ±duplicates
    and integer multiples of those kept."""
    if not len(vecs):
        return []
    cart = vecs @ a_star
    ln = np.hypot(cart[:, 0], cart[:, 1])
    out, out_c = [], list(kept_c or [])
    for i in (np.argsort(ln, kind="stable") if by_length else range(len(vecs))):
        c = cart[i]
        if ln[i] <= 2 * tol_g:
            continue
        if any(min(np.hypot(*(c - o)), np.hypot(*(c + o))) <= 1.5 * tol_g for o in out_c):
            continue
        if any(abs(c[0] * o[1] - c[1] * o[0]) <= 1.5 * tol_g * np.hypot(*o) and
               abs(round(float(c @ o / (o @ o))) - c @ o / (o @ o)) < 0.1 for o in out_c):
            continue
        out.append(vecs[i])
        out_c.append(c)
        if len(out) >= n_keep:
            break
    return out


def _candidate_vectors(hk: np.ndarray, integer: np.ndarray, a_star: np.ndarray, tol_g: float,
                       intensity: np.ndarray | None = None, n_spots: int = 10, n_bright: int = 6,
                       n_diff: int = 4) -> np.ndarray:
    """Reciprocal vectors to pair into overlayer bases.

    The shortest observed fractional beams (each is a lattice vector of some
    domain) and the brightest ones (first-order overlayer beams outshine
    multiple-scattering satellites), the substrate's short vectors, and a few
    short differences between nearby beams (to recover beams hidden by the gun).
    """
    g = hk @ a_star
    rad = np.hypot(g[:, 0], g[:, 1])
    frac_idx = [i for i in np.argsort(rad) if not integer[i]]
    primary = _dedupe_vectors(hk[frac_idx], a_star, tol_g, n_spots)
    if intensity is not None and len(frac_idx):
        bright = sorted(frac_idx, key=lambda i: -intensity[i])
        primary += _dedupe_vectors(hk[bright], a_star, tol_g, n_bright, [v @ a_star for v in primary],
                                   by_length=False)
    ints = _dedupe_vectors(np.array([(1, 0), (0, 1), (1, 1), (1, -1)], float), a_star, tol_g, 4,
                           [v @ a_star for v in primary])
    near = np.argsort(rad)[:24]
    diffs = np.array([hk[a] - hk[b] for ia, a in enumerate(near) for b in near[ia + 1:]]).reshape(-1, 2)
    kept = [v @ a_star for v in primary + ints]
    extra = _dedupe_vectors(diffs, a_star, tol_g, n_diff, kept)
    return np.array(primary + ints + extra).reshape(-1, 2)


def _domain_matrices(m: np.ndarray, ops) -> tuple[list[np.ndarray], list[str]]:
    """Distinct domains M W (W in the substrate group), right-handed like M, with the op names."""
    w = np.array([op.matrix for op in ops], dtype=np.float64)
    mw = np.einsum("ij,gjk->gik", m, w)
    flip = np.linalg.det(mw) * np.linalg.det(m) < 0
    mw[flip] = mw[flip][:, ::-1]
    # same lattice: mw_i mw_j⁻¹ is an integer matrix of determinant ±1
    t = np.einsum("aij,bjk->abik", mw, np.linalg.inv(mw))
    r = np.rint(t)
    same = np.all(np.abs(t - r) <= 1e-6, axis=(2, 3)) & \
        (np.abs(np.abs(r[..., 0, 0] * r[..., 1, 1] - r[..., 0, 1] * r[..., 1, 0]) - 1) < 0.5)
    keep = [g for g in range(len(w)) if not same[g, :g].any()]
    return [mw[g].copy() for g in keep], [ops[g].name for g in keep]


@dataclass(frozen=True, eq=False)
class _Context:
    """What every model is scored against (computed once per pattern)."""

    hk: np.ndarray
    integer: np.ndarray
    a_star: np.ndarray
    geom: ScreenGeometry
    energy_eV: float
    tol_g: float
    ops: list
    tree: cKDTree
    r_max: float
    g_max: float
    valid_mask: np.ndarray | None
    intensity: np.ndarray | None
    substrate: Net2D
    max_denominator: int = 6
    reliable: np.ndarray | None = None  # (K,) spots whose centres are trusted (None: all)


def _context(hk, integer, substrate_fit: SubstrateFit, energy_eV, intensity, valid_mask, tol_px,
             max_denominator: int = 6, reliable=None) -> _Context:
    hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
    reliable = np.ones(len(hk), bool) if reliable is None else np.asarray(reliable, dtype=bool).reshape(len(hk))
    frac = ~np.asarray(integer, dtype=bool)
    if int((frac & reliable).sum()) < 2:  # too few trusted fractional spots to judge by: count them all
        reliable = np.ones(len(hk), bool)
    geom = substrate_fit.geometry
    a_star = substrate_fit.reciprocal_net.vectors
    lam = wavelength_A(energy_eV)
    center = np.array(geom.center_px)
    obs_xy = _screen_xy(hk @ a_star, energy_eV, geom)
    r_obs = np.hypot(obs_xy[:, 0] - center[0], obs_xy[:, 1] - center[1])
    r_max = float(np.nanmax(r_obs)) * 1.02 if len(r_obs) else 0.0
    sub = Net2D(substrate_fit.net.vectors)
    return _Context(hk=hk, integer=np.asarray(integer, dtype=bool), a_star=a_star, geom=geom,
                    energy_eV=float(energy_eV), tol_g=tol_px / (geom.scale_px * lam),
                    ops=point_group(sub, tol=2e-3), tree=cKDTree(hk @ a_star), r_max=r_max,
                    g_max=math.sin(math.radians(min(geom.acceptance_deg, 80.0))) / lam,
                    valid_mask=valid_mask, intensity=None if intensity is None else np.asarray(intensity, float),
                    substrate=sub, max_denominator=int(max_denominator), reliable=reliable)


def _score(ctx: _Context, matrix, *, all_domains: bool, satellites: bool, absent: bool = True) -> dict:
    """Explained / unexplained / absent counts and the score of one matrix with its domains.

    With ``absent=False`` the (costly) count of missing beams is left for
    :func:`_with_absent`; ``score`` is then an upper bound.
    """
    m = np.asarray(matrix, dtype=np.float64)
    if np.linalg.det(m) < 0:  # report bases with the substrate's handedness (det M > 0)
        m = m[::-1].copy()
    hk, a_star, tol_g = ctx.hk, ctx.a_star, ctx.tol_g
    frac = ~ctx.integer
    mats, names = _domain_matrices(m, ctx.ops)
    ms = np.array(mats)
    bs = np.linalg.inv(ms).transpose(0, 2, 1)  # reciprocal bases (D, 2, 2), hk units
    # distance of every spot to each domain's net: hk ≈ rint(hk Mᵀ) B
    near = np.einsum("dkj,dji->dki", np.rint(np.einsum("ki,dji->dkj", hk, ms)), bs)
    dd = (hk[None] - near) @ a_star
    dist = np.hypot(dd[..., 0], dd[..., 1])  # (D, K) Å⁻¹
    expl = (dist <= tol_g) & frac[None, :]
    primary = expl.copy()
    if satellites:  # a substrate beam plus a first-order beam of the layer (± b1*, b2*, b1* ± b2*)
        v = np.stack([bs[:, 0], bs[:, 1], bs[:, 0] + bs[:, 1], bs[:, 0] - bs[:, 1]], axis=1)
        v = np.concatenate([v, -v], axis=1)  # (D, 8, 2)
        sh = hk[None, None] - v[:, :, None, :]
        dd = (sh - np.rint(sh)) @ a_star
        dist = np.minimum(dist, np.hypot(dd[..., 0], dd[..., 1]).min(axis=1))
        expl = (dist <= tol_g) & frac[None, :]
    if all_domains:
        chosen = list(range(len(mats)))
    else:  # greedy: the smallest set of domains that explains the spots (a domain earns its
        # place by beams of its own; satellites only count for domains already chosen)
        chosen, covered = [], np.zeros(len(hk), bool)
        while True:
            gains = [int((primary[i] & ~covered).sum()) if i not in chosen else -1 for i in range(len(mats))]
            best = int(np.argmax(gains))
            if gains[best] < (1 if not chosen else 2):
                break
            chosen.append(best)
            covered |= primary[best]
        chosen = chosen or [0]
    by = np.full(len(hk), -1)
    by[ctx.integer] = -2
    for rank in range(len(chosen) - 1, -1, -1):
        by[expl[chosen[rank]]] = rank
    covered = expl[chosen].any(axis=0) & frac
    e = int(covered.sum())
    e_sat = e - int((primary[chosen].any(axis=0) & frac).sum())
    u = int(frac.sum()) - e
    # the score counts spots with trusted centres only (not cut by a mask edge, fit converged):
    # a biased centre must not decide between models
    rel = ctx.reliable
    e_r = int((covered & rel).sum())
    e_sat_r = e_r - int((primary[chosen].any(axis=0) & frac & rel).sum())
    u_r = int((frac & rel).sum()) - e_r
    det = abs(float(np.linalg.det(mats[chosen[0]])))
    bound = (e_r - 0.25 * e_sat_r) - u_r - 1.0 * (len(chosen) - 1) - 0.5 * abs(math.log2(det))
    if e_r:  # the tighter fit wins a tie: mean squared miss of the explained spots, in tolerances
        miss = dist[chosen].min(axis=0)[covered & rel] / tol_g
        bound -= float(np.mean(miss**2))
    if e_sat and ctx.intensity is not None:  # a layer's own beams outshine its multiple-scattering satellites
        own = primary[chosen].any(axis=0) & frac & rel
        sat_only = covered & rel & ~own
        if own.any() and sat_only.any():
            li = np.log(np.clip(ctx.intensity, 1e-9, None))
            bound += math.tanh(float(np.median(li[own]) - np.median(li[sat_only])))
    sc = {"mats": [mats[i] for i in chosen], "names": [names[i] for i in chosen], "all_mats": mats, "e": e,
          "u": u, "absent": None, "by": by, "score": float(bound), "bound": float(bound), "total": len(mats),
          "satellites": e_sat, "satellites_allowed": bool(satellites)}
    return _with_absent(ctx, sc) if absent else sc


def _with_absent(ctx: _Context, sc: dict) -> dict:
    """Count predicted fractional beams missing where they could be seen; finish the score."""
    if sc["absent"] is not None:
        return sc
    absent = 0
    center = np.array(ctx.geom.center_px)
    a_star = ctx.a_star
    pts = [_lattice_points(np.linalg.inv(m).T, a_star, ctx.g_max) for m in sc["mats"]]
    pts = np.concatenate(pts) if pts else np.zeros((0, 2))  # every domain at once
    pts = pts[np.any(np.abs(pts - np.rint(pts)) > 1e-6, axis=1)]
    if len(pts):
        seen = _seen(_screen_xy(pts @ a_star, ctx.energy_eV, ctx.geom), ctx.valid_mask, center, ctx.r_max, 0.0)
        if seen.any():
            d, _ = ctx.tree.query(pts[seen] @ a_star, distance_upper_bound=ctx.tol_g)
            absent = int(np.sum(~np.isfinite(d)))
    return {**sc, "absent": absent, "score": float(sc["bound"] - 0.5 * absent)}


def _describe(ctx: _Context, sc: dict, *, kind_tol: float) -> OverlayerModel:
    """Turn a scored matrix into a model with kind, Wood notation and coverage."""
    m = sc["mats"][0]
    # a continuous fit names only the coincidences the search itself would have snapped to;
    # closer high-order ones are listed as its approximants
    kind = classify_superstructure(ctx.substrate, m, tol=kind_tol,
                                   max_denominator=ctx.max_denominator if sc["satellites_allowed"] else 12)
    if kind.kind in ("commensurate", "coincidence", "none"):  # exact, and in a readable basis
        snapped = [_snap_matrix(d, kind_tol, 12) for d in sc["mats"]]
        mats = [nice_matrix(ctx.substrate, d if q is None else q) for d, q in zip(sc["mats"], snapped)]
        m = mats[0]
    else:
        mats = sc["mats"]
    w = wood_notation(ctx.substrate, m, tol=1e-6 if kind.kind != "incommensurate" else 2e-3)
    ratio = None
    if ctx.intensity is not None and len(mats) > 1:
        ratio = _population_test(ctx.hk, sc["by"], ctx.intensity, ctx.ops)
    notes = []
    if sc["satellites"]:
        notes.append(f"{sc['satellites']} spots explained as multiple-scattering satellites")
    return OverlayerModel(matrix=m, domains=mats, domain_ops=sc["names"], kind=kind.kind, wood=w.text,
                          wood_note=w.note, coverage=coverage(m), explained=sc["e"], unexplained=sc["u"],
                          absent=sc["absent"], explained_by=sc["by"], score=sc["score"], total_domains=sc["total"],
                          notes=tuple(notes),
                          details={"intensity_ratio": ratio, "kind": kind, "wood_notation": w, "tol_g": ctx.tol_g})


def evaluate_model(hk: np.ndarray, integer: np.ndarray, substrate_fit: SubstrateFit, matrix, *,
                   energy_eV: float, intensity: np.ndarray | None = None, valid_mask: np.ndarray | None = None,
                   tol_px: float = 2.5, all_domains: bool = False, satellites: bool = False,
                   kind_tol: float = 1e-6, reliable: np.ndarray | None = None) -> OverlayerModel:
    """Score one superstructure matrix (with its symmetry domains) against the spots.

    Parameters
    ----------
    hk : (K, 2) ndarray
        Fractional indices of all spots (substrate basis).
    integer : (K,) ndarray of bool
        Spots taken as substrate beams.
    substrate_fit : SubstrateFit
    matrix : (2, 2) array_like
        Real-space matrix of one domain.
    all_domains : bool
        Use every symmetry domain (a model typed by hand); otherwise the
        smallest set of domains that explains the spots (greedy).
    satellites : bool
        Also accept first-order multiple-scattering spots (substrate beam ±
        an overlayer beam), for incommensurate overlayers.
    kind_tol : float
        Absolute tolerance on the matrix entries for integer / rational.
    reliable : (K,) ndarray of bool, optional
        Spots whose centres are trusted; only they count in the score
        (the counts reported cover every spot).
    """
    ctx = _context(hk, integer, substrate_fit, energy_eV, intensity, valid_mask, tol_px, reliable=reliable)
    sc = _score(ctx, matrix, all_domains=all_domains, satellites=satellites)
    return _describe(ctx, sc, kind_tol=kind_tol)


_INTENSITY_SCATTER = 0.1  # relative scatter of equivalent beams' intensities taken as noise


def _population_test(hk: np.ndarray, by: np.ndarray, intensity: np.ndarray, ops) -> float | None:
    """Variance ratio of log intensities within symmetry classes, without / with per-domain populations.

    Classes are orbits of beam indices under the full substrate group. A ratio
    well above 1 says the domains are unequally populated, which a
    single-domain model cannot produce.
    """
    sel = by >= 0
    if sel.sum() < 6:
        return None
    li = np.log(np.clip(intensity[sel], 1e-9, None))
    inv_t = np.array([np.linalg.inv(op.matrix).T for op in ops])
    # class key: the lexicographically largest image of the beam index under the group
    img = np.round(np.einsum("si,gij->sgj", hk[sel], inv_t), 3) + 0.0  # (S, G, 2)
    k0 = img[:, :, 0].max(axis=1)
    k1 = np.where(img[:, :, 0] == k0[:, None], img[:, :, 1], -np.inf).max(axis=1)
    _, cls = np.unique(np.column_stack([k0, k1]), axis=0, return_inverse=True)
    cls = cls.ravel()
    dom = by[sel]

    def resid_var(cols):
        x = np.column_stack(cols)
        beta, *_ = np.linalg.lstsq(x, li, rcond=None)
        r = li - x @ beta
        return float(r @ r) / max(len(li) - np.linalg.matrix_rank(x), 1)

    c_cols = [(cls == c).astype(float) for c in np.unique(cls)]
    d_cols = [(dom == d).astype(float) for d in np.unique(dom)[1:]]
    if len(li) - np.linalg.matrix_rank(np.column_stack(c_cols + d_cols)) < 4:
        return None  # too few spots per class to tell
    v0 = resid_var(c_cols)
    v1 = resid_var(c_cols + d_cols) if d_cols else v0
    # measured spot intensities scatter by ~10 % between equivalent beams (common practice for
    # LEED: screen and camera non-uniformity), so differences of a few per cent between domains
    # are no evidence of unequal populations, however precise the counts
    floor = _INTENSITY_SCATTER**2
    return float((v0 + floor) / (v1 + floor))


def model_from_matrix(hk, integer, substrate_fit, matrix, *, energy_eV, **kw) -> OverlayerModel:
    """A model typed by hand: every symmetry domain of `matrix` (see :func:`evaluate_model`)."""
    return evaluate_model(hk, integer, substrate_fit, matrix, energy_eV=energy_eV, all_domains=True, **kw)


def find_overlayers(hk: np.ndarray, integer: np.ndarray, substrate_fit: SubstrateFit, *, energy_eV: float,
                    intensity: np.ndarray | None = None, valid_mask: np.ndarray | None = None,
                    tol_px: float = 2.5, max_det: float = 64.0, max_denominator: int = 6,
                    n_results: int = 5, reliable: np.ndarray | None = None) -> list[OverlayerModel]:
    """Search superstructure matrices that explain the fractional-order spots.

    Candidates come from pairs of short observed beam vectors (and their
    differences, to recover beams hidden by the gun); each pair is a
    reciprocal basis B*, refined by least squares on the spots it explains,
    turned into M = (B*⁻¹)ᵀ and snapped to an integer matrix
    (commensurate) or one with denominators ≤ `max_denominator` (coincidence)
    when the spots allow; the unsnapped fit competes as an incommensurate
    model (with multiple-scattering satellites allowed). Each is scored with
    its domains (see the module docstring); the best few are described.

    Returns
    -------
    list of OverlayerModel
        Best first. A clean surface gives one model, the identity, kind ``none``.
    """
    ctx = _context(hk, integer, substrate_fit, energy_eV, intensity, valid_mask, tol_px, max_denominator, reliable)
    if int((~ctx.integer).sum()) == 0:
        return [_describe(ctx, _score(ctx, np.eye(2), all_domains=False, satellites=False), kind_tol=1e-6)]
    n_frac = int((~ctx.integer).sum())
    a_star, tol_g = ctx.a_star, ctx.tol_g
    vecs = _candidate_vectors(ctx.hk, ctx.integer, a_star, tol_g, ctx.intensity)
    g_ref = float(np.min(np.linalg.norm(a_star, axis=1)))
    seen: set = set()
    scored: list[tuple[dict, float]] = []
    for i in range(len(vecs)):
        for j in range(i + 1, len(vecs)):
            b = np.array([vecs[i], vecs[j]])
            det_b = abs(np.linalg.det(b))
            if det_b < 1.0 / max_det - 1e-9:
                continue
            cart = b @ a_star
            if det_b * abs(np.linalg.det(a_star)) / (np.linalg.norm(cart[0]) * np.linalg.norm(cart[1])) < 0.15:
                continue  # nearly parallel
            m0 = np.linalg.inv(b).T
            if int((_explained(ctx.hk, m0, a_star, 2 * tol_g) & ~ctx.integer).sum()) < 2:
                continue  # this pair spans no net the spots lie on
            m = _refine_matrix(ctx.hk, m0, a_star, tol_g)
            if abs(np.linalg.det(m)) > max_det + 1e-6:
                continue
            # the tolerance on M follows from the spot tolerance through |M|²
            m_tol = max(0.02, 0.5 * tol_g / g_ref * float(np.max(np.abs(m))) ** 2 / math.sqrt(n_frac))
            snapped = _snap_matrix(m, min(m_tol, 0.12), 1)
            if snapped is None:
                snapped = _snap_matrix(m, min(m_tol, 0.05), max_denominator)
            options = [(snapped, 1e-6, False)] if snapped is not None and abs(np.linalg.det(snapped)) > 1e-9 else []
            if not options or _snap_matrix(m, 2e-3, 12) is None:
                options.append((m, 2e-3, True))  # the continuous fit competes too (incommensurate)
            for c, ktol, sat in options:
                key = _structure_key(c, exact=not sat)
                if key in seen:
                    continue
                seen.add(key)
                if int((_explained(ctx.hk, c, a_star, tol_g) & ~ctx.integer).sum()) < 2 and not sat:
                    continue
                sc = _score(ctx, c, all_domains=False, satellites=sat, absent=False)
                if not sat:  # every domain of this structure is now known
                    seen.update(_structure_key(d, exact=True) for d in sc["all_mats"])
                scored.append((sc, ktol))
    # the bare substrate always competes: a few stray spots do not make a superstructure
    scored.append((_score(ctx, np.eye(2), all_domains=False, satellites=False, absent=False), 1e-6))
    # branch and bound: finish the scores best bound first, until no bound can enter the list;
    # irrational fits are ranked with the handicap _prefer_simple gives them
    def rank(sc, key="score"):
        return sc[key] - (_irrational_handicap(sc["e"], len(sc["mats"])) if sc["satellites_allowed"] else 0.0)

    scored.sort(key=lambda t: -rank(t[0], "bound"))
    done: list[tuple[dict, float]] = []
    for sc, kt in scored:
        if len(done) >= 2 * n_results and rank(sc, "bound") < sorted(rank(d) for d, _ in done)[-2 * n_results]:
            break
        done.append((_with_absent(ctx, sc), kt))
    done.sort(key=lambda t: -rank(t[0]))
    scored = []
    for sc, kt in done:  # irrational fits of one lattice (other bases, other starts) count once
        if sc["satellites_allowed"] and any(
                o["satellites_allowed"] and len(o["mats"]) == len(sc["mats"]) and
                any(_same_lattice_fast(sc["mats"][0], x, 0.02) for x in o["all_mats"]) for o, _ in scored):
            continue
        scored.append((sc, kt))
    models = _prefer_simple([_describe(ctx, sc, kind_tol=kt) for sc, kt in scored[: n_results + 1]])
    models.sort(key=lambda mm: -mm.score)
    out, keys = [], []
    for mm in models:
        key = (mm.wood, mm.n_domains, mm.kind) if mm.wood else (mm.n_domains, mm.kind, _lattice_key(mm.matrix))
        if key in keys:
            continue
        if mm.kind == "incommensurate":  # an unsnapped copy of a rational model listed already
            near = _snap_matrix(np.asarray(mm.matrix, float), 0.02, 12)
            if near is not None and any(o.kind != "incommensurate" and o.n_domains == mm.n_domains and
                                        _same_lattice_fast(near, np.asarray(o.matrix, float), 1e-6) for o in out):
                continue
        keys.append(key)
        out.append(mm)
    out = out[:n_results]
    return [_lead_with_plainest_domain(ctx, out[0])] + out[1:] if out else out


def _lead_with_plainest_domain(ctx: _Context, mm: OverlayerModel) -> OverlayerModel:
    """Put first the domain whose Wood cell reads most plainly (m ≥ n, least rotation).

    Domains related by a substrate mirror name the same structure, e.g. (2×1)
    and (1×2) on a centred rectangular net; the report names it by the plainer one.
    """
    if mm.n_domains < 2 or mm.kind == "incommensurate":
        return mm
    woods = [wood_notation(ctx.substrate, d) for d in mm.domains]

    def key(w):
        if w.text is None:
            return (1, 0.0, 0.0)
        return (0, float(w.n > w.m + 1e-9), abs(w.angle_deg), -w.angle_deg)

    k = min(range(len(woods)), key=lambda i: key(woods[i]))
    if k == 0:
        return mm
    order = [k] + [i for i in range(mm.n_domains) if i != k]
    by = mm.explained_by.copy()
    remap = {old: new for new, old in enumerate(order)}
    by = np.array([remap.get(int(b), int(b)) if b >= 0 else int(b) for b in by])
    w = woods[k]
    return dataclasses.replace(mm, matrix=mm.domains[k], domains=[mm.domains[i] for i in order],
                               domain_ops=[mm.domain_ops[i] for i in order], wood=w.text, wood_note=w.note,
                               explained_by=by, details={**mm.details, "wood_notation": w})


def _structure_key(m: np.ndarray, *, exact: bool) -> tuple:
    """Hashable name of the lattice of `m`.

    Exact (rational) matrices: the Hermite normal form. Others: the reduced
    overlayer basis rounded to 0.002 in substrate units.
    """
    if exact:
        try:
            return tuple(np.round(hermite_normal_form(m, max_denominator=12).ravel(), 6))
        except NetError:
            pass
    red, _ = reduce_net(Net2D(np.asarray(m, float)))
    v = red.vectors
    if v[0, 0] < 0 or (v[0, 0] == 0 and v[0, 1] < 0):
        v = -v
    return ("irrational",) + tuple(np.round(v.ravel() / 0.002).astype(int).tolist())


def _lattice_key(m: np.ndarray) -> tuple:
    """Hashable name of the lattice of m: its HNF when exactly rational, else rounded entries."""
    try:
        return tuple(np.round(hermite_normal_form(m, max_denominator=12).ravel(), 6))
    except NetError:
        return tuple(np.round(m.ravel(), 2))


def _irrational_handicap(explained: int, n_domains: int) -> float:
    """Score handicap of an irrational (incommensurate) model: four free parameters can absorb
    a small camera error, so it must explain clearly more than a rational cell, and each
    further irrational domain is a new free orientation."""
    return 1.5 + 0.05 * explained + 2.0 * (n_domains - 1)


def _prefer_simple(models: list[OverlayerModel]) -> list[OverlayerModel]:
    """Adjust scores: an irrational matrix must explain clearly more than a rational one;
    a multi-domain model gains when the intensities say the domains are unequally
    populated (which a single-domain model cannot produce)."""
    out = []
    for mm in models:
        s = mm.score
        if mm.kind == "incommensurate":
            s -= _irrational_handicap(mm.explained, mm.n_domains)
        ratio = mm.details.get("intensity_ratio")
        # only where positions cannot tell (rational models, no satellites); repays the domain penalty, no more
        if mm.n_domains > 1 and ratio is not None and mm.kind != "incommensurate":
            s += mm.n_domains * math.tanh(max(math.log(ratio) - math.log(2.0), 0.0))
        out.append(dataclasses.replace(mm, score=float(s)))
    return out


# --------------------------------------------------------------------------- whole pattern

def model_indices(hk: np.ndarray, model: OverlayerModel) -> np.ndarray:
    """The exact (model) indices of the spots a model explains; NaN elsewhere. (K, 2)."""
    out = np.full_like(np.asarray(hk, dtype=np.float64), np.nan)
    by = model.explained_by
    out[by == -2] = np.rint(hk[by == -2])
    for d, m in enumerate(model.domains):
        sel = by == d
        if sel.any():
            n = np.rint(hk[sel] @ np.asarray(m).T)
            pred = n @ np.linalg.inv(m).T
            ok = np.hypot(*((pred - hk[sel]) @ np.eye(2)).T) < 0.5  # satellites keep NaN below
            out[np.flatnonzero(sel)[ok]] = pred[ok]
    return out


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
    """
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    trusted = np.ones(len(xy), bool) if reliable is None else np.asarray(reliable, dtype=bool)
    lat = fit.reciprocal_net.vectors
    free = ("center_x_px", "center_y_px", "rotation_deg") if fit.scale_source == "calibration" else \
        ("center_x_px", "center_y_px", "scale_px", "rotation_deg", "distortion", "ellipticity")
    joint = None
    if model.kind == "incommensurate":
        tol_g = float(model.details.get("tol_g", 2.5 / (fit.geometry.scale_px * wavelength_A(energy_eV))))
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


def _search_and_refit(xy, energy_eV, fit, geometry, kw, rounds: int = 2):
    """Overlayer search, then refits of the camera with the best rational model's spots
    (its nearest rational neighbour when only irrational models came out; an irrational
    top model then also refits jointly with its own net), kept while they raise the best
    score by more than 0.05."""
    models = find_overlayers(fit.hk, fit.integer, fit, **kw)
    for _ in range(rounds):
        if int((~fit.integer).sum()) == 0:
            break
        top = models[0]
        if top.kind != "incommensurate" and top.unexplained == 0 and top.absent == 0:
            break
        seed = next((m for m in models if m.kind != "incommensurate"), None)
        if seed is None:
            near = _snap_matrix(np.asarray(top.matrix, float), 0.05, 6)
            seed = top if near is None else evaluate_model(
                fit.hk, fit.integer, fit, near, energy_eV=kw["energy_eV"], intensity=kw["intensity"],
                valid_mask=kw["valid_mask"], tol_px=3 * kw["tol_px"], reliable=kw["reliable"])
        seeds = [seed] + ([top] if top.kind == "incommensurate" and seed is not top else [])
        better = None
        for sd in seeds:  # the first seed that helps is kept (the rational one when it does)
            fit2 = refine_with_model(xy, energy_eV, fit, sd, fit_lattice=geometry is not None,
                                     reliable=kw["reliable"])
            models2 = find_overlayers(fit2.hk, fit2.integer, fit2, **kw)
            # spots that became substrate beams no longer count for or against a model: the refit
            # must win without them (and a refit that only tightens the fit a little is not worth it)
            if models2[0].score - int((fit2.integer & ~fit.integer).sum()) - models[0].score > 0.05:
                better = (fit2, models2)
                break
        if better is None:
            break
        fit, models = better
    return fit, models


@dataclass(frozen=True, eq=False)
class IndexResult:
    """Substrate readings and overlayer models for one pattern.

    Attributes
    ----------
    substrate : SubstrateFit
        The reading used (best).
    substrate_candidates : list of SubstrateFit
        All readings, best first, with confidences.
    models : list of OverlayerModel
        Overlayer models on the best reading, best first.
    """

    substrate: SubstrateFit
    substrate_candidates: list
    models: list

    @property
    def best(self) -> OverlayerModel:
        return self.models[0]


def index_pattern(xy_px: np.ndarray, energy_eV: float, hint: Net2D, *, intensity: np.ndarray | None = None,
                  geometry: ScreenGeometry | None = None, center_px=None, center_guess=None,
                  screen_radius_px: float | None = None, screen_prior_sigma: float = _SCALE_PRIOR_SIGMA,
                  valid_mask: np.ndarray | None = None,
                  tol_px: float = 2.5, n_results: int = 5, min_confidence: float = 0.15,
                  max_readings: int = 1, reliable: np.ndarray | None = None) -> IndexResult:
    """Index a whole pattern: substrate readings, overlayer models, joint refits.

    The best substrate reading is followed to its best overlayer model (the
    others stay listed with their confidence). With ``max_readings > 1`` the
    next readings with confidence ≥ `min_confidence` are followed too, and the
    one with the best ``substrate score − ½ (unexplained + absent) − ½ (domains − 1)``
    is kept (off by default: stray spots then favour wrong readings too easily).
    For each reading the camera model is refitted with the spots the best
    rational model explains while that raises the best score.
    """
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    fits = fit_substrate(xy, energy_eV, hint, intensity=intensity, geometry=geometry, center_px=center_px,
                         center_guess=center_guess, screen_radius_px=screen_radius_px,
                         screen_prior_sigma=screen_prior_sigma, valid_mask=valid_mask, tol_px=tol_px)
    kw = dict(energy_eV=energy_eV, intensity=intensity, valid_mask=valid_mask, tol_px=tol_px, n_results=n_results,
              reliable=None if reliable is None else np.asarray(reliable, dtype=bool).reshape(len(xy)))
    readings = [f for f in fits[:max_readings] if f is fits[0] or f.confidence >= min_confidence]
    followed = []
    for reading in readings:
        fit, models = _follow_reading(xy, energy_eV, reading, geometry, tol_px, kw)
        top = models[0]
        key = reading.score - 0.5 * (top.unexplained + top.absent) - 0.5 * (top.n_domains - 1)
        followed.append((key, fit, models, reading))
    key, fit, models, reading = max(followed, key=lambda t: t[0])
    cands = [fit] + [f for f in fits if f is not reading]
    return IndexResult(substrate=fit, substrate_candidates=cands, models=models)


def _follow_reading(xy, energy_eV, reading: SubstrateFit, geometry, tol_px, kw):
    """Best overlayer models for one substrate reading (trying camera readings when R/L is open)."""
    variants = [reading]
    if geometry is None and _distortion_open(reading):  # the spots leave R/L open: try readings,
        alt = _distortion_from_fractions(xy, energy_eV, reading, tol_px)  # the likeliest first
        variants = ([alt] if alt is not reading else []) + [reading, _with_distortion(
            xy, energy_eV, reading, _DISTORTION_PRIOR, f"distortion R/L held at the typical {_DISTORTION_PRIOR}")]
    best = None
    for fit in variants:
        fit, models = _search_and_refit(xy, energy_eV, fit, geometry, kw)
        if best is None or models[0].score > best[1][0].score:
            best = (fit, models)
        top = best[1][0]
        n_frac = max(int((~fit.integer).sum()), 1)
        if top.kind != "incommensurate" and top.unexplained + top.absent <= max(2, 0.1 * n_frac):
            break  # (nearly) every spot explained and none missing: other readings cannot do much better
    return best
