"""The web app's only call sites into :mod:`analysis`, and the upload checks in front of them.

The demo images (:mod:`webapp.demos`) and the JSON export of an analysis
(:mod:`webapp.bundles`) live in their own modules; their names are handed out here too.

Every function raises an :class:`analysis.errors.RecinetError` with a one-line
message a page can show as it is; pages never call the core directly.
"""

from __future__ import annotations

import base64
import binascii
import dataclasses
import functools
import hashlib
import json
import math
import os
import re

import diskcache
import numpy as np

from analysis import pipeline, serialize
from analysis.errors import ImageError, NetError, ParameterError, RecinetError
from analysis.indexing import predicted_beams
from analysis.io import load_image
from analysis.nets import Net2D, parse_substrate, reciprocal
from analysis.optics import ScreenGeometry
from analysis.series.pipeline import overlayer_matrices
from analysis.superstructure import format_matrix

from . import runtime
from .bundles import EXPORT_FORMAT, export_bundle, read_bundle  # handed out here too
from .demos import DEMO_DIR, demo_bytes, demo_choices, demo_defaults  # handed out here too

__all__ = [
    "result_object", "candidate_predictions", "record_key", "calibration_of",
    "DEMO_DIR", "EXPORT_FORMAT", "demo_choices", "demo_bytes", "demo_defaults", "decode_upload", "read_image",
    "image_array", "check_energy", "check_substrate", "analyze", "try_model", "summary_of",
    "export_bundle", "read_bundle", "clean_edits",
]

_DATA_URL = re.compile(r"data:([\w.+/-]*)(;[\w=.+-]+)*;base64,", re.ASCII)
MAX_EDITS = 500
MAX_MODEL_CELLS = 400  # substrate cells in one tried model's cell: beyond it the drawing has ~10⁴ beams


# --------------------------------------------------------------------------- uploads

def decode_upload(contents: str | None, filename: str | None, *, max_bytes: int) -> bytes:
    """Raw bytes of a ``dcc.Upload`` data URL, refusing empty and oversize files before decoding.

    Parameters
    ----------
    contents : str or None
        The ``data:...;base64,...`` URL.
    filename : str or None
        The file's name, for messages.
    max_bytes : int, keyword-only
        Largest accepted file.

    Returns
    -------
    bytes
        The file's bytes.

    Examples
    --------
    >>> decode_upload("data:image/png;base64,aGVsbG8=", "x.png", max_bytes=100)
    b'hello'
    """
    name = (filename or "upload")[:120]
    if not contents or not isinstance(contents, str):
        raise ImageError(f"{name}: the upload is empty.")
    m = _DATA_URL.match(contents)
    if not m:
        raise ImageError(f"{name}: the upload did not arrive as a file (no base64 data).")
    payload = contents[m.end():]
    est = len(payload) * 3 // 4
    if est > max_bytes:
        raise ImageError(f"{name}: the file is {est / 1e6:.1f} MB; the limit is {max_bytes / 1e6:.1f} MB.")
    try:
        raw = base64.b64decode(payload, validate=True)
    except (binascii.Error, ValueError):
        raise ImageError(f"{name}: the upload is not valid base64 data.") from None
    if not raw:
        raise ImageError(f"{name}: the file is empty.")
    if len(raw) > max_bytes:
        raise ImageError(f"{name}: the file is {len(raw) / 1e6:.1f} MB; the limit is {max_bytes / 1e6:.1f} MB.")
    return raw


def read_image(raw: bytes, *, name: str = "upload"):
    """Decode image bytes through :func:`analysis.io.load_image` (all format and bomb checks live there).

    Parameters
    ----------
    raw : bytes
        The image file.
    name : str, keyword-only
        What messages call it.

    Returns
    -------
    LoadedImage
        The decoded frame.
    """

    try:
        im = load_image(raw)
    except ImageError as err:  # name the file the user chose, not "<bytes>"
        raise ImageError(str(err).replace("<bytes>", name[:120], 1)) from None
    except RecinetError:
        raise
    except (MemoryError, OSError, ValueError) as err:  # a decoder failing in a way io did not foresee
        raise ImageError(f"{name[:120]}: cannot be read as an image ({type(err).__name__}).") from None
    return im


@functools.lru_cache(maxsize=6)
def _cached_array(sha: str, store_key: int) -> np.ndarray:

    raw = runtime.get_store().image_bytes(sha)
    if raw is None:
        raise ParameterError("The image of this analysis is no longer stored; upload it again.")
    return read_image(raw).data


def image_array(sha: str) -> np.ndarray:
    """The (M, N) float64 pixels of a stored image, decoded once per process.

    Parameters
    ----------
    sha : str
        The image's SHA-256 (the store's key).

    Returns
    -------
    (M, N) ndarray of float64
        The pixels (read-only).
    """

    return _cached_array(sha, id(runtime.get_store()))


# --------------------------------------------------------------------------- parameters

def check_energy(value) -> float:
    """Electron energy from a form field, in eV (the pipeline's check: 5 to 5000 eV).

    Parameters
    ----------
    value : object
        The field's value.

    Returns
    -------
    float
        The energy, eV.
    """

    return pipeline.check_energy(value)


def check_substrate(text):
    """Substrate net from a preset like ``Pt(111)`` or a net like ``hexagonal:2.775``.

    Parameters
    ----------
    text : str
        The field's value.

    Returns
    -------
    Net2D
        The (1×1) real-space net, Å.
    """

    if not isinstance(text, str) or len(text) > 120:
        raise NetError("Substrate must be a short text like 'Pt(111)' or 'hexagonal:2.775'.")
    return parse_substrate(text)


def clean_edits(edits) -> dict:
    """Manual edits from the browser, checked: ``added`` [[x, y]], ``removed`` [[x, y]] (spots dropped,
    found again by position), ``center`` [x, y] or None.

    Parameters
    ----------
    edits : dict or None
        The edits as the browser sent them.

    Returns
    -------
    dict
        ``{"added", "removed", "center"}`` with finite pixel coordinates.
    """
    edits = edits if isinstance(edits, dict) else {}

    def point(p):
        if isinstance(p, (list, tuple)) and len(p) == 2:
            try:
                x, y = float(p[0]), float(p[1])
            except (TypeError, ValueError):
                return None
            if math.isfinite(x) and math.isfinite(y):
                return [x, y]
        return None

    added = [q for q in (point(p) for p in (edits.get("added") or [])[:MAX_EDITS]) if q is not None]
    removed = [q for q in (point(p) for p in (edits.get("removed") or [])[:MAX_EDITS]) if q is not None]
    return {"added": added, "removed": removed, "center": point(edits.get("center"))}


# --------------------------------------------------------------------------- the analysis

def calibration_of(result: dict | None):
    """The fitted camera model (a ScreenGeometry dict) a saved result carries, or None.

    Parameters
    ----------
    result : dict or None
        A result dict.

    Returns
    -------
    dict or None
        Its camera model as a ScreenGeometry dict.
    """
    if not isinstance(result, dict):
        return None
    for key in ("geometry", "calibration"):
        if isinstance(result.get(key), dict) and result[key]:
            return result[key]
    return None


def record_key(sha: str, parameters: dict, edits: dict | None) -> str:
    """A stable key for one (image, parameters, edits): the cache name of its analysis object.

    Parameters
    ----------
    sha : str
        The image's SHA-256.
    parameters : dict
        The analysis parameters.
    edits : dict or None
        The manual edits.

    Returns
    -------
    str
        A hex digest.
    """

    blob = json.dumps(_normalised([sha, parameters or {}, clean_edits(edits)]), sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


def _normalised(value):
    """The same inputs as the same value, however they travelled: numbers as floats (75 from the
    browser's JSON and 75.0 from Python are one energy), text stripped, tuples as lists.

    >>> _normalised({"energy_eV": 75, "substrate": " Cu(100) ", "c": (1, True, None)})
    {'energy_eV': 75.0, 'substrate': 'Cu(100)', 'c': [1.0, True, None]}
    """
    if isinstance(value, bool) or value is None:
        return value
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        return value.strip()
    if isinstance(value, dict):
        return {str(k).strip(): _normalised(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_normalised(v) for v in value]
    try:  # numpy scalars
        return float(value)
    except (TypeError, ValueError):
        return str(value)


_CACHES: dict = {}  # folder name → (process id, diskcache.Cache)


def job_cache(name: str, size_limit: int):
    """The diskcache in the data folder's job-cache subfolder `name`, opened once per process
    (shared by workers and background jobs; the least recently used entries are evicted).

    Parameters
    ----------
    name : str
        Subfolder name.
    size_limit : int
        Largest size of the cache, bytes.

    Returns
    -------
    diskcache.Cache
        The cache.
    """



    pid, cache = _CACHES.get(name, (None, None))
    if cache is None or pid != os.getpid():
        cache = diskcache.Cache(str(runtime.get_settings().cache_dir / name), size_limit=size_limit,
                                eviction_policy="least-recently-used")
        _CACHES[name] = (os.getpid(), cache)
    return cache


def _results_cache():
    """diskcache of analysis objects in the data folder."""
    return job_cache("results", 2 * 1024**3)


def _pipeline_edits(ed: dict) -> dict:
    return {"added_xy": ed["added"], "removed_xy": ed["removed"], "center_xy": ed["center"]}


def analyze(image: np.ndarray, *, energy_eV: float, substrate: str, edits: dict | None = None,
            reference: np.ndarray | None = None, reference_energy_eV: float | None = None,
            calibration: dict | None = None, progress=None, cache_key: str | None = None) -> dict:
    """Run the analysis and return the result as its JSON-safe dict.

    With `cache_key`, the analysis object is kept (without its background maps)
    so that trying a model or drawing a candidate later needs no new analysis.

    Parameters
    ----------
    image : (M, N) ndarray of float64
        The image's pixels.
    energy_eV : float, keyword-only
        Beam energy, eV.
    substrate : str, keyword-only
        E.g. ``"Pt(111)"`` or ``"hexagonal:2.775"``.
    edits : dict, optional, keyword-only
        Manual edits (:func:`clean_edits` checks them).
    reference : (M, N) ndarray of float64, optional, keyword-only
        A clean-substrate image from the same optics.
    reference_energy_eV : float, optional, keyword-only
        Its energy, eV.
    calibration : dict, optional, keyword-only
        A saved camera model (a ScreenGeometry dict).
    progress : callable(fraction, message), optional, keyword-only
        Told how far the analysis is.
    cache_key : str, optional, keyword-only
        Name under which the analysis object is cached (:func:`record_key`).

    Returns
    -------
    dict
        :func:`analysis.serialize.result_to_dict` of the analysis.
    """

    e = check_energy(energy_eV)
    check_substrate(substrate)
    ed = clean_edits(edits)
    geom = ScreenGeometry.from_dict(calibration) if isinstance(calibration, dict) else calibration
    result = pipeline.analyze_image(image, energy_eV=e, substrate=substrate, edits=_pipeline_edits(ed),
                                    reference=reference, reference_energy_eV=reference_energy_eV,
                                    calibration=geom, progress=progress)
    if cache_key:
        slim = dataclasses.replace(result, measurement=dataclasses.replace(result.measurement, background=None))
        try:
            _results_cache().set(cache_key, slim, expire=7 * 86400)
        except Exception:  # noqa: BLE001 - a full or unwritable cache only costs a re-analysis later
            pass
    return serialize.result_to_dict(result)


def result_object(record: dict):
    """The analysis object behind a stored record: from the cache, else analysed again (same inputs).

    Parameters
    ----------
    record : dict
        A stored analysis record: ``sha`` (the image's SHA-256), ``parameters``, ``edits``.

    Returns
    -------
    AnalysisResult
        The analysis object.
    """

    params = (record or {}).get("parameters") or {}
    sha = (record or {}).get("sha")
    key = record_key(sha, params, record.get("edits"))
    try:
        obj = _results_cache().get(key)
    except Exception:  # noqa: BLE001
        obj = None
    if obj is not None:
        return obj
    ref = None
    if params.get("reference_sha256"):
        ref = image_array(params["reference_sha256"])
    cal = None
    if params.get("calibration_from"):
        from webapp import calibrations  # it imports service: a top-level import would be circular

        cal = calibrations.resolve(runtime.get_store(), params["calibration_from"])
    analyze(image_array(sha), energy_eV=params.get("energy_eV"), substrate=params.get("substrate", ""),
            edits=record.get("edits"), reference=ref, reference_energy_eV=params.get("reference_energy_eV"),
            calibration=cal, cache_key=key)
    obj = _results_cache().get(key)
    if obj is None:
        raise RecinetError("The analysis could not be kept in the job cache; check the data folder's free space.")
    return obj


def summary_of(result: dict | None) -> str:
    """One line for lists: the Wood notation, else the matrix, else the kind.

    Parameters
    ----------
    result : dict or None
        A result dict.

    Returns
    -------
    str
        The line (empty without an overlayer).
    """
    ov = (result or {}).get("overlayer") or {}
    if ov.get("wood"):
        return str(ov["wood"])
    if ov.get("kind") == "none":
        return "(1×1)"
    if ov.get("matrix"):
        try:
            return format_matrix(ov["matrix"])
        except (ValueError, TypeError):
            return ""
    return str(ov.get("kind") or "")


def _xy_of(points) -> list:
    return [[float(p["x"]), float(p["y"])] for p in points]


def try_model(text: str, record: dict) -> dict:
    """Score a typed model (a matrix or a Wood notation) on the analysed spots.

    Returns ``{"label", "matrices", "xy", "explained", "unexplained", "n_domains", "wood", "kind", "domains"}``;
    ``xy`` are the beams every domain of the model predicts, on the camera model, and ``domains``
    the same beams per domain as ``{"x", "y", "h", "k"}`` rows (drawn as the model's nets).

    Parameters
    ----------
    text : str
        The model as typed.
    record : dict
        A stored analysis record: ``sha`` (the image's SHA-256), ``parameters``, ``edits``.

    Returns
    -------
    dict
        The keys above.
    """

    if not isinstance(text, str) or not text.strip():
        raise NetError("Type a matrix like '2 1 / -1 1' or a Wood notation like '(√3×√3)R30°'.")
    if len(text) > 200:
        raise NetError("The model text is too long (at most 200 characters).")
    obj = result_object(record)
    typed = overlayer_matrices(text.strip(), obj.index.substrate.net)  # the pipeline's reading of the text
    for m in typed if isinstance(typed, list) else []:
        cells = abs(float(np.linalg.det(m)))
        if cells > MAX_MODEL_CELLS:
            raise NetError(f"The model {text.strip()[:60]!r} has a cell of {cells:.4g} substrate cells; models up "
                           f"to {MAX_MODEL_CELLS} cells can be tried.")
    try:
        model = pipeline.try_model(obj, text.strip())
    except (ValueError, ArithmeticError, MemoryError) as err:  # a numeric failure the checks above did not foresee
        if isinstance(err, RecinetError):
            raise
        raise NetError(f"The model {text.strip()[:60]!r} cannot be drawn on this pattern ({type(err).__name__}); "
                       "try a smaller cell.") from None
    fit = obj.index.substrate
    d = serialize.model_to_dict(model)
    pred = serialize.predicted_spots(predicted_beams(fit, model, obj.energy_eV))
    xy = [q for dom in pred["domains"] for q in _xy_of(dom)]
    return {"label": f"{d['matrix_text']}  {d['wood'] or 'no Wood notation'}", "matrices": d["domains"],
            "xy": xy, "explained": int(d["explained"]), "unexplained": int(d["unexplained_count"]),
            "n_domains": int(d["n_domains"]), "wood": d["wood"], "kind": d["kind"], "domains": pred["domains"]}


def candidate_predictions(record: dict, pick: int) -> list[list]:
    """Predicted beams (x, y, h, k dicts) of each domain of ranked candidate `pick`.

    Parameters
    ----------
    record : dict
        A stored analysis record: ``sha`` (the image's SHA-256), ``parameters``, ``edits``.
    pick : int
        Rank of the candidate (0: the best).

    Returns
    -------
    list of list of dict
        Per domain, ``{"x", "y", "h", "k"}`` rows (pixels, substrate indices).
    """

    obj = result_object(record)
    models = obj.index.models
    if not (0 <= int(pick) < len(models)):
        raise ParameterError(f"There is no candidate {int(pick) + 1}.")
    return serialize.predicted_spots(predicted_beams(obj.index.substrate, models[int(pick)], obj.energy_eV))["domains"]


# --------------------------------------------------------------------------- small numeric helpers

def reciprocal_parameters(a, b, gamma_deg):
    """(a*, b*, γ*) in Å⁻¹ (no 2π) and degrees of the net (a, b, γ), or None when incomplete.

    Parameters
    ----------
    a, b : float or None
        Lattice constants, Å.
    gamma_deg : float or None
        Angle between them, degrees.

    Returns
    -------
    tuple of float, or None
        (a*, b*, γ*).
    """

    try:
        rec = reciprocal(Net2D.from_parameters(float(a), float(b), float(gamma_deg)))
    except (TypeError, ValueError):
        return None
    return rec.a, rec.b, rec.gamma_deg


def substrate_vectors(sub: dict) -> np.ndarray:
    """Real-space rows a1, a2 (Å) for drawing, from a result's substrate block (a along +x).

    Parameters
    ----------
    sub : dict
        The result's ``substrate`` block (``a_angstrom``, ``b_angstrom``, ``gamma_deg``).

    Returns
    -------
    (2, 2) ndarray of float64
        Rows a1, a2, Å.
    """

    try:
        return Net2D.from_parameters(float(sub["a_angstrom"]), float(sub["b_angstrom"]), float(sub["gamma_deg"])).vectors
    except (KeyError, TypeError, ValueError):
        net = check_substrate(str(sub.get("net") or "square:1"))
        return net.vectors


def summary_matrix(overlayer: dict) -> str:
    """The overlayer's matrix as one line of text, or empty.

    Parameters
    ----------
    overlayer : dict
        A result's ``overlayer`` block.

    Returns
    -------
    str
        E.g. ``"(2 0 / 0 2)"``.
    """
    m = (overlayer or {}).get("matrix")
    if m is None:
        return ""
    try:
        return format_matrix(m)
    except (TypeError, ValueError):
        return ""
