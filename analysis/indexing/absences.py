"""Glide lines from systematic absences, and the plane groups they allow.

At normal incidence a layer whose plane group has a glide line parallel to a cell
axis b_i (translation b_i / 2) scatters nothing into the beams n·b_i* with n odd:
the two atoms the glide relates cancel in those beams. On a primitive rectangular
(or square) cell the rules are (conditions of the plane groups, cell axes as in the
plane-group tables):

* pg, p2mg: one glide direction; beams along it with an odd index vanish.
* p2gg (and p4gm on a square cell): glides along both axes; both rows of odd beams vanish.

Oblique, hexagonal and centred cells have no absences beyond their lattice (the
glides of cm, c2mm, p3m1, p31m, p6mm remove no beam of the primitive net), so the
absences can only tell whether glide lines exist along the axes of a rectangular
cell; mirrors and rotations are not seen in positions.

A glide line is read per domain: its odd beams along the axis are all missing (or
weak: off normal incidence the extinction is partly lifted) while the domain's
other beams are seen. A beam that another domain also produces, and where that
domain is not extinct, says nothing (it is filled). Absent beams that every domain
producing them extinguishes by a glide line so found are not held against a cell
(:func:`glide_excused`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..lattice import lattice_points
from ..nets import Net2D, reduce_net
from .matching import _screen_xy, _seen

__all__ = ["GlideLine", "PlaneGroupReading", "read_plane_group", "glide_excused", "extinct_mask",
           "WEAK_FRACTION", "MIN_SEEN_FRACTION"]

WEAK_FRACTION = 0.25
"""An odd beam counts as extinguished when it is missing or at most this fraction of the
median intensity of the domain's other seen fractional beams (our choice: at 2–3° off
normal the lifted beams stay below a few per cent of the allowed ones in the renders)."""

MIN_SEEN_FRACTION = 0.7
"""A domain is tested only when at least this fraction of its allowed beams that could be
seen was found (the domain is there and its beams are visible)."""

_MIN_EVIDENCE = 2  # odd beams along an axis that must be missing or weak
_ORTHO_TOL = 2e-3  # |cos γ| of a rectangular cell


@dataclass(frozen=True, eq=False)
class GlideLine:
    """A glide line found in one domain from the beams missing along its direction.

    Attributes
    ----------
    domain : int
        Index into the model's domains.
    axis : (2,) ndarray of int64
        The glide direction as a real-space vector of the domain's rectangular cell,
        in the substrate basis (a row of the reduced domain matrix).
    missing : (N, 2) ndarray of float64
        Odd beams along the axis (h, k substrate units) where no spot was found.
    weak : (W, 3) ndarray of float64
        Odd beams seen weakly: h, k and intensity over the domain's median beam.
    filled : (F, 2) ndarray of float64
        Odd beams another domain also produces (not evidence).
    """

    domain: int
    axis: np.ndarray
    missing: np.ndarray
    weak: np.ndarray
    filled: np.ndarray

    def to_dict(self) -> dict:
        """The glide line: its domain, axis and the beams that show it.

        Returns
        -------
        dict
            Plain JSON types.
        """
        return {"domain": int(self.domain), "axis": [int(v) for v in self.axis],
                "missing_beams": np.asarray(self.missing, float).tolist(),
                "weak_beams": [{"h": float(r[0]), "k": float(r[1]), "relative_intensity": float(r[2])}
                               for r in self.weak],
                "filled_by_other_domains": np.asarray(self.filled, float).tolist()}


@dataclass(frozen=True, eq=False)
class PlaneGroupReading:
    """What the absences say about the layer's plane group.

    Attributes
    ----------
    groups : tuple of str
        Plane groups consistent with the glide lines found (empty: not told by absences).
    glide_lines : tuple of GlideLine
        Every glide line found, per domain.
    tested_domains : tuple of int
        Domains whose cell is rectangular and whose beams allowed a test.
    cell : str
        ``rectangular``, ``square`` or the net type of the cell (then nothing is testable).
    note : str
        One line for the report.
    open_axes : tuple of dict
        Axes of tested domains that could not be told: ``{"domain", "axis", "filled_beams"}``
        (the odd beams other domains fill; the rest are substrate beams or unseen).
    """

    groups: tuple
    glide_lines: tuple
    tested_domains: tuple
    cell: str
    note: str
    open_axes: tuple = ()

    @property
    def symbol(self) -> str | None:
        return " or ".join(self.groups) if self.groups else None

    def to_dict(self) -> dict:
        """The reading: symbol, allowed groups, cell, glide lines and the axes left open.

        Returns
        -------
        dict
            Plain JSON types.
        """
        return {"symbol": self.symbol, "groups": list(self.groups), "cell": self.cell,
                "glide_lines": [g.to_dict() for g in self.glide_lines],
                "tested_domains": [int(d) for d in self.tested_domains], "note": self.note,
                "open_axes": [dict(a) for a in self.open_axes]}


def _axis(row) -> list:
    """A cell vector as integers, its first non-zero entry positive."""
    v = [int(x) for x in np.rint(row)]
    return [-x for x in v] if (v[0] or v[1]) < 0 else v


def _rect_cell(substrate: Net2D, m: np.ndarray) -> tuple[np.ndarray, str] | None:
    """The reduced matrix of a rectangular (or square) domain cell, else None."""
    try:
        red, op = reduce_net(Net2D(np.asarray(m, float) @ substrate.vectors))
    except (ValueError, ParameterError):
        return None
    v = red.vectors
    la, lb = np.linalg.norm(v[0]), np.linalg.norm(v[1])
    if abs(v[0] @ v[1]) > _ORTHO_TOL * la * lb:
        return None
    return op @ np.asarray(m, float), ("square" if abs(la - lb) <= _ORTHO_TOL * la else "rectangular")


def extinct_mask(hk: np.ndarray, matrix, axis: int) -> np.ndarray:
    """Which beams `hk` (substrate units) a glide along row `axis` of the cell `matrix` extinguishes.

    Beams n·b*_axis of the cell with n odd (the other index 0).

    Parameters
    ----------
    hk : (N, 2) array_like of float
        Beam indices in the substrate's reciprocal basis.
    matrix : (2, 2) array_like of float
        The domain's rectangular cell, real space, substrate basis; its rows are the
        cell axes a glide may run along.
    axis : int
        The row of `matrix` the glide line runs along (0 or 1).

    Returns
    -------
    (N,) ndarray of bool
        True for the beams the glide extinguishes.

    Examples
    --------
    >>> hk = np.array([[0.5, 0.0], [1.0, 0.0], [0.0, 0.5], [0.5, 0.5]])
    >>> print(extinct_mask(hk, [[2, 0], [0, 2]], 0).tolist())
    [True, False, False, False]
    """
    m = np.asarray(matrix, dtype=np.float64)
    n = np.asarray(hk, dtype=np.float64).reshape(-1, 2) @ m.T
    r = np.rint(n)
    on = np.all(np.abs(n - r) < 1e-6, axis=1)
    other = 1 - int(axis)
    return on & (r[:, other] == 0) & (np.abs(r[:, axis]) % 2 == 1)


def _beams(ctx, mats) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Predicted fractional beams that could be seen (union of the domains), which domains
    produce each, and the intensity of the spot found there (NaN: none)."""
    a_star = ctx.a_star
    pts = []
    for m in mats:
        try:
            pts.append(lattice_points(np.linalg.inv(m).T, ctx.g_max, metric=a_star))
        except ParameterError:
            return np.zeros((0, 2)), np.zeros((0, len(mats)), bool), np.zeros(0)
    hk = np.concatenate(pts) if pts else np.zeros((0, 2))
    hk = hk[np.any(np.abs(hk - np.rint(hk)) > 1e-6, axis=1)]
    if len(hk) == 0:
        return hk, np.zeros((0, len(mats)), bool), np.zeros(0)
    _, first = np.unique(np.round(hk, 6), axis=0, return_index=True)
    hk = hk[np.sort(first)]
    seen = _seen(_screen_xy(hk @ a_star, ctx.energy_eV, ctx.geom), ctx.valid_mask, np.array(ctx.geom.center_px),
                 ctx.r_max, 0.0)
    hk = hk[seen]
    member = np.zeros((len(hk), len(mats)), bool)
    for d, m in enumerate(mats):
        n = hk @ np.asarray(m, float).T
        member[:, d] = np.all(np.abs(n - np.rint(n)) < 1e-6, axis=1)
    dist, j = ctx.tree.query(hk @ a_star, distance_upper_bound=ctx.tol_g) if len(hk) else (np.zeros(0), None)
    found = np.isfinite(dist)
    inten = np.full(len(hk), np.nan)
    if found.any():
        inten[found] = 1.0 if ctx.intensity is None else ctx.intensity[j[found]]
    return hk, member, inten


def _glides(ctx, mats):
    """Glide lines per domain.

    Returns (lines, tested, cell, status, table): the GlideLine list, the tested domains,
    the cell name, per tested domain the status of each axis (``"glide"``, ``"none"``:
    its odd beams are seen bright, ``"open"``: too few odd beams to tell, e.g. filled by
    other domains or integer), and (hk, member, accepted, open axes) for
    :func:`glide_excused` (None when nothing was tested).
    """
    cells = [_rect_cell(ctx.substrate, m) for m in mats]
    if any(c is None for c in cells):
        return [], [], "not rectangular", {}, None
    hk, member, inten = _beams(ctx, mats)
    if len(hk) == 0:
        return [], [], cells[0][1], {}, None
    ext = [[extinct_mask(hk, c[0], i) & member[:, d] for i in (0, 1)] for d, c in enumerate(cells)]
    may_vanish = np.zeros((len(hk), len(mats)), bool)  # the beam lies in an odd row of that domain
    for d in range(len(mats)):
        may_vanish[:, d] = ext[d][0] | ext[d][1]
    found = np.isfinite(inten)
    lines, tested, status, open_axes = [], [], {}, []
    accepted = [[np.zeros(len(hk), bool)] * 2 for _ in mats]
    for d, (cell, _) in enumerate(cells):
        own = member[:, d]
        allowed = own & ~may_vanish[:, d]
        if allowed.sum() < 2 or found[allowed].sum() < 2 or found[allowed].mean() < MIN_SEEN_FRACTION:
            continue
        ref = float(np.median(inten[allowed & found]))
        if not ref > 0:  # no brightness to compare with
            continue
        # filled: another domain produces the beam and cannot extinguish it there
        others = member & ~may_vanish
        others[:, d] = False
        filled = others.any(axis=1)
        rel = np.where(found, inten / ref, 0.0)
        tested.append(d)
        status[d] = []
        for i in (0, 1):
            cls = ext[d][i]
            evid = cls & ~filled
            if evid.sum() < _MIN_EVIDENCE:
                status[d].append("open")
                open_axes.append({"domain": d, "axis": _axis(cell[i]), "filled_beams": hk[cls & filled].tolist()})
            elif np.all(rel[evid] <= WEAK_FRACTION):
                status[d].append("glide")
                accepted[d][i] = cls
                weak = evid & found
                lines.append(GlideLine(domain=d, axis=np.array(_axis(cell[i]), dtype=np.int64),
                                       missing=hk[evid & ~found], weak=np.column_stack([hk[weak], rel[weak]]),
                                       filled=hk[cls & filled]))
            else:
                status[d].append("none")
    return lines, tested, cells[0][1], status, (hk, member, accepted, open_axes)


def glide_excused(ctx, mats, absent_hk: np.ndarray) -> np.ndarray:
    """Which absent predicted beams are extinguished by the glide lines the spots show.

    Parameters
    ----------
    ctx : analysis.indexing.overlayers._Context
        The overlayer scoring context (spots, camera, matching tolerance).
    mats : list of (2, 2) ndarray
        The model's domains.
    absent_hk : (N, 2) ndarray
        Predicted fractional beams (substrate units) that could be seen and were not found.

    Returns
    -------
    (N,) ndarray of bool
        True where every domain that produces the beam extinguishes it by a glide line found.
    """
    absent_hk = np.asarray(absent_hk, dtype=np.float64).reshape(-1, 2)
    out = np.zeros(len(absent_hk), bool)
    if len(absent_hk) == 0:
        return out
    lines, _, _, _, table = _glides(ctx, mats)
    if not lines:
        return out
    hk, member, accepted, _ = table
    gone = np.zeros((len(hk), len(mats)), bool)  # extinguished in that domain
    for d in range(len(mats)):
        gone[:, d] = accepted[d][0] | accepted[d][1]
    excused = np.all(gone | ~member, axis=1) & member.any(axis=1)
    key = {tuple(np.round(p, 6)): bool(e) for p, e in zip(hk, excused)}
    return np.array([key.get(tuple(np.round(p, 6)), False) for p in absent_hk], dtype=bool)


def read_plane_group(ctx, mats) -> PlaneGroupReading:
    """The glide lines of a model's domains and the plane groups they allow.

    Parameters
    ----------
    ctx : analysis.indexing.overlayers._Context
        The overlayer scoring context (spots, camera, matching tolerance).
    mats : list of (2, 2) ndarray
        The model's domains.

    Returns
    -------
    PlaneGroupReading
        The plane-group symbol, the groups allowed, the glide lines and the open axes.
    """
    mats = [np.asarray(m, float) for m in mats]
    lines, tested, cell, status, table = _glides(ctx, mats)
    open_axes = tuple(table[3]) if table is not None else ()
    if cell not in ("rectangular", "square"):
        return PlaneGroupReading((), (), (), cell, "The cell is not rectangular: absences cannot show glide lines.")
    if not tested:
        return PlaneGroupReading((), (), (), cell, "Too few of the layer's beams were seen to test for glide lines.")
    # the domains are one structure: its glide axes number at least the most any domain shows
    # and at most two less the most any domain shows without one
    n_min = max(s.count("glide") for s in status.values())
    n_max = 2 - max(s.count("none") for s in status.values())
    names = {1: ("pg", "p2mg"), 2: ("p2gg", "p4gm") if cell == "square" else ("p2gg",)}
    groups = tuple(g for n in range(max(n_min, 1), n_max + 1) for g in names[n]) if n_min else ()
    if n_min == 0:
        note = ("No glide line: the odd beams along the cell axes are seen (absences do not tell "
                "p1, p2, pm, p2mm apart)." if n_max == 0 else
                "No glide line seen; along an axis whose odd beams other domains fill, absences cannot tell.")
    elif n_min == 1:
        note = "Glide line along one cell axis: its odd beams are missing."
        if n_max == 2:
            note += " The other axis cannot be told: other domains fill its odd beams, or too few are seen."
    else:
        note = "Glide lines along both cell axes: the odd beams along each are missing."
    untested = [d for d in range(len(mats)) if d not in tested]
    if untested and lines:
        note += f" Domain(s) {', '.join(str(d) for d in untested)} not testable."
    return PlaneGroupReading(groups, tuple(lines), tuple(tested), cell, note, open_axes)
