"""A whole pattern: :func:`index_pattern` follows the best substrate reading (trying
camera readings when the distortion R/L is open) to its overlayer models, refitting the
camera with the best rational model's spots while that raises the best score;
:class:`IndexResult` holds the readings and the models, with what follows from them
(the exact indices of the spots, the beams predicted on the screen: :func:`predicted_beams`).
"""

from __future__ import annotations

import dataclasses
import functools
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..lattice import lattice_points, screen_g_max
from ..nets import Net2D
from ..optics import ScreenGeometry, momentum_to_pixels
from .camera_refit import (_distortion_from_fractions, _distortion_open, _with_distortion, refine_with_model)
from .candidates import _snap_matrix
from .overlayers import OverlayerModel, evaluate_model, find_overlayers, model_indices
from .phases import find_phases
from .substrate import _DISTORTION_PRIOR, along_reference, _SCALE_PRIOR_SIGMA, SubstrateFit, fit_substrate


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
    energy_eV : float
        The beam energy the pattern was indexed at.
    phases : tuple of Phase
        The overlayer phases (:func:`.phases.find_phases`): the best model first, then
        coexisting phases that explain the spots it leaves; empty for a clean surface.
    """

    substrate: SubstrateFit
    substrate_candidates: list
    models: list
    energy_eV: float | None = None
    phases: tuple = ()

    @property
    def plane_group(self):
        """What the best model's absences say about its plane group (:mod:`.absences`), or None."""
        return self.phases[0].plane_group if self.phases else None

    @property
    def best(self) -> OverlayerModel:
        return self.models[0]

    @functools.cached_property
    def best_indices(self) -> np.ndarray:
        """(K, 2) exact indices of the spots the best model explains, NaN elsewhere (:func:`model_indices`)."""
        return model_indices(self.substrate.hk, self.best)

    @functools.cached_property
    def predicted(self) -> PredictedBeams:
        """The beams of the reading and of the best model's domains on the screen (:func:`predicted_beams`)."""
        return predicted_beams(self.substrate, self.best, self.energy_eV)


@dataclass(frozen=True, eq=False)
class PredictedBeams:
    """Where a substrate reading and an overlayer model put their beams on the screen.

    Attributes
    ----------
    substrate_hk, substrate_xy : (K, 2) ndarray of float64
        The integer beams (h, k) that reach the screen and their (x, y) pixel positions.
    domains : tuple of ((N, 2) ndarray, (N, 2) ndarray)
        For each domain of the model (none for a model of kind ``"none"``): its
        fractional beams (h, k) in the substrate basis and their (x, y) pixels.
    """

    substrate_hk: np.ndarray
    substrate_xy: np.ndarray
    domains: tuple = ()


def predicted_beams(fit: SubstrateFit, model: OverlayerModel | None, energy_eV: float) -> PredictedBeams:
    """The beams a substrate reading and a model on it put on the screen at `energy_eV`.

    Each net is enumerated inside the screen's momentum radius (:mod:`analysis.lattice`),
    in lexicographic order of its integer coordinates; a net far finer than the
    screen (more than 200 000 candidates) gives no beams.

    Parameters
    ----------
    fit : SubstrateFit
        The substrate reading (camera model and reciprocal net).
    model : OverlayerModel or None
        The overlayer model; None for the substrate beams only.
    energy_eV : float
        Electron energy, eV.

    Returns
    -------
    PredictedBeams
        Integer beams and each domain's fractional beams, with (x, y) pixels.
    """
    lat = fit.reciprocal_net.vectors
    geom = fit.geometry
    # a hair beyond the screen's edge: the camera model's own visibility test decides below
    g_max = screen_g_max(energy_eV, geom.acceptance_deg) + 1e-9

    def on_screen(b_star_hk, fractional_only):
        try:
            hk = lattice_points(b_star_hk, g_max, metric=lat, max_points=200_000)
        except ParameterError:  # nothing useful to draw
            hk = np.zeros((0, 2))
        if fractional_only:
            hk = hk[np.any(np.abs(hk - np.rint(hk)) > 1e-6, axis=1)]
        xy, vis = momentum_to_pixels(hk @ lat, energy_eV, geom)
        ok = vis & np.all(np.isfinite(xy), axis=1)
        return hk[ok], xy[ok]

    sub_hk, sub_xy = on_screen(np.eye(2), False)
    doms = ()
    if model is not None and model.kind != "none":
        doms = tuple(on_screen(np.linalg.inv(np.asarray(m, float)).T, True) for m in model.domains)
    return PredictedBeams(substrate_hk=sub_hk, substrate_xy=sub_xy, domains=doms)


def index_pattern(xy_px: np.ndarray, energy_eV: float, hint: Net2D, *, intensity: np.ndarray | None = None,
                  geometry: ScreenGeometry | None = None, center_px=None, center_guess=None,
                  screen_radius_px: float | None = None, screen_prior_sigma: float = _SCALE_PRIOR_SIGMA,
                  valid_mask: np.ndarray | None = None,
                  tol_px: float = 2.5, n_results: int = 5, min_confidence: float = 0.15,
                  max_readings: int = 1, reliable: np.ndarray | None = None,
                  azimuth_a_star_px: np.ndarray | None = None) -> IndexResult:
    """Index a whole pattern: substrate readings, overlayer models, joint refits.

    The best substrate reading is followed to its best overlayer model (the
    others stay listed with their confidence). With ``max_readings > 1`` the
    next readings with confidence ≥ `min_confidence` are followed too, and the
    one with the best ``substrate score − ½ (unexplained + absent) − ½ (domains − 1)``
    is kept (off by default: stray spots then favour wrong readings too easily).
    For each reading the camera model is refitted with the spots the best
    rational model explains while that raises the best score.

    `azimuth_a_star_px` (2, 2), the substrate's reciprocal basis in pixels as a reference
    image showed it, keeps the readings whose basis lies along the reference's beams (within
    3°, any symmetry-equivalent beam): the reference says where the integer beams are, so a
    net of the same length turned onto fractional beams is not read (when no reading agrees,
    all are kept and the best one's notes say so).

    Parameters
    ----------
    xy_px : (K, 2) array_like of float
        Spot centres (x, y), pixels (x right, y down).
    energy_eV : float
        Electron energy, eV.
    hint : Net2D
        The substrate's (1×1) real-space net, Å (from :func:`analysis.nets.parse_substrate`).
    intensity : (K,) array_like of float, optional, keyword-only
        Integrated spot intensities (counts); integer beams are usually the brightest.
    geometry : ScreenGeometry, optional, keyword-only
        A known camera model (calibration or reference image): its scale and distortion
        are kept and the lattice constants measured.
    center_px : (x, y), optional, keyword-only
        The pattern centre when known (pixels); otherwise found from ±g spot pairs.
    center_guess : (x, y), optional, keyword-only
        Where to start pairing spots (e.g. the gun-disk centre), pixels.
    screen_radius_px : float, optional, keyword-only
        Radius of the visible screen, pixels: a prior on the camera scale.
    screen_prior_sigma : float, keyword-only
        Relative width of that prior.
    valid_mask : (M, N) array_like of bool, optional, keyword-only
        Pixels where a spot could be seen (screen minus gun shadow): predicted beams
        there without a spot count as absent.
    tol_px : float, keyword-only
        Matching tolerance, pixels.
    n_results : int, keyword-only
        Overlayer models kept per reading.
    min_confidence : float, keyword-only
        Least confidence (0–1) of a further reading followed when ``max_readings > 1``.
    max_readings : int, keyword-only
        Substrate readings followed to their overlayer models.
    reliable : (K,) array_like of bool, optional, keyword-only
        Spots whose centres are trusted (not cut by a mask edge, fit converged); only
        they count in the overlayer score. Default: all.
    azimuth_a_star_px : (2, 2) array_like of float, optional, keyword-only
        The substrate's reciprocal basis in pixels as a reference image showed it.

    Returns
    -------
    IndexResult
        The substrate reading (camera model, reciprocal net in Å⁻¹ without 2π, spot
        indices), the other readings and the overlayer models, best first.

    Raises
    ------
    FitError
        Too few spots, or no reading of `hint` fits them.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.simulate import forward_pattern
    >>> cu = parse_substrate("Cu(100)")
    >>> beams = forward_pattern(cu, [[[2, 0], [0, 2]]], energy_eV=100.0,
    ...                         geometry=ScreenGeometry(256.0, 256.0, 300.0))
    >>> res = index_pattern(beams.xy_px, 100.0, cu)
    >>> print(res.best.wood, res.best.n_domains, res.best.unexplained, np.round(res.substrate.geometry.center_px, 2))
    p(2×2) 1 0 [256. 256.]
    """
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2)
    fits = fit_substrate(xy, energy_eV, hint, intensity=intensity, geometry=geometry, center_px=center_px,
                         center_guess=center_guess, screen_radius_px=screen_radius_px,
                         screen_prior_sigma=screen_prior_sigma, valid_mask=valid_mask, tol_px=tol_px,
                         reference_a_star_px=azimuth_a_star_px)
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
    # coexisting phases (the dominant one leads the models) and what their absences say
    models, phases = find_phases(fit, models, energy_eV=energy_eV, intensity=intensity, valid_mask=valid_mask,
                                 tol_px=tol_px, reliable=kw["reliable"])
    return IndexResult(substrate=fit, substrate_candidates=cands, models=models, energy_eV=float(energy_eV),
                       phases=phases)


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
