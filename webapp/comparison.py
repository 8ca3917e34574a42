"""Two saved analyses side by side: the quantities a surface scientist compares, and which differ.

Pure: saved-analysis facts in, rows out (the ``/compare`` page draws them). A
row differs when

- text (kind, Wood notation, substrate) differs after folding blanks;
- the matrices do not span the same overlayer lattice (two bases of one
  lattice are the same structure, :func:`analysis.superstructure.same_lattice`);
- the domain sets differ: a domain of one has no domain of the other spanning
  the same lattice, or the counts differ;
- two numbers differ by more than twice their combined 1-σ uncertainty when
  both carry one, else by more than :data:`REL_TOL` of their mean (our choice,
  about the precision a spot-position fit gives for lattice constants).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from analysis.superstructure import format_matrix, same_lattice

__all__ = ["Row", "compare_results", "REL_TOL"]

REL_TOL = 0.005


@dataclass(frozen=True)
class Row:
    """One compared quantity.

    Attributes
    ----------
    label : str
        What it is.
    a, b : str
        Its value in the first and the second analysis, as text.
    differs : bool
        True when the two differ (see the module docstring).
    """

    label: str
    a: str
    b: str
    differs: bool


def _text(v) -> str:
    return " ".join(str(v).split()) if v not in (None, "") else "—"


def _float(v):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _matrix(m):
    try:
        a = np.asarray(m, dtype=np.float64)
    except (TypeError, ValueError):
        return None
    return a if a.shape == (2, 2) and np.all(np.isfinite(a)) and abs(np.linalg.det(a)) > 1e-9 else None


def _same(m1, m2) -> bool:
    if m1 is None or m2 is None:
        return m1 is None and m2 is None
    return same_lattice(m1, m2, tol=1e-3)


def _numbers_differ(x, sx, y, sy) -> bool:
    if x is None or y is None:
        return (x is None) != (y is None)
    if sx is not None and sy is not None and (sx > 0 or sy > 0):
        return abs(x - y) > 2.0 * math.hypot(sx, sy)
    return abs(x - y) > REL_TOL * max(abs(x + y) / 2.0, 1e-12)


def _num_text(x, s, unit, digits):
    if x is None:
        return "—"
    return f"{x:.{digits}f}" + (f" ± {s:.{digits}f}" if s is not None else "") + unit


def _domains(over: dict) -> list:
    return [m for m in (_matrix(d) for d in (over.get("domains") or [])) if m is not None]


def _domains_differ(da: list, db: list) -> bool:
    if len(da) != len(db):
        return True
    return not (all(any(_same(x, y) for y in db) for x in da) and all(any(_same(y, x) for x in da) for y in db))


def _phases(over: dict) -> list:
    """Each phase found as (text, matrix): its Wood notation (else matrix) and share of the intensity."""
    out = []
    for p in over.get("phases") or []:
        m = _matrix((p or {}).get("matrix"))
        if m is None:
            continue
        share = _float(p.get("intensity_share"))
        text = (p.get("wood") or format_matrix(m)) + (f" ({100 * share:.0f} %)" if share is not None else "")
        out.append((text, m))
    return out


def compare_results(a: dict, b: dict) -> list[Row]:
    """The rows comparing two saved analyses.

    Parameters
    ----------
    a, b : dict
        Each ``{"parameters": dict, "result": dict or None}`` of a saved analysis.

    Returns
    -------
    list of Row
        Substrate, energy, kind, Wood notation, matrix, domains, coverage, the phases found
        (each with its share of the intensity; they differ when their cells do), the measured
        substrate lattice constants and the overlayer's, in that order.

    Examples
    --------
    >>> one = {"parameters": {}, "result": {"overlayer": {"matrix": [[2, 0], [0, 2]], "kind": "commensurate"}}}
    >>> two = {"parameters": {}, "result": {"overlayer": {"matrix": [[2, 2], [0, 2]], "kind": "commensurate"}}}
    >>> [(r.label, r.differs) for r in compare_results(one, two) if r.label in ("Kind", "Matrix")]
    [('Kind', False), ('Matrix', False)]
    """
    pa, pb = (x.get("parameters") or {} for x in (a, b))
    ra, rb = (x.get("result") or {} for x in (a, b))
    oa, ob = (r.get("overlayer") or {} for r in (ra, rb))
    sa, sb = (r.get("substrate") or {} for r in (ra, rb))
    rows = []

    def text_row(label, x, y):
        tx, ty = _text(x), _text(y)
        rows.append(Row(label, tx, ty, tx != ty))

    def num_row(label, x, sx, y, sy, unit, digits):
        x, sx, y, sy = (_float(v) for v in (x, sx, y, sy))
        rows.append(Row(label, _num_text(x, sx, unit, digits), _num_text(y, sy, unit, digits),
                        _numbers_differ(x, sx, y, sy)))

    text_row("Substrate", pa.get("substrate"), pb.get("substrate"))
    num_row("Energy", pa.get("energy_eV"), None, pb.get("energy_eV"), None, " eV", 1)
    text_row("Kind", oa.get("kind"), ob.get("kind"))
    text_row("Wood notation", oa.get("wood"), ob.get("wood"))
    ma, mb = _matrix(oa.get("matrix")), _matrix(ob.get("matrix"))
    rows.append(Row("Matrix", format_matrix(ma) if ma is not None else "—",
                    format_matrix(mb) if mb is not None else "—", not _same(ma, mb)))
    da, db = _domains(oa), _domains(ob)
    rows.append(Row("Domains", f"{len(da)}: " + ", ".join(format_matrix(m) for m in da) if da else "—",
                    f"{len(db)}: " + ", ".join(format_matrix(m) for m in db) if db else "—", _domains_differ(da, db)))
    num_row("Coverage (one adsorbate per cell)", oa.get("coverage"), None, ob.get("coverage"), None, " ML", 3)
    pha, phb = _phases(oa), _phases(ob)
    rows.append(Row("Phases", "; ".join(t for t, _ in pha) or "—", "; ".join(t for t, _ in phb) or "—",
                    _domains_differ([m for _, m in pha], [m for _, m in phb])))
    siga, sigb = sa.get("sigma") or {}, sb.get("sigma") or {}
    for key, label, unit in (("a_angstrom", "Substrate a", " Å"), ("b_angstrom", "Substrate b", " Å"),
                             ("gamma_deg", "Substrate γ", "°")):
        num_row(label, sa.get(key), siga.get(key), sb.get(key), sigb.get(key), unit, 3)
    na, nb = oa.get("net") or {}, ob.get("net") or {}
    for key, label, unit in (("a_angstrom", "Overlayer a", " Å"), ("b_angstrom", "Overlayer b", " Å"),
                             ("gamma_deg", "Overlayer γ", "°")):
        num_row(label, na.get(key), None, nb.get(key), None, unit, 3)
    return rows
