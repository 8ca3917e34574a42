"""The substrate's reciprocal net in an image: :func:`fit_substrate` ranks the readings of
the named substrate through the camera model (:class:`SubstrateFit`), and
:func:`fractional_indices` reads spot positions in a reading's basis.

A reading starts from one spot taken as a short beam of the substrate net, then grows
ring by ring (matching, refitting the camera) until every beam on the screen is
matched; the readings are ranked by the substrate score (:mod:`.score`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from ..calibration import estimate_center_from_pairs
from ..errors import FitError
from ..lattice import lattice_points, screen_g_max
from ..nets import Net2D, classify_net, reciprocal
from ..optics import ScreenGeometry, local_jacobian, pixels_to_momentum, wavelength_A
from ..superstructure import same_lattice
from .camera_refit import _MIN_SPOTS_FOR_INCIDENCE, OFF_AXIS, _refine
from .matching import _is_rational, _match, _nn_spacing, _screen_xy, _seen
from .score import ScoreBreakdown, substrate_breakdown


_ACCEPTANCE_PRIOR_DEG = 52.0  # screen half-angle, common practice (≈ 50–55°)
_DISTORTION_PRIOR = 0.2  # typical R/L of rear-view optics (an assumption); also tried when spots leave it open
_SCALE_PRIOR_SIGMA = 0.15  # relative (log) width: acceptance 48–56° and R/L 0–0.4 span ±15 % (common practice)


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
        Ranking score (:mod:`.score`) and its share among the candidates (0..1).
    completeness : float
        Fraction of the predicted integer beams inside the seen region that were found.
    score_terms : ScoreBreakdown
        The score's named terms (:data:`.score.SUBSTRATE_TERMS`); ``score_terms.total``
        is `score`.
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
    score_terms: ScoreBreakdown | None = None

    @property
    def reciprocal_constants(self) -> tuple[float, float, float]:
        """a*, b* (Å⁻¹, no 2π) and γ* (degrees) of the reciprocal of `net`."""
        rec = reciprocal(self.net)
        return rec.a, rec.b, rec.gamma_deg


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
                  tol_px: float = 2.5, n_candidates: int = 12, max_results: int = 3,
                  reference_a_star_px=None) -> list[SubstrateFit]:
    """Find the substrate reciprocal net among the spots, ranked.

    Parameters
    ----------
    xy_px : (K, 2) ndarray
        Spot centres (x, y), pixels.
    energy_eV : float
        Electron energy, eV.
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
    n_candidates : int, keyword-only
        Starting spot pairs tried.
    max_results : int, keyword-only
        Readings returned at most.
    reference_a_star_px : (2, 2) array_like, optional
        The substrate's reciprocal basis in pixels as a reference image showed it.
        The spots nearest to its first-order beams start readings first (a dense
        pattern's nearest and brightest spots may all be fractional), and only
        readings along its beams are kept (:func:`along_reference`); when none is,
        all are kept and the best one's notes say so.

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
    tree = cKDTree(xy)
    prior = geometry.scale_px if geometry is not None else _scale_prior(screen_radius_px)
    prior_sigma = 0.03 if geometry is not None else float(screen_prior_sigma)

    def readings(center):
        r = np.hypot(xy[:, 0] - center[0], xy[:, 1] - center[1])
        r_max = float(r.max()) * 1.03 + tol_px
        r_min = 0.0
        order = [i for i in np.argsort(r) if r[i] > 3 * tol_px]
        near = order[:n_candidates]
        bright = sorted(order, key=lambda i: -inten[i])[:n_candidates]
        expected = []
        if reference_a_star_px is not None and len(order):
            for q in center + _short_beams(reference_a_star_px):
                d, j = tree.query(q)
                if np.isfinite(d) and d <= 0.1 * float(np.hypot(q[0] - center[0], q[1] - center[1])) and \
                        r[j] > 3 * tol_px:
                    expected.append(int(j))
        cands = list(dict.fromkeys(expected + near + bright))
        found: list[SubstrateFit] = []
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
                    if f is not None and not any(_same_reading(f, g) for g in found):
                        found.append(f)
        return found

    fits = readings(center)
    if not fits and center_px is None and geometry is None:
        # off normal incidence the ±g pairs no longer share their midpoint (the radial law bends
        # them apart) and the specular beam leaves the gun: start from the bright spots near the
        # middle instead, each taken as the specular (0,0) beam; the readings then fit the incidence
        # (a camera off the screen axis bends them apart too: there the gun's centre stays put)
        r0 = np.hypot(xy[:, 0] - center[0], xy[:, 1] - center[1])
        middle = np.flatnonzero(r0 <= 0.3 * float(r0.max()))
        starts = ([("the gun's centre", np.asarray(center_guess, dtype=np.float64))] if center_guess is not None
                  else []) + [("a bright spot near the middle as the specular beam", xy[j])
                              for j in middle[np.argsort(-inten[middle], kind="stable")][:3]]
        for what, c in starts:  # every start: the readings compete by their scores below
            fits += [dataclasses.replace(f, notes=tuple(f.notes) + (
                f"the centre from ±g pairs gave no reading: started from {what}",)) for f in readings(c)
                if not any(_same_reading(f, g) for g in fits)]
    if not fits:
        raise FitError(f"No reading of the {classify_net(hint)} substrate net "
                       f"({hint.label or 'given'}) fits the {len(xy)} spots.")
    if reference_a_star_px is not None:
        agree = [f for f in fits if along_reference(f.a_star_px, reference_a_star_px)]
        if agree:
            fits = agree
        else:
            fits = [dataclasses.replace(f, notes=tuple(f.notes) + (
                "no reading lies along the reference image's substrate beams",)) for f in fits]
    fits.sort(key=lambda f: -f.score)
    scores = np.array([f.score for f in fits])
    conf = np.exp(scores - scores.max())
    conf /= conf.sum()
    return [dataclasses.replace(f, confidence=float(c)) for f, c in zip(fits, conf)][:max_results]


def _short_beams(basis: np.ndarray) -> np.ndarray:
    """(8, 2) ±a1, ±a2, ±(a1 + a2), ±(a1 − a2) of a (2, 2) basis: every first-order beam of
    the five plane nets is among them."""
    a = np.asarray(basis, dtype=np.float64)
    short = np.array([a[0], a[1], a[0] + a[1], a[0] - a[1]])
    return np.vstack([short, -short])


def along_reference(a_star_px, reference_a_star_px, *, tol_deg: float = 3.0, len_rtol: float = 0.15) -> bool:
    """Whether both rows of `a_star_px` point along beams of the reference basis.

    A row agrees when one of the reference's short vectors (±a1*, ±a2*, ±(a1* ± a2*)) has
    its length within `len_rtol` and its direction within `tol_deg`.

    >>> ref = np.array([[100.0, 0.0], [-50.0, 86.6]])  # hexagonal, 120°
    >>> turn = lambda deg: np.array([[np.cos(np.radians(deg)), np.sin(np.radians(deg))],
    ...                              [-np.sin(np.radians(deg)), np.cos(np.radians(deg))]])
    >>> along_reference(ref @ turn(60.0), ref), along_reference(ref @ turn(38.2), ref)
    (True, False)

    Parameters
    ----------
    a_star_px : (2, 2) array_like of float
        A reading's reciprocal basis in pixels, rows a1*, a2*.
    reference_a_star_px : (2, 2) array_like of float
        The reference image's reciprocal basis in pixels.
    tol_deg : float, keyword-only
        Largest angle between a row and a reference vector, degrees.
    len_rtol : float, keyword-only
        Largest relative difference of their lengths.

    Returns
    -------
    bool
        True when both rows agree.
    """
    ref = np.asarray(reference_a_star_px, dtype=np.float64)
    short = _short_beams(ref)
    ang_ref = np.arctan2(short[:, 1], short[:, 0])
    len_ref = np.hypot(short[:, 0], short[:, 1])
    for row in np.asarray(a_star_px, dtype=np.float64):
        ln = float(np.hypot(*row))
        d = np.abs((np.arctan2(row[1], row[0]) - ang_ref + np.pi) % (2 * np.pi) - np.pi)
        if not np.any((d <= np.radians(tol_deg)) & (np.abs(len_ref / ln - 1.0) <= len_rtol)):
            return False
    return True


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


def _one_ring(hk: np.ndarray, a_star: np.ndarray) -> bool:
    """True when the beams `hk` (integer indices) all lie on one ring |g| (within 5 %) and the
    specular (0,0) beam is not among them (seen beside the gun, it says the beam is off normal).

    >>> a = np.eye(2)
    >>> _one_ring(np.array([[1, 0], [0, 1], [-1, 0]]), a), _one_ring(np.array([[1, 0], [1, 1]]), a)
    (True, False)
    >>> _one_ring(np.array([[1, 0], [0, 1], [0, 0]]), a)
    False
    """
    g = np.linalg.norm(np.asarray(hk, dtype=np.float64) @ a_star, axis=1)
    if not len(g) or float(g.min()) < 1e-12:
        return False
    return float(g.max()) <= 1.05 * float(g.min())


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
    hk_all = lattice_points(np.eye(2), screen_g_max(energy_eV, 85.0), metric=a_star)  # integer (h, k)
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
        # an unfitted distortion moves outer rings most (outwards in the model); a calibrated
        # camera knows it, and there the nearest spot is the beam, not the brightest one near it
        if n_stage in (1, 2) and geometry is None:
            pred = np.where((rr <= min(rad, 1.15 * r_max))[:, None], pred, np.nan)
            tol = np.maximum(0.12 * rr, tol)  # look wider, and take the brightest spot there
            pi, oj = _match(pred, tree, tol, brightness=inten)
        else:
            pred = np.where((rr <= min(rad, r_max))[:, None], pred, np.nan)
            pi, oj = _match(pred, tree, tol)
        if len(pi) < 2 or np.linalg.matrix_rank(hk_all[pi]) < 2:
            return None
        one_ring = _one_ring(hk_all[pi], a_star)
        if n_stage >= 2 and len(pi) >= _MIN_SPOTS_FOR_INCIDENCE:  # the beam may be off normal
            free = free + OFF_AXIS[:2]
        elif n_stage >= 3 and len(pi) >= 6 and geometry is None and one_ring:
            free = free + OFF_AXIS[2:]  # one ring: a keystone (with its prior)
        if n_stage >= 2 and len(pi) >= 8 and geometry is None and not one_ring:
            # an oval image, or a named net whose a/b is a little off (a strained film): both
            # stretch the net along one direction, and the outer rings leave the tolerance first
            free = free + ("ellipticity",)
        geom, lattice, _, _ = _refine(xy[oj], hk_all[pi], energy_eV, geom, lattice, free,
                                      fit_lattice and rad == np.inf, rtol=1e-6)
    pred = _screen_xy(hk_all @ lattice, energy_eV, geom)
    pi, oj = _match(pred, tree, tol_px)
    if len(pi) < 3:
        return None
    last = free_geo + (("ellipticity",) if geometry is None else ())
    # the incidence and the keystone bend a pattern much alike: several rings tell an incidence
    # (the radial law), one ring of beams is bent by a keystone only (off normal it is not round)
    if len(pi) >= _MIN_SPOTS_FOR_INCIDENCE:
        last = last + OFF_AXIS[:2]
    elif len(pi) >= 6 and geometry is None and _one_ring(hk_all[pi], a_star):
        last = last + OFF_AXIS[2:]
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
    z = None if prior is None else math.log(geom.scale_px / prior) / prior_sigma
    terms = substrate_breakdown(completeness=completeness, indexable=indexable, brightness_log_ratio=d_logi, z=z,
                                residual_rms_px=float(np.sqrt(np.mean(res**2))), tol_px=tol_px)  # tighter fit wins
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
                        score=terms.total, completeness=float(completeness), notes=tuple(notes),
                        score_terms=terms)


def fractional_indices(xy_px: np.ndarray, energy_eV: float, fit: SubstrateFit) -> np.ndarray:
    """(h, k) in the fitted substrate reciprocal basis for (x, y) pixel positions, (K, 2).

    Parameters
    ----------
    xy_px : (K, 2) ndarray of float
        Spot positions (x, y), pixels.
    energy_eV : float
        Electron energy, eV.
    fit : SubstrateFit
        The substrate reading (camera model and reciprocal net).

    Returns
    -------
    (K, 2) ndarray of float64
        (h, k) of each position; integers on substrate beams.
    """
    g = pixels_to_momentum(np.asarray(xy_px, dtype=np.float64).reshape(-1, 2), energy_eV, fit.geometry)
    return g @ np.linalg.inv(fit.reciprocal_net.vectors)
