"""A parameter series as a table (CSV, one row per frame and beam) and as a JSON record.

The CSV has fixed columns, so a watch appends the rows of each new frame to the same
file (:func:`frame_rows`, :data:`CSV_COLUMNS`); :func:`csv_text` writes a whole result.
:func:`result_to_dict` is the JSON record: parameter, beams, families, segments with
their structures and parameter ranges, the switches between them, the drift, and
optionally an order–disorder fit.
"""

from __future__ import annotations

import csv
import io as _stdio

import numpy as np

from ..files import write_text_atomic
from ..jsonsafe import json_safe

__all__ = ["CSV_COLUMNS", "frame_rows", "csv_text", "result_to_dict", "write_csv", "write_json"]

CSV_COLUMNS = ("frame", "name", "parameter", "beam", "h", "k", "family", "intensity", "sigma", "background_per_px",
               "width_radial_px", "width_tangential_px", "x_px", "y_px", "flags")


def _cell(v) -> str:
    if isinstance(v, (float, np.floating)):
        return "" if not np.isfinite(v) else f"{float(v):.6g}"
    return str(v)


def _family_of(beams, families) -> list[str]:
    out = ["integer" if b else "" for b in beams.integer]
    for f in families:
        for j in f.members:
            out[int(j)] = f.label
    return out


def frame_rows(trace, frame: int, families=()) -> list[list[str]]:
    """The CSV rows (cells as text) of one frame of a ParameterTrace, one per beam.

    Parameters
    ----------
    trace : ParameterTrace
        The beams followed so far.
    frame : int
        The frame (0-based).
    families : sequence of Family
        The beam families, to name each beam's family.

    Returns
    -------
    list of list of str
        One row per beam, cells in :data:`CSV_COLUMNS` order.
    """
    fam = _family_of(trace.beams, families)
    rows = []
    for j in range(len(trace.beams)):
        xy = trace.xy_px[frame, j]
        rows.append([str(frame), trace.frame_names[frame], _cell(trace.value[frame]), trace.beams.labels[j],
                     _cell(trace.beams.hk[j, 0]), _cell(trace.beams.hk[j, 1]), fam[j],
                     _cell(trace.intensity[frame, j]), _cell(trace.sigma[frame, j]),
                     _cell(trace.background_per_px[frame, j]), _cell(trace.width_radial_px[frame, j]),
                     _cell(trace.width_tangential_px[frame, j]), _cell(xy[0]), _cell(xy[1]),
                     str(int(trace.flags[frame, j]))])
    return rows


def csv_text(result) -> str:
    """The whole series as CSV text: a header, then one row per frame and beam.

    Parameters
    ----------
    result : ParameterSeriesResult
        What :func:`analysis.follow.analyse_parameter_series` (or a LiveSeries) found.

    Returns
    -------
    str
        CSV text (header :data:`CSV_COLUMNS`).
    """
    buf = _stdio.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    heading = result.trace.name + (f" ({result.trace.unit})" if result.trace.unit else "")
    w.writerow([c if c != "parameter" else heading for c in CSV_COLUMNS])
    for i in range(len(result.trace.value)):
        w.writerows(frame_rows(result.trace, i, result.families))
    return buf.getvalue()


def result_to_dict(result, *, transition=None) -> dict:
    """JSON-safe record of a :class:`analysis.follow.ParameterSeriesResult`.

    Parameters
    ----------
    result : ParameterSeriesResult
        What :func:`analysis.follow.analyse_parameter_series` (or a LiveSeries) found.
    transition : optional, keyword-only
        An order–disorder fit (:func:`analysis.follow.fit_order_disorder`) to record with it.

    Returns
    -------
    dict
        Plain JSON types (NaN as None).
    """
    tr = result.trace
    segs = []
    for s in result.segments:
        segs.append({"first_frame": s.first, "last_frame": s.last, "n_frames": s.n_frames,
                     "value_range": list(s.value_range), "families": list(s.families), "structure": s.label,
                     "indexing": None if s.indexing is None else s.indexing.to_dict()})
    out = {
        "parameter": {"name": tr.name, "unit": tr.unit, "values": tr.value},
        "energy_eV": tr.energy_eV,
        "frames": list(tr.frame_names),
        "n_spots": result.n_spots,
        "reference": result.reference.to_dict(),
        "beams": [{"label": lab, "h": hk[0], "k": hk[1], "integer": bool(i)}
                  for lab, hk, i in zip(tr.beams.labels, tr.beams.hk, tr.beams.integer)],
        "families": [{"label": f.label, "order": f.order, "beams": [tr.beams.labels[j] for j in f.members]}
                     for f in result.families],
        "family_intensity": result.family_intensity,
        "present": result.present,
        "segments": segs,
        "switches": result.switches(),
        "family_peaks": result.family_peaks(),
        "drift": tr.drift,
        "intensity": tr.intensity, "sigma": tr.sigma, "background_per_px": tr.background_per_px,
        "width_radial_px": tr.width_radial_px, "width_tangential_px": tr.width_tangential_px,
        "flags": tr.flags,
    }
    if transition is not None:
        out["order_disorder"] = transition.to_dict()
    return json_safe(out)


def write_csv(result, path) -> None:
    """Write :func:`csv_text` atomically (nothing is left half-written on an error).

    Parameters
    ----------
    result : ParameterSeriesResult
        What :func:`analysis.follow.analyse_parameter_series` (or a LiveSeries) found.
    path : str or os.PathLike
        The file to write; its folder must exist.
    """
    write_text_atomic(path, csv_text(result), mode=0o644)


def write_json(result, path, **kw) -> None:
    """Write :func:`result_to_dict` atomically as JSON.

    Parameters
    ----------
    result : ParameterSeriesResult
        What :func:`analysis.follow.analyse_parameter_series` (or a LiveSeries) found.
    path : str or os.PathLike
        The file to write; its folder must exist.
    **kw
        Passed to :func:`result_to_dict`.
    """
    import json

    write_text_atomic(path, json.dumps(result_to_dict(result, **kw), indent=1), mode=0o644)
