"""The spot table: one row per spot of an analysis (indices, position, intensity, SNR,
widths, flags, domain), and its CSV text.

Input is either an :class:`analysis.pipeline.AnalysisResult` or its JSON dict
(:func:`analysis.serialize.result_to_dict`). Widths come from
:func:`measure_widths`, which refits every spot on the frame with an oriented Gaussian
(:mod:`analysis.spots.widths`), converts the widths to momentum and per cent of |a*|
and estimates the mean domain size from the fractional beams (:mod:`analysis.domain_size`).

Positions are (x, y) pixels, x right, y down, the centre of the top-left pixel at (0, 0).
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass

import numpy as np

from .domain_size import BeamWidths, DomainSize, domain_size, sizes_along_axes, widths_in_momentum
from .errors import ParameterError
from .optics import ScreenGeometry
from .spots.widths import fit_spot_widths

__all__ = ["COLUMNS", "WidthReport", "measure_widths", "spot_rows", "rows_to_csv"]

#: the columns of a row, in order (units in the names; % BZ = per cent of |a*|)
COLUMNS = ("n", "label", "h", "k", "x", "y", "intensity", "snr", "kind", "domain",
           "fwhm_radial_px", "fwhm_tangential_px", "fwhm_major_px", "fwhm_minor_px", "axis_angle_deg",
           "fwhm_radial_invA", "fwhm_tangential_invA", "fwhm_radial_bz_percent", "fwhm_tangential_bz_percent",
           "domain_size_A", "flags")


@dataclass(frozen=True, eq=False)
class WidthReport:
    """Widths of every spot of an analysis and the domain size from them.

    Attributes
    ----------
    beams : BeamWidths
        One entry per spot of the analysis, in its order.
    domain : DomainSize
    axes : list of dict
        Per overlayer domain, the mean extents along its net vectors b1 and b2
        (:func:`analysis.domain_size.sizes_along_axes`).
    """

    beams: BeamWidths
    domain: DomainSize
    axes: tuple = ()

    def to_dict(self) -> dict:
        """The domain size and the extents along the domain axes, as plain JSON types.

        Returns
        -------
        dict
            ``domain_size``, ``along_domain_axes``, ``instrument_fwhm_px``.
        """
        return {"domain_size": self.domain.to_dict(), "along_domain_axes": list(self.axes),
                "instrument_fwhm_px": list(self.domain.instrument_fwhm_px)}

    def axes_text(self) -> str:
        """One line: each domain's extents along b1 and b2 ('' when none resolves).

        Returns
        -------
        str
            The line.
        """
        parts = []
        for a in self.axes:
            b1, b2 = a["size_b1_angstrom"], a["size_b2_angstrom"]
            f = (lambda v: f"{v:.0f} Å" if math.isfinite(v) else "unresolved")
            parts.append(f"domain {a['domain']}: {f(b1)} along b1, {f(b2)} along b2 "
                         f"({max(a['n_b1'], a['n_b2'])} beams)")
        return ("Along each domain's net vectors — " + "; ".join(parts) + ".") if parts else ""


def _as_dict(result) -> tuple[dict, np.ndarray | None, list]:
    """(JSON dict, valid mask or None, per-spot fit flag names) of an AnalysisResult or its dict."""
    if isinstance(result, dict):
        from .serialize import check_result_dict

        d = check_result_dict(result)
        return d, None, [[] for _ in d["spots"]]
    from .pipeline import AnalysisResult
    from .serialize import result_to_dict
    from .spots import FLAG_NAMES

    if not isinstance(result, AnalysisResult):
        raise ParameterError(f"`result` must be an AnalysisResult or its JSON dict, got {type(result).__name__}.")
    d = result_to_dict(result)
    meas = result.measurement
    names = [[] for _ in d["spots"]]
    st = meas.spots
    if len(st):
        from scipy.spatial import cKDTree

        dist, j = cKDTree(st.xy).query(np.asarray(result.xy_px, float).reshape(-1, 2))
        for i in range(len(names)):
            if dist[i] < 1e-6 and not result.manual[i]:
                fl = int(st.flags[j[i]])
                names[i] = [n for bit, n in FLAG_NAMES.items() if fl & bit]
    return d, meas.valid, names


def _mask_from_dict(d: dict, img: np.ndarray):
    """The valid pixels (screen minus gun shadow) rebuilt from an analysis dict's ``screen`` and
    ``gun`` entries; None when they cannot be read."""
    from .spots import find_gun_shadow, find_screen

    try:
        s, g = d.get("screen") or {}, d.get("gun") or {}
        if s.get("source") in (None, "frame"):
            valid = np.ones(img.shape, bool)
            scr = None
        else:
            (x, y), (a, b) = s["center_px"], s["semi_axes_px"]
            scr = find_screen(img, ellipse=(x, y, a, b, s.get("angle_deg", 0.0)), margin_px=s.get("margin_px", 3.0))
            valid = scr.mask.copy()
        if g.get("center_px") is not None and g.get("source") not in (None, "none") and scr is not None:
            arm = g.get("arm_angle_deg")
            gun = find_gun_shadow(img, scr, disk_xyr=(*g["center_px"], g["radius_px"]), arm_angle_deg=arm,
                                  arm_width_px=g.get("arm_width_px") if arm is not None else None,
                                  margin_px=g.get("margin_px", 3.0))
            valid &= ~gun.mask
        return valid
    except (KeyError, TypeError, ValueError, ParameterError):
        return None


def _saturation(img: np.ndarray):
    return float(np.iinfo(img.dtype).max) if np.issubdtype(img.dtype, np.integer) else None


def measure_widths(image, result, *, mask=None) -> WidthReport:
    """Oriented widths of every spot of `result`, in pixels, Å⁻¹ and % of |a*|, and the domain size.

    Parameters
    ----------
    image : (M, N) ndarray
        The analysed frame.
    result : AnalysisResult or dict
        The analysis (or its JSON dict).
    mask : (M, N) ndarray of bool, optional, keyword-only
        Valid pixels; default the analysis's own (screen minus gun shadow): from its
        measurement, or rebuilt from the dict's ``screen`` and ``gun`` entries.

    Returns
    -------
    WidthReport
        Integer beams (the instrument response) and fractional beams are the trusted,
        detected spots the best model calls so; hand-added spots are left out.
    """
    d, valid, _ = _as_dict(result)
    img = np.asarray(image)
    shape = tuple(d.get("image_shape") or img.shape)
    if img.ndim != 2 or tuple(img.shape) != shape:
        raise ParameterError(f"The image ({'x'.join(map(str, img.shape))}) is not the analysed one "
                             f"({'x'.join(map(str, shape))}).")
    m = np.asarray(mask, bool) if mask is not None else (valid if valid is not None else _mask_from_dict(d, img))
    spots = d["spots"]
    xy = np.array([[s["x"], s["y"]] for s in spots], float).reshape(-1, 2)
    geom = ScreenGeometry.from_dict(d["geometry"])
    sigma = float(d.get("spot_sigma_px") or 2.0)
    w = fit_spot_widths(img, xy, sigma_px=sigma, center_xy=d["center_px"], mask=m, saturation_level=_saturation(img))
    beams = widths_in_momentum(w, energy_eV=float(d["energy_eV"]), geometry=geom,
                               a_star_invA=float(d["substrate"]["a_star_invA"]))
    usable = np.array([bool(s.get("trusted", True)) and not s.get("manual", False) for s in spots], bool)
    kind = np.array([s.get("kind") for s in spots], dtype=object)
    frac = usable & (kind == "fractional")
    dom = domain_size(beams, usable & (kind == "integer"), frac, geometry=geom)
    return WidthReport(beams, dom, tuple(_axes_sizes(d, beams, usable & (kind == "integer"), frac)))


def _axes_sizes(d: dict, beams: BeamWidths, integer, frac) -> list:
    """Per domain, extents along its net vectors (momentum frame: k = hk · A*, rows of A* from the dict)."""
    try:
        a_star = np.asarray(d["substrate"]["reciprocal_invA"], float).reshape(2, 2)
        mats = np.asarray(d["overlayer"].get("domains") or [], float).reshape(-1, 2, 2)
    except (KeyError, TypeError, ValueError):
        return []
    if len(mats) == 0 or abs(np.linalg.det(a_star)) < 1e-12:
        return []
    a_real = np.linalg.inv(a_star).T  # rows a1, a2 (Å): a_i · a*_j = δ_ij
    axes = mats @ a_real  # (D, 2, 2): rows b1, b2 of each domain
    idx = np.array([s.get("domain") if s.get("domain") is not None else -1 for s in d["spots"]], int)
    idx = np.where(frac, idx, -1)
    return sizes_along_axes(beams, integer, idx, axes)


def _num(v, nd=None):
    if v is None:
        return None
    v = float(v)
    if not math.isfinite(v):
        return None
    return (round(v, nd) if nd is not None else v) + 0.0  # + 0.0: no "-0.0" in the table


def spot_rows(result, *, widths: WidthReport | None = None) -> list[dict]:
    """One dict per spot of `result` with the keys of :data:`COLUMNS` (None where unknown).

    Parameters
    ----------
    result : AnalysisResult or dict
        An analysis, or its JSON dict.
    widths : WidthReport, optional, keyword-only
        From :func:`measure_widths` on the same analysis; without it the width
        columns are None.

    Returns
    -------
    list of dict
        ``domain`` counts from 1 (as the page shows it; the JSON's ``domain`` counts from 0).
        ``flags`` is text: the spot fit's flags (saturated, near_mask_edge, fit_failed,
        split_pair), ``manual`` (added by hand), ``untrusted`` (does not count in the
        model scores), ``width_fit_failed``.

    Examples
    --------
    >>> d = {"schema": "recinet.analysis", "version": 1, "center_px": [0, 0], "substrate": {}, "overlayer": {},
    ...      "candidates": [], "spots": [{"x": 10.0, "y": 5.0, "h": 0.5, "k": 0.0, "label": "(½ 0)",
    ...      "intensity": 120.0, "snr": 9.0, "kind": "fractional", "domain": 0, "manual": False, "trusted": True}]}
    >>> r = spot_rows(d)[0]
    >>> print(r["n"], r["label"], r["h"], r["x"], r["domain"], r["fwhm_radial_px"], repr(r["flags"]))
    1 (½ 0) 0.5 10.0 1 None ''
    """
    d, _, fit_flags = _as_dict(result)
    spots = d["spots"]
    if widths is not None and len(widths.beams.pixels) != len(spots):
        raise ParameterError(f"`widths` has {len(widths.beams.pixels)} spots, the analysis {len(spots)}.")
    rows = []
    for i, s in enumerate(spots):
        flags = list(fit_flags[i])
        if s.get("manual"):
            flags.append("manual")
        if not s.get("trusted", True):
            flags.append("untrusted")
        row = {"n": i + 1, "label": s.get("label") or "", "h": _num(s.get("h"), 4), "k": _num(s.get("k"), 4),
               "x": _num(s["x"], 2), "y": _num(s["y"], 2), "intensity": _num(s.get("intensity"), 1),
               "snr": _num(s.get("snr"), 1), "kind": s.get("kind") or "",
               "domain": None if s.get("domain") is None else int(s["domain"]) + 1}
        for c in COLUMNS[10:20]:
            row[c] = None
        if widths is not None:
            px, b = widths.beams.pixels, widths.beams
            if not px.ok[i]:
                flags.append("width_fit_failed")
            row.update({"fwhm_radial_px": _num(px.fwhm_radial_px[i], 2),
                        "fwhm_tangential_px": _num(px.fwhm_tangential_px[i], 2),
                        "fwhm_major_px": _num(px.fwhm_major_px[i], 2), "fwhm_minor_px": _num(px.fwhm_minor_px[i], 2),
                        "axis_angle_deg": _num(px.angle_deg[i], 1),
                        "fwhm_radial_invA": _num(b.fwhm_radial_invA[i], 5),
                        "fwhm_tangential_invA": _num(b.fwhm_tangential_invA[i], 5),
                        "fwhm_radial_bz_percent": _num(b.fwhm_radial_bz_percent[i], 2),
                        "fwhm_tangential_bz_percent": _num(b.fwhm_tangential_bz_percent[i], 2),
                        "domain_size_A": _num(widths.domain.per_spot_A[i], 1)})
        row["flags"] = " ".join(flags)
        rows.append(row)
    return rows


def rows_to_csv(rows: list[dict], *, domain: DomainSize | None = None, axes_text: str = "") -> str:
    """CSV text of :func:`spot_rows` (header :data:`COLUMNS`; empty cells for None); with
    `domain` (and `axes_text`, :meth:`WidthReport.axes_text`), leading ``#`` comment lines state
    the domain-size estimate, the extents along the domains' net vectors and the method.

    Parameters
    ----------
    rows : list of dict
        From :func:`spot_rows`.
    domain : DomainSize, optional, keyword-only
        The domain-size estimate of the same analysis.
    axes_text : str, keyword-only
        The extents along the domains' net vectors in words (:meth:`WidthReport.axes_text`);
        written as a comment line after the estimate when given.

    Returns
    -------
    str
        CSV text, one line per spot after the header.

    Examples
    --------
    >>> print(rows_to_csv([{"n": 1, "x": 3.5, "flags": "manual"}]).splitlines()[1][:12])
    1,,,,3.5,,,,
    """
    out = io.StringIO()
    if domain is not None:
        out.write(f"# {domain.message}\n")
        if axes_text:
            out.write(f"# {axes_text}\n")
        out.write(f"# method: {domain.method}\n")
    w = csv.writer(out, lineterminator="\n")
    w.writerow(COLUMNS)
    for r in rows:
        w.writerow(["" if r.get(c) is None else r.get(c) for c in COLUMNS])
    return out.getvalue()
