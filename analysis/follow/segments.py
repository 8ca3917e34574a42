"""Beam families and the segments of a series where the set of beams stays the same.

A fractional-order beam belongs to a *family*: the beams whose indices agree modulo the
substrate net after any operation of the substrate's point group (the ½-order beams of
a p(2×2) on a hexagonal net are one family, the ⅓-order beams of a (√3×√3)R30° another).
A family is *present* in a frame when the summed intensity of its beams stands out of
their summed counting noise (:func:`family_presence`). :func:`find_segments` splits the
frames where the set of present families changes and stays changed for a few frames.
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from ..errors import ParameterError
from ..nets import Net2D, reciprocal
from ..series.beams import BeamSet, symmetry_ops
from ..superstructure import beam_label

__all__ = ["Family", "beam_families", "snap_fractional", "orbit_hk", "family_presence", "Segment", "find_segments"]

_KEY = 840  # lcm(1..8): fractions with denominators up to 8 map to integers


@dataclass(frozen=True, eq=False)
class Family:
    """Fractional beams equivalent modulo the substrate net and its point group.

    Attributes
    ----------
    label : str
        The family's shortest member, e.g. ``"(1/2,0)"``.
    members : (n,) ndarray of int64
        Positions of its beams in the BeamSet.
    order : int
        Largest denominator of the members' indices (2 for half-order beams); 0 when
        irrational.
    """

    label: str
    members: np.ndarray
    order: int


def _hk_ops(substrate: Net2D) -> list[np.ndarray]:
    """The point group as integer matrices acting on (h, k) rows."""
    a = reciprocal(substrate).vectors
    ops, _ = symmetry_ops(substrate, "full")
    return [np.rint(a @ q.T @ np.linalg.inv(a)).astype(np.float64) for q in ops]


def orbit_hk(substrate: Net2D, hk) -> np.ndarray:
    """Every symmetry image of the beams `hk` (K, 2) under the substrate's full point group.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å).
    hk : (K, 2) array_like of float
        Beam indices in the substrate's reciprocal basis.

    Returns
    -------
    (M, 2) ndarray of float64
        The distinct images.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> len(orbit_hk(parse_substrate("Cu(100)"), [[0.5, 0.0]]))
    4
    """
    hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
    imgs = np.vstack([hk @ op for op in _hk_ops(substrate)]) if len(hk) else hk
    key = np.rint(imgs * _KEY).astype(np.int64)
    _, first = np.unique(key, axis=0, return_index=True)
    return imgs[np.sort(first)]


def snap_fractional(hk, *, max_denominator: int = 6, tol: float = 0.04) -> np.ndarray:
    """Indices moved to the nearest fraction with a small denominator when within `tol`.

    Parameters
    ----------
    hk : (K, 2) array_like of float
        Beam indices in the substrate's reciprocal basis.
    max_denominator : int, keyword-only
        Largest denominator of the fractions.
    tol : float, keyword-only
        Largest move of an index.

    Returns
    -------
    (K, 2) ndarray of float64
        The indices, snapped where close enough.

    Examples
    --------
    >>> snap_fractional([[0.49, 0.02], [0.337, 0.331], [0.27, 0.0]]).round(3).tolist()
    [[0.5, 0.0], [0.333, 0.333], [0.25, 0.0]]
    """
    hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
    out = hk.copy()
    for i, row in enumerate(hk):
        fr = [Fraction(float(v)).limit_denominator(max_denominator) for v in row]
        snapped = np.array([float(f) for f in fr])
        if np.all(np.abs(snapped - row) <= tol):
            out[i] = snapped
    return out


def _order(hk: np.ndarray) -> int:
    d = 1
    for v in hk:
        f = Fraction(float(v)).limit_denominator(_KEY)
        if abs(float(f) - v) > 1e-6:
            return 0
        d = max(d, f.denominator)
    return d


def beam_families(beams: BeamSet, substrate: Net2D) -> list[Family]:
    """Group the fractional beams of `beams` into families (integer beams are left out).

    Parameters
    ----------
    beams : BeamSet
        The beams followed (their indices in the substrate's reciprocal basis).
    substrate : Net2D
        Real-space substrate net (Å), for its point group.

    Returns
    -------
    list of Family
        The families, by order then label.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> sub = parse_substrate("Pt(111)")
    >>> b = BeamSet.from_hk(sub, [[0, 0], [1, 0], [0.5, 0], [0, 0.5], [0.5, 0.5], [1/3, 1/3], [2/3, 2/3]])
    >>> [(f.label, len(f.members), f.order) for f in beam_families(b, sub)]
    [('(1/2,0)', 3, 2), ('(1/3,1/3)', 2, 3)]
    """
    ops = _hk_ops(substrate)
    groups: dict[tuple, list[int]] = {}
    for j in np.flatnonzero(~beams.integer):
        imgs = np.array([beams.hk[j] @ op for op in ops])
        key = np.mod(np.rint(imgs * _KEY).astype(np.int64), _KEY)
        canon = min(map(tuple, key.tolist()))
        groups.setdefault(canon, []).append(int(j))
    out = []
    for members in groups.values():
        m = np.array(members, dtype=np.int64)
        g2 = np.einsum("ij,ij->i", beams.g_par[m], beams.g_par[m])
        rep = m[np.lexsort((-beams.hk[m, 1], -beams.hk[m, 0], np.round(g2, 9)))[0]]
        out.append(Family(beam_label(*beams.hk[rep]), m, _order(beams.hk[rep])))
    out.sort(key=lambda f: (f.order == 0, f.order, f.label))
    return out


def family_presence(intensity, sigma, families, *, z_min: float = 8.0) -> tuple[np.ndarray, np.ndarray]:
    """Summed intensity of each family per frame and whether it stands out of the noise.

    Parameters
    ----------
    intensity, sigma : (F, K) array_like of float
        Beam intensities and their uncertainties; NaN where not measured.
    families : sequence of Family
        From :func:`beam_families`.
    z_min : float, keyword-only
        Significance needed: ΣI / √(Σσ²) over the family's measured beams.

    Returns
    -------
    total : (F, n) ndarray of float64
        ΣI of each family (NaN where none of its beams was measured).
    present : (F, n) ndarray of bool
        Whether each family stands out in each frame.

    Examples
    --------
    >>> fam = [Family("(1/2,0)", np.array([0, 1]), 2)]
    >>> t, p = family_presence([[100.0, 120.0], [3.0, -2.0]], [[5.0, 5.0], [5.0, 5.0]], fam)
    >>> t[:, 0].tolist(), p[:, 0].tolist()
    ([220.0, 1.0], [True, False])
    """
    i = np.asarray(intensity, dtype=np.float64)
    s = np.asarray(sigma, dtype=np.float64)
    if i.shape != s.shape or i.ndim != 2:
        raise ParameterError(f"`intensity` and `sigma` must be (frames, beams) arrays of one shape, got "
                             f"{i.shape} and {s.shape}.")
    f = i.shape[0]
    total = np.full((f, len(families)), np.nan)
    present = np.zeros((f, len(families)), dtype=bool)
    for n, fam in enumerate(families):
        ii, ss = i[:, fam.members], s[:, fam.members]
        ok = np.isfinite(ii) & np.isfinite(ss)
        cnt = ok.sum(axis=1)
        tot = np.where(ok, ii, 0.0).sum(axis=1)
        noise = np.sqrt(np.where(ok, ss * ss, 0.0).sum(axis=1))
        total[:, n] = np.where(cnt > 0, tot, np.nan)
        with np.errstate(invalid="ignore", divide="ignore"):
            present[:, n] = (cnt > 0) & (tot > z_min * noise)
    return total, present


@dataclass(frozen=True, eq=False)
class Segment:
    """Consecutive frames showing the same set of beam families.

    Attributes
    ----------
    first, last : int
        First and last frame (inclusive).
    families : tuple of str
        Labels of the families present.
    value_range : (float, float)
        Smallest and largest parameter value of its frames.
    indexing : object or None
        What indexing the segment's frames found (:class:`analysis.series.SeriesIndexing`).
    """

    first: int
    last: int
    families: tuple
    value_range: tuple
    indexing: object = None

    @property
    def n_frames(self) -> int:
        return self.last - self.first + 1

    @property
    def label(self) -> str:
        """The structure found, or the families when the segment was not indexed."""
        if self.indexing is not None:
            return self.indexing.label
        return "(1×1)" if not self.families else "families " + ", ".join(self.families)


def find_segments(present, values, labels, *, min_frames: int = 2) -> list[Segment]:
    """Split the frames where the set of present families changes for `min_frames` frames or more.

    Each family's presence is first cleaned by a running majority of three frames; runs
    shorter than `min_frames` join the segment before them (the first run: the one after).

    Parameters
    ----------
    present : (F, n) array_like of bool
        From :func:`family_presence`.
    values : (F,) array_like of float
        The parameter of each frame.
    labels : sequence of str
        The n family labels.
    min_frames : int, keyword-only
        Shortest run that makes a segment.

    Returns
    -------
    list of Segment
        In frame order.

    Examples
    --------
    >>> p = np.array([[0, 0]] * 3 + [[1, 0]] * 4 + [[0, 1]] * 3, dtype=bool)
    >>> p[5, 0] = False  # one frame flickers
    >>> s = find_segments(p, np.arange(10.0), ["(1/2,0)", "(1/3,1/3)"])
    >>> [(x.first, x.last, x.families) for x in s]
    [(0, 2, ()), (3, 6, ('(1/2,0)',)), (7, 9, ('(1/3,1/3)',))]
    """
    p = np.asarray(present, dtype=bool)
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    if p.ndim != 2 or p.shape[0] != v.size or p.shape[1] != len(labels):
        raise ParameterError(f"`present` must be (frames, families) = ({v.size}, {len(labels)}), got {p.shape}.")
    if not (isinstance(min_frames, (int, np.integer)) and min_frames >= 1):
        raise ParameterError(f"`min_frames` must be a positive integer, got {min_frames!r}.")
    f = p.shape[0]
    if f == 0:
        return []
    q = p.copy()
    if f >= 3:
        s = p[:-2].astype(int) + p[1:-1] + p[2:]
        q[1:-1] = s >= 2
    sig = [tuple(row) for row in q]
    runs = []  # [first, last, signature]
    for i, s in enumerate(sig):
        if runs and runs[-1][2] == s:
            runs[-1][1] = i
        else:
            runs.append([i, i, s])
    changed = True
    while changed and len(runs) > 1:
        changed = False
        for n, r in enumerate(runs):
            if r[1] - r[0] + 1 < min_frames:
                if n > 0:
                    runs[n - 1][1] = r[1]
                else:
                    runs[1][0] = r[0]
                del runs[n]
                changed = True
                break
        merged = [runs[0]]
        for r in runs[1:]:
            if r[2] == merged[-1][2]:
                merged[-1][1] = r[1]
            else:
                merged.append(r)
        runs = merged
    return [Segment(a, b, tuple(lab for lab, on in zip(labels, s) if on), (float(v[a:b + 1].min()),
                                                                         float(v[a:b + 1].max())))
            for a, b, s in runs]
