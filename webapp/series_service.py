"""The web app's calls into :mod:`analysis.series` for energy series, and the checks in front of them.

A series arrives as one uploaded file (a multi-page TIFF or a zip of images); its
bytes are kept in a disk cache of the data folder under their SHA-256, so every
worker and the background job see them, and no user input becomes a file path.
A run is the one series pipeline, :func:`analysis.series.pipeline.run_iv` (the
one ``recinet iv`` runs: first pass over the frames, indexing, beams, tracking);
this module checks the form's fields in front of it and keeps the
:class:`~analysis.series.IVResult` and a small 8-bit preview of every frame in
the same cache under a run key. The page holds only :func:`run_series`'s small
JSON summary. Every function raises a :class:`analysis.errors.RecinetError` with
one line a page can show as it is.

Positions at this edge are (x, y) pixels, x right, y down, the centre of the
top-left pixel at (0, 0).
"""

from __future__ import annotations

import base64
import functools
import hashlib
import json
import math
import tempfile
from pathlib import Path

import numpy as np

from analysis.errors import ImageError, RecinetError, SeriesError
from analysis.io import iter_frames, load_image
from analysis.jsonsafe import json_safe
from analysis.series import (DEFAULT_NAME_PATTERN, EnergyTable, average_equivalent, check_energies, csv_text,
                             read_energy_file, result_to_dict)
from analysis.series.pipeline import overlayer_matrices, run_iv
from analysis.superstructure import domains, format_matrix, wood_notation

from . import figures, service

__all__ = [
    "MAX_FRAMES", "MAX_FRAME_PIXELS", "MAX_SIDECAR_BYTES", "PREVIEW_SIDE", "ENERGY_MODES",
    "frames_of", "store_upload", "read_energies", "run_series", "load_result", "frame_view",
    "first_frame_view", "preview_factor", "groups_of", "export_csv", "export_json",
]

MAX_FRAMES = 1000  # frames in one uploaded series
MAX_FRAME_PIXELS = 4096 * 4096  # pixels in one frame (a zip or TIFF may inflate a lot)
MAX_SIDECAR_BYTES = 2_000_000  # an energy file
PREVIEW_SIDE = 512  # longer side of the 8-bit frame previews, px
ENERGY_MODES = ("file", "step", "names")
_KEEP_S = 3 * 86400  # uploads and runs stay this long in the cache

def _cache():
    """diskcache of uploads and runs in the data folder's job-cache (see service.job_cache)."""

    return service.job_cache("series", 4 * 1024**3)


def _short(name) -> str:
    return str(name or "upload")[:120]


# --------------------------------------------------------------------------- frames

def frames_of(raw: bytes, filename: str):
    """Yield ``(name, (M, N) float64 frame)`` of an uploaded stack, one at a time.

    Frame names carry the upload's file name (``stack.tif#3``) or the zip member's;
    errors name the file the user chose. More than :data:`MAX_FRAMES` frames is refused.

    Parameters
    ----------
    raw : bytes
        The uploaded stack file.
    filename : str
        Its name.

    Yields
    ------
    name : str
        The frame's name.
    frame : (M, N) ndarray of float64
        Its pixels.
    """

    name = _short(filename)
    it = iter_frames(raw, max_pixels=MAX_FRAME_PIXELS)
    i = 0
    while True:
        try:
            fname, frame = next(it)
        except StopIteration:
            return
        except ImageError as err:
            raise ImageError(str(err).replace("<bytes>", name)) from None
        if i >= MAX_FRAMES:
            raise SeriesError(f"{name}: more than {MAX_FRAMES} frames; split the series into parts.")
        yield fname.replace("<bytes>", name, 1), frame
        i += 1


def _preview(frame: np.ndarray) -> bytes:
    """An 8-bit PNG of one frame for the slider view, at most :data:`PREVIEW_SIDE` px."""

    small, _ = figures.downsample(frame, PREVIEW_SIDE)
    return figures.png_bytes(figures.display_levels(small, scale="gamma", gamma=0.5, clip_pct=(1.0, 99.95)))


def preview_factor(width: int, height: int) -> int:
    """How many times smaller than the frame its preview is (1 up to :data:`PREVIEW_SIDE` px).

    Parameters
    ----------
    width, height : int
        Frame size, pixels.

    Returns
    -------
    int
        The downsampling factor (≥ 1).
    """
    return max(1, math.ceil(max(width, height) / PREVIEW_SIDE))


def store_upload(raw: bytes, filename: str) -> dict:
    """Keep an uploaded series on the server; return ``{"sha", "filename", "width", "height", "bytes"}``.

    Only the first frame is decoded here (to refuse what is not an image at once);
    the rest is read by the run.

    Parameters
    ----------
    raw : bytes
        The uploaded file.
    filename : str
        Its name.

    Returns
    -------
    dict
        The keys above; ``sha`` is the SHA-256 of `raw`.
    """
    name = _short(filename)
    try:
        first_name, first = next(frames_of(raw, name))
    except StopIteration:
        raise SeriesError(f"{name}: the file holds no frames.") from None
    sha = hashlib.sha256(raw).hexdigest()
    c = _cache()
    c.set(("raw", sha), raw, expire=_KEEP_S)
    c.set(("first", sha), _preview(first), expire=_KEEP_S)
    h, w = first.shape
    return {"sha": sha, "filename": name, "width": int(w), "height": int(h), "bytes": len(raw)}


def _raw(sha: str) -> bytes:
    raw = _cache().get(("raw", str(sha)))
    if raw is None:
        raise SeriesError("The uploaded series is no longer on the server; drop it again.")
    return raw


def first_frame_view(sha: str) -> str | None:
    """PNG data URL of the first frame of an uploaded series (before any run), or None.

    Parameters
    ----------
    sha : str
        The upload's SHA-256 (:func:`store_upload`).

    Returns
    -------
    str or None
        ``data:image/png;base64,...``.
    """

    png = _cache().get(("first", str(sha)))
    return None if png is None else "data:image/png;base64," + base64.b64encode(png).decode("ascii")


# --------------------------------------------------------------------------- energies

def read_energies(raw: bytes, filename: str) -> dict:
    """Read an uploaded energy file (CSV or JSON, as :func:`analysis.series.read_energy_file`).

    Returns ``{"filename", "energy_eV", "current" or None, "frame" or None}`` (JSON-safe).
    Energies in frame order are checked at once (positive, steadily rising or falling).

    Parameters
    ----------
    raw : bytes
        The uploaded file.
    filename : str
        Its name (its suffix says CSV or JSON).

    Returns
    -------
    dict
        The keys above.
    """

    name = _short(filename)
    if not raw:
        raise SeriesError(f"{name}: the energy file is empty.")
    if len(raw) > MAX_SIDECAR_BYTES:
        raise SeriesError(f"{name}: an energy file of {len(raw) / 1e6:.1f} MB is more than the "
                          f"{MAX_SIDECAR_BYTES / 1e6:.0f} MB limit.")
    suffix = ".json" if name.lower().endswith(".json") else ".csv"
    fixed = "energies" + suffix  # our own name on disk; messages get the user's back
    with tempfile.TemporaryDirectory(prefix="recinet-energies-") as d:
        p = Path(d) / fixed
        p.write_bytes(raw)
        try:
            table = read_energy_file(p)
        except SeriesError as err:
            raise SeriesError(str(err).replace(fixed, name)) from None
    frame = None if table.frame is None else list(table.frame)
    numbered = frame is None or all(f.strip().lstrip("+-").isdigit() for f in frame)
    if numbered:
        try:
            check_energies(table.energy_eV)
        except SeriesError as err:
            raise SeriesError(f"{name}: {err}") from None
    return {"filename": name, "energy_eV": table.energy_eV.tolist(),
            "current": None if table.current is None else table.current.tolist(), "frame": frame}


def _number(value, what: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SeriesError(f"{what} must be a number of eV, got {str(value)[:40]!r}.") from None
    if not math.isfinite(v):
        raise SeriesError(f"{what} must be a finite number of eV, got {value!r}.")
    return v


def _energy_table(table: dict):

    if not isinstance(table, dict) or not table.get("energy_eV"):
        raise SeriesError("Drop an energy file (CSV or JSON) first, or choose 'a start and a step'.")
    cur = table.get("current")
    frame = table.get("frame")
    return EnergyTable(np.asarray(table["energy_eV"], dtype=np.float64),
                       None if cur is None else np.asarray(cur, dtype=np.float64),
                       None if frame is None else tuple(str(f) for f in frame), _short(table.get("filename")))


# --------------------------------------------------------------------------- the run


def _energy_source(mode: str, table, start, step, pattern):
    """What :func:`analysis.series.run_iv` reads the energies from: (energies, name pattern)."""
    if mode == "file":
        return _energy_table(table), None
    if mode == "step":
        if start in (None, ""):
            raise SeriesError("Give the energy of the first frame (start, eV).")
        if step in (None, ""):
            raise SeriesError("Give the energy step between frames (eV).")
        s, d = _number(start, "The start energy"), _number(step, "The energy step")
        if d == 0:
            raise SeriesError("The energy step must not be 0: energies must not repeat.")
        return {"start_eV": s, "step_eV": d}, None
    if mode == "names":
        pat = str(pattern).strip() if pattern else DEFAULT_NAME_PATTERN
        if len(pat) > 200:
            raise SeriesError("The file-name pattern is too long (at most 200 characters).")
        return None, pat
    raise SeriesError(f"Unknown energy source {str(mode)[:20]!r}; use {', '.join(ENERGY_MODES)}.")


def _saturation(raw: bytes):
    try:
        return load_image(raw, max_pixels=MAX_FRAME_PIXELS).saturation_level
    except RecinetError:
        return None  # e.g. a zip: integer depth unknown, no saturation flags


def _run_key(sha: str, params: dict) -> str:
    blob = json.dumps([sha, params], sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:32]


def _index_frame(value) -> int | None:
    """The frame number typed, or None (blank: several frames are indexed together)."""
    if value in (None, ""):
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SeriesError(f"The frame to index must be a frame number, got {str(value)[:40]!r}.") from None
    if not (math.isfinite(v) and v >= 0 and v == int(v)):
        raise SeriesError(f"The frame to index must be a whole number from 0, got {value!r}.")
    return int(v)


def run_series(sha: str, filename: str, *, substrate: str, mode: str = "file", table: dict | None = None,
               start=None, step=None, pattern: str | None = None, index_frame=None, overlayer: str | None = None,
               progress=None) -> dict:
    """Index and follow every beam of the uploaded series with :func:`analysis.series.run_iv`
    (the pipeline ``recinet iv`` runs), keep the result; return its summary.

    Parameters
    ----------
    sha, filename : str
        The upload kept by :func:`store_upload`.
    substrate : str, keyword-only
        ``"Cu(100)"`` or ``"hexagonal:2.775"`` (:func:`analysis.nets.parse_substrate`).
    mode : {"file", "step", "names"}, keyword-only
        Energies from `table` (:func:`read_energies`), from `start` + i·`step` (eV), or
        from a number in each frame's name (`pattern`, a regular expression).
    table : dict, optional, keyword-only
        What :func:`read_energies` returned.
    start, step : float, optional, keyword-only
        First energy and step, eV.
    pattern : str, optional, keyword-only
        Regular expression whose first group is the energy in a frame's name.
    index_frame : int or None, keyword-only
        The frame whose pattern is indexed (geometry, substrate net, overlayer domains);
        None: several frames are indexed together (:func:`analysis.series.joint.index_series_joint`).
    overlayer : str, keyword-only
        Empty: follow the overlayer domains the indexing found; ``"none"``: substrate beams
        only; a matrix (``"2 0 / 0 2"``) or a Wood notation (``"c(2x2)"``): it and its
        symmetry-equivalent domains (:func:`analysis.series.overlayer_matrices` reads it).
    progress : callable(fraction, text), optional, keyword-only
        Told how far the run is.

    Returns
    -------
    dict
        JSON-safe: ``key`` (for :func:`load_result`), ``n_frames``, ``energy_eV``, ``width``,
        ``height``, ``factor`` (preview downsampling), ``beams`` [{label, group, n_valid}],
        ``groups`` [{label, members, r_pendry, r_zj, overlap_eV, range_eV}], ``calibration``,
        ``index`` {frame, name, energy_eV, kind, wood, matrix, n_domains, source, votes},
        ``normalised``, ``default_beams``.
    """
    say = progress or (lambda f, t="": None)
    hint = service.check_substrate(substrate)
    asked = _index_frame(index_frame)
    typed = overlayer_matrices(overlayer, hint)  # bad text fails here, before any frame is read
    energies, name_pattern = _energy_source(mode, table, start, step, pattern)
    raw = _raw(sha)
    previews: dict[int, bytes] = {}

    def frames():  # a fresh pass over the upload; each frame's preview is made on the first pass
        for i, (nm, frame) in enumerate(frames_of(raw, filename)):
            if i not in previews:
                previews[i] = _preview(frame)
            yield nm, frame

    stage = ["reading"]

    def staged(frac, text=""):
        stage[0] = "indexing" if text.startswith("indexing") else ("following" if frac >= 0.2 else stage[0])
        say(frac, text)

    n_seen = [1]

    def tracked(i, n, e):
        n_seen[0] = n
        say(0.2 + 0.78 * i / max(n, 1), f"frame {i} of {n}, {e:g} eV")

    try:
        run = run_iv(frames, substrate=hint, energies=energies, name_pattern=name_pattern, overlayer=typed,
                     index_frame=asked, all_domains=isinstance(typed, list),
                     saturation_level=_saturation(raw), progress=tracked, say=staged)
    except SeriesError as err:
        if stage[0] == "indexing" and asked is not None:
            raise SeriesError(f"{err} Try indexing another frame.") from None
        raise
    res, found = run.result, run.indexing
    net = found.substrate
    if isinstance(typed, list):
        mats = [np.asarray(d.matrix, dtype=np.float64) for m in typed for d in domains(net, m)]
        shown = {"kind": "typed", "wood": wood_notation_or_none(net, typed[0]), "matrix": format_matrix(typed[0]),
                 "source": "typed"}
    elif typed == "none":
        mats = []
        shown = {"kind": "none", "wood": None, "matrix": None, "source": "typed"}
    else:
        mats = list(run.overlayer["matrices"])
        shown = {"kind": found.kind, "wood": found.wood,
                 "matrix": found.matrix_text if found.kind != "none" else None, "source": "indexed"}
    params = {"mode": mode, "table": table, "start": start, "step": step, "pattern": pattern,
              "substrate": substrate, "index_frame": asked, "overlayer": overlayer}
    key = _run_key(sha, params)
    c = _cache()
    c.set(("iv", key), res, expire=_KEEP_S)
    c.set(("previews", key), [previews[i] for i in range(len(run.frame_names))], expire=_KEEP_S)
    say(1.0, "done")
    h, w = (int(v) for v in run.frame_shape)
    groups = groups_of(res)
    valid = res.valid
    beams_out = [{"label": lab, "group": int(res.beams.group[j]), "n_valid": int(valid[:, j].sum())}
                 for j, lab in enumerate(res.beams.labels)]
    if not any(b["n_valid"] for b in beams_out):
        raise SeriesError("No beam could be followed in any frame: check the substrate, the energies and "
                          "the frame indexed.")
    cal = res.calibration
    return json_safe({
        "key": key, "sha": sha, "filename": _short(filename), "n_frames": int(res.energy_eV.size),
        "energy_eV": res.energy_eV.tolist(), "frame_names": list(res.frame_names), "width": w, "height": h,
        "factor": preview_factor(w, h), "beams": beams_out,
        "groups": [{"label": g.label, "members": list(g.members), "r_pendry": g.r_pendry, "r_zj": g.r_zj,
                    "overlap_eV": g.overlap_eV, "range_eV": g.range_eV} for g in groups],
        "calibration": None if cal is None else cal.to_dict(),
        "index": {"frame": found.frame, "name": found.frame_name, "energy_eV": found.energy_eV, **shown,
                  "n_domains": len(mats), "substrate": hint.label or str(substrate),
                  "votes": [dict(v) for v in found.votes]},
        "symmetry": res.beams.symmetry,
        "normalised": bool(res.settings.get("normalised_by_current")),
        "default_beams": _default_beams(groups),
    })


def wood_notation_or_none(net, matrix) -> str | None:
    """The Wood notation of `matrix` on `net` as text, or None when none exists.

    Parameters
    ----------
    net : Net2D
        Real-space substrate net (Å).
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix.

    Returns
    -------
    str or None
        E.g. ``"c(2×2)"``.
    """
    try:
        w = wood_notation(net, matrix)
    except RecinetError:
        return None
    return getattr(w, "text", None)


def _default_beams(groups) -> list[str]:
    """The members of the equivalent group seen longest (not the specular beam), at most six."""
    best = None
    for g in groups:
        if g.label == "(0,0)":
            continue
        score = (len(g.members) > 1, g.overlap_eV, g.range_eV)
        if best is None or score > best[0]:
            best = (score, g)
    return [] if best is None else list(best[1].members[:6])


# --------------------------------------------------------------------------- reading a run back

@functools.lru_cache(maxsize=4)
def _load(key: str):
    res = _cache().get(("iv", key))
    if res is None:
        raise SeriesError("This run is no longer kept on the server; press 'Follow the beams' again.")
    return res


def load_result(key: str):
    """The :class:`analysis.series.IVResult` of a run (read once per process).

    Parameters
    ----------
    key : str
        The run's key (from :func:`run_series`).

    Returns
    -------
    IVResult
        The run's result.
    """
    return _load(str(key))


@functools.lru_cache(maxsize=64)
def _preview_url(key: str, i: int) -> str:

    previews = _cache().get(("previews", key))
    if previews is None:
        raise SeriesError("The frames of this run are no longer kept on the server; run it again.")
    if not 0 <= i < len(previews):
        raise SeriesError(f"There is no frame {i}; the series has {len(previews)} frames.")
    return "data:image/png;base64," + base64.b64encode(previews[i]).decode("ascii")


def frame_view(key: str, i: int) -> str:
    """PNG data URL of the preview of frame `i` of a run.

    Parameters
    ----------
    key : str
        The run's key (from :func:`run_series`).
    i : int
        Frame index (0-based).

    Returns
    -------
    str
        ``data:image/png;base64,...``.
    """
    return _preview_url(str(key), int(i))


@functools.lru_cache(maxsize=4)
def _groups(key: str):

    return average_equivalent(_load(key))


def groups_of(res) -> list:
    """The equivalent-beam groups (:func:`analysis.series.average_equivalent`) of an IVResult or run key.

    Parameters
    ----------
    res : IVResult or str
        A result, or a run key.

    Returns
    -------
    list of BeamGroup
        In the order of the beams' equivalence classes.
    """

    if isinstance(res, str):
        return _groups(res)
    return average_equivalent(res)


def export_csv(key: str, *, averaged: bool = False) -> str:
    """The I(V) table as CSV (energy in eV first, one column per beam or per group).

    Parameters
    ----------
    key : str
        The run's key (from :func:`run_series`).
    averaged : bool, keyword-only
        One column per group of equivalent beams.

    Returns
    -------
    str
        CSV text.
    """

    return csv_text(load_result(key), averaged=averaged)


def export_json(key: str) -> str:
    """The whole run as JSON (:func:`analysis.series.result_to_dict`).

    Parameters
    ----------
    key : str
        The run's key (from :func:`run_series`).

    Returns
    -------
    str
        JSON text.
    """

    return json.dumps(result_to_dict(load_result(key)), indent=1, allow_nan=False)
