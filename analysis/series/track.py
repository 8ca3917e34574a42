"""Following every beam through an energy series: predict, refine, integrate, refit.

:func:`track_series` streams the frames; a stack on disk is read a few frames ahead on a
second thread (:class:`_Prefetch`). Each frame's beams are predicted from the current
screen geometry, refined locally by a peak search and a background-subtracted centroid
(:func:`_refine`), integrated there, and the geometry is refitted from all frames so far.
Frames between two refits share one geometry, so a few of them are refined and integrated
in one vectorised pass (:func:`_track_frames`), each with the numbers it gets alone. :class:`IVResult` holds the intensity, uncertainty,
position and flags of every beam in every frame. Pixel arrays are (row, col) inside;
positions at the API are (x, y) pixels as in :mod:`analysis.optics`.
"""

from __future__ import annotations

import itertools
import math
import os
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from ..errors import FitError, ImageError, ParameterError, SeriesError
from ..optics import ScreenGeometry
from ..timelimit import check_time
from .beams import BeamSet
from .energies import DEFAULT_NAME_PATTERN, _Energies
from .geometry import SeriesCalibration, _predict, _refit, fit_series_geometry
from .integrate import (
    BLOCKING_FLAGS,
    FLAG_CROWDED,
    FLAG_NOT_REFINED,
    FLAG_OFF_SCREEN,
    _check_integration,
    _default_annulus,
    _despike_windows,
    _extract,
    _integrate,
    _mask_map,
    _robust,
    _rowdot,
    _square_offsets,
    _Windows,
)

__all__ = ["IVResult", "track_series"]


class _BeamCurves:
    """`valid` and `curve` of a series result: (F, K) `intensity`, `sigma` and `flags` of its
    `beams`, against the (F,) axis named by ``_AXIS`` (energies, or a parameter)."""

    _AXIS = "energy_eV"

    @property
    def valid(self) -> np.ndarray:
        """(F, K) bool: points that enter the curves."""
        return ((self.flags & BLOCKING_FLAGS) == 0) & np.isfinite(self.intensity)

    def curve(self, beam) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(axis, intensity, sigma) of one beam (label, (h, k) or index); NaN where left out.

        Parameters
        ----------
        beam : str, (h, k) or int
            The beam's label, indices or position.

        Returns
        -------
        axis, intensity, sigma : (F,) ndarray of float64
            The series' axis (energies in eV, or the parameter of each frame), the beam's
            intensity and its uncertainty.
        """
        j = beam if isinstance(beam, (int, np.integer)) else self.beams.index(beam)
        ok = self.valid[:, j]
        return (np.array(getattr(self, self._AXIS), dtype=np.float64), np.where(ok, self.intensity[:, j], np.nan),
                np.where(ok, self.sigma[:, j], np.nan))


@dataclass(frozen=True, eq=False)
class IVResult(_BeamCurves):
    """Everything measured in an energy series.

    Attributes
    ----------
    energy_eV : (F,) ndarray of float64
        Energy of each frame, eV, in frame order.
    frame_names : tuple of str
    beams : BeamSet
        The K beams followed.
    intensity : (F, K) ndarray of float64
        Integrated intensity (frame units, divided by the beam current when given); NaN
        where the beam was not integrated (off the screen, masked, saturated, crowded).
    sigma : (F, K) ndarray of float64
        Counting-statistics uncertainty of `intensity`.
    xy_px : (F, K, 2) ndarray of float64
        (x, y) where each beam was integrated (refined, or predicted when too weak);
        NaN off the screen.
    flags : (F, K) ndarray of uint8
        Bit flags, see :data:`FLAG_NAMES`; :data:`BLOCKING_FLAGS` leave a point out.
    background_per_px : (F, K) ndarray of float64
        Local background at each beam, frame units per pixel.
    current : (F,) ndarray of float64 or None
        Beam current used for the normalisation.
    calibration : SeriesCalibration or None
        Screen geometry fitted from all frames.
    settings : dict
        The options used (JSON-safe).
    """

    energy_eV: np.ndarray
    frame_names: tuple
    beams: BeamSet
    intensity: np.ndarray
    sigma: np.ndarray
    xy_px: np.ndarray
    flags: np.ndarray
    background_per_px: np.ndarray
    current: np.ndarray | None
    calibration: SeriesCalibration | None
    settings: dict = field(default_factory=dict)

    def overlap_eV(self) -> np.ndarray:
        """(K,) energy range in eV covered by each beam's valid points (sum of the steps between them).

        Returns
        -------
        (K,) ndarray of float64
            Energy ranges, eV.
        """
        e = self.energy_eV
        ok = self.valid
        both = ok[1:] & ok[:-1]
        return np.abs(np.diff(e))[:, None].repeat(ok.shape[1], axis=1).__mul__(both).sum(axis=0)


_STACK_MAX_BYTES = 16_000_000_000  # a multi-page file streamed from disk
# Beam positions in the final calibration of a series: with 12 000 its parameters' statistical
# σ is a few 10⁻⁴ px (a 300-frame, 25 000-point series: centre 3.5·10⁻⁴ px against 2.4·10⁻⁴ px
# from all, values within 1.5 σ), far below the camera model's own residual (~0.05 px), at a
# third of the fit's time.
_CALIBRATION_POINTS = 12_000
# Frames between two refits are tracked together: at most this many, with at most this many
# window pixels in one pass (beyond, the larger arrays cost more per pixel than the numpy calls
# saved: measured with benchmarks/bench_series.py).
_BATCH_FRAMES = 4
_BATCH_PIXELS = 400_000


def _as_frames(frames) -> Iterator[tuple[str, np.ndarray]]:
    """(name, array) pairs from a path (through analysis.io) or from an iterable."""
    if isinstance(frames, (str, os.PathLike, bytes, bytearray)):
        from ..io import iter_frames

        # A stack on disk is decoded page by page, so its file size is not held in memory:
        # only the per-frame pixel limit of analysis.io applies to it.
        # Integer frames keep their type: only the beams' small windows become float64.
        kw = {"max_bytes": _STACK_MAX_BYTES} if isinstance(frames, (str, os.PathLike)) else {}
        yield from iter_frames(frames, as_float=False, **kw)
        return
    for i, item in enumerate(frames):
        if isinstance(item, tuple) and len(item) == 2:
            yield str(item[0]), item[1]
        else:
            yield f"frame {i}", item


def _worth_reading_ahead(frames) -> bool:
    """Whether a second thread should decode the next frames: for files whose frames must be
    decompressed (image folders and zips, compressed TIFF), not for an uncompressed TIFF,
    whose pages are a copy the second thread cannot hide (it only competes for the GIL:
    measured 30 % slower on a 300-frame 16-bit stack) or for frames already in memory."""
    if not isinstance(frames, (str, os.PathLike, bytes, bytearray)):
        return False
    if isinstance(frames, (str, os.PathLike)) and os.path.isdir(frames):
        return True
    import io as _io

    import tifffile

    try:
        with tifffile.TiffFile(_io.BytesIO(frames) if isinstance(frames, (bytes, bytearray)) else frames) as tif:
            return int(tif.pages[0].compression) != 1  # 1: stored uncompressed
    except Exception:  # not a TIFF (a zip, a PNG...), or unreadable: the reader says why later
        return True


class _Prefetch:
    """Frames read on a second thread, at most `depth` ahead of the consumer.

    Reading and decoding a stack (file reads, NumPy's conversions) release the GIL, so
    they overlap the tracking of the frame before. Items come out in order; an error of
    the reader is raised by ``next`` where the frame would have come; ``close`` stops
    the reader and closes the source.
    """

    def __init__(self, source: Iterator, depth: int = 2):
        import queue
        import threading

        self._queue = queue.Queue(maxsize=depth)
        self._full = queue.Full
        self._stop = threading.Event()
        self._source = source
        self._done = False
        self._thread = threading.Thread(target=self._run, name="recinet-frame-reader", daemon=True)
        self._thread.start()

    def _put(self, item) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.05)
                return True
            except self._full:
                continue
        return False

    def _run(self) -> None:
        try:
            for item in self._source:
                if not self._put(("frame", item)):
                    return
            self._put(("end", None))
        except BaseException as exc:  # noqa: BLE001 - handed over to the consumer
            self._put(("error", exc))
        finally:
            close = getattr(self._source, "close", None)
            if close is not None:
                close()

    def __iter__(self):
        return self

    def __next__(self):
        if self._done:
            raise StopIteration
        kind, value = self._queue.get()
        if kind == "frame":
            return value
        self._done = True
        if kind == "end":
            raise StopIteration
        raise value

    def close(self) -> None:
        self._stop.set()
        self._thread.join()


def _median(values: np.ndarray) -> float:
    """Median of a short 1-D array (as numpy.median, without its overhead)."""
    v = np.sort(values)
    n = v.size
    return float(v[n // 2]) if n % 2 else float((v[n // 2 - 1] + v[n // 2]) / 2)


def _neighbour_distance(xy: np.ndarray) -> np.ndarray:
    """Distance from each point to its nearest other point, px (inf when alone)."""
    if len(xy) < 2:
        return np.full(len(xy), np.inf)
    dx = np.subtract.outer(xy[:, 0], xy[:, 0])
    dy = np.subtract.outer(xy[:, 1], xy[:, 1])
    d2 = dx * dx + dy * dy
    np.fill_diagonal(d2, np.inf)
    return np.sqrt(d2.min(axis=1))


def track_series(frames, beams: BeamSet, geometry: ScreenGeometry, *, energies=None,
                 name_pattern: str = DEFAULT_NAME_PATTERN, mask: np.ndarray | None = None,
                 radius_px: float | None = None, annulus_px=None, background: str = "annulus",
                 method: str = "aperture", spot_sigma_px: float | None = None, search_px: float = 6.0,
                 min_snr: float = 6.0, gain: float = 1.0, saturation_level: float | None = None,
                 fit: Sequence[str] = ("center", "scale", "distortion", "rotation"),
                 normalise_current: bool = True,
                 progress: Callable[[int, int | None, float], None] | None = None,
                 prefetch: bool | None = None) -> IVResult:
    """Follow every beam through an energy series and integrate it in every frame.

    Frames are streamed: only the few frames tracked together are held. For each frame the
    beams are predicted from the current screen geometry, refined locally (peak search
    within `search_px`, then a background-subtracted centroid), and integrated at the
    refined position (at the predicted one when the spot is too weak, flagged
    "not_refined"). The geometry is refitted from all frames so far after frames 1, 2, 4,
    8, … and once more at the end (:func:`fit_series_geometry`), so beams entering at the
    screen edge are picked up where the geometry predicts them. Frames between two refits
    are tracked together, up to four in one vectorised pass (fewer when they hold many
    beams); every number is the one the frame gives when tracked alone.

    Parameters
    ----------
    frames : path, bytes, or iterable of (name, (M, N) ndarray) or of arrays
        A multi-page TIFF, folder or zip (read with :func:`analysis.io.iter_frames`), or
        frames already in memory.
    beams : BeamSet
        The beams to follow (:func:`beams_from_nets` or :meth:`BeamSet.from_hk`).
    geometry : ScreenGeometry
        Starting geometry, e.g. from indexing one frame; within a few pixels of the truth.
    energies : EnergyTable, path of a sidecar, (F,) array_like, dict or None, keyword-only
        ``{"start_eV": …, "step_eV": …}`` for evenly stepped energies; None: read from
        each frame's name with `name_pattern`.
    name_pattern : str, keyword-only
        Regular expression whose first group is the energy in a frame's name.
    mask : (M, N) ndarray of bool, optional, keyword-only
        True where pixels may be used; beams whose aperture touches a False pixel (gun
        shadow, holder arm) are flagged "masked" in that frame and not integrated.
    radius_px : float, optional, keyword-only
        Aperture radius; default 3 × the spot σ measured in the first frame (2.5–20 px).
    annulus_px : (inner, outer), optional, keyword-only
        Background annulus, pixels (as for :func:`integrate_spots`).
    background : {"annulus", "plane"}, keyword-only
        Background model (as for :func:`integrate_spots`).
    method : {"aperture", "profile"}, keyword-only
        Aperture sum or profile fit (as for :func:`integrate_spots`); with
        `method="profile"` and no `spot_sigma_px` the width is measured per frame from
        the strong spots.
    spot_sigma_px : float, optional, keyword-only
        Gaussian σ of the spots, pixels.
    search_px : float, keyword-only
        Largest distance between prediction and refined position, px (also cut to 45 %
        of the distance to the nearest other beam).
    min_snr : float, keyword-only
        Peak signal-to-noise needed to refine a position.
    gain : float, keyword-only
        Frame units per detected count.
    saturation_level : float, optional, keyword-only
        Full-scale pixel value.
    fit : sequence of str, keyword-only
        Geometry parameters refitted (see :func:`fit_series_geometry`); empty: keep `geometry`.
    normalise_current : bool, keyword-only
        Divide by the beam current when the energy table has one.
    progress : callable(i, n, energy_eV), optional
        Called after each frame, once the frames tracked with it are done (n is None when the
        count is not known in advance).
    prefetch : bool, optional, keyword-only
        Read the next frames on a second thread (at most four ahead) while others are
        tracked; default: when `frames` is a folder, a zip or a compressed file, whose
        decoding is worth overlapping (:func:`_worth_reading_ahead`).

    Returns
    -------
    IVResult
        Every beam's intensity, σ, position and flags per frame, with the energies and the geometry.

    Raises
    ------
    SeriesError
        Missing or bad energies, frames of different sizes, an unreadable frame — naming it.
    """
    ann_given = annulus_px
    if radius_px is not None:
        _check_integration(radius_px, annulus_px, background, method)
    else:
        _check_integration(5.0, None, background, method)
    if not isinstance(beams, BeamSet):
        raise ParameterError(f"`beams` must be a BeamSet, got {type(beams).__name__}.")
    if not isinstance(geometry, ScreenGeometry):
        raise ParameterError(f"`geometry` must be a ScreenGeometry, got {type(geometry).__name__}.")
    for name, v in (("search_px", search_px), ("min_snr", min_snr), ("gain", gain)):
        if not (isinstance(v, (int, float, np.floating)) and v > 0 and math.isfinite(v)):
            raise ParameterError(f"`{name}` must be a positive number, got {v!r}.")
    en = _Energies(energies, name_pattern)
    k = len(beams)
    g = beams.g_par
    geom = geometry
    rec_e, rec_names, rec_cur = [], [], []
    rec_I, rec_s, rec_xy, rec_f, rec_bg = [], [], [], [], []
    pts_e, pts_g, pts_xy = [], [], []
    shape = None
    r_ap = None if radius_px is None else float(radius_px)
    ann = None if r_ap is None else (_default_annulus(r_ap) if ann_given is None else tuple(ann_given))
    last_sigma = spot_sigma_px
    i = -1
    it = _as_frames(frames)
    if prefetch or (prefetch is None and _worth_reading_ahead(frames)):
        it = _Prefetch(it, depth=max(2, _BATCH_FRAMES))  # decode the next frames while others are tracked
    n_total = en.n if en.by_name is None else None
    batch = []  # (index, frame, saturation level) read and not yet tracked
    ended = False
    try:
        while not ended:
            try:
                name, frame = next(it)
            except StopIteration:
                ended = True
            except ImageError as err:
                where = f"frame {i + 1}" + (f" (after {rec_names[-1]})" if rec_names else "")
                raise SeriesError(f"Cannot read {where}: {err}") from None
            if not ended:
                i += 1
                frame = np.ascontiguousarray(frame)  # flat gathers below need one contiguous buffer
                if frame.ndim != 2:
                    raise SeriesError(f"Frame {i} ({name}) is not a 2-D image (shape {frame.shape}).")
                if shape is None:
                    shape = frame.shape
                    if mask is not None:
                        mask = np.ascontiguousarray(mask, dtype=bool)
                        if mask.shape != shape:
                            raise SeriesError(f"The mask is {mask.shape[1]}×{mask.shape[0]} px but frame 0 "
                                              f"({name}) is {shape[1]}×{shape[0]} px.")
                    mask_map = _mask_map(mask)
                elif frame.shape != shape:
                    raise SeriesError(f"Frame {i} ({name}) is {frame.shape[1]}×{frame.shape[0]} px but frame 0 "
                                      f"({rec_names[0]}) is {shape[1]}×{shape[0]} px: all frames must have one "
                                      f"size.")
                e, cur = en.at(i, name)
                rec_e.append(e)
                rec_names.append(name)
                rec_cur.append(cur)
                sat = saturation_level
                if sat is None and np.issubdtype(frame.dtype, np.integer):
                    sat = float(np.iinfo(frame.dtype).max)
                if i == 0:
                    geom, r_ap, ann, last_sigma = _bootstrap(frame, e, g, geom, mask_map, sat, r_ap, ann, ann_given,
                                                             search_px, min_snr, fit, spot_sigma_px)
                batch.append((i, frame, sat))
                # frames between two refits share one geometry: they are tracked together
                if len(batch) < _BATCH_FRAMES and not _refit_after(i, fit):
                    continue
            if not batch:
                continue
            outs, last_sigma = _track_frames([b[1] for b in batch], [rec_e[b[0]] for b in batch],
                                             [b[2] for b in batch], g, geom, mask_map, r_ap, ann, background,
                                             method, search_px, min_snr, gain,
                                             spot_sigma_px if spot_sigma_px else last_sigma,
                                             carry=spot_sigma_px is None)
            for (j, _, _), (inten, sig, xy, flags, bgpx, okpos, _) in zip(batch, outs):
                e, cur = rec_e[j], rec_cur[j]
                if cur is not None and normalise_current:
                    inten, sig = inten / cur, sig / cur
                rec_I.append(inten)
                rec_s.append(sig)
                rec_xy.append(xy)
                rec_f.append(flags)
                rec_bg.append(bgpx)
                if okpos.any():
                    pts_e.append(np.full(int(okpos.sum()), e))
                    pts_g.append(g[okpos])
                    pts_xy.append(xy[okpos])
                if _refit_after(j, fit) and pts_e:
                    geom = _refit(pts_e, pts_g, pts_xy, geom, fit)
                check_time()  # a caller's time limit stops the extraction between frames
                if progress is not None:
                    progress(j + 1, n_total, e)
            batch = []
    finally:
        if isinstance(it, _Prefetch):
            it.close()
    if i < 0:
        raise SeriesError("The series holds no frames.")
    en.finish(i + 1)
    calibration = None
    if pts_e:
        e_all, g_all, xy_all = np.concatenate(pts_e), np.vstack(pts_g), np.vstack(pts_xy)
        if e_all.size > _CALIBRATION_POINTS:  # evenly spread over the frames (the points are in frame order)
            pick = np.unique(np.linspace(0, e_all.size - 1, _CALIBRATION_POINTS).round().astype(np.int64))
            e_all, g_all, xy_all = e_all[pick], g_all[pick], xy_all[pick]
        try:
            calibration = fit_series_geometry(e_all, g_all, xy_all, initial=geom, fit=fit or ("center",))
        except FitError:
            calibration = None
    currents = None if any(c is None for c in rec_cur) else np.array(rec_cur, dtype=np.float64)
    settings = {"radius_px": r_ap, "annulus_px": list(ann), "background": background, "method": method,
                "spot_sigma_px": spot_sigma_px, "search_px": search_px, "min_snr": min_snr, "gain": gain,
                "saturation_level": saturation_level, "fit": list(fit),
                "normalised_by_current": bool(currents is not None and normalise_current),
                "initial_geometry": geometry.to_dict(), "frame_shape": list(shape)}
    return IVResult(np.array(rec_e), tuple(rec_names), beams, np.array(rec_I).reshape(-1, k),
                    np.array(rec_s).reshape(-1, k), np.array(rec_xy).reshape(-1, k, 2),
                    np.array(rec_f, dtype=np.uint8).reshape(-1, k), np.array(rec_bg).reshape(-1, k),
                    currents, calibration, settings)


def _refit_after(i: int, fit) -> bool:
    """The geometry is refitted after frames 1, 2, 4, 8, … (0-based i = 1, 3, 7, …) when `fit` is set."""
    return bool(fit) and i > 0 and ((i + 1) & i) == 0


def _bootstrap(frame, e, g, geom, mask, sat, r_ap, ann, ann_given, search_px, min_snr, fit, spot_sigma_px):
    """First frame: widen the search, refit the geometry, measure the spot width."""
    r_try = 5.0 if r_ap is None else r_ap
    sigma = spot_sigma_px
    for wide in (3.0, 1.5):
        xy, ins = _predict(g, e, geom, frame.shape)
        idx = np.flatnonzero(ins)
        if idx.size == 0:
            break
        nn = _neighbour_distance(xy[idx])
        search = np.minimum(wide * search_px, 0.45 * nn)
        half = int(math.ceil(max(search.max(initial=0.0) + r_try, r_try + 3))) + 1
        rc = xy[idx, ::-1]
        win = _extract(frame, rc, half, mask)
        ref, snr, ok, sig_est = _refine(win, rc, search, r_try, min_snr)
        dr, dc = _local(win, ref)
        ok &= ~np.any(win.inside & ~win.usable & (dr * dr + dc * dc <= r_try * r_try), axis=(1, 2))
        good = np.isfinite(sig_est) & ok
        if good.any() and sigma is None:
            sigma = float(np.median(sig_est[good]))
        if fit and ok.sum() >= 3:
            sub = [f for f in fit if f != "distortion"] if ok.sum() < 6 else list(fit)
            try:
                geom = fit_series_geometry(np.full(int(ok.sum()), e), g[idx[ok]], ref[ok, ::-1],
                                           initial=geom, fit=sub).geometry
            except FitError:
                pass
    if r_ap is None:
        r_ap = float(np.clip(3.0 * (sigma if sigma else 2.0), 2.5, 20.0))
        ann = _default_annulus(r_ap) if ann_given is None else tuple(float(v) for v in ann_given)
        _check_integration(r_ap, ann, "annulus", "aperture")
    return geom, r_ap, ann, sigma


def _one_frame(frame, e, g, geom, mask, sat, r_ap, ann, background, method, search_px, min_snr, gain, sigma):
    """One frame tracked alone: (inten, sig, xy, flags, bgpx, okpos, sig_est), see :func:`_track_frames`."""
    return _track_frames([frame], [e], [sat], g, geom, mask, r_ap, ann, background, method, search_px, min_snr,
                         gain, sigma, carry=False)[0][0]


class _Aim(NamedTuple):
    """Where to look in one frame."""

    xy: np.ndarray  # (K, 2) float64 predicted (x, y) of every beam, px
    idx: np.ndarray  # (n,) int64 the beams on the screen
    nn: np.ndarray  # (n,) float64 distance from each to its nearest other beam, px
    search: np.ndarray  # (n,) float64 search radius of each, px
    half: int  # half-width of the windows, px


def _aim(shape, e, g, geom, r_ap, ann, search_px) -> _Aim:
    """Predicted beams of a frame at `e` eV, their search radii and the window size."""
    xy, ins = _predict(g, e, geom, shape)
    idx = np.flatnonzero(ins)
    nn = _neighbour_distance(xy[idx])
    search = np.minimum(search_px, 0.45 * nn)
    return _Aim(xy, idx, nn, search, int(math.ceil(max(ann[1], search.max(initial=0.0) + r_ap))) + 2)


def _runs(aims: list[_Aim], sats: list) -> Iterator[list[int]]:
    """Indices of consecutive frames tracked in one pass: one window size and saturation level,
    at most ``_BATCH_PIXELS`` window pixels together (a frame with more goes alone); a frame with
    no beam on the screen goes alone."""
    run, key, size = [], None, 0
    for j, (aim, sat) in enumerate(zip(aims, sats)):
        n = aim.idx.size * (2 * aim.half + 1) ** 2
        this = (aim.half, sat) if n else None
        if run and (this is None or this != key or size + n > _BATCH_PIXELS):
            yield run
            run, size = [], 0
        run.append(j)
        key, size = this, size + n
    if run:
        yield run


def _track_frames(frames, energies, sats, g, geom, mask, r_ap, ann, background, method, search_px, min_snr, gain,
                  sigma, *, carry: bool):
    """Refine and integrate the beams of several frames predicted from one geometry.

    Consecutive frames with one window size and one saturation level are tracked in one
    vectorised pass: their windows are cut frame by frame and stacked, each row knowing its
    frame (`layer` of :func:`_extract`), so the fixed cost of the many small numpy calls is paid
    once for all of them. Every row's result is what tracking its frame alone gives. A
    frame's spots are integrated with the spot σ `sigma` (px) or, when that is None, the
    width measured in it; with `carry` the width measured in each frame (when finite)
    becomes `sigma` for the next one.

    Returns
    -------
    list of tuple
        Per frame: intensity, σ, (x, y), flags, background per px, usable position (each
        (K,) or (K, 2), NaN / off-screen for beams not on the screen) and the median spot
        σ measured in it (NaN when no spot was strong enough).
    float or None
        `sigma` after the last frame.
    """
    k = len(g)
    aims = [_aim(f.shape, e, g, geom, r_ap, ann, search_px) for f, e in zip(frames, energies)]
    out = []
    for run in _runs(aims, sats):
        part = [aims[j] for j in run]
        if part[0].idx.size == 0:  # no beam on the screen
            out.append((np.full(k, np.nan), np.full(k, np.nan), np.full((k, 2), np.nan),
                        np.full(k, FLAG_OFF_SCREEN, dtype=np.uint8), np.full(k, np.nan), np.zeros(k, dtype=bool),
                        float("nan")))
            continue
        sizes = [a.idx.size for a in part]
        layer = np.repeat(np.arange(len(run)), sizes)
        rc_pred = np.concatenate([a.xy[a.idx, ::-1] for a in part])
        win = _extract([frames[j] for j in run], rc_pred, part[0].half, mask, layer)
        ref, snr, ok, s_est = _refine(win, rc_pred, np.concatenate([a.search for a in part]), r_ap, min_snr)
        good = np.isfinite(s_est) & ok
        sig_est, s_use = [], []
        for lo, hi in itertools.pairwise(np.cumsum([0] + sizes)):
            sig_est.append(_median(s_est[lo:hi][good[lo:hi]]) if good[lo:hi].any() else float("nan"))
            s_use.append(sigma if sigma else (sig_est[-1] if np.isfinite(sig_est[-1]) else r_ap / 3.0))
            if carry and np.isfinite(sig_est[-1]):
                sigma = sig_est[-1]
        rc = np.where(ok[:, None], ref, rc_pred)
        res = _integrate([frames[j] for j in run], rc, mask, sats[run[0]], radius_px=r_ap, annulus_px=ann,
                         background=background, method=method, spot_sigma_px=np.repeat(s_use, sizes),
                         gain=gain, window=win)
        f = res.flags.copy()
        f[np.concatenate([a.nn for a in part]) < 2.0 * r_ap] |= FLAG_CROWDED
        f[~ok] |= FLAG_NOT_REFINED
        blocked = (f & BLOCKING_FLAGS) != 0
        # every frame's K beams in one (B, K) table: row layer, column the beam's index
        at = layer * k + np.concatenate([a.idx for a in part])
        b = len(run)
        inten, sig, bgpx = np.full((b, k), np.nan), np.full((b, k), np.nan), np.full((b, k), np.nan)
        xy_out = np.full((b, k, 2), np.nan)
        flags = np.full((b, k), FLAG_OFF_SCREEN, dtype=np.uint8)
        okpos = np.zeros((b, k), dtype=bool)
        inten.reshape(-1)[at] = np.where(blocked, np.nan, res.intensity)
        sig.reshape(-1)[at] = np.where(blocked, np.nan, res.sigma)
        bgpx.reshape(-1)[at] = res.background_per_px
        xy_out.reshape(-1, 2)[at] = rc[:, ::-1]
        flags.reshape(-1)[at] = f
        okpos.reshape(-1)[at] = ok & ~blocked
        out += list(zip(inten, sig, xy_out, flags, bgpx, okpos, sig_est))
    return out, sigma


def _local(win: _Windows, rc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row and column offsets (K, w, 1) and (K, 1, w) of each window pixel from `rc`."""
    off = np.arange(win.data.shape[1], dtype=np.float64)
    dr = (win.row0[:, None] + off[None, :] - rc[:, 0, None])[:, :, None]
    dc = (win.col0[:, None] + off[None, :] - rc[:, 1, None])[:, None, :]
    return dr, dc


def _refine(win: _Windows, rc_pred: np.ndarray, search_px: np.ndarray, radius_px: float,
            min_snr: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Local peak search and background-subtracted centroid.

    Returns refined (K, 2) (row, col), peak SNR (K,), ok (K,) and a moment estimate of
    the spot σ in px (K,; NaN for spots too weak to tell).
    """
    k, w, _ = win.data.shape
    h = win.half
    # every other pixel of the window's border (about 250 of its 500 at the usual size) gives
    # the level and noise the search and the centroid need; the intensities' background is the
    # annulus's, all of it (measured: 11 % less tracking time)
    ring = _square_offsets(h)[2][::2]
    flat = win.data.reshape(k, -1)
    bg, noise, _ = _robust(flat[:, ring], win.usable.reshape(k, -1)[:, ring])
    noise = np.maximum(noise, 1e-6)
    # peak search: 3×3 box sums (separable) in the central (2s+1)² part of the window only
    s = min(int(math.ceil(float(np.max(search_px, initial=0.0)))) + 1, h - 1)
    _despike_windows(win.data, bg, noise)  # a hot pixel brighter than the spot cannot pull the search
    lo, hi = h - s - 1, h + s + 2
    v = win.data[:, lo:hi, lo:hi] - bg[:, None, None]
    v[~win.usable[:, lo:hi, lo:hi]] = 0.0
    n = 2 * s + 1
    rows3 = v[:, 0:n] + v[:, 1:n + 1] + v[:, 2:n + 2]
    box = rows3[:, :, 0:n] + rows3[:, :, 1:n + 1] + rows3[:, :, 2:n + 2]
    off_s = np.arange(h - s, h + s + 1, dtype=np.float64)
    br = (win.row0[:, None] + off_s[None, :] - rc_pred[:, 0, None])[:, :, None]
    bc = (win.col0[:, None] + off_s[None, :] - rc_pred[:, 1, None])[:, None, :]
    cand = win.usable[:, h - s:h + s + 1, h - s:h + s + 1] & (br * br + bc * bc <= (search_px[:, None, None]) ** 2)
    box[~cand] = -np.inf
    score = box.reshape(k, -1)
    best = np.argmax(score, axis=1)
    snr = score[np.arange(k), best] / (3.0 * noise)
    snr = np.where(np.isfinite(snr), snr, 0.0)
    pr, pc = h - s + best // n, h - s + best % n  # peak pixel, window indices
    # centroid in a small box around the peak (indices clipped to the window)
    b = int(math.ceil(radius_px)) + 1
    ob = np.arange(-b, b + 1)
    ri = pr[:, None] + ob[None, :]
    ci = pc[:, None] + ob[None, :]
    if k and min(pr.min(), pc.min()) >= b and max(pr.max(), pc.max()) < w - b:
        # every box lies inside its window: one gather of (2b+1)² squares, no index arrays
        from numpy.lib.stride_tricks import sliding_window_view

        at = (np.arange(k), pr - b, pc - b)
        pos = sliding_window_view(win.data, (2 * b + 1, 2 * b + 1), axis=(1, 2))[at]
        pos -= bg[:, None, None]
        np.maximum(pos, 0.0, out=pos)
        pos[~sliding_window_view(win.usable, (2 * b + 1, 2 * b + 1), axis=(1, 2))[at]] = 0.0
    else:
        okr, okc = (ri >= 0) & (ri < w), (ci >= 0) & (ci < w)
        ri, ci = np.clip(ri, 0, w - 1), np.clip(ci, 0, w - 1)
        sel = (np.arange(k) * (w * w))[:, None, None] + ri[:, :, None] * w + ci[:, None, :]
        pos = flat.take(sel) - bg[:, None, None]
        np.maximum(pos, 0.0, out=pos)
        pos[~(win.usable.reshape(-1).take(sel) & okr[:, :, None] & okc[:, None, :])] = 0.0
    rows = (win.row0[:, None] + ri).astype(np.float64)  # (K, m)
    cols = (win.col0[:, None] + ci).astype(np.float64)
    c = np.column_stack([win.row0 + pr, win.col0 + pc]).astype(np.float64)
    sigma = np.full(k, np.nan)
    r2 = radius_px * radius_px
    ones = np.ones(2 * b + 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        for it in range(3):
            dr, dc = rows - c[:, 0, None], cols - c[:, 1, None]
            dr2, dc2 = dr * dr, dc * dc
            wgt = pos * (dr2[:, :, None] + dc2[:, None, :] <= r2)
            w_r, w_c = wgt @ ones, ones @ wgt  # (K, m) marginals, as matrix products (BLAS)
            tot = _by_layer(w_r, ones, win.layer)  # frame by frame: the bits of a frame alone
            good = tot > 0
            new_r, new_c = _rowdot(w_r, rows) / tot, _rowdot(w_c, cols) / tot
            if it == 2:
                m2 = (_rowdot(w_r, dr2) + _rowdot(w_c, dc2)) / tot / 2.0
                sigma = np.where(good & (snr > 20), np.sqrt(np.maximum(m2, 0.0)), np.nan)
            c[good, 0], c[good, 1] = new_r[good], new_c[good]
    shift = np.hypot(c[:, 0] - rc_pred[:, 0], c[:, 1] - rc_pred[:, 1])
    ok = (snr >= min_snr) & (shift <= search_px)
    return c, snr, ok, _untruncated_sigma(sigma, radius_px)


def _by_layer(a: np.ndarray, b: np.ndarray, layer: np.ndarray | None) -> np.ndarray:
    """``a @ b`` for a (K, n) `a` whose rows come from several frames (`layer`, (K,) sorted, or
    None for one frame), one frame's rows at a time.

    A BLAS matrix-vector product sums a row in an order that depends on the row's place in the
    matrix and on the matrix's size, so each frame's rows are multiplied as a matrix of their
    own: the values are those of the frame tracked alone, to the last bit.
    """
    if layer is None or layer.size == 0 or layer[0] == layer[-1]:
        return a @ b
    out = np.empty(a.shape[:1] + b.shape[1:])
    cuts = np.concatenate([[0], np.flatnonzero(np.diff(layer)) + 1, [a.shape[0]]])
    for lo, hi in itertools.pairwise(cuts):
        np.matmul(a[lo:hi], b, out=out[lo:hi])
    return out


def _untruncated_sigma(sigma_cut: np.ndarray, radius_px: float) -> np.ndarray:
    """Gaussian σ (px) of spots whose second-moment σ `sigma_cut` (K,) was measured inside a
    radius R: for a Gaussian cut at R, <d²>/2 = σ² (1 − x e^{−x} / (1 − e^{−x})), x = R² / (2σ²);
    four fixed-point steps (NaN stays NaN)."""
    s = sigma_cut.copy()
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        for _ in range(4):
            x = radius_px * radius_px / (2.0 * s * s)
            f = 1.0 - x * np.exp(-x) / (-np.expm1(-x))
            s = sigma_cut / np.sqrt(np.clip(f, 0.2, 1.0))
    return s
