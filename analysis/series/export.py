"""The I(V) table and the JSON record of a series, as text or written to files.

:func:`iv_table` lays the curves out one column per beam (or per group of equivalent
beams), energy in eV first; :func:`csv_text` and :func:`write_csv` give it as CSV.
:func:`result_to_dict` is the JSON-safe record (metadata, calibration, curves, flags,
groups) that :func:`write_json` writes. Files are written atomically: a failed write
leaves no partial file.
"""

from __future__ import annotations

import csv
import io as _stdio
import json
from pathlib import Path

import numpy as np

from ..errors import SeriesError
from ..files import write_text_atomic
from ..jsonsafe import json_safe
from .curves import average_equivalent, smooth_curve
from .integrate import BLOCKING_FLAGS, FLAG_NAMES
from .track import IVResult

__all__ = ["iv_table", "csv_text", "write_csv", "result_to_dict", "write_json"]


def _cell(v: float) -> str:
    return "" if not np.isfinite(v) else f"{v:.7g}"


def iv_table(result: IVResult, *, averaged: bool = False, smooth_eV: float = 0.0, v0i_eV: float = 4.0,
             include_empty: bool = False) -> tuple[list[str], list[list[str]]]:
    """The I(V) table: energy in eV first, then one column per beam (or group).

    Parameters
    ----------
    result : IVResult
        What :func:`track_series` (or :func:`analysis.series.pipeline.run_iv`) measured.
    averaged : bool, keyword-only
        One column per group of equivalent beams (headed by its first member) instead of
        one per beam.
    smooth_eV : float, keyword-only
        Gaussian FWHM applied to every curve (0: none).
    v0i_eV : float, keyword-only
        V0i of the Pendry R-factor used when grouping equivalent beams, eV.
    include_empty : bool, keyword-only
        Keep beams that are never valid (an all-empty column).

    Returns
    -------
    header : list of str
        ``["energy_eV", "(1,0)", "(1/2,0)", …]``.
    rows : list of list of str
        One row per frame in frame order; empty cells where a beam is off the screen or
        flagged.
    """
    e = result.energy_eV
    cols: list[tuple[str, np.ndarray]] = []
    if averaged:
        for grp in average_equivalent(result, v0i_eV=v0i_eV, smooth_eV=smooth_eV, include_empty=include_empty):
            cols.append((grp.label, grp.intensity))
    else:
        for j, lab in enumerate(result.beams.labels):
            _, i, _ = result.curve(j)
            if not include_empty and not np.isfinite(i).any():
                continue
            if smooth_eV:
                o = np.argsort(e)
                sm = np.empty_like(i)
                sm[o] = smooth_curve(e[o], i[o], fwhm_eV=smooth_eV)
                i = sm
            cols.append((lab, i))
    header = ["energy_eV"] + [c[0] for c in cols]
    rows = [[f"{e[f]:.6g}"] + [_cell(c[1][f]) for c in cols] for f in range(e.size)]
    return header, rows


def _atomic_write(path, text: str) -> None:
    """Write `text` to `path` through a temporary file, so no partial file is ever left.

    The file is readable by everyone and written by its owner (mode 0o644 before the umask),
    as any output file a user shares.
    """
    p = Path(path)
    if p.is_dir():
        raise SeriesError(f"Output {p} is a folder, not a file name.")
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise SeriesError(f"Output folder {parent} does not exist.")
    write_text_atomic(p, text, mode=0o644)


def csv_text(result: IVResult, **kw) -> str:
    """The table of :func:`iv_table` as CSV text (keywords as there).

    Parameters
    ----------
    result : IVResult
        What :func:`track_series` (or :func:`analysis.series.pipeline.run_iv`) measured.
    **kw
        ``averaged``, ``smooth_eV``, ``v0i_eV``, ``include_empty`` of :func:`iv_table`.

    Returns
    -------
    str
        Comma-separated, a header line then one line per frame.
    """
    header, rows = iv_table(result, **kw)
    buf = _stdio.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    return buf.getvalue()


def write_csv(result: IVResult, path, **kw) -> None:
    """Write the I(V) table of :func:`iv_table` to `path` (keywords as there); atomic.

    Parameters
    ----------
    result : IVResult
        What :func:`track_series` (or :func:`analysis.series.pipeline.run_iv`) measured.
    path : str or os.PathLike
        The file to write; its folder must exist.
    **kw
        As for :func:`iv_table`.
    """
    _atomic_write(path, csv_text(result, **kw))


def result_to_dict(result: IVResult, *, v0i_eV: float = 4.0, smooth_eV: float = 0.0) -> dict:
    """JSON-safe record of a series: metadata, calibration, curves, flags and equivalent groups.

    NaN becomes null. ``flags`` are per frame and beam, with ``flag_names`` giving the bits.

    Parameters
    ----------
    result : IVResult
        What :func:`track_series` (or :func:`analysis.series.pipeline.run_iv`) measured.
    v0i_eV : float, keyword-only
        V0i of the Pendry R-factor among equivalent beams, eV.
    smooth_eV : float, keyword-only
        Gaussian FWHM applied to the curves of the groups, eV (0: none).

    Returns
    -------
    dict
        Plain JSON types (NaN as None); energies in eV.
    """
    b = result.beams
    groups = average_equivalent(result, v0i_eV=v0i_eV, smooth_eV=smooth_eV)
    per_beam_flags = {}
    for j, lab in enumerate(b.labels):
        counts = {name: int(np.sum((result.flags[:, j] & bit) != 0)) for bit, name in FLAG_NAMES.items()}
        per_beam_flags[lab] = {k: v for k, v in counts.items() if v}
    d = {
        "kind": "recinet I(V) series",
        "schema_version": 1,
        "energy_unit": "eV",
        "intensity_unit": "frame units summed over the aperture" + (
            ", divided by the beam current" if result.settings.get("normalised_by_current") else ""),
        "pixel_convention": "x right, y down, centre of the top-left pixel at (0, 0)",
        "reciprocal_convention": "crystallographic, no 2π",
        "n_frames": int(result.energy_eV.size),
        "energy_eV": result.energy_eV,
        "frame_names": list(result.frame_names),
        "current": result.current,
        "settings": result.settings,
        "calibration": None if result.calibration is None else result.calibration.to_dict(),
        "symmetry": b.symmetry,
        "flag_names": {str(bit): name for bit, name in FLAG_NAMES.items()},
        "blocking_flags": [FLAG_NAMES[bit] for bit in FLAG_NAMES if bit & BLOCKING_FLAGS],
        "beams": [{"label": lab, "h": b.hk[j, 0], "k": b.hk[j, 1], "integer": bool(b.integer[j]),
                   "group": int(b.group[j]), "g_par_invA": b.g_par[j],
                   "overlap_eV": float(result.overlap_eV()[j]), "flag_counts": per_beam_flags[lab],
                   "intensity": np.where(result.valid[:, j], result.intensity[:, j], np.nan),
                   "sigma": np.where(result.valid[:, j], result.sigma[:, j], np.nan),
                   "x_px": result.xy_px[:, j, 0], "y_px": result.xy_px[:, j, 1],
                   "flags": result.flags[:, j].astype(int)} for j, lab in enumerate(b.labels)],
        "groups": [{"label": g.label, "members": list(g.members), "intensity": g.intensity, "sigma": g.sigma,
                    "n_used": g.n_used, "r_pendry": g.r_pendry, "r_zanazzi_jona": g.r_zj,
                    "v0i_eV": v0i_eV, "overlap_eV": g.overlap_eV, "range_eV": g.range_eV} for g in groups],
    }
    return json_safe(d)


def write_json(result: IVResult, path, **kw) -> None:
    """Write :func:`result_to_dict` to `path` as JSON; atomic.

    Parameters
    ----------
    result : IVResult
        What :func:`track_series` (or :func:`analysis.series.pipeline.run_iv`) measured.
    path : str or os.PathLike
        The file to write; its folder must exist.
    **kw
        ``v0i_eV`` and ``smooth_eV`` of :func:`result_to_dict`.
    """
    _atomic_write(path, json.dumps(result_to_dict(result, **kw), indent=1, allow_nan=False))
