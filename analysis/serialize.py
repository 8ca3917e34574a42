"""Analysis results as JSON-safe dicts (the `recinet analyze --json` contract).

Schema (``"schema": "recinet.analysis"``, ``"version": 1``), keys kept stable:

* ``center_px``: [x, y] pattern centre: the specular (0,0) beam (the image of the
  surface normal at normal incidence); pixels are x right, y down, the centre
  of the top-left pixel at (0, 0). ``geometry`` holds the camera model, with
  ``incidence_x``/``incidence_y`` (sin θ of the specular beam) when the beam is
  off normal.
* ``spots``: one object per spot used: ``x``, ``y``, ``h``, ``k`` (fractional
  indices in the substrate basis, null when the spot is not explained),
  ``h_measured``, ``k_measured``, ``intensity``, ``snr``, ``kind``
  (``integer``/``fractional``/``unexplained``), ``domain`` (index into the
  domains or null), ``manual``, ``trusted`` (false when the centre is cut by a
  mask edge or its fit failed: such spots do not count in the model scores).
  Every entry is an accepted detection: one that can be a diffraction spot.
* ``rejected_spots``: detections that cannot be diffraction spots (hot pixels,
  cosmic rays, background structure), each with ``x``, ``y``, ``intensity``,
  ``snr``, its widths and the ``reason``.
* ``substrate``: ``net`` (plane-net type), ``a_star_px`` (rows a1*, a2* as
  pixel displacements at the centre: the local derivative of the camera
  model; always a primitive basis), ``a_angstrom``, ``b_angstrom``,
  ``gamma_deg`` (+ ``sigma``; measured through a calibration or reference, the σ
  counts the calibration's own uncertainty, given alone in ``sigma.from_calibration``),
  ``reciprocal_invA`` (rows, Å⁻¹, no 2π),
  ``lattice_source``, ``confidence``.
* ``overlayer``: ``kind`` (none/commensurate/coincidence/incommensurate),
  ``matrix`` (real space, substrate basis), ``domains`` (every domain found,
  the first is ``matrix``), ``wood`` (text or null), ``coverage`` (one
  adsorbate per overlayer cell), ``net`` (real-space a, b, γ, type),
  ``angle_to_substrate_deg``, counts, ``unexplained`` (spot indices),
  ``same_beams_as`` (other candidates whose domains put beams at the same places,
  ``{"name", "n_domains"}``: only intensities tell them apart).
  ``overlayer.phases``: every overlayer phase found, the dominant one (this
  ``overlayer``, the model that explains most spots) first, then coexisting phases
  that explain the spots it leaves; each ``{"kind", "matrix", "domains", "n_domains",
  "wood", "coverage", "intensity_share", "explained", "spots", "plane_group"}``
  (``intensity_share``: its spots' share of the intensity of all the phases' spots;
  ``spots``: spot indices); empty for a clean surface. Each spot's ``phase`` indexes it.
  ``overlayer.plane_group``: what the dominant phase's absent beams say (null for a
  clean surface): ``{"symbol", "groups", "cell", "glide_lines", "tested_domains",
  "open_axes", "note"}``, each glide line ``{"domain", "axis"`` (real-space cell
  vector, substrate basis), ``"missing_beams", "weak_beams", "filled_by_other_domains"}``,
  each open axis (one that cannot be told) ``{"domain", "axis", "filled_beams"}``;
  ``groups`` lists the plane groups the glide lines allow (empty: absences cannot tell).
* ``candidates``: the ranked models (same fields and their ``score``), each with
  ``score_terms``: ``{"terms": {name: {"value", "weight", "contribution"}}, "total"}``, the named
  terms of the score (``analysis/indexing/score.py``) that say why it won or lost.
* ``geometry``: the fitted camera model; ``predicted``: pixel positions of
  the substrate beams and of each domain's beams, for overlays.

This module formats: every number comes with the result objects (the indexing and
pipeline layers compute them), none is computed here.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from .errors import ParameterError
from .jsonsafe import json_safe
from .superstructure import beam_label, format_matrix

if TYPE_CHECKING:  # annotations only
    from .indexing import OverlayerModel, PredictedBeams

__all__ = ["SCHEMA", "VERSION", "result_to_dict", "model_to_dict", "check_result_dict", "predicted_spots"]

SCHEMA = "recinet.analysis"
VERSION = 1


def _f(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def predicted_spots(beams: PredictedBeams) -> dict:
    """Pixel positions of the substrate beams and of each domain's fractional beams on the screen.

    Parameters
    ----------
    beams : PredictedBeams
        From :attr:`analysis.indexing.IndexResult.predicted` or
        :func:`analysis.indexing.predicted_beams`.

    Returns
    -------
    dict
        ``{"substrate": [{"x", "y", "h", "k"}...], "domains": [[...], ...]}``.
    """

    def rows(hk, xy):
        return [{"x": float(p[0]), "y": float(p[1]), "h": float(q[0]), "k": float(q[1])} for p, q in zip(xy, hk)]

    return {"substrate": rows(beams.substrate_hk, beams.substrate_xy),
            "domains": [rows(hk, xy) for hk, xy in beams.domains]}


def model_to_dict(model: OverlayerModel) -> dict:
    """One overlayer model as a JSON-safe dict (see the module docstring).

    Parameters
    ----------
    model : OverlayerModel
        The model.

    Returns
    -------
    dict
        Kind, matrix, domains, Wood notation, coverage, net, counts, score and its terms.
    """
    m = np.asarray(model.matrix, dtype=np.float64)
    over = model.net
    wn = model.details.wood_notation if model.details is not None else None
    kind = model.details.kind if model.details is not None else None
    d = {
        "kind": model.kind,
        "matrix": m.tolist(),
        "matrix_text": format_matrix(m),
        "domains": [np.asarray(x, float).tolist() for x in model.domains],
        "domain_operations": list(model.domain_ops),
        "n_domains": model.n_domains,
        "symmetry_domains": model.total_domains,
        "wood": model.wood,
        "wood_note": model.wood_note or ("" if model.wood else "No Wood notation exists; use the matrix."),
        "wood_primitive": getattr(wn, "primitive", None),
        "coverage": _f(model.coverage),
        "net": {"a_angstrom": over.a, "b_angstrom": over.b, "gamma_deg": over.gamma_deg, "type": model.net_type},
        "angle_to_substrate_deg": model.angle_to_substrate_deg,
        "explained": model.explained,
        "unexplained_count": model.unexplained,
        "absent": model.absent,
        "score": _f(model.score),
        # why a candidate won or lost: each named term of the score (indexing/score.py)
        "score_terms": model.score_terms.to_dict() if model.score_terms is not None else None,
        "unexplained": [int(i) for i in np.flatnonzero(model.explained_by == -1)],
        "notes": list(model.notes),
        # rational models whose domains put beams at the same places (only intensities tell them apart)
        "same_beams_as": [{"name": name, "n_domains": int(n)} for name, n in model.same_beams_as],
    }
    if kind is not None and getattr(kind, "coincidence_cell", None) is not None:
        d["coincidence_cell"] = np.asarray(kind.coincidence_cell).tolist()
    if kind is not None and getattr(kind, "approximants", None):
        d["approximants"] = [{"matrix": a.matrix.tolist(), "substrate_cells": a.substrate_cells,
                              "overlayer_cells": a.overlayer_cells, "strain": a.strain}
                             for a in kind.approximants]
    if kind is not None:
        d["point_on_line"] = bool(getattr(kind, "point_on_line", False))
    if model.kind == "incommensurate":
        d["moire_period_angstrom"] = model.moire_period_A
    return d


def result_to_dict(result) -> dict:
    """An :class:`analysis.pipeline.AnalysisResult` as the JSON contract dict.

    Parameters
    ----------
    result : AnalysisResult
        What :func:`analysis.pipeline.analyze_image` returned.

    Returns
    -------
    dict
        JSON-safe, with the keys listed in the module docstring; pixels as (x, y).
    """
    idx = result.index
    fit = idx.substrate
    best = idx.best
    hk_model = idx.best_indices
    by = best.explained_by
    trusted = np.ones(len(result.xy_px), bool) if getattr(result, "trusted", None) is None else result.trusted
    phase_of = {int(j): n for n, ph in enumerate(getattr(idx, "phases", ())) for j in ph.spots}
    spots = []
    for i, (p, hkm) in enumerate(zip(result.xy_px, fit.hk)):
        explained = bool(np.all(np.isfinite(hk_model[i])))
        kind = "integer" if by[i] == -2 else ("fractional" if by[i] >= 0 else "unexplained")
        h, k = (hk_model[i] if explained else (None, None))
        spots.append({
            "x": float(p[0]), "y": float(p[1]),
            "h": _f(h) if explained else None, "k": _f(k) if explained else None,
            "label": beam_label(h, k) if explained else None,
            "h_measured": float(hkm[0]), "k_measured": float(hkm[1]),
            "intensity": _f(result.intensity[i]), "snr": _f(result.snr[i]),
            "kind": kind, "domain": int(by[i]) if by[i] >= 0 else None, "manual": bool(result.manual[i]),
            "trusted": bool(trusted[i]),
            "phase": phase_of.get(i),
        })
    net = fit.net
    a_star, b_star, gamma_star = fit.reciprocal_constants
    sig = fit.sigma or {}
    sub = {
        "net": fit.net_type,
        "a_star_px": np.asarray(fit.a_star_px).tolist(),
        "a_angstrom": net.a, "b_angstrom": net.b, "gamma_deg": net.gamma_deg,
        "sigma": {"a_angstrom": _f(sig.get("a_A")), "b_angstrom": _f(sig.get("b_A")),
                  "gamma_deg": _f(sig.get("gamma_deg")), "center_x_px": _f(sig.get("center_x_px")),
                  "center_y_px": _f(sig.get("center_y_px")), "scale_px": _f(sig.get("scale_px")),
                  # the part of the σ above that the calibration's own uncertainty makes
                  "from_calibration": None if not sig.get("calibration") else {
                      "a_angstrom": _f(sig["calibration"]["a_A"]), "b_angstrom": _f(sig["calibration"]["b_A"]),
                      "gamma_deg": _f(sig["calibration"]["gamma_deg"])}},
        "a_star_invA": a_star, "b_star_invA": b_star, "gamma_star_deg": gamma_star,
        "reciprocal_invA": fit.reciprocal_net.vectors.tolist(),
        "reciprocal_convention": "crystallographic, a_i·a*_j = δ_ij, no 2π",
        "lattice_source": "measured" if fit.scale_source == "calibration" else "substrate given",
        "spec": result.substrate_spec,
        "confidence": _f(fit.confidence),
        "completeness": _f(fit.completeness),
        "residual_px": _f(fit.residual_px),
        "notes": list(fit.notes),
    }
    alt_sub = [{"a_star_px": np.asarray(f.a_star_px).tolist(), "confidence": _f(f.confidence),
                "score": _f(f.score), "scale_px": f.geometry.scale_px}
               for f in idx.substrate_candidates[1:]]
    meas = result.measurement
    out = {
        "schema": SCHEMA, "version": VERSION,
        "energy_eV": result.energy_eV,
        "image_shape": [int(v) for v in result.image_shape],
        "center_px": list(fit.geometry.specular_px),
        "spots": spots,
        "substrate": sub,
        "substrate_alternatives": alt_sub,
        "overlayer": _with_phases(model_to_dict(best), idx),
        "candidates": [model_to_dict(m) for m in idx.models],
        "geometry": fit.geometry.to_dict(),
        "calibration_source": result.calibration_source,
        "screen": meas.screen.to_dict(),
        "gun": meas.gun.to_dict(),
        "spot_sigma_px": float(meas.sigma_px),
        "rejected_spots": [{"x": r["x"], "y": r["y"], "intensity": _f(r["intensity"]), "snr": _f(r["snr"]),
                            "fwhm_radial_px": _f(r["fwhm_radial_px"]),
                            "fwhm_tangential_px": _f(r["fwhm_tangential_px"]), "reason": r["reason"]}
                           for r in meas.rejected_records()],
        "predicted": predicted_spots(idx.predicted),
        "edits": result.edits.to_dict(),
        "warnings": list(result.warnings),
        "timings_s": {k: float(v) for k, v in result.timings_s.items()},
        "pixel_convention": "x right, y down, centre of the top-left pixel at (0, 0)",
        "matrix_convention": "real space, (b1, b2) = M (a1, a2) in the substrate basis",
    }
    return json_safe(out)


def _with_phases(d: dict, idx) -> dict:
    """The overlayer dict with the pattern's phases and the best model's plane-group reading."""
    phases = getattr(idx, "phases", ())
    d["phases"] = [p.to_dict() for p in phases]
    d["plane_group"] = phases[0].plane_group.to_dict() if phases else None
    return d


_REQUIRED = {"center_px": list, "spots": list, "substrate": dict, "overlayer": dict, "candidates": list}


def check_result_dict(d) -> dict:
    """Validate an analysis dict read back from JSON (e.g. an import); returns it.

    Parameters
    ----------
    d : dict
        The decoded JSON.

    Returns
    -------
    dict
        `d` itself.

    Raises
    ------
    ParameterError
        When it is not a recinet analysis, is from a newer version, or lacks a key.
    """
    if not isinstance(d, dict):
        raise ParameterError(f"An analysis must be a JSON object, got {type(d).__name__}.")
    if d.get("schema") != SCHEMA:
        raise ParameterError(f"Not a recinet analysis (schema {d.get('schema')!r}, expected {SCHEMA!r}).")
    if not isinstance(d.get("version"), int) or d["version"] > VERSION:
        raise ParameterError(f"Analysis version {d.get('version')!r} is not readable by this program "
                             f"(reads up to {VERSION}).")
    for k, t in _REQUIRED.items():
        if not isinstance(d.get(k), t):
            raise ParameterError(f"The analysis lacks '{k}' ({t.__name__}).")
    return d
