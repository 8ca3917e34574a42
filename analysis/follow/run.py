"""A parameter series from frames to beams, families, segments and structures.

:class:`LiveSeries` takes frames one at a time (``recinet watch`` and the live page feed
it as files arrive): the first frame that can be indexed fixes the camera and the
substrate (frames before it wait and are replayed), every frame's spots reveal new
fractional beams (kept when seen in two frames, with their symmetry images), every beam
is followed (:class:`analysis.follow.trace.BeamFollower`), and each frame reports which
beam families are present and the segment it belongs to; a new segment starts when the
set of families has changed for `min_frames` frames, and its first clear frame is
indexed. :func:`analyse_parameter_series` does the same for a whole stack in two passes
(spots of up to `n_probe` frames spread over the series first, so every beam is followed
from the first frame), then splits it (:func:`analysis.follow.segments.find_segments`)
and indexes each segment from its own frames, jointly when `n_index` > 1
(:func:`analysis.series.joint.index_series_joint`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import ImageError, RecinetError, SeriesError
from ..nets import Net2D, reciprocal
from ..optics import ScreenGeometry, pixels_to_momentum
from ..series.beams import BeamSet
from ..series.index_frames import SeriesIndexing, index_series_frame
from ..timelimit import check_time
from .parameters import DEFAULT_PARAMETER_PATTERN, ParameterTable, parameters_from_names, parameters_from_times, \
    read_parameter_file
from .segments import Family, Segment, beam_families, family_presence, find_segments, orbit_hk, snap_fractional
from .trace import BeamFollower, ParameterTrace

__all__ = ["LiveSeries", "ParameterSeriesResult", "analyse_parameter_series", "resolve_parameters"]

_TOL_HK = 0.04  # a spot within this many substrate units of a beam is that beam
_MAX_WAITING = 20  # frames held while no frame could be indexed yet


@dataclass(frozen=True, eq=False)
class ParameterSeriesResult:
    """Everything found in a parameter series.

    Attributes
    ----------
    trace : ParameterTrace
        Every beam's intensity, background, widths and position in every frame; the drift.
    reference : SeriesIndexing
        The indexing that fixed the camera and the substrate net.
    families : tuple of Family
    family_intensity : (F, n) ndarray of float64
        Summed intensity of each family per frame.
    present : (F, n) ndarray of bool
    segments : tuple of Segment
    n_spots : (F,) ndarray of int64
        Spots found in each frame (−1 where the frame was not searched for spots).
    """

    trace: ParameterTrace
    reference: SeriesIndexing
    families: tuple
    family_intensity: np.ndarray
    present: np.ndarray
    segments: tuple
    n_spots: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def segment_of(self, frame: int) -> Segment | None:
        """The segment that holds `frame`, or None.

        Parameters
        ----------
        frame : int
            Frame index (0-based).

        Returns
        -------
        Segment or None
            The segment.
        """
        return next((s for s in self.segments if s.first <= frame <= s.last), None)

    def switches(self) -> list[dict]:
        """Each boundary between segments: the frames either side and the parameter midway.

        Returns
        -------
        list of dict
            One per boundary, in frame order.
        """
        v = self.trace.value
        return [{"after_frame": a.last, "before_frame": b.first, "value": float(0.5 * (v[a.last] + v[b.first])),
                 "from": a.label, "to": b.label}
                for a, b in zip(self.segments[:-1], self.segments[1:])]

    def family_peaks(self) -> list[dict]:
        """Where each family is brightest: the parameter of its largest summed intensity
        (a parabola through it and its neighbours in frame order when they are measured),
        e.g. the exposure at which an ordered phase is complete.

        Returns
        -------
        list of dict
            ``family``, ``frame``, ``value`` (the parameter at the peak) and ``intensity``.
        """
        out = []
        v = self.trace.value
        for n, fam in enumerate(self.families):
            y = self.family_intensity[:, n]
            if not np.any(np.isfinite(y)):
                continue
            i = int(np.nanargmax(y))
            peak = float(v[i])
            if 0 < i < len(y) - 1 and np.all(np.isfinite(y[i - 1:i + 2])):
                x3, y3 = v[i - 1:i + 2], y[i - 1:i + 2]
                if x3[0] < x3[1] < x3[2] or x3[0] > x3[1] > x3[2]:
                    a, b, _ = np.polyfit(x3, y3, 2)
                    if a < 0:
                        peak = float(np.clip(-b / (2 * a), min(x3[0], x3[2]), max(x3[0], x3[2])))
            out.append({"family": fam.label, "frame": i, "value": peak, "intensity": float(y[i])})
        return out

    def family_curve(self, family) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(value, summed intensity, its σ) of one family (label or position).

        Parameters
        ----------
        family : str or int
            The family's label or its position in ``families``.

        Returns
        -------
        value, intensity, sigma : (F,) ndarray of float64
            The parameter of each frame, the family's summed intensity and its uncertainty.
        """
        family = self._family_index(family)
        fam = self.families[family]
        s = self.trace.sigma[:, fam.members]
        ok = np.isfinite(s) & np.isfinite(self.trace.intensity[:, fam.members])
        sig = np.sqrt(np.where(ok, s * s, 0.0).sum(axis=1))
        sig = np.where(ok.any(axis=1), sig, np.nan)
        return self.trace.value.copy(), self.family_intensity[:, int(family)].copy(), sig

    def order_parameter(self, family) -> tuple[np.ndarray, np.ndarray]:
        """(value, η) of one family: η = √(I / I_max), its summed intensity I (negative
        values as 0) over the largest seen, i.e. the long-range order parameter when a
        superstructure beam's intensity goes as its square (kinematic scattering; the same
        I ∝ η² the order–disorder fit assumes); NaN where the family was not measured.

        Parameters
        ----------
        family : str or int
            The family's label or its position in ``families``.

        Returns
        -------
        value, eta : (F,) ndarray of float64
            The parameter of each frame and η (1 at the brightest frame).
        """
        v, total, _ = self.family_curve(family)
        top = np.nanmax(total) if np.any(np.isfinite(total)) else np.nan
        with np.errstate(invalid="ignore", divide="ignore"):
            eta = np.sqrt(np.clip(total, 0.0, None) / top) if top > 0 else np.full_like(total, np.nan)
        return v, eta

    def family_widths(self, family) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(value, radial σ, tangential σ) of one family: the median over its beams measured
        well enough (signal-to-noise ≥ 10) in each frame, px; NaN where none was.

        Parameters
        ----------
        family : str or int
            The family's label or its position in ``families``.

        Returns
        -------
        value, radial, tangential : (F,) ndarray of float64
            The parameter of each frame and the family's spot widths (Gaussian σ, px) along
            and across the direction to the pattern centre.
        """
        fam = self.families[self._family_index(family)]
        out = []
        for w in (self.trace.width_radial_px, self.trace.width_tangential_px):
            m = w[:, fam.members]
            ok = np.isfinite(m)
            med = np.full(len(m), np.nan)
            for i in np.flatnonzero(ok.any(axis=1)):
                med[i] = np.median(m[i][ok[i]])
            out.append(med)
        return self.trace.value.copy(), out[0], out[1]

    def _family_index(self, family) -> int:
        labels = [f.label for f in self.families]
        if isinstance(family, str):
            if family not in labels:
                raise SeriesError(f"No beam family {family!r}; the series has {', '.join(labels) or 'none'}.")
            return labels.index(family)
        return int(family)

    def order_disorder(self, family=None, **kw):
        """:func:`analysis.follow.fit_order_disorder` on a family's summed intensity against
        the parameter (default: the first family present in the first frames).

        Parameters
        ----------
        family : str or int, optional
            The family's label or position.
        **kw
            Passed to :func:`analysis.follow.fit_order_disorder`.

        Returns
        -------
        OrderDisorderFit
            The fit (Tc with its uncertainty).
        """
        from .transition import fit_order_disorder

        if not self.families:
            raise SeriesError("The series shows no fractional-order beams to fit.")
        if family is None:
            first = next((s for s in self.segments if s.families), None)
            family = first.families[0] if first is not None else 0
        v, total, sig = self.family_curve(family)
        return fit_order_disorder(v, total, sig, **kw)

    def transition(self):
        """The order–disorder fit when the parameter is a temperature (unit K or named so) and
        the first family's intensity vanishes inside the range measured; else None.

        Returns
        -------
        OrderDisorderFit or None
            The fit.
        """
        tr = self.trace
        if not (tr.unit == "K" or tr.name.strip().lower() in ("temperature", "t")) or not self.families:
            return None
        from ..errors import FitError

        try:
            fit = self.order_disorder()
        except (FitError, SeriesError):
            return None
        v = tr.value[np.isfinite(tr.value)]
        return fit if v.size and v.min() < fit.tc < v.max() else None

    def to_dict(self, **kw) -> dict:
        """JSON-safe record (see :mod:`analysis.follow.export`).

        Parameters
        ----------
        **kw
            Passed to :func:`analysis.follow.export.result_to_dict`.

        Returns
        -------
        dict
            Plain JSON types.
        """
        from .export import result_to_dict

        return result_to_dict(self, **kw)


def resolve_parameters(parameters, names, *, paths=None, name_pattern: str | None = None,
                       name: str = "parameter", unit: str = "") -> ParameterTable:
    """The parameter table of frames `names`: a ParameterTable, a sidecar path, values,
    ``"names"`` (numbers in the file names, also the default) or ``"times"`` (file times).

    Parameters
    ----------
    parameters : ParameterTable, str, os.PathLike, (F,) array_like or None
        As above; None means ``"names"``.
    names : sequence of str
        The frames' names.
    paths : sequence of path, optional, keyword-only
        The frames' files (for ``"times"``).
    name_pattern : str, optional, keyword-only
        Regular expression for the number in a name.
    name, unit : str, keyword-only
        What the parameter is, when not read from a sidecar heading.

    Returns
    -------
    ParameterTable
        One value per frame.
    """
    if isinstance(parameters, ParameterTable):
        return parameters
    if parameters is None or (isinstance(parameters, str) and parameters.strip().lower() in ("names", "name")):
        return parameters_from_names(names, pattern=name_pattern or DEFAULT_PARAMETER_PATTERN, name=name, unit=unit)
    if isinstance(parameters, str) and parameters.strip().lower() in ("times", "time", "mtime"):
        if paths is None:
            raise SeriesError("File times need frames that are files (a folder); give the values another way.")
        return parameters_from_times(paths)
    if isinstance(parameters, (str, Path)):
        return read_parameter_file(parameters)
    from .parameters import check_parameters

    return ParameterTable(check_parameters(parameters, names, what=name), name, unit, None, "values")


def _frame_array(frame):
    return np.asarray(getattr(frame, "data", frame))


class LiveSeries:
    """A parameter series analysed frame by frame as the frames arrive.

    Parameters
    ----------
    substrate : str or Net2D
    energy_eV : float, keyword-only
    name, unit : str, keyword-only
        What the parameter is.
    beams : BeamSet, optional, keyword-only
        Beams to follow from the start (with `geometry` and `reference`); default found.
    reference : SeriesIndexing, optional, keyword-only
        A reading of the camera and substrate to use instead of indexing the first frame.
    discover : bool, keyword-only
        Search every frame for spots and follow new fractional beams.
    z_min, min_frames : keyword-only
        As for :func:`family_presence` and :func:`find_segments`.
    index_segments : bool, keyword-only
        Index the first clear frame of each new segment.
    """

    def __init__(self, substrate, *, energy_eV: float, name: str = "parameter", unit: str = "",
                 beams: BeamSet | None = None, reference: SeriesIndexing | None = None, discover: bool = True,
                 z_min: float = 8.0, min_frames: int = 2, index_segments: bool = True, min_snr: float = 5.0):
        from ..nets import parse_substrate

        self.hint = parse_substrate(substrate) if isinstance(substrate, str) else substrate
        e = float(energy_eV)
        if not (math.isfinite(e) and e > 0):
            raise SeriesError(f"The energy must be a positive number of eV, got {energy_eV!r}.")
        self.energy_eV, self.name, self.unit = e, name, unit
        self.discover, self.z_min, self.min_frames = bool(discover), float(z_min), int(min_frames)
        self.index_segments, self.min_snr = bool(index_segments), float(min_snr)
        self.reference = reference
        self.follower: BeamFollower | None = None
        self._preset = beams
        self.waiting: list[tuple] = []
        self.seen: dict[tuple, int] = {}  # snapped fractional hk -> frames it was seen in
        self.n_spots: list[int] = []
        self.families: list[Family] = []
        self.live_segments: list[dict] = []  # first, signature, indexing
        self._pending_change = None
        self._kept: dict = {}  # binning -> (screen, gun shadow, spot σ) of the first search
        self._bin = None
        self.lines: list[dict] = []
        if reference is not None:
            self._start(reference)

    # -- set-up
    @property
    def substrate(self) -> Net2D | None:
        return None if self.reference is None else self.reference.substrate

    def _start(self, ref: SeriesIndexing) -> None:
        from ..series.beams import beams_from_nets

        self.reference = ref
        if self._preset is not None:
            beams = self._preset
        else:
            # a commensurate reading's beams are followed from the start; other readings'
            # beams (and those of later phases) come from the spots as they are seen
            mats = list(ref.overlayers) if ref.kind == "commensurate" else []
            b = beams_from_nets(ref.substrate, mats, energy_max_eV=self.energy_eV, geometry=ref.geometry)
            integer = b.hk[b.integer]
            frac = b.hk[~b.integer]
            if len(frac):
                frac = self._on_screen(orbit_hk(ref.substrate, snap_fractional(frac, tol=_TOL_HK)), ref.geometry,
                                       None)
            beams = BeamSet.from_hk(ref.substrate, np.vstack([integer, frac]) if len(frac) else integer)
        self.follower = BeamFollower(beams, ref.geometry, energy_eV=self.energy_eV, mask=ref.mask)
        self.families = beam_families(beams, ref.substrate)

    def _on_screen(self, hk, geom: ScreenGeometry, shape) -> np.ndarray:
        from ..optics import momentum_to_pixels

        hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
        if not len(hk):
            return hk
        g = hk @ reciprocal(self.reference.substrate).vectors
        xy, vis = momentum_to_pixels(g, self.energy_eV, geom)
        ok = vis & np.all(np.isfinite(xy), axis=1)
        if shape is not None:
            rows, cols = shape
            ok &= (xy[:, 0] >= 0) & (xy[:, 0] <= cols - 1) & (xy[:, 1] >= 0) & (xy[:, 1] <= rows - 1)
        elif self.reference.mask is not None:
            rows, cols = self.reference.mask.shape
            ok &= (xy[:, 0] >= 0) & (xy[:, 0] <= cols - 1) & (xy[:, 1] >= 0) & (xy[:, 1] <= rows - 1)
        return hk[ok]

    # -- frames
    def add(self, frame, *, value: float, name: str = "") -> list[dict]:
        """Analyse one frame; returns the lines of the frames analysed now (several when
        frames waited for the first indexing, none while still waiting).

        Parameters
        ----------
        frame : (M, N) ndarray or LoadedImage
            The frame.
        value : float, keyword-only
            Its parameter.
        name : str, keyword-only
            Its name (file name).

        Returns
        -------
        list of dict
            The rows of the frames analysed now.
        """
        name = name or f"frame {len(self.lines) + len(self.waiting)}"
        arr = _frame_array(frame)
        if arr.ndim != 2:
            raise SeriesError(f"Frame {name} is not a 2-D image (shape {arr.shape}).")
        if self.follower is None:
            try:
                ref = index_series_frame(frame, energy_eV=self.energy_eV, substrate=self.hint,
                                         frame_index=len(self.waiting), frame_name=name, min_snr=self.min_snr)
            except SeriesError as err:
                if len(self.waiting) >= _MAX_WAITING:
                    raise SeriesError(f"None of the first {_MAX_WAITING + 1} frames could be indexed; the last: "
                                      f"{err}") from None
                self.waiting.append((frame, float(value), name, str(err)))
                return []
            self._start(ref)
            todo, self.waiting = self.waiting + [(frame, float(value), name, "")], []
            return [self._one(f, v, n) for f, v, n, _ in todo]
        return [self._one(frame, float(value), name)]

    def _spots_hk(self, arr) -> tuple[np.ndarray, int]:
        """Indices of the spots found in a frame, and their number.

        The search runs on the frame binned by ``b`` = ⌊σ / 1.6 px⌋ (1–4; σ the followed spots'
        width, so binned spots keep σ ≥ 1.6 px): positions need only be good to a fraction of
        the matching tolerance here, and a 1 MP frame is searched 4–16× faster. The screen,
        gun shadow and spot width of the first search are kept (they do not change)."""
        from ..spots import measure_image

        b = self._bin or 1
        sigma = self.follower.sigma if self.follower is not None else None
        if self._bin is None and sigma:  # fixed once the followed spots' width is known
            b = self._bin = int(np.clip(np.floor(sigma / 1.6), 1, 4))
        screen, gun, spot_sigma = self._kept.get(b, (None, None, None))
        img = np.asarray(arr, dtype=np.float64)
        if b > 1:
            rows, cols = (img.shape[0] // b) * b, (img.shape[1] // b) * b
            img = img[:rows, :cols].reshape(rows // b, b, cols // b, b).mean(axis=(1, 3))
        try:
            meas = measure_image(img, sigma_px=spot_sigma, min_snr=self.min_snr, screen=screen, gun=gun)
        except (RecinetError, ValueError):
            return np.zeros((0, 2)), 0
        if screen is None:
            self._kept[b] = (meas.screen, meas.gun, float(meas.sigma_px))
        xy = np.asarray(meas.spots.xy, dtype=np.float64).reshape(-1, 2)
        if not len(xy):
            return np.zeros((0, 2)), 0
        xy = b * xy + 0.5 * (b - 1)  # binned pixel centres back to frame pixels
        geom = self.follower.geometry
        k = pixels_to_momentum(xy, self.energy_eV, geom)
        hk = k @ np.linalg.inv(reciprocal(self.reference.substrate).vectors)
        return hk[np.all(np.isfinite(hk), axis=1)], len(xy)

    def _discover(self, arr) -> int:
        hk, n = self._spots_hk(arr)
        if not len(hk):
            return n
        frac = hk[np.max(np.abs(hk - np.rint(hk)), axis=1) > _TOL_HK]
        if not len(frac):
            return n
        known = self.follower.beams.hk
        d = np.min(np.max(np.abs(frac[:, None, :] - known[None, :, :]), axis=2), axis=1)
        new = snap_fractional(frac[d > _TOL_HK], tol=_TOL_HK)
        # a beam, not a stray spot: seen in two frames, or seen with a symmetry image of it
        # (another spot of its family, not its own position) in the same frame
        from .segments import _hk_ops

        ops = _hk_ops(self.reference.substrate)
        keys = [tuple(np.rint(h * 840).astype(int).tolist()) for h in new]
        fam = [min(tuple(np.mod(np.rint((h @ op) * 840).astype(int), 840).tolist()) for op in ops) for h in new]
        add = []
        for h, key, f in zip(new, keys, fam):
            self.seen[key] = self.seen.get(key, 0) + 1
            partners = sum(1 for k2, f2 in zip(keys, fam) if f2 == f and k2 != key)
            if self.seen[key] == 2 or (self.seen[key] == 1 and partners >= 1):
                add.append(h)
        if add:
            cand = self._on_screen(orbit_hk(self.reference.substrate, np.array(add)), self.follower.geometry,
                                   arr.shape)
            if len(cand):
                d = np.min(np.max(np.abs(cand[:, None, :] - known[None, :, :]), axis=2), axis=1)
                cand = cand[d > _TOL_HK]
            if len(cand):
                beams = BeamSet.from_hk(self.reference.substrate, np.vstack([known, cand]))
                self.follower.add_beams(beams)
                self.families = beam_families(beams, self.reference.substrate)
        return n

    def _one(self, frame, value: float, name: str) -> dict:
        arr = _frame_array(frame)
        i = len(self.lines)
        n_spots = self._discover(arr) if self.discover else -1
        self.n_spots.append(n_spots)
        row = self.follower.add(frame, value=value, name=name)
        beams = self.follower.beams
        k = len(row["intensity"])
        inten = np.full(len(beams), np.nan)
        sig = np.full(len(beams), np.nan)
        inten[:k], sig[:k] = row["intensity"], row["sigma"]
        total, present = family_presence(inten[None], sig[None], self.families, z_min=self.z_min)
        sig_now = tuple(f.label for f, on in zip(self.families, present[0]) if on)
        self._segment_step(i, sig_now, frame, name)
        integer = beams.integer
        line = {"frame": i, "name": name, "value": value, "spots": n_spots, "beams": int(len(beams)),
                "integer_intensity": float(np.nansum(inten[integer])),
                "fractional_intensity": float(np.nansum(inten[~integer])),
                "families": list(sig_now), "segment": self.live_segments[-1]["label"],
                "center_px": list(row["geometry"].center_px)}
        self.lines.append(line)
        check_time()
        return line

    def _segment_step(self, i, sig_now, frame, name) -> None:
        segs = self.live_segments
        if not segs:
            segs.append(self._new_segment(i, sig_now, frame, name))
            return
        if sig_now == segs[-1]["families"]:
            self._pending_change = None
            return
        p = self._pending_change
        if p is None or p["families"] != sig_now:
            self._pending_change = p = {"first": i, "families": sig_now, "count": 0}
        p["count"] += 1
        if p["count"] >= self.min_frames:
            segs.append(self._new_segment(p["first"], sig_now, frame, name))
            self._pending_change = None

    def _new_segment(self, first, fams, frame, name) -> dict:
        ind = None
        if fams and self.index_segments:
            try:
                ind = index_series_frame(frame, energy_eV=self.energy_eV, substrate=self.hint, frame_index=first,
                                         frame_name=name, min_snr=self.min_snr)
            except SeriesError:
                ind = None
        label = ind.label if ind is not None else ("(1×1)" if not fams else "families " + ", ".join(fams))
        return {"first": first, "families": fams, "indexing": ind, "label": label}

    # -- results
    def result(self, *, segment_indexing: Callable | None = None) -> ParameterSeriesResult:
        """The series so far: trace, families, presence, segments (each with an indexing).

        Parameters
        ----------
        segment_indexing : callable(segment, total, families), optional, keyword-only
            Indexes each segment (default: none).

        Returns
        -------
        ParameterSeriesResult
            The series so far.
        """
        if self.follower is None or not len(self.follower):
            why = f" ({self.waiting[-1][3]})" if self.waiting else ""
            raise SeriesError(f"No frame of the series could be indexed yet{why}.")
        trace = self.follower.result(name=self.name, unit=self.unit)
        fams = beam_families(trace.beams, self.reference.substrate)
        total, present = family_presence(trace.intensity, trace.sigma, fams, z_min=self.z_min)
        segs = find_segments(present, trace.value, [f.label for f in fams], min_frames=self.min_frames)
        out = []
        for s in segs:
            ind = None
            if s.families:
                if segment_indexing is not None:
                    ind = segment_indexing(s, total, fams)
                else:  # the live segment that began nearest, with the same families
                    cands = [ls for ls in self.live_segments if ls["families"] == s.families and
                             ls["indexing"] is not None]
                    if cands:
                        ind = min(cands, key=lambda ls: abs(ls["first"] - s.first))["indexing"]
            out.append(Segment(s.first, s.last, s.families, s.value_range, ind))
        return ParameterSeriesResult(trace, self.reference, tuple(fams), total, present, tuple(out),
                                     np.array(self.n_spots, dtype=np.int64))


def _source_and_names(frames):
    """A fresh-iterator function over (name, frame), the frame names and their paths (or None)."""
    from ..series.pipeline import _source

    paths = None
    if isinstance(frames, (str, Path)) and Path(frames).is_dir():
        from ..io import IMAGE_SUFFIXES, _natural_key

        paths = sorted((p for p in Path(frames).iterdir() if p.is_file() and not p.name.startswith(".")
                        and p.suffix.lower() in IMAGE_SUFFIXES), key=lambda p: _natural_key(p.name))
        if not paths:
            raise SeriesError(f"{Path(frames).name}: the folder holds no image files.")
    elif isinstance(frames, (list, tuple)) and frames and all(isinstance(f, (str, Path)) for f in frames):
        paths = [Path(f) for f in frames]
    if paths is not None:
        from ..io import load_image

        def it():
            for p in paths:
                yield p.name, load_image(p)
        return it, [p.name for p in paths], paths
    source = _source(frames)
    names = []
    gen = source()
    try:
        for nm, _ in gen:
            names.append(str(nm))
    except ImageError as err:
        raise SeriesError(f"Cannot read frame {len(names)}: {err}") from None
    finally:
        close = getattr(gen, "close", None)
        if close is not None:
            close()
    return source, names, None


def _spread(n: int, k: int) -> list[int]:
    return sorted(set(np.linspace(0, n - 1, min(k, n)).round().astype(int).tolist()))


def analyse_parameter_series(frames, *, substrate, energy_eV: float, parameters=None, name_pattern: str | None = None,
                             name: str = "parameter", unit: str = "", n_probe: int = 16, n_index: int = 2,
                             z_min: float = 8.0, min_frames: int = 2, min_snr: float = 5.0,
                             progress: Callable | None = None) -> ParameterSeriesResult:
    """Analyse a whole parameter series: beams, families, segments and their structures.

    Parameters
    ----------
    frames : folder, multi-page file, list of paths, callable or sequence of arrays
        The frames in recording order (a folder in natural name order).
    substrate : str or Net2D, keyword-only
        E.g. ``"Pt(111)"`` (:func:`analysis.nets.parse_substrate`), or the (1×1) net in Å.
    energy_eV : float, keyword-only
        The one electron energy of the series.
    parameters : ParameterTable, sidecar path, (F,) values, "names" or "times", keyword-only
        Default: a number in each file name (`name_pattern`).
    name_pattern : str, optional, keyword-only
        Regular expression whose first group is the parameter in a file name.
    name, unit : str, keyword-only
        What the parameter is, when not read from a sidecar heading.
    n_probe : int, keyword-only
        Frames, spread over the series, searched for spots before following (beams
        found there are followed in every frame).
    n_index : int, keyword-only
        Frames indexed together for the camera and for each segment (1: one frame alone).
    z_min : float, keyword-only
        Significance a beam family needs to count as present.
    min_frames : int, keyword-only
        Shortest segment, frames.
    min_snr : float, keyword-only
        Spot detection threshold in units of local noise.
    progress : callable(i, n, text), optional, keyword-only
        Told how far the work is.

    Returns
    -------
    ParameterSeriesResult
        The trace of every beam, the families, their presence, the segments and their structures.

    Raises
    ------
    SeriesError
        One line: no frames, frames of different sizes, parameters that do not match,
        no frame that can be indexed.
    """
    from ..series.joint import index_series_joint
    from ..spots import measure_image

    say = progress or (lambda i, n, text="": None)
    for nm, v in (("n_probe", n_probe), ("n_index", n_index), ("min_frames", min_frames)):
        if not (isinstance(v, (int, np.integer)) and v >= 1):
            raise SeriesError(f"`{nm}` must be a positive integer, got {v!r}.")
    source, names, paths = _source_and_names(frames)
    if not names:
        raise SeriesError("The series holds no frames.")
    table = resolve_parameters(parameters, names, paths=paths, name_pattern=name_pattern, name=name, unit=unit)
    values = np.array([table.value_of(i, n) for i, n in enumerate(names)])
    from ..series.pipeline import _pick

    e = float(energy_eV)
    # pass 1: spots of frames spread over the series
    probes = _spread(len(names), n_probe)
    probe_frames = _pick(source, probes, np.full(len(names), e))
    counts = []
    for n, (f, _, i, nm) in enumerate(probe_frames):
        say(n, len(probe_frames), f"searching {nm} for spots")
        try:
            counts.append(len(measure_image(_frame_array(f), sigma_px=None, min_snr=min_snr).spots.xy))
        except (RecinetError, ValueError):
            counts.append(0)
        check_time()
    order = np.argsort(counts)[::-1]
    picks = [probe_frames[j] for j in sorted(order[:n_index].tolist())]
    say(0, 1, "indexing")
    if n_index == 1:
        f, _, i, nm = picks[0]
        ref = index_series_frame(f, energy_eV=e, substrate=substrate, frame_index=i, frame_name=nm, min_snr=min_snr)
    else:
        ref = index_series_joint(picks, substrate=substrate, min_snr=min_snr)
    live = LiveSeries(substrate, energy_eV=e, name=table.name, unit=table.unit, reference=ref, discover=True,
                      z_min=z_min, min_frames=min_frames, index_segments=False, min_snr=min_snr)
    for f, _, i, nm in probe_frames:
        live._discover(_frame_array(f))
    probes_set = set(probes)
    live.discover = False
    # pass 2: every beam in every frame
    gen = source()
    try:
        for i, (nm, f) in enumerate(gen):
            say(i, len(names), f"following {nm}")
            live._one(f, float(values[i]), str(nm))
            live.n_spots[-1] = counts[probes.index(i)] if i in probes_set else -1
    except ImageError as err:
        raise SeriesError(f"Cannot read frame {len(live.lines)}: {err}") from None
    finally:
        close = getattr(gen, "close", None)
        if close is not None:
            close()

    def index_segment(seg: Segment, total, fams):
        cols = [n for n, fm in enumerate(fams) if fm.label in seg.families]
        strength = np.nansum(total[seg.first:seg.last + 1][:, cols], axis=1)
        best = (np.argsort(-np.nan_to_num(strength, nan=-np.inf))[:n_index] + seg.first).tolist()
        chosen = _pick(source, best, np.full(len(names), e))
        say(0, 1, f"indexing frames {seg.first}–{seg.last}")
        try:
            if len(chosen) == 1:
                f, _, i, nm = chosen[0]
                return index_series_frame(f, energy_eV=e, substrate=substrate, frame_index=i, frame_name=nm,
                                          min_snr=min_snr)
            return index_series_joint(chosen, substrate=substrate, min_snr=min_snr)
        except SeriesError:
            return None

    return live.result(segment_indexing=index_segment)
