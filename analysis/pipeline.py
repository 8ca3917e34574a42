"""One call from a camera image to the superstructure: measure the spots, apply
the user's edits, calibrate (reference image or saved calibration), index.

Pixel positions at this module's edges are (x, y), x right, y down, the
centre of the top-left pixel at (0, 0). Reciprocal quantities are
crystallographic (Å⁻¹, no 2π).
"""

from __future__ import annotations

import dataclasses
import math
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from .calibration import Calibration, calibrate_from_reference, calibration_sigma
from .errors import FitError, ImageError, ParameterError
from .indexing import IndexResult, index_pattern, model_from_matrix
from .io import LoadedImage, load_image
from .nets import Net2D, parse_substrate, reciprocal
from .optics import ScreenGeometry, local_jacobian
from .spots import FLAG_FIT_FAILED, FLAG_NEAR_EDGE, Measurement, measure_image
from .spots.accept import FAINT_UNEXPLAINED_SNR, REJECT_FAINT_UNEXPLAINED
from .superstructure import parse_matrix, parse_wood
from .timelimit import check_time

__all__ = ["Edits", "AnalysisResult", "analyze_image", "try_model", "check_energy"]

_MIN_EV, _MAX_EV = 5.0, 5000.0


def check_energy(energy_eV, name: str = "energy") -> float:
    """Validate a LEED beam energy in eV (5 to 5000 eV); returns it as float.

    Parameters
    ----------
    energy_eV : float
        The energy as given (any number-like value).
    name : str
        What the message calls it (e.g. ``"reference energy"``).

    Returns
    -------
    float
        The energy in eV.

    Raises
    ------
    ParameterError
        When it is not a finite number between 5 and 5000 eV.
    """
    try:
        e = float(energy_eV)
    except (TypeError, ValueError):
        raise ParameterError(f"The {name} must be a number of eV, got {energy_eV!r}.") from None
    if not math.isfinite(e) or e <= 0:
        raise ParameterError(f"The {name} must be a positive number of eV, got {energy_eV!r}.")
    if not (_MIN_EV <= e <= _MAX_EV):
        raise ParameterError(f"The {name} {e:g} eV is outside the LEED range {_MIN_EV:g}–{_MAX_EV:g} eV.")
    return e


@dataclass(frozen=True)
class Edits:
    """What a user changed by hand.

    Attributes
    ----------
    added_xy : tuple of (x, y)
        Spots the detector missed, pixels.
    removed_xy : tuple of (x, y)
        Spots to drop: the detected spot nearest each point (within `pick_px`).
    center_xy : (x, y) or None
        The pattern centre set by hand.
    pick_px : float
        How near a removal point must be to a spot.
    """

    added_xy: tuple = ()
    removed_xy: tuple = ()
    center_xy: tuple | None = None
    pick_px: float = 6.0

    @classmethod
    def from_dict(cls, d: dict | None) -> "Edits":
        """Edits from :meth:`to_dict`'s dict, checked.

        Parameters
        ----------
        d : dict or None
            ``added_xy``, ``removed_xy`` ((x, y) pixel pairs), ``center_xy``, ``pick_px``.

        Returns
        -------
        Edits
            The edits (none for an empty `d`).

        Raises
        ------
        ParameterError
            When a point is not a finite (x, y) pair.
        """
        if not d:
            return cls()
        if not isinstance(d, dict):
            raise ParameterError(f"Edits must be an object, got {type(d).__name__}.")

        def pts(key):
            out = []
            for p in d.get(key) or ():
                try:
                    x, y = float(p[0]), float(p[1])
                except (TypeError, ValueError, IndexError):
                    raise ParameterError(f"Edit '{key}' needs (x, y) pairs, got {p!r}.") from None
                if not (math.isfinite(x) and math.isfinite(y)):
                    raise ParameterError(f"Edit '{key}' has a non-finite point {p!r}.")
                out.append((x, y))
            return tuple(out)

        c = d.get("center_xy")
        if c is not None:
            try:
                c = (float(c[0]), float(c[1]))
            except (TypeError, ValueError, IndexError):
                raise ParameterError(f"Edit 'center_xy' needs an (x, y) pair, got {c!r}.") from None
        return cls(added_xy=pts("added_xy"), removed_xy=pts("removed_xy"), center_xy=c,
                   pick_px=float(d.get("pick_px", 6.0)))

    def to_dict(self) -> dict:
        """The edits as plain JSON types (what :meth:`from_dict` reads).

        Returns
        -------
        dict
            Plain JSON types.
        """
        return {"added_xy": [list(p) for p in self.added_xy], "removed_xy": [list(p) for p in self.removed_xy],
                "center_xy": None if self.center_xy is None else list(self.center_xy), "pick_px": self.pick_px}


@dataclass(frozen=True, eq=False)
class AnalysisResult:
    """Everything one analysis found.

    Attributes
    ----------
    xy_px : (K, 2) ndarray
        Spots used (detected, minus removed, plus added), (x, y) pixels.
    intensity, snr : (K,) ndarray
        Integrated intensity (ADU) and detection significance (NaN for added spots).
    manual : (K,) ndarray of bool
        Spots added by hand.
    index : IndexResult
    measurement : Measurement
    energy_eV : float
    substrate_spec : str
    substrate_hint : Net2D
    image_shape : (rows, cols)
    edits : Edits
    calibration_source : str
        ``"none"``, ``"reference"`` or ``"calibration"``.
    timings_s : dict
    trusted : (K,) ndarray of bool or None
        Spots whose centres count when models are scored (not cut by a mask
        edge, fit converged; spots added by hand are trusted). None: all.
    """

    xy_px: np.ndarray
    intensity: np.ndarray
    snr: np.ndarray
    manual: np.ndarray
    index: IndexResult
    measurement: Measurement
    energy_eV: float
    substrate_spec: str
    substrate_hint: Net2D
    image_shape: tuple
    edits: Edits
    calibration_source: str = "none"
    reference_geometry: ScreenGeometry | None = None
    warnings: tuple = ()
    timings_s: dict = field(default_factory=dict)
    trusted: np.ndarray | None = None


def _as_image(image) -> LoadedImage:
    if isinstance(image, LoadedImage):
        return image
    return load_image(image)


def _measure_reference(reference, shape, sigma_px, min_snr):
    """The reference image's spots, or the ImageError/FitError that makes it unusable (returned,
    not raised: a reference that cannot be used never stops the analysis)."""
    try:
        ref_img = _as_image(reference)
        if ref_img.shape != shape:
            raise ImageError(f"it is {ref_img.shape[1]}×{ref_img.shape[0]} px but the image is "
                             f"{shape[1]}×{shape[0]} px; use one from the same camera.")
        return measure_image(ref_img, sigma_px=sigma_px, min_snr=min_snr)
    except (ImageError, FitError) as err:
        return err


def _with_camera_sigma(idx: IndexResult, xy: np.ndarray, energy_eV: float, camera_sigma: dict,
                       camera_cov=None) -> IndexResult:
    """The index result with the lattice constants' σ widened by the calibration's own
    uncertainty (:func:`analysis.calibration.calibration_sigma`), in quadrature."""
    fit = idx.substrate
    stat = fit.sigma or {}
    if stat.get("a_A") is None:  # the lattice was not measured (constants from the substrate given)
        return idx
    cam = calibration_sigma(xy[fit.integer], np.rint(fit.hk[fit.integer]), energy_eV, fit.geometry, camera_sigma,
                            camera_cov)
    if not cam:
        return idx
    sigma = dict(stat)
    for key in ("a_A", "b_A", "gamma_deg"):
        if stat.get(key) is not None:
            sigma[key] = float(math.hypot(stat[key], cam[key]))
    sigma["calibration"] = cam
    fit2 = dataclasses.replace(fit, sigma=sigma)
    cands = [fit2 if c is fit else c for c in idx.substrate_candidates]
    return dataclasses.replace(idx, substrate=fit2, substrate_candidates=cands)


def _local_intensity(img: np.ndarray, bg: np.ndarray, x: float, y: float, half: int = 4) -> float:
    r, c = int(round(y)), int(round(x))
    r0, r1 = max(0, r - half), min(img.shape[0], r + half + 1)
    c0, c1 = max(0, c - half), min(img.shape[1], c + half + 1)
    if r0 >= r1 or c0 >= c1:
        raise ParameterError(f"The added spot ({x:.1f}, {y:.1f}) lies outside the image.")
    return float(np.sum(img[r0:r1, c0:c1] - bg[r0:r1, c0:c1]))


def _faint_unexplained(idx, snr: np.ndarray, manual: np.ndarray) -> np.ndarray:
    """Indices, among the spots found (those added by hand come after them and never count),
    of those whose detection SNR is below FAINT_UNEXPLAINED_SNR and that no fitted net labels."""
    labelled = np.all(np.isfinite(np.asarray(idx.best_indices, float).reshape(len(snr), -1)), axis=1)
    for phase in getattr(idx, "phases", ()):  # a second phase's spots are explained by its own net
        labelled[np.asarray(phase.spots, dtype=np.int64)] = True
    faint = ~labelled & ~manual & (np.nan_to_num(snr, nan=np.inf) < FAINT_UNEXPLAINED_SNR)
    return np.flatnonzero(faint[~manual])


def _apply_edits(meas: Measurement, img: np.ndarray, edits: Edits):
    st = meas.spots
    xy = st.xy
    keep = np.ones(len(xy), bool)
    for px, py in edits.removed_xy:
        if len(xy):
            d = np.hypot(xy[:, 0] - px, xy[:, 1] - py)
            d[~keep] = np.inf
            j = int(np.argmin(d))
            if d[j] <= edits.pick_px:
                keep[j] = False
    xy_k, inten, snr = xy[keep], st.intensity[keep], st.snr[keep]
    # a centre biased by a mask edge, or from a failed fit, is not trusted for choosing models
    trusted = (st.flags[keep] & (FLAG_NEAR_EDGE | FLAG_FIT_FAILED)) == 0
    add = np.array(edits.added_xy, dtype=np.float64).reshape(-1, 2)
    bg = meas.background.background
    add_i = np.array([_local_intensity(img, bg, x, y) for x, y in add])
    xy_all = np.vstack([xy_k, add]) if len(add) else xy_k
    inten_all = np.concatenate([inten, np.clip(add_i, 1e-6, None)]) if len(add) else inten
    snr_all = np.concatenate([snr, np.full(len(add), np.nan)]) if len(add) else snr
    manual = np.concatenate([np.zeros(len(xy_k), bool), np.ones(len(add), bool)])
    trusted_all = np.concatenate([trusted, np.ones(len(add), bool)])  # spots placed by hand are trusted
    return xy_all, inten_all, snr_all, manual, trusted_all, np.flatnonzero(keep)


def analyze_image(image, *, energy_eV: float, substrate: str | Net2D, reference=None,
                  reference_energy_eV: float | None = None, calibration: Calibration | ScreenGeometry | None = None,
                  edits: Edits | dict | None = None, progress=None, sigma_px: float | None = None,
                  min_snr: float = 5.0, tol_px: float = 2.5) -> AnalysisResult:
    """Analyse one LEED image.

    Parameters
    ----------
    image : path, bytes, (M, N) ndarray or LoadedImage
        The camera frame (a file path or its bytes are read by :func:`analysis.io.load_image`).
    energy_eV : float, keyword-only
        Beam energy (5–5000 eV).
    substrate : str or Net2D, keyword-only
        E.g. ``"Pt(111)"`` or ``"hexagonal:2.775"`` (see :func:`analysis.nets.parse_substrate`).
    reference : image, optional
        A clean-substrate image from the same optics; with `reference_energy_eV`
        it fixes the camera scale and distortion, so lattice constants are measured.
    reference_energy_eV : float, optional, keyword-only
        Beam energy of `reference`, eV (needed with it).
    calibration : Calibration or ScreenGeometry, optional
        A saved camera calibration (the same purpose as `reference`).
    edits : Edits or dict, optional
        Manual spot additions / removals and a centre set by hand.
    progress : callable(fraction: float, message: str), optional, keyword-only
        Told the fraction done (0–1) and the step in words between steps.
    sigma_px : float, optional, keyword-only
        Spot Gaussian σ in pixels; None measures it.
    min_snr : float, keyword-only
        Spot detection threshold in units of local noise.
    tol_px : float, keyword-only
        Matching tolerance between predicted beams and spots, pixels.

    Returns
    -------
    AnalysisResult
        The spots (``xy_px`` (K, 2) x, y pixels; ``intensity``, ``snr``), the measurement,
        the indexing (``.index``: substrate reading, overlayer models best first), warnings
        and timings; :func:`analysis.serialize.result_to_dict` writes it as JSON.

    Raises
    ------
    ImageError, ParameterError, NetError, FitError
        With a one-line message for the user.

    Examples
    --------
    >>> from analysis.simulate import forward_pattern, render_image
    >>> pat = forward_pattern(parse_substrate("Cu(100)"), [[[1, 1], [-1, 1]]], energy_eV=120.0,
    ...                       geometry=ScreenGeometry(192.0, 192.0, 230.0))
    >>> im = render_image(pat, shape=(384, 384), rng=np.random.default_rng(0))
    >>> res = analyze_image(im.image, energy_eV=120.0, substrate="Cu(100)")
    >>> print(res.index.best.wood, res.index.best.kind)
    c(2×2) commensurate
    """
    t0 = time.perf_counter()
    user_say = progress or (lambda f, m: None)

    def say(fraction, message):
        check_time()  # a time limit set by the caller (web job, CLI) stops the work between steps
        user_say(fraction, message)

    e = check_energy(energy_eV)
    hint = parse_substrate(substrate) if isinstance(substrate, str) else substrate
    if not isinstance(hint, Net2D):
        raise ParameterError(f"`substrate` must be text like 'Pt(111)' or a Net2D, got {type(substrate).__name__}.")
    ed = edits if isinstance(edits, Edits) else Edits.from_dict(edits)
    img = _as_image(image)
    timings = {}
    re_ = None
    if reference is not None:
        if reference_energy_eV is None:
            raise ParameterError("A reference image needs its energy (reference energy in eV).")
        re_ = check_energy(reference_energy_eV, "reference energy")
    say(0.05, "finding the screen, the gun shadow and the spots")
    # the reference is measured on the machine's other core while the image is: the two
    # measurements share nothing, and most of their time is spent in numpy outside the GIL
    with ThreadPoolExecutor(max_workers=1) as pool:
        ref_job = (pool.submit(_measure_reference, reference, img.shape, sigma_px, min_snr)
                   if reference is not None else None)
        try:
            meas = measure_image(img, sigma_px=sigma_px, min_snr=min_snr)
        except BaseException:
            if ref_job is not None:
                ref_job.cancel()
            raise
        timings["spots"] = time.perf_counter() - t0
        ref_meas = ref_job.result() if ref_job is not None else None
    xy, inten, snr, manual, trusted, rows = _apply_edits(meas, img.data, ed)
    if len(xy) < 3:
        raise FitError(f"Only {len(xy)} spots found (signal-to-noise ≥ {min_snr:g}); an ordered surface shows "
                       f"at least the first-order substrate spots. Check the energy, exposure and screen.")
    geometry, source, ref_geom, warnings = None, "none", None, []
    azimuth = ref_centre = None
    camera_sigma, camera_cov = {}, None  # what a calibration or reference says of the camera fields it holds
    if calibration is not None:
        geometry = calibration.geometry if isinstance(calibration, Calibration) else calibration
        if isinstance(calibration, Calibration):
            camera_sigma, camera_cov = dict(calibration.uncertainty), calibration.covariance
        if not isinstance(geometry, ScreenGeometry):
            raise ParameterError(f"`calibration` must be a Calibration or ScreenGeometry, got {type(calibration).__name__}.")
        source = "calibration"
    if reference is not None:
        say(0.3, "calibrating the camera on the reference image")
        try:  # a reference that cannot be used never stops the analysis: it goes on without it
            if isinstance(ref_meas, Exception):
                raise ref_meas
            gfit, _ = calibrate_from_reference(ref_meas.spots.xy, hint, re_)
        except (ImageError, FitError) as err:
            warnings.append(f"The reference image was not used: {err}")
        else:
            ref_geom = gfit.geometry
            # the reference says where the substrate's beams are: the analysed image keeps that azimuth
            azimuth = reciprocal(hint).vectors @ local_jacobian(e, ref_geom).T
            if "distortion" in gfit.free:
                geometry, source = ref_geom, "reference"
                camera_sigma, camera_cov = dict(gfit.uncertainty), gfit.covariance
            else:
                warnings.append("The reference image shows one ring of substrate beams: it fixes the centre and "
                                "the azimuth of the net; the camera scale and distortion come from this image, "
                                "and the lattice constants from the substrate given.")
                ref_centre = ref_geom.center_px
        timings["reference"] = time.perf_counter() - t0
    say(0.5, "fitting the substrate net and searching overlayers")
    screen = meas.screen
    center_guess = None
    if meas.gun.center_rc is not None:
        center_guess = (float(meas.gun.center_rc[1]), float(meas.gun.center_rc[0]))
    if ref_centre is not None:
        center_guess = tuple(float(v) for v in ref_centre)
    # the screen's radius sets a scale prior; when no screen edge was found, the image frame's
    # half-size stands in for it with a wider prior (screens usually fill most of the frame)
    framed = screen.source == "frame"

    def index(xy, inten, trusted):
        return index_pattern(xy, e, hint, intensity=inten, geometry=geometry, center_px=ed.center_xy,
                             center_guess=center_guess,
                             screen_radius_px=(0.45 * min(img.shape) if framed else screen.radius_px),
                             screen_prior_sigma=0.3 if framed else 0.15,
                             valid_mask=meas.valid, tol_px=tol_px, reliable=trusted, azimuth_a_star_px=azimuth)

    idx = index(xy, inten, trusted)
    # faint detections that none of the fitted nets explains are set aside, and the pattern
    # indexed once more without them (spots.accept.FAINT_UNEXPLAINED_SNR says why)
    faint = _faint_unexplained(idx, snr, manual)
    if faint.size and len(xy) - faint.size >= 3:
        meas = meas.set_aside(rows[faint], REJECT_FAINT_UNEXPLAINED)
        xy, inten, snr, manual, trusted, rows = _apply_edits(meas, img.data, ed)
        idx = index(xy, inten, trusted)
    if geometry is not None and camera_sigma:
        idx = _with_camera_sigma(idx, xy, e, camera_sigma, camera_cov)
    timings["total"] = time.perf_counter() - t0
    if idx.substrate.confidence < 0.8:
        warnings.append(f"The substrate reading is uncertain ({idx.substrate.confidence:.0%}); "
                        f"other readings are listed. A reference image or calibration settles it.")
    say(1.0, "done")
    return AnalysisResult(xy_px=xy, intensity=inten, snr=snr, manual=manual, index=idx, measurement=meas,
                          energy_eV=e, substrate_spec=hint.label or str(substrate), substrate_hint=hint,
                          image_shape=tuple(img.shape), edits=ed, calibration_source=source,
                          reference_geometry=ref_geom, warnings=tuple(warnings), timings_s=timings, trusted=trusted)


def try_model(result: AnalysisResult, text: str):
    """Score a model typed by hand (a matrix like ``"2 1 / -1 1"`` or a Wood notation).

    Parameters
    ----------
    result : AnalysisResult
        An analysis of the image (its spots and substrate reading are reused).
    text : str
        The model: a real-space matrix or a Wood notation on the analysed substrate.

    Returns
    -------
    OverlayerModel
        With every symmetry domain of the model.

    Raises
    ------
    NetError
        When the text is neither a matrix nor a Wood notation.
    """
    sub = result.index.substrate
    t = (text or "").strip()
    m = parse_wood(t, sub.net) if ("(" in t and ("x" in t.lower() or "×" in t)) else parse_matrix(t)
    return model_from_matrix(sub.hk, sub.integer, sub, m, energy_eV=result.energy_eV,
                             intensity=result.intensity, valid_mask=result.measurement.valid,
                             reliable=result.trusted)
