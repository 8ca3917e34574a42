"""Indexing frames of a series: which frames to index, reading them, and the vote.

:func:`index_series_frame` indexes one frame with :func:`analysis.pipeline.analyze_image`
(the camera model, the substrate net and the overlayer domains it shows), which is what
:func:`analysis.series.beams_from_nets` and :func:`analysis.series.track_series` start
from (:class:`SeriesIndexing`); :func:`index_series_frames` lets several frames vote,
and :func:`vote_frame_choices` picks them by energy. The helpers here also count the
frames of a series and read the chosen ones in one pass, checking the energies on the way.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from ..errors import FitError, ImageError, RecinetError, SeriesError
from ..jsonsafe import json_safe
from ..nets import Net2D
from ..optics import ScreenGeometry
from .energies import EnergyTable, _Energies, _StartStep
from .track import _STACK_MAX_BYTES

__all__ = ["SeriesIndexing", "index_series_frame", "index_series_frames", "vote_frame_choices"]


@dataclass(frozen=True, eq=False)
class SeriesIndexing:
    """What indexing one frame of a series found (:func:`index_series_frame`).

    Attributes
    ----------
    frame : int
        Position of the frame in the series (0-based).
    frame_name : str
    energy_eV : float
        Energy of that frame, eV.
    geometry : ScreenGeometry
        Camera model fitted on that frame (the starting geometry for tracking).
    substrate : Net2D
        Real-space substrate net in the surface axes of `geometry`, Å (label kept).
    overlayers : tuple of (2, 2) ndarray of float64
        Matrices of every overlayer domain found, ``overlayer = M @ substrate``; empty
        for a clean (1×1) surface.
    kind : str
        ``"none"`` (clean), ``"commensurate"``, ``"coincidence"`` or ``"incommensurate"``.
    wood : str or None
        Wood notation of the superstructure, when one exists.
    matrix_text : str
        The first domain's matrix as text.
    confidence : float
        Share of the substrate reading among the readings found (0–1).
    mask : (M, N) ndarray of bool or None
        Pixels that may be used: the screen found on that frame minus the gun shadow.
    warnings : tuple of str
    votes : tuple of dict
        When several frames were indexed (:func:`index_series_frames`): each frame's
        ``frame``, ``energy_eV``, ``reading`` (its label, or the error) and ``confidence``.
    joint : dict or None
        When the frames were indexed together (:func:`analysis.series.joint.index_series_joint`):
        the frames and spots used, the camera's rms, the readings compared and how many
        frames read the same on their own (``frames_agreeing`` of ``frames_total``).
    """

    frame: int
    frame_name: str
    energy_eV: float
    geometry: ScreenGeometry
    substrate: Net2D
    overlayers: tuple
    kind: str
    wood: str | None
    matrix_text: str
    confidence: float
    mask: np.ndarray | None = None
    warnings: tuple = ()
    votes: tuple = ()
    joint: dict | None = None

    @property
    def label(self) -> str:
        """Short name of what was found, e.g. ``"c(2×2)"`` or ``"clean (1×1)"``."""
        if self.kind == "none":
            return "clean (1×1)"
        name = self.wood or self.matrix_text
        n = len(self.overlayers)
        return f"{name}, {self.kind}" + (f", {n} domains" if n > 1 else "")

    def to_dict(self) -> dict:
        """JSON-safe summary (the mask left out).

        Returns
        -------
        dict
            Plain JSON types.
        """
        return json_safe({
            "frame": self.frame, "frame_name": self.frame_name, "energy_eV": self.energy_eV,
            "superstructure": self.label, "kind": self.kind, "wood": self.wood, "matrix_text": self.matrix_text,
            "domains": [np.asarray(m, dtype=np.float64).tolist() for m in self.overlayers],
            "substrate_confidence": self.confidence, "geometry": self.geometry.to_dict(),
            "substrate_net_A": self.substrate.vectors.tolist(), "warnings": list(self.warnings),
            "votes": [dict(v) for v in self.votes], "joint": self.joint})


def index_series_frame(frame, *, energy_eV: float, substrate: str | Net2D, frame_index: int = 0,
                       frame_name: str = "", min_snr: float = 5.0) -> SeriesIndexing:
    """Index one frame of a series with :func:`analysis.pipeline.analyze_image`.

    The camera model, the substrate net in the optics' axes and the overlayer domains
    found are what :func:`beams_from_nets` and :func:`track_series` need. When the
    spots pair up about a centre other than the gun shadow's, the frame is indexed a
    second time from the centre of the symmetric spot pairs.

    Parameters
    ----------
    frame : (M, N) ndarray or LoadedImage
        The frame, frame units.
    energy_eV : float, keyword-only
        Its energy, eV.
    substrate : str or Net2D, keyword-only
        E.g. ``"Cu(100)"``.
    frame_index, frame_name : keyword-only
        Where the frame sits in the series (for the record and the messages).
    min_snr : float, keyword-only
        Spot detection threshold.

    Returns
    -------
    SeriesIndexing
        The frame's camera model, substrate net, overlayer domains and label.

    Raises
    ------
    SeriesError
        One line naming the frame and the reason when the frame cannot be indexed.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.simulate import forward_pattern, render_image
    >>> geom = ScreenGeometry(258.6, 251.4, 290.0, distortion=0.1, rotation_deg=6.0)
    >>> pat = forward_pattern(parse_substrate("Cu(100)"), [[[1, 1], [-1, 1]]], energy_eV=120.0, geometry=geom)
    >>> im = render_image(pat, shape=(512, 512), rng=np.random.default_rng(0))
    >>> found = index_series_frame(im.image, energy_eV=120.0, substrate="Cu(100)", frame_index=7)
    >>> print(found.label, round(found.geometry.scale_px, 1))
    c(2×2), commensurate 290.0
    """
    from ..pipeline import Edits, analyze_image

    from ..io import load_image

    where = f"frame {frame_index}" + (f" ({frame_name})" if frame_name else "")
    try:
        e = float(energy_eV)
        frame = load_image(frame)
        try:
            res = analyze_image(frame, energy_eV=e, substrate=substrate, min_snr=min_snr)
        except FitError:
            centre = _pair_centre(frame, min_snr)
            if centre is None:
                raise
            res = analyze_image(frame, energy_eV=e, substrate=substrate, min_snr=min_snr,
                                edits=Edits(center_xy=centre))
    except (RecinetError, TypeError, ValueError) as err:
        raise SeriesError(f"Could not index {where} at {energy_eV:g} eV: {err}") from None
    fit = res.index.substrate
    best = res.index.best
    hint = res.substrate_hint
    mats = () if best.kind == "none" else tuple(np.array(m, dtype=np.float64) for m in best.domains)
    valid = np.array(res.measurement.valid, dtype=bool)
    for a in (*mats, valid):
        a.flags.writeable = False
    from ..superstructure import format_matrix

    return SeriesIndexing(frame=int(frame_index), frame_name=str(frame_name), energy_eV=e, geometry=fit.geometry,
                          substrate=Net2D(fit.net.vectors, label=hint.label), overlayers=mats, kind=best.kind,
                          wood=best.wood, matrix_text=format_matrix(np.asarray(best.matrix, dtype=np.float64)),
                          confidence=float(fit.confidence), mask=valid,
                          warnings=tuple(res.warnings))


def index_series_frames(frames, *, substrate: str | Net2D, min_snr: float = 5.0) -> SeriesIndexing:
    """Index several frames of a series and keep the reading most of them agree on.

    One frame can mislead: at an energy where the integer beams sit in I(V) minima,
    positions alone may fit another substrate reading (e.g. p(2×2) and
    (√5×√5)R26.6° on nets of different size). Each frame votes for its reading
    (superstructure, kind and domain count) with the confidence of its substrate
    reading; the winner's most confident frame is returned, with every vote.

    Parameters
    ----------
    frames : iterable of (frame, energy_eV, frame_index, frame_name)
        Each frame ((M, N) array or LoadedImage) with its energy (eV), index and name.
    substrate : str or Net2D, keyword-only
        E.g. ``"Cu(100)"`` (:func:`analysis.nets.parse_substrate`), or the (1×1) net in Å.
    min_snr : float, keyword-only
        Spot detection threshold in units of local noise.

    Returns
    -------
    SeriesIndexing
        The winning reading's most confident frame, with every frame's vote.

    Raises
    ------
    SeriesError
        When no frame could be indexed (the message names each frame's reason).

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.simulate import forward_pattern, render_image
    >>> geom = ScreenGeometry(258.6, 251.4, 290.0, distortion=0.1, rotation_deg=6.0)
    >>> ims = [render_image(forward_pattern(parse_substrate("Cu(100)"), [[[1, 1], [-1, 1]]], energy_eV=e,
    ...                                     geometry=geom), shape=(512, 512), rng=np.random.default_rng(1))
    ...        for e in (100.0, 130.0)]
    >>> found = index_series_frames([(im.image, e, i, "") for i, (im, e) in enumerate(zip(ims, (100.0, 130.0)))],
    ...                             substrate="Cu(100)")
    >>> print(found.label, [v["reading"] for v in found.votes])
    c(2×2), commensurate ['c(2×2), commensurate', 'c(2×2), commensurate']
    """
    results, votes, errors = [], [], []
    for frame, energy, index, name in frames:
        try:
            r = index_series_frame(frame, energy_eV=energy, substrate=substrate, frame_index=index,
                                   frame_name=name, min_snr=min_snr)
        except SeriesError as err:
            errors.append(str(err))
            votes.append({"frame": int(index), "energy_eV": float(energy), "reading": f"not indexed: {err}",
                          "confidence": 0.0})
            continue
        results.append(r)
        votes.append({"frame": r.frame, "energy_eV": r.energy_eV, "reading": r.label, "confidence": r.confidence})
    if not results:
        raise SeriesError("No frame could be indexed: " + " ".join(errors))
    weight: dict[str, float] = {}
    for r in results:
        weight[r.label] = weight.get(r.label, 0.0) + max(r.confidence, 1e-3)
    win = max(weight, key=lambda k: weight[k])
    best = max((r for r in results if r.label == win), key=lambda r: r.confidence)
    warnings = list(best.warnings)
    agree = sum(r.label == win for r in results)
    if agree < len(votes):
        others = sorted({v["reading"] for v in votes if v["reading"] != win})
        warnings.append(f"{agree} of {len(votes)} frames read {win}; the others: " + "; ".join(others) + ".")
    return replace(best, warnings=tuple(warnings), votes=tuple(votes))


def _pair_centre(frame, min_snr: float):
    """(x, y) centre of the symmetric spot pairs found by a vote over all pairs, or None."""
    from ..calibration import estimate_center_from_pairs
    from ..spots import measure_image

    try:
        spots = measure_image(frame, sigma_px=None, min_snr=min_snr).spots
        c = estimate_center_from_pairs(spots.xy).center_xy
    except RecinetError:
        return None
    return float(c[0]), float(c[1])


def _count_frames(series, energies, first) -> int | None:
    """Frames in a series when known without decoding them (table, page count, folder listing)."""
    if isinstance(energies, EnergyTable) and not (energies.frame and not all(
            re.fullmatch(r"[+-]?\d+", f or "") for f in energies.frame)):
        return len(energies)
    p = Path(series)
    if p.is_dir():
        from ..io import IMAGE_SUFFIXES

        return sum(1 for f in p.iterdir() if f.is_file() and not f.name.startswith(".")
                   and f.suffix.lower() in IMAGE_SUFFIXES) or None
    if first is not None and first.n_frames > 1:
        return int(first.n_frames)
    return None


# Indexing works best on a pattern with a moderate number of spots: above this energy the
# pattern crowds towards the screen edge (more spots, slower and less certain readings).
_INDEX_EV_MAX = 150.0


def _frame_energies(series, energies, first) -> tuple[int | None, np.ndarray | None]:
    """(frame count, energy of every frame) where known before reading the frames."""
    n = _count_frames(series, energies, first)
    e = None
    if isinstance(energies, EnergyTable) and n == len(energies):
        e = energies.energy_eV
    elif isinstance(energies, _StartStep) and n:
        e = energies.start + energies.step * np.arange(n)
    return n, e


def _index_frame_choice(series, energies, first) -> int:
    """The frame nearest the middle of the energy range, or nearest 150 eV when the middle
    is higher; the middle of the series when the energies are known only frame by frame."""
    n, e = _frame_energies(series, energies, first)
    if e is not None:
        target = min(0.5 * (e.min() + e.max()), _INDEX_EV_MAX)
        return int(np.argmin(np.abs(e - target)))
    if n is None:  # e.g. a zip with energies in the file names: count the frames once
        from ..io import iter_frames

        n = sum(1 for _ in iter_frames(series, max_bytes=_STACK_MAX_BYTES))
    return max(n - 1, 0) // 2


def _index_frame_choices(series, energies, first, n_frames: int = 5) -> list[int]:
    """Frames to index and vote over: the usual choice (:func:`_index_frame_choice`) and
    others spread over the lower part of the range (up to 250 eV), where several rings of
    beams are seen and spots do not crowd."""
    k0 = _index_frame_choice(series, energies, first)
    n, e = _frame_energies(series, energies, first)
    if e is None:
        if not n:
            return [k0]
        picks = np.rint(np.linspace(0.1, 0.6, n_frames) * (n - 1)).astype(int)
        return sorted({k0, *(int(p) for p in picks)})
    return vote_frame_choices(e, n_frames=n_frames)


def vote_frame_choices(energy_eV, *, n_frames: int = 5, e_max_eV: float = 250.0) -> list[int]:
    """Frames (0-based) to index and vote over (:func:`index_series_frames`), by energy.

    The frame nearest the middle of the range (or nearest 150 eV when the middle is
    higher), and `n_frames` more spread from 10 % into the range up to `e_max_eV`, where
    several rings of beams are seen and spots do not crowd.

    Parameters
    ----------
    energy_eV : (F,) array_like of float
        The energy of every frame, eV.
    n_frames : int, keyword-only
        Frames chosen besides the middle one.
    e_max_eV : float, keyword-only
        Highest energy chosen, eV.

    Returns
    -------
    list of int
        Frame indices in increasing order, without repeats.

    Examples
    --------
    >>> e = np.arange(50.0, 401.0, 10.0)
    >>> e[vote_frame_choices(e)].tolist()
    [80.0, 130.0, 150.0, 170.0, 210.0, 250.0]
    """
    e = np.asarray(energy_eV, dtype=np.float64).ravel()
    if not e.size:
        return []
    k0 = int(np.argmin(np.abs(e - min(0.5 * (e.min() + e.max()), _INDEX_EV_MAX))))
    lo = float(e.min()) + 0.1 * float(np.ptp(e))
    hi = max(min(float(e.max()), e_max_eV), lo)
    picks = [int(np.argmin(np.abs(e - t))) for t in np.linspace(lo, hi, n_frames)]
    return sorted({k0, *picks})


def _seek_frames(series, wanted: list[int], energies, name_pattern: str) -> list[tuple]:
    """(index, name, frame, energy_eV) of each wanted frame, in one pass over the series."""
    from ..io import iter_frames

    en = _Energies(energies, name_pattern)
    want = set(wanted)
    out, i = [], -1
    frames = iter_frames(series, max_bytes=_STACK_MAX_BYTES)
    try:
        for i, (name, frame) in enumerate(frames):
            e, _ = en.at(i, name)
            if i in want:
                out.append((i, name, frame, e))
                if len(out) == len(want):
                    break
    except ImageError as err:
        raise SeriesError(f"Cannot read frame {i + 1}: {err}") from None
    finally:
        frames.close()
    return out


def _seek_frame(series, n: int, energies, name_pattern: str):
    """(name, frame, energy_eV) of frame `n`, checking the energies of the frames before it."""
    from ..io import iter_frames

    en = _Energies(energies, name_pattern)
    i = -1
    frames = iter_frames(series, max_bytes=_STACK_MAX_BYTES)
    try:
        for i, (name, frame) in enumerate(frames):
            e, _ = en.at(i, name)
            if i == n:
                return name, frame, e
    except ImageError as err:
        raise SeriesError(f"Cannot read frame {i + 1}: {err}") from None
    finally:
        frames.close()  # the stack's file is closed now, not when the reader is collected
    raise SeriesError(f"--index-frame {n} is beyond the last frame (the series has {i + 1} frames).")
