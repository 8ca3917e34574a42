"""Indexing a series as a whole: one camera and one reciprocal net for the spots of many frames.

On a fixed camera a beam's parallel momentum does not change with energy while its spot
moves in as 1/√E. A substrate reading fixes the momentum scale; with it, the spots of
every frame must land where one camera model (centre, scale per √eV, distortion R/L,
rotation) puts the beams of one reciprocal net. A reading that is right on one frame
but puts the substrate beams on the wrong spots needs another distortion at every
energy, and no single camera fits all frames as well: :func:`index_series_joint`
measures the spots of several frames, collects the readings each frame offers
(:func:`analysis.indexing.index_pattern`), fits one camera per reading to the spots of
all frames at once, pools the spots into beams (a beam is a momentum seen in several
frames), searches the overlayer on the pooled beams with :func:`analysis.indexing.find_overlayers`,
and keeps the reading and model that explain the spots of all frames best. Each
frame's own reading is kept as a cross-check (the votes).

Positions are (x, y) pixels; momenta are Å⁻¹ without 2π.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..errors import FitError, RecinetError, SeriesError
from ..nets import Net2D, classify_net
from ..optics import ScreenGeometry, local_jacobian, momentum_to_pixels, pixels_to_momentum, wavelength_A
from .geometry import fit_series_geometry
from .index_frames import SeriesIndexing

__all__ = ["index_series_joint"]

_TOL_PX = 2.5  # matching tolerance of a spot to its beam, px (the single-frame indexing's)
_SPOT_FLOOR_PX = 0.05  # no camera fits better than this (spot centres are not exact)
_SAME_CAMERA_PX = 0.25  # a camera refit that moves no spot further leaves the pooled beams as they were
_READINGS_PER_FRAME = 4  # substrate readings each frame offers to the joint fit
_ACCEPTANCE_DEG = 52.0  # screen half-angle, common practice (≈ 50–55° for rear-view optics; from memory)
_ACCEPTANCE_SIGMA_DEG = 5.0  # its spread between instruments (common practice)


def _label(kind: str, wood, matrix_text: str, n_domains: int) -> str:
    if kind == "none":
        return "clean (1×1)"
    return f"{wood or matrix_text}, {kind}" + (f", {n_domains} domains" if n_domains > 1 else "")


def _measure(frame, energy_eV, index, name, hint, min_snr):
    """Spots of one frame and the substrate readings it offers on its own (best first)."""
    from ..indexing import fit_substrate
    from ..io import load_image
    from ..spots import FLAG_FIT_FAILED, FLAG_NEAR_EDGE, measure_image

    img = load_image(frame)
    meas = measure_image(img, sigma_px=None, min_snr=min_snr)
    st = meas.spots
    xy = np.asarray(st.xy, dtype=np.float64).reshape(-1, 2)
    trusted = (np.asarray(st.flags) & (FLAG_NEAR_EDGE | FLAG_FIT_FAILED)) == 0
    framed = meas.screen.source == "frame"
    out = {"frame": int(index), "name": str(name), "energy_eV": float(energy_eV), "xy": xy,
           "intensity": np.clip(np.asarray(st.intensity, dtype=np.float64), 1e-9, None), "trusted": trusted,
           "valid": meas.valid, "readings": [], "vote": None,
           # the screen's edge when it was found (None: the screen fills the frame)
           "screen": None if framed else (float(meas.screen.center_rc[1]), float(meas.screen.center_rc[0]),
                                          float(meas.screen.radius_px))}
    if len(xy) < 3:
        out["vote"] = f"not indexed: only {len(xy)} spots"
        return out
    cg = None if meas.gun.center_rc is None else (float(meas.gun.center_rc[1]), float(meas.gun.center_rc[0]))
    radius = 0.45 * min(img.shape) if framed else meas.screen.radius_px
    try:
        fits = fit_substrate(xy, float(energy_eV), hint, intensity=out["intensity"], center_guess=cg,
                             screen_radius_px=radius, screen_prior_sigma=0.3 if framed else 0.15,
                             valid_mask=meas.valid, max_results=_READINGS_PER_FRAME)
    except (RecinetError, ValueError) as err:
        out["vote"] = f"not indexed: {err}"
        return out
    best = fits[0]
    out["vote"] = f"substrate at {best.geometry.scale_px:.0f} px per sin θ"
    out["vote_confidence"] = float(best.confidence)
    out["vote_a_star"] = best.reciprocal_net.vectors
    out["vote_geometry"] = best.geometry
    out["readings"] = [(f.geometry, f.reciprocal_net.vectors) for f in fits]
    return out


def _pool(frames):
    """Every spot of every frame in one table: energy, (x, y), normalised intensity, frame, trusted."""
    e, xy, inten, which, trusted = [], [], [], [], []
    for n, f in enumerate(frames):
        k = len(f["xy"])
        if not k:
            continue
        e.append(np.full(k, f["energy_eV"]))
        xy.append(f["xy"])
        inten.append(f["intensity"] / float(np.median(f["intensity"])))
        which.append(np.full(k, n))
        trusted.append(f["trusted"])
    return (np.concatenate(e), np.vstack(xy), np.concatenate(inten), np.concatenate(which),
            np.concatenate(trusted))


def _tol_g(e, geom: ScreenGeometry, tol_px: float = _TOL_PX) -> np.ndarray:
    """Momentum tolerance of each spot (its pixel tolerance at its energy), Å⁻¹."""
    return tol_px / (geom.scale_px * wavelength_A(np.asarray(e, dtype=np.float64)))


def _fit_camera(e, g, xy, geom: ScreenGeometry) -> ScreenGeometry | None:
    try:
        return fit_series_geometry(e, g, xy, initial=geom).geometry
    except (FitError, ValueError):
        return None


def _substrate_camera(pool, geom: ScreenGeometry, a_star: np.ndarray, rounds: int = 3):
    """One camera for the substrate beams of every frame of the pool, or None."""
    e, xy = pool[0], pool[1]
    geom = dataclasses.replace(geom, acceptance_deg=89.0)
    for _ in range(rounds):
        hk = pixels_to_momentum_e(xy, e, geom) @ np.linalg.inv(a_star)
        near = np.rint(hk)
        miss = np.hypot(*((hk - near) @ a_star).T)
        ok = np.isfinite(miss) & (miss <= _tol_g(e, geom))
        if ok.sum() < 6 or np.linalg.matrix_rank(near[ok]) < 2:
            return None
        new = _fit_camera(e[ok], near[ok] @ a_star, xy[ok], geom)
        if new is None:
            return None
        geom = new
    return geom


def pixels_to_momentum_e(xy, e, geom: ScreenGeometry) -> np.ndarray:
    """:func:`analysis.optics.pixels_to_momentum` for points each at its own energy (K, 2).

    Parameters
    ----------
    xy : (K, 2) array_like of float
        Positions (x, y), pixels.
    e : (K,) array_like of float
        The energy of each point, eV.
    geom : ScreenGeometry
        The camera model.

    Returns
    -------
    (K, 2) ndarray of float64
        Outgoing parallel momentum, Å⁻¹ without 2π.
    """
    k = pixels_to_momentum(xy, 100.0, geom)  # sin θ / λ scales as λ(100 eV) / λ(E)
    return k * (wavelength_A(100.0) / wavelength_A(np.asarray(e, dtype=np.float64)))[:, None]


def _beams(k, e, which, tol_g, n_frames: int):
    """Group the spots into beams: momenta that agree within tolerance (one per frame).

    Returns the beam of every spot (−1: seen in one frame only, not a beam) and the
    number of beams."""
    ok = np.all(np.isfinite(k), axis=1)
    lab = np.full(len(k), -1)
    idx = np.flatnonzero(ok)
    if not len(idx):
        return lab, 0
    tree = cKDTree(k[idx])
    pairs = tree.query_pairs(float(np.median(tol_g[idx])), output_type="ndarray")
    if len(pairs):
        pairs = pairs[which[idx][pairs[:, 0]] != which[idx][pairs[:, 1]]]
    g = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(idx), len(idx)))
    _, comp = connected_components(g, directed=False)
    counts = np.bincount(comp)
    frames_per = np.array([np.unique(which[idx][comp == c]).size for c in range(counts.size)])
    need = 2 if n_frames > 2 else 1
    keep = frames_per >= need
    remap = np.full(counts.size, -1)
    remap[keep] = np.arange(int(keep.sum()))
    lab[idx] = remap[comp]
    return lab, int(keep.sum())


def _assign(pool, geom, a_star, model):
    """Each spot's beam (h, k) under a substrate reading and an overlayer model (NaN: none)."""
    e, xy = pool[0], pool[1]
    hk = pixels_to_momentum_e(xy, e, geom) @ np.linalg.inv(a_star)
    tol = _tol_g(e, geom)
    cands = [np.rint(hk)]
    if model is not None and model.kind != "none":
        for m in model.domains:
            m = np.asarray(m, dtype=np.float64)
            cands.append(np.rint(hk @ m.T) @ np.linalg.inv(m).T)
    best = np.full(hk.shape, np.nan)
    dist = np.full(len(hk), np.inf)
    for c in cands:
        d = np.hypot(*((hk - c) @ a_star).T)
        better = np.isfinite(d) & (d < dist)
        best[better], dist[better] = c[better], d[better]
    best[~(dist <= tol)] = np.nan
    return best


def _cost(pool, geom, a_star, assigned, tol_px: float = _TOL_PX) -> np.ndarray:
    """Per spot: the squared pixel miss to its beam, capped at tol² (tol² when it has no beam)."""
    e, xy = pool[0], pool[1]
    out = np.full(len(e), tol_px**2)
    ok = np.all(np.isfinite(assigned), axis=1)
    if ok.any():
        g = assigned[ok] @ a_star
        lam_ref = wavelength_A(100.0)
        g_ref = g * (wavelength_A(e[ok]) / lam_ref)[:, None]
        pred, _ = momentum_to_pixels(g_ref, 100.0, geom)
        d2 = np.sum((pred - xy[ok]) ** 2, axis=1)
        out[ok] = np.minimum(np.where(np.isfinite(d2), d2, tol_px**2), tol_px**2)
    return np.maximum(out, _SPOT_FLOOR_PX**2)


def _overlayer(pool, geom, a_star, hint, n_frames):
    """Pool the spots into beams and search the overlayer on them (one virtual pattern)."""
    from ..indexing import SubstrateFit, find_overlayers

    e, xy, inten, which, trusted = pool
    k = pixels_to_momentum_e(xy, e, geom)
    tol = _tol_g(e, geom)
    lab, n = _beams(k, e, which, tol, n_frames)
    if n == 0:
        return None, lab, None
    kb = np.array([np.median(k[lab == b], axis=0) for b in range(n)])
    ib = np.array([np.median(inten[lab == b]) for b in range(n)])
    tb = np.array([bool(trusted[lab == b].any()) for b in range(n)])
    # the virtual pattern is drawn at the highest energy used: every beam seen is on the screen there
    e_v = float(e.max())
    gv = dataclasses.replace(geom, acceptance_deg=89.0)
    lam_v = wavelength_A(e_v)
    keep = lam_v * np.hypot(kb[:, 0], kb[:, 1]) < math.sin(math.radians(85.0))
    kb, ib, tb = kb[keep], ib[keep], tb[keep]
    remap = np.full(n, -1)
    remap[keep] = np.arange(int(keep.sum()))
    lab = np.where(lab >= 0, remap[np.maximum(lab, 0)], -1)
    hk = kb @ np.linalg.inv(a_star)
    miss = np.hypot(*((hk - np.rint(hk)) @ a_star).T)
    tol_v = float(np.median(tol))  # the spots' own tolerance in momentum
    integer = miss <= tol_v
    net = Net2D(np.linalg.inv(a_star).T, label=hint.label)
    jac = local_jacobian(e_v, gv)
    fit = SubstrateFit(geometry=gv, reciprocal_net=Net2D(a_star), net=net, net_type=classify_net(net, tol=2e-3),
                       a_star_px=a_star @ jac.T, hk=hk, integer=integer, residual_px=0.0, sigma={},
                       scale_source="hint")
    tol_px_v = tol_v * geom.scale_px * lam_v
    try:
        models = find_overlayers(hk, integer, fit, energy_eV=e_v, intensity=ib, valid_mask=None,
                                 tol_px=tol_px_v, reliable=tb)
    except (RecinetError, ValueError):
        return None, lab, fit
    return models[0], lab, fit


def _moved_px(pool, g1: ScreenGeometry, g2: ScreenGeometry) -> float:
    """The largest shift, px, between where two cameras put the momenta of the pooled spots."""
    e, xy = pool[0], pool[1]
    k = pixels_to_momentum_e(xy, e, g1)
    ok = np.all(np.isfinite(k), axis=1)
    if not ok.any():
        return 0.0
    g_ref = k[ok] * (wavelength_A(e[ok]) / wavelength_A(100.0))[:, None]
    a = momentum_to_pixels(g_ref, 100.0, dataclasses.replace(g1, acceptance_deg=89.0))[0]
    b = momentum_to_pixels(g_ref, 100.0, dataclasses.replace(g2, acceptance_deg=89.0))[0]
    d = np.hypot(*(a - b).T)
    return float(np.nanmax(d)) if np.isfinite(d).any() else float("inf")


def _evaluate(pool, reading, hint, frames, geom):
    """Score one substrate reading whose camera `geom` fits the substrate beams of all frames:
    its overlayer on the pooled beams, the camera refitted with every spot the model explains."""
    geom0, a_star = reading
    n_frames = len(frames)
    model, lab, fit = _overlayer(pool, geom, a_star, hint, n_frames)
    first = geom
    for _ in range(2):  # refit the camera with every spot the model explains, then look again
        assigned = _assign(pool, geom, a_star, model)
        ok = np.all(np.isfinite(assigned), axis=1)
        new = _fit_camera(pool[0][ok], assigned[ok] @ a_star, pool[1][ok], geom) if ok.sum() >= 6 else None
        if new is None:
            break
        geom = new
    if _moved_px(pool, first, geom) > _SAME_CAMERA_PX:  # the search again only where the beams moved
        model, lab, fit = _overlayer(pool, geom, a_star, hint, n_frames)
    if model is None:
        return None
    assigned = _assign(pool, geom, a_star, model)
    cost = _cost(pool, geom, a_star, assigned)
    terms = _substrate_terms(pool, frames, geom, a_star)
    return {"substrate_terms": terms, "geometry": dataclasses.replace(geom, acceptance_deg=geom0.acceptance_deg), "a_star": a_star,
            "model": model, "cost": cost, "assigned": np.all(np.isfinite(assigned), axis=1), "n_beams": int(len(fit.hk)) if fit is not None else 0,
            "explained": int(np.all(np.isfinite(assigned), axis=1).sum())}


def _acceptance_z(frames, xy, geom: ScreenGeometry) -> float:
    """The screen half-angle a reading's camera implies, against the usual one, in prior widths.

    Readings of one set of beams whose nets differ in size (a substrate net on the
    overlayer's beams) fit the spot positions of every energy about equally well: the
    distortion R/L bends one scale onto the other, and θ depends on λ|g| alone, so the
    energy cannot tell them apart. The camera they need can: with the fitted scale and
    R/L the edge of the screen (where it was found) lies at an angle θ, and a reading that
    needs a screen of 70° or beyond 90° misreads the momentum scale. Where the screen fills
    the frame the outermost spot bounds θ from below only.
    """
    from ..optics import _radial_inverse

    d = float(geom.distortion)
    edges = [f["screen"] for f in frames if f.get("screen")]
    if edges:
        r = float(np.median([e[2] for e in edges]))
    elif len(xy):
        r = float(np.max(np.hypot(*(np.asarray(xy) - np.array(geom.center_px)).T)))
    else:
        return 0.0
    u = r / geom.scale_px
    if u >= math.sqrt((1.0 - d) / (1.0 + d)):  # the largest radius this camera can image (at cos θ = R/L)
        theta = 90.0
    else:
        theta = math.degrees(math.asin(float(_radial_inverse(np.array([u]), d)[0])))
    z = (theta - _ACCEPTANCE_DEG) / _ACCEPTANCE_SIGMA_DEG
    return z if edges else max(z, 0.0)


def _substrate_terms(pool, frames, geom, a_star):
    """The substrate score (:func:`analysis.indexing.score.substrate_breakdown`) of a reading
    over the spots of all frames: completeness over every frame's seen region, the share of
    spots on integer or simple fractional positions, the integer beams' brightness, the
    screen's half-angle the camera implies against the usual one (:func:`_acceptance_z`),
    and the integer beams' pixel residual."""
    from ..indexing.matching import _is_rational, _seen
    from ..indexing.score import substrate_breakdown
    from ..lattice import lattice_points, screen_g_max

    e, xy, inten, which = pool[0], pool[1], pool[2], pool[3]
    hk = pixels_to_momentum_e(xy, e, geom) @ np.linalg.inv(a_star)
    miss = np.hypot(*((hk - np.rint(hk)) @ a_star).T)
    integer = np.isfinite(miss) & (miss <= _tol_g(e, geom))
    found = pred = 0
    centre = np.array(geom.center_px)
    for n, f in enumerate(frames):
        sel = which == n
        if not sel.any():
            continue
        r_max = float(np.max(np.hypot(*(xy[sel] - centre).T))) * 1.03 + _TOL_PX
        pts = lattice_points(np.eye(2), screen_g_max(f["energy_eV"], 85.0), metric=a_star)
        pxy, _ = momentum_to_pixels(pts @ a_star, f["energy_eV"], dataclasses.replace(geom, acceptance_deg=89.0))
        seen = _seen(pxy, f["valid"], centre, r_max, 3 * _TOL_PX)
        if seen.any():
            d, _ = cKDTree(xy[sel]).query(pxy[seen], distance_upper_bound=_TOL_PX)
            found += int(np.isfinite(d).sum())
            pred += int(seen.sum())
    completeness = found / max(pred, found, 1)
    frac = ~integer & np.all(np.isfinite(hk), axis=1)
    rational = np.array([_is_rational(h, 8, 0.05) for h in hk[frac]], dtype=bool)
    indexable = (int(integer.sum()) + int(rational.sum())) / max(len(e), 1)
    li = np.log(np.clip(inten, 1e-9, None))
    d_logi = float(np.median(li[integer]) - np.percentile(li[~integer], 90)) if integer.any() and (~integer).any() \
        else 0.0
    z = _acceptance_z(frames, xy, geom)
    ok = integer
    g_ref = np.rint(hk[ok]) @ a_star * (wavelength_A(e[ok]) / wavelength_A(100.0))[:, None]
    res = momentum_to_pixels(g_ref, 100.0, dataclasses.replace(geom, acceptance_deg=89.0))[0] - xy[ok]
    rms = float(np.sqrt(np.nanmean(res**2))) if ok.any() else _TOL_PX
    return substrate_breakdown(completeness=completeness, indexable=indexable, brightness_log_ratio=d_logi, z=z,
                               residual_rms_px=rms, tol_px=_TOL_PX)


def _same(r1, r2) -> bool:
    """Two evaluated readings are the same camera and net (up to the choice of basis)."""
    from ..superstructure import same_lattice

    g1, g2 = r1["geometry"], r2["geometry"]
    if abs(g1.center_x_px - g2.center_x_px) > 1 or abs(g1.center_y_px - g2.center_y_px) > 1:
        return False
    if abs(math.log(g1.scale_px / g2.scale_px)) > 0.01:
        return False
    p1 = r1["a_star"] @ local_jacobian(100.0, g1).T
    p2 = r2["a_star"] @ local_jacobian(100.0, g2).T
    return bool(same_lattice(p1, p2, tol=0.03))


def index_series_joint(frames, *, substrate: str | Net2D, min_snr: float = 5.0) -> SeriesIndexing:
    """Index a series from the spots of several frames at once.

    Each frame is measured (:func:`analysis.spots.measure_image`) and indexed on its own
    (:func:`analysis.indexing.index_pattern`); every substrate reading any frame offers is
    then fitted with one camera to the spots of all frames, the spots are pooled into
    beams (one momentum, several frames) and the overlayer is searched on the beams. The
    reading kept explains the spots of all frames best: its score is the substrate score
    over all frames' spots (:data:`analysis.indexing.score.SUBSTRATE_TERMS`), plus the pooled
    overlayer score without its reward for explained spots, plus the camera's ``−½ Σ (d²/σ² − 1)`` over the spots the reading
    explains, d the pixel miss of each (capped at the matching tolerance) and σ² the
    smallest mean d² of any reading over all spots (tol² for a spot it leaves out) (a spot explained at that noise costs nothing; those
    a reading leaves out count in the overlayer score as unexplained beams). Each frame's own reading is kept as a vote (the cross-check).

    Parameters
    ----------
    frames : iterable of (frame, energy_eV, frame_index, frame_name)
        Two or more frames, best spread over the energy range.
    substrate : str or Net2D, keyword-only
        E.g. ``"Cu(100)"`` (:func:`analysis.nets.parse_substrate`), or the (1×1) net in Å.
    min_snr : float, keyword-only
        Spot detection threshold.

    Returns
    -------
    SeriesIndexing
        ``frame`` is the frame whose screen mask is kept; ``votes`` holds each frame's
        own reading with ``agrees`` (its reading is the joint one); ``joint`` the summary.

    Raises
    ------
    SeriesError
        When no reading fits the frames (the message names each frame's reason).

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.simulate import forward_pattern, render_image
    >>> geom = ScreenGeometry(258.6, 251.4, 290.0, distortion=0.2, rotation_deg=6.0)
    >>> es = (90.0, 130.0, 170.0)
    >>> ims = [render_image(forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=e,
    ...                                     geometry=geom), shape=(512, 512), rng=np.random.default_rng(2))
    ...        for e in es]
    >>> found = index_series_joint([(im.image, e, i, "") for i, (im, e) in enumerate(zip(ims, es))],
    ...                            substrate="Cu(100)")
    >>> print(found.label, round(found.geometry.scale_px), round(found.geometry.distortion, 2))
    p(2×2), commensurate 290 0.2
    """
    from ..nets import parse_substrate
    from ..superstructure import format_matrix, same_lattice

    hint = parse_substrate(substrate) if isinstance(substrate, str) else substrate
    measured = []
    for frame, energy, index, name in frames:
        try:
            measured.append(_measure(frame, energy, index, name, hint, min_snr))
        except (RecinetError, ValueError, TypeError) as err:
            measured.append({"frame": int(index), "name": str(name), "energy_eV": float(energy),
                             "xy": np.zeros((0, 2)), "readings": [], "vote": f"not indexed: {err}"})
    used = [m for m in measured if len(m["xy"])]
    readings = [r for m in used for r in m["readings"]]
    if not readings:
        raise SeriesError("No frame could be indexed: " + " ".join(
            f"frame {m['frame']} ({m['energy_eV']:g} eV): {m['vote']}." for m in measured))
    pool = _pool(used)
    results, cameras = [], []
    for r in readings:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            geom = _substrate_camera(pool, r[0], r[1])
            # readings that land on one camera and net are scored once (the overlayer search is the cost)
            if geom is None or any(_same({"geometry": geom, "a_star": r[1]}, q) for q in cameras):
                continue
            cameras.append({"geometry": geom, "a_star": r[1]})
            ev = _evaluate(pool, r, hint, used, geom)
        if ev is None or any(_same(ev, q) for q in results):
            continue
        ev["start"] = r
        results.append(ev)
    if not results:
        raise SeriesError("No substrate reading fits the spots of the frames indexed together.")
    n = len(pool[0])
    # the camera's chi-square against the best camera's noise: a spot explained at that noise
    # costs nothing, further off it costs (d/σ)² (the spots a reading leaves out count in the
    # overlayer score, as unexplained beams)
    # σ² from the reading that fits all spots best (a spot no beam explains costs tol², so a
    # reading cannot set the noise by leaving the hard spots out)
    var = min(float(np.mean(q["cost"])) for q in results)
    for q in results:
        q["camera_term"] = -0.5 * float(np.sum(q["cost"][q["assigned"]] / var - 1.0))
        # the overlayer's own terms, less its reward for spots explained: that reward grows
        # with the spots a reading leaves off the substrate, so it cannot compare readings
        layer = float(q["model"].score) - q["model"].score_terms.contributions()["explained"]
        q["overlayer_term"] = layer
        q["total"] = q["substrate_terms"].total + layer + q["camera_term"]
    results.sort(key=lambda q: -q["total"])
    tot = np.array([q["total"] for q in results])
    conf = np.exp(tot - tot.max())
    conf /= conf.sum()
    win = results[0]
    model, geom, a_star = win["model"], win["geometry"], win["a_star"]
    mats = () if model.kind == "none" else tuple(np.array(m, dtype=np.float64) for m in model.domains)
    for m in mats:
        m.flags.writeable = False
    matrix_text = format_matrix(np.asarray(model.matrix, dtype=np.float64))
    label = _label(model.kind, model.wood, matrix_text, len(mats))
    # the cross-check: does each frame, read on its own, put the substrate beams where the
    # joint camera does, and how many of its spots does the joint model explain
    which = pool[3]
    votes, agree, n_voted = [], 0, 0
    for m in measured:
        v = {"frame": m["frame"], "energy_eV": m["energy_eV"], "reading": m["vote"],
             "confidence": float(m.get("vote_confidence", 0.0)), "agrees": False}
        if "vote_a_star" in m:
            n_voted += 1
            p_own = m["vote_a_star"] @ local_jacobian(m["energy_eV"], m["vote_geometry"]).T
            p_joint = a_star @ local_jacobian(m["energy_eV"], geom).T
            v["agrees"] = bool(same_lattice(p_own, p_joint, tol=0.05))
            agree += v["agrees"]
        n_used = next((k for k, u in enumerate(used) if u is m), None)
        if n_used is not None:
            sel = which == n_used
            v["spots"] = int(sel.sum())
            v["explained"] = int(win["assigned"][sel].sum())
            c = win["cost"][sel & win["assigned"]]
            v["rms_px"] = math.sqrt(float(np.mean(c))) if c.size else float("nan")
        votes.append(v)
    keep = max(used, key=lambda m: len(m["xy"]))
    warnings = []
    if agree < len(measured):
        warnings.append(f"{agree} of {len(measured)} frames read on their own put the substrate beams where "
                        f"the frames together do.")
    shares = [v["explained"] / v["spots"] for v in votes if v.get("spots")]
    if shares and min(shares) < 0.5:
        worst = min((v for v in votes if v.get("spots")), key=lambda v: v["explained"] / v["spots"])
        warnings.append(f"The joint reading explains only {worst['explained']} of {worst['spots']} spots of "
                        f"frame {worst['frame']} ({worst['energy_eV']:g} eV).")
    rms = math.sqrt(float(np.mean(win["cost"][win["cost"] < _TOL_PX**2]))) if np.any(
        win["cost"] < _TOL_PX**2) else float("nan")
    joint = {"frames": [m["frame"] for m in used], "n_spots": int(n), "n_beams": win["n_beams"],
             "spots_explained": win["explained"], "rms_px": rms, "readings_tried": len(results),
             "frames_agreeing": int(agree), "frames_indexed": int(n_voted), "frames_total": len(measured),
             "explained_min": float(min(shares)) if shares else float("nan"),
             "explained_median": float(np.median(shares)) if shares else float("nan"),
             "readings": [{"scale_px": q["geometry"].scale_px, "distortion": q["geometry"].distortion,
                           "model": _label(q["model"].kind, q["model"].wood,
                                           format_matrix(np.asarray(q["model"].matrix, dtype=np.float64)),
                                           len(q["model"].domains)),
                           "overlayer_score": float(q["model"].score), "overlayer_term": q["overlayer_term"],
                           "substrate_score": q["substrate_terms"].total, "camera_term": q["camera_term"],
                           "score": q["total"]} for q in results[:5]]}
    return SeriesIndexing(frame=keep["frame"], frame_name=keep["name"], energy_eV=keep["energy_eV"], geometry=geom,
                          substrate=Net2D(np.linalg.inv(a_star).T, label=hint.label), overlayers=mats,
                          kind=model.kind, wood=model.wood, matrix_text=matrix_text, confidence=float(conf[0]),
                          mask=keep["valid"], warnings=tuple(warnings), votes=tuple(votes), joint=joint)
