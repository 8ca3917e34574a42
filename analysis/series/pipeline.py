"""One energy series from frames to I(V) curves: :func:`run_iv` (``recinet iv`` and the web call it).

A first pass reads every frame once (nothing is kept but the names) and stops on bad
input before any work: frames of different sizes, a single frame, energies that do not
match the frames one to one, repeat or go back. Then several frames spread over the
range are indexed together (:func:`analysis.series.joint.index_series_joint`) unless a
camera geometry is given or one frame is named, the beams of the substrate and the
overlayer (found, or typed as a matrix or in Wood notation, or ``"none"``) are listed
(:func:`analysis.series.beams_from_nets`) and followed (:func:`analysis.series.track_series`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import ImageError, SeriesError
from ..nets import Net2D
from ..optics import ScreenGeometry
from .energies import EnergyTable, _Energies, _StartStep, read_energy_file
from .index_frames import SeriesIndexing, index_series_frame, vote_frame_choices
from .joint import index_series_joint
from .track import _STACK_MAX_BYTES, IVResult, _worth_reading_ahead, track_series

__all__ = ["IVRun", "run_iv", "overlayer_matrices"]

_NO_OVERLAYER = ("none", "no", "clean", "1x1", "(1x1)", "1×1", "(1×1)", "p(1x1)", "p(1×1)")


@dataclass(frozen=True, eq=False)
class IVRun:
    """What :func:`run_iv` found and measured.

    Attributes
    ----------
    result : IVResult
        The curves, flags and the geometry fitted over the series.
    indexing : SeriesIndexing or None
        How the series was indexed (None when a geometry was given).
    energy_eV : (F,) ndarray of float64
        The energy of every frame, checked before the run.
    frame_names : tuple of str
    frame_shape : (rows, cols)
    overlayer : dict
        ``source`` ("indexed", "typed" or "none"), ``matrices`` (the domains followed).
    """

    result: IVResult
    indexing: SeriesIndexing | None
    energy_eV: np.ndarray
    frame_names: tuple
    frame_shape: tuple
    overlayer: dict


def overlayer_matrices(overlayer, substrate: Net2D):
    """The overlayer as given: None (index it), ``"none"`` (substrate beams only) or a list
    of (2, 2) matrices, from a matrix, a list of them, text (``"2 0 / 0 2"``) or Wood
    notation (``"c(2x2)"``, ``"(√3×√3)R30°"``).

    >>> from analysis.nets import parse_substrate
    >>> overlayer_matrices("c(2x2)", parse_substrate("Cu(100)"))[0].tolist()
    [[1.0, 1.0], [0.0, 2.0]]

    Parameters
    ----------
    overlayer : None, str, (2, 2) array_like or list of them
        The overlayer as the user gave it.
    substrate : Net2D
        Real-space substrate net (Å), for Wood notation.

    Returns
    -------
    None, str or list of (2, 2) ndarray of float64
        None, ``"none"`` or the real-space matrices.
    """
    from ..superstructure import parse_matrix, parse_wood

    if overlayer is None:
        return None
    if isinstance(overlayer, str):
        t = overlayer.strip()
        if not t:
            return None
        if len(t) > 200:
            raise SeriesError("The overlayer text is too long (at most 200 characters).")
        if t.lower() in _NO_OVERLAYER:
            return "none"
        wood = "(" in t and ("x" in t.lower() or "×" in t)
        m = parse_wood(t, substrate) if wood else parse_matrix(t)
        return [np.asarray(m, dtype=np.float64)]
    arr = np.asarray(overlayer, dtype=np.float64)
    if arr.shape == (2, 2):
        return [arr]
    if arr.ndim == 3 and arr.shape[1:] == (2, 2):
        return [a for a in arr]
    items = list(overlayer)
    if not items:
        return None
    out = []
    for it in items:
        got = overlayer_matrices(it, substrate)
        if isinstance(got, list):
            out.extend(got)
    return out or "none"


def _source(frames, *, as_float: bool = True):
    """A function giving a fresh iterator of (name, frame) over the series (`as_float`
    False: integer frames in their own type, as :func:`analysis.io.iter_frames`)."""
    if callable(frames):
        return frames
    if isinstance(frames, (str, Path, bytes)):
        from ..io import iter_frames

        return lambda: iter_frames(frames, max_bytes=_STACK_MAX_BYTES, as_float=as_float)
    frames = list(frames)

    def it():
        for i, f in enumerate(frames):
            yield (f if isinstance(f, tuple) else (f"frame {i}", f))
    return it


def _first_pass(source, energies, name_pattern):
    """Names, energies and shape of every frame, read once; bad input stops here."""
    en = _Energies(energies, name_pattern)
    names, e, shape = [], [], None
    it = source()
    try:
        while True:
            try:
                nm, frame = next(it)
            except StopIteration:
                break
            except ImageError as err:
                after = f" (after {names[-1]})" if names else ""
                raise SeriesError(f"Cannot read frame {len(names)}{after}: {err}") from None
            shp = tuple(np.shape(getattr(frame, "data", frame)))
            if shape is None:
                shape = shp
            elif shp != shape:
                raise SeriesError(f"Frame {len(names)} ({nm}) is {shp[1]}×{shp[0]} px but frame 0 ({names[0]}) is "
                                  f"{shape[1]}×{shape[0]} px: all frames must have one size.")
            e.append(en.at(len(names), nm)[0])
            names.append(str(nm))
    finally:
        close = getattr(it, "close", None)
        if close is not None:
            close()
    if not names:
        raise SeriesError("The series holds no frames.")
    if len(names) < 2:
        raise SeriesError("The series holds one frame: an I(V) curve needs at least two energies.")
    if en.table is not None and en.by_name is None and len(names) != len(en.table):
        raise SeriesError(f"The stack has {len(names)} frames but {len(en.table)} energies are listed "
                          f"({en.table.source}): give one energy per frame.")
    from .energies import check_energies

    return names, check_energies(e, names), shape


def _pick(source, wanted, energy_eV):
    wanted = set(wanted)
    out = []
    it = source()
    try:
        for i, (nm, frame) in enumerate(it):
            if i in wanted:
                out.append((frame, float(energy_eV[i]), i, str(nm)))
                if len(out) == len(wanted):
                    break
    finally:
        close = getattr(it, "close", None)
        if close is not None:
            close()
    return out


def run_iv(frames, *, substrate: str | Net2D, energies=None, overlayer=None, geometry: ScreenGeometry | None = None,
           azimuth_deg: float = 0.0, index_frame: int | None = None, name_pattern: str | None = None,
           mask: np.ndarray | None = None, all_domains: bool = False, symmetry: str = "auto",
           radius_px: float | None = None, background: str = "annulus", method: str = "aperture",
           gain: float = 1.0, saturation_level: float | None = None, normalise_current: bool = True,
           n_index_frames: int = 6, progress=None, say=None) -> IVRun:
    """Index an energy series and follow every beam through it.

    Parameters
    ----------
    frames : path, bytes, callable or sequence
        A multi-page TIFF, folder or zip; a function returning a fresh iterator of
        (name, frame) each call; or the frames in memory.
    substrate : str or Net2D, keyword-only
        E.g. ``"Cu(100)"`` (see :func:`analysis.nets.parse_substrate`), or the (1×1) net in Å.
    energies : EnergyTable, path, (F,) array_like, {"start_eV", "step_eV"} or None, keyword-only
        None: a number in each frame's name (`name_pattern`).
    overlayer : None, "none", (2, 2) array_like, list of them, matrix text or Wood notation, keyword-only
        None: the overlayer the indexing finds; ``"none"``: substrate beams only.
    geometry : ScreenGeometry, keyword-only
        A saved camera geometry (then nothing is indexed; `azimuth_deg` turns the net).
    azimuth_deg : float, keyword-only
        With `geometry`: counter-clockwise rotation of the substrate net on the screen, degrees.
    index_frame : int, keyword-only
        Index only this frame (default: several frames together).
    name_pattern : str, optional, keyword-only
        Regular expression whose first group is the energy in a frame's name (default
        ``energies.DEFAULT_NAME_PATTERN``).
    mask : (M, N) ndarray of bool, optional, keyword-only
        Pixels that may be used (False: gun shadow, holder arm), as for
        :func:`analysis.series.track_series`.
    all_domains : bool, keyword-only
        Follow the beams of every symmetry domain of the overlayer matrices.
    symmetry : str, keyword-only
        Point group for the classes of equivalent beams (``"auto"``: the substrate's).
    radius_px : float, optional, keyword-only
        Integration aperture radius, pixels (default from the spot σ of the first frame).
    background : {"annulus", "plane"}, keyword-only
        Local background model under each beam.
    method : {"aperture", "profile"}, keyword-only
        Aperture sum or profile fit of each beam.
    gain : float, keyword-only
        Frame units per detected count (for the shot noise).
    saturation_level : float, optional, keyword-only
        Full-scale value; beams touching it are flagged.
    normalise_current : bool, keyword-only
        Divide by the beam current when the energy table has one.
    n_index_frames : int, keyword-only
        How many frames are indexed together when neither `geometry` nor `index_frame` is given.
    progress : callable(i, n, energy_eV), keyword-only
        Called as the frames are followed.
    say : callable(fraction, text), keyword-only
        Called at each stage.

    Returns
    -------
    IVRun
        ``.result`` (the beams' I(V) curves, flags and the geometry fitted over the
        series), ``.indexing`` (how the series was indexed; None with `geometry`),
        ``.energy_eV`` ((F,) eV) and the overlayer followed.

    Raises
    ------
    SeriesError
        One line naming the problem, before any work when the input is bad.

    Examples
    --------
    >>> from analysis.simulate import render_series
    >>> from analysis.nets import parse_substrate
    >>> geom = ScreenGeometry(250.0, 256.0, 300.0, distortion=0.2, rotation_deg=5.0)
    >>> e = np.arange(80.0, 141.0, 20.0)
    >>> ims = [im.image for _, im in render_series(parse_substrate("Cu(100)"), (), e, geometry=geom,
    ...                                            shape=(512, 512), rng=np.random.default_rng(0))]
    >>> run = run_iv(ims, substrate="Cu(100)", energies=e)
    >>> print(run.indexing.label, run.result.energy_eV.size)
    clean (1×1) 4
    """
    from ..nets import parse_substrate
    from .beams import beams_from_nets
    from .energies import DEFAULT_NAME_PATTERN

    say = say or (lambda f, t="": None)
    hint = parse_substrate(substrate) if isinstance(substrate, str) else substrate
    mats = overlayer_matrices(overlayer, hint)
    if isinstance(energies, (str, Path)):
        energies = read_energy_file(energies)
    elif isinstance(energies, dict) and set(energies) == {"start_eV", "step_eV"}:
        energies = _StartStep(energies["start_eV"], energies["step_eV"])
    elif energies is not None and not isinstance(energies, (EnergyTable, _StartStep)):
        energies = np.asarray(energies, dtype=np.float64)
    pattern = name_pattern or DEFAULT_NAME_PATTERN
    source = _source(frames)
    say(0.02, "reading the frames")
    names, e, shape = _first_pass(source, energies, pattern)
    found = None
    if geometry is not None:
        net, azimuth = hint, float(azimuth_deg)
    else:
        azimuth = 0.0
        if index_frame is not None:
            if not (0 <= int(index_frame) < len(names)):
                raise SeriesError(f"Frame {index_frame} to index is beyond the last frame (the series has "
                                  f"{len(names)} frames, 0 to {len(names) - 1}).")
            say(0.1, f"indexing frame {index_frame}")
            (f, ek, i, nm), = _pick(source, [int(index_frame)], e)
            found = index_series_frame(f, energy_eV=ek, substrate=hint, frame_index=i, frame_name=nm)
        else:
            picks = vote_frame_choices(e, n_frames=n_index_frames, e_max_eV=300.0)
            say(0.1, f"indexing {len(picks)} frames together")
            found = index_series_joint(_pick(source, picks, e), substrate=hint)
        geometry, net = found.geometry, found.substrate
        mask = found.mask if mask is None else mask
    if mats is None:
        mats = list(found.overlayers) if found is not None else []
        ov = {"source": "indexed" if found is not None else "none", "matrices": mats}
    elif isinstance(mats, str):
        mats = []
        ov = {"source": "none", "matrices": []}
    else:
        ov = {"source": "typed", "matrices": mats}
    beams = beams_from_nets(net, mats, energy_max_eV=float(np.max(e)), geometry=geometry, azimuth_deg=azimuth,
                            all_domains=all_domains, symmetry=symmetry)
    say(0.2, "following the beams")
    try:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            res = track_series((_source(frames, as_float=False) if isinstance(frames, (str, Path, bytes))
                                else source)(), beams, geometry,
                               energies=energies if isinstance(energies, EnergyTable) else np.asarray(e), mask=mask, radius_px=radius_px,
                               background=background, method=method, gain=gain, saturation_level=saturation_level,
                               normalise_current=normalise_current, progress=progress,
                               prefetch=_worth_reading_ahead(frames))  # the series as given, not its iterator
    except ImageError as err:
        raise SeriesError(f"Cannot read a frame: {err}") from None
    if found is not None:
        from dataclasses import replace

        res = replace(res, settings={**res.settings, "indexing": found.to_dict()})
    return IVRun(result=res, indexing=found, energy_eV=e, frame_names=tuple(names), frame_shape=tuple(shape),
                 overlayer=ov)

