"""Candidate overlayer bases: the observed beam vectors worth pairing, the matrices their
pairs propose (:func:`_candidate_matrices`: each pair's net refined by least squares on
the spots it explains, then snapped to simple fractions), and hashable names of lattices
(to try each structure once).

Indices ``hk`` are in the substrate reciprocal basis ``a_star`` (rows a1*, a2*, Å⁻¹,
no 2π); a real-space matrix M has the reciprocal basis (M⁻¹)ᵀ in hk units.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import NetError
from ..nets import Net2D, reduce_net
from ..superstructure import hermite_normal_form


def _snap_matrix(m: np.ndarray, tol: float, max_den: int) -> np.ndarray | None:
    """Each entry replaced by the closest fraction with denominator ≤ `max_den`, or None
    when one lies farther than `tol` from it (the closest p/q for each q is rint(x q)/q)."""
    m = np.asarray(m, dtype=np.float64)
    if np.all(np.abs(m - np.rint(m)) <= tol):
        return np.rint(m) + 0.0
    q = np.arange(1, max_den + 1, dtype=np.float64).reshape((-1,) + (1,) * m.ndim)
    cand = np.rint(m * q) / q
    err = np.abs(cand - m)
    k = np.argmin(err, axis=0)  # the smallest denominator among equally close ones
    best = np.take_along_axis(cand, k[None], 0)[0]
    if np.any(np.take_along_axis(err, k[None], 0)[0] > tol):
        return None
    return best + 0.0


def _lattice_distance(hk: np.ndarray, m: np.ndarray, a_star: np.ndarray) -> np.ndarray:
    """Distance (Å⁻¹) of each spot to the nearest point of the reciprocal net of matrix m."""
    n = hk @ m.T  # hk = n @ inv(M).T  →  n = hk @ M.T
    d = (hk - np.rint(n) @ np.linalg.inv(m).T) @ a_star
    return np.hypot(d[:, 0], d[:, 1])


def _explained(hk: np.ndarray, m: np.ndarray, a_star: np.ndarray, tol_g: float) -> np.ndarray:
    """Which spots lie on the reciprocal net of matrix m (within tol_g, Å⁻¹)."""
    return _lattice_distance(hk, m, a_star) <= tol_g


def _refine_matrix(hk: np.ndarray, m: np.ndarray, a_star: np.ndarray, tol_g: float) -> np.ndarray:
    """Least-squares reciprocal basis of matrix m from the spots it explains."""
    prev = None
    for _ in range(3):
        ok = _explained(hk, m, a_star, tol_g)
        if prev is not None and np.array_equal(ok, prev):
            return m  # the same spots give the same fit
        prev = ok
        n = np.rint(hk[ok] @ m.T)
        if len(n) < 3 or np.linalg.matrix_rank(n) < 2:
            return m
        b_star, *_ = np.linalg.lstsq(n, hk[ok], rcond=None)  # hk ≈ n @ B*
        if abs(np.linalg.det(b_star)) < 1e-9:
            return m
        m = np.linalg.inv(b_star).T
    return m


def _dedupe_vectors(vecs: np.ndarray, a_star: np.ndarray, tol_g: float, n_keep: int,
                    kept_c: list | None = None, *, by_length: bool = True) -> list[np.ndarray]:
    """Up to `n_keep` vectors (shortest first, or in the given order), dropping ±duplicates
    and integer multiples of those kept."""
    if not len(vecs):
        return []
    cart = vecs @ a_star
    ln = np.hypot(cart[:, 0], cart[:, 1])
    out, out_c = [], list(kept_c or [])
    for i in (np.argsort(ln, kind="stable") if by_length else range(len(vecs))):
        c = cart[i]
        if ln[i] <= 2 * tol_g:
            continue
        if any(min(np.hypot(*(c - o)), np.hypot(*(c + o))) <= 1.5 * tol_g for o in out_c):
            continue
        if any(abs(c[0] * o[1] - c[1] * o[0]) <= 1.5 * tol_g * np.hypot(*o) and
               abs(round(float(c @ o / (o @ o))) - c @ o / (o @ o)) < 0.1 for o in out_c):
            continue
        out.append(vecs[i])
        out_c.append(c)
        if len(out) >= n_keep:
            break
    return out


def _candidate_vectors(hk: np.ndarray, integer: np.ndarray, a_star: np.ndarray, tol_g: float,
                       intensity: np.ndarray | None = None, n_spots: int = 10, n_bright: int = 6,
                       n_diff: int = 4) -> np.ndarray:
    """Reciprocal vectors to pair into overlayer bases.

    The shortest observed fractional beams (each is a lattice vector of some
    domain) and the brightest ones (first-order overlayer beams outshine
    multiple-scattering satellites), the substrate's short vectors, and a few
    short differences between nearby beams (to recover beams hidden by the gun).
    """
    g = hk @ a_star
    rad = np.hypot(g[:, 0], g[:, 1])
    frac_idx = [i for i in np.argsort(rad) if not integer[i]]
    primary = _dedupe_vectors(hk[frac_idx], a_star, tol_g, n_spots)
    if intensity is not None and len(frac_idx):
        bright = sorted(frac_idx, key=lambda i: -intensity[i])
        primary += _dedupe_vectors(hk[bright], a_star, tol_g, n_bright, [v @ a_star for v in primary],
                                   by_length=False)
    ints = _dedupe_vectors(np.array([(1, 0), (0, 1), (1, 1), (1, -1)], float), a_star, tol_g, 4,
                           [v @ a_star for v in primary])
    near = np.argsort(rad)[:24]
    diffs = np.array([hk[a] - hk[b] for ia, a in enumerate(near) for b in near[ia + 1:]]).reshape(-1, 2)
    kept = [v @ a_star for v in primary + ints]
    extra = _dedupe_vectors(diffs, a_star, tol_g, n_diff, kept)
    return np.array(primary + ints + extra).reshape(-1, 2)


def _substrate_rotation(a_star: np.ndarray) -> np.ndarray | None:
    """The substrate's smallest rotation in hk units (acting on row vectors): 60° for a
    hexagonal net, 90° for a square one, None for nets with only the 2-fold axis."""
    la, lb = np.linalg.norm(a_star, axis=1)
    if abs(la - lb) > 1e-3 * la:
        return None
    cosg = float(a_star[0] @ a_star[1]) / (la * lb)
    if abs(abs(cosg) - 0.5) < 1e-3:
        ang = math.radians(60.0)
    elif abs(cosg) < 1e-3:
        ang = math.radians(90.0)
    else:
        return None
    rot = np.array([[math.cos(ang), math.sin(ang)], [-math.sin(ang), math.cos(ang)]])  # rows: g @ rot
    return a_star @ rot @ np.linalg.inv(a_star)


def _moire_seeds(hk: np.ndarray, integer: np.ndarray, a_star: np.ndarray, tol_g: float,
                 intensity: np.ndarray | None, n_bright: int = 3):
    """Bases (u, R u) of a layer that nearly coincides with the substrate (a moiré).

    u is one of the brightest fractional beams lying within `_MOIRE_SEED_MISMATCH` of
    |a*| of a first-order substrate beam (the layer's own first-order beams outshine its
    satellites) and R the substrate's rotation: the layer is taken to share the
    substrate's symmetry, so its net is not read off two satellites that happen to span
    a skewed cell. Yields refined matrices M (continuous fits).
    """
    rot = _substrate_rotation(a_star)
    frac = np.flatnonzero(~integer)
    if rot is None or intensity is None or len(frac) < 6:
        return
    g_min = float(np.min(np.linalg.norm(a_star, axis=1)))
    first = np.array([[1, 0], [0, 1], [1, 1], [1, -1], [-1, 0], [0, -1], [-1, -1], [-1, 1]], dtype=np.float64)
    first = first[np.abs(np.linalg.norm(first @ a_star, axis=1) - g_min) < 1e-6 * g_min]
    seen = []
    for i in frac[np.argsort(-np.asarray(intensity, float)[frac], kind="stable")]:
        d = np.min(np.linalg.norm((hk[i] - first) @ a_star, axis=1))
        if d > _MOIRE_SEED_MISMATCH * g_min or d <= 2 * tol_g:
            continue
        b = np.array([hk[i], hk[i] @ rot])
        if abs(np.linalg.det(b)) < 1e-9 or any(np.allclose(b[0] @ a_star, q, atol=tol_g) for q in seen):
            continue
        seen.extend(b @ a_star)
        yield _refine_matrix(hk, np.linalg.inv(b).T, a_star, tol_g)
        if len(seen) >= 2 * n_bright:
            return


#: a fractional beam this close to a first-order substrate beam (fraction of |a*|) may be a
#: moiré layer's own first-order beam (as :data:`analysis.indexing.overlayers._MOIRE_MISMATCH`)
_MOIRE_SEED_MISMATCH = 0.2


def _candidate_matrices(hk: np.ndarray, integer: np.ndarray, a_star: np.ndarray, tol_g: float,
                        intensity: np.ndarray | None, *, max_det: float, max_denominator: int):
    """Overlayer matrices proposed by pairs of observed beam vectors, in search order.

    Each pair of :func:`_candidate_vectors` that spans a net two or more fractional spots
    lie on is a reciprocal basis B*; it is refined on the spots it explains
    (:func:`_refine_matrix`), turned into M = (B*⁻¹)ᵀ and snapped to an integer matrix or
    one with denominators ≤ `max_denominator` when the spots allow (the tolerance on M
    follows from the spot tolerance through |M|²); the unsnapped fit is proposed too
    unless it is within 2·10⁻³ of simple fractions.

    Yields
    ------
    (matrix, kind_tol, continuous) : ((2, 2) ndarray, float, bool)
        The matrix, the tolerance that names its kind, and whether it is the unsnapped
        (continuous) fit, which competes as an incommensurate model with satellites.
    """
    n_frac = int((~integer).sum())
    vecs = _candidate_vectors(hk, integer, a_star, tol_g, intensity)
    g_ref = float(np.min(np.linalg.norm(a_star, axis=1)))
    for m in _moire_seeds(hk, integer, a_star, tol_g, intensity):
        yield m, 2e-3, True
    for i in range(len(vecs)):
        for j in range(i + 1, len(vecs)):
            b = np.array([vecs[i], vecs[j]])
            det_b = abs(np.linalg.det(b))
            if det_b < 1.0 / max_det - 1e-9:
                continue
            cart = b @ a_star
            if det_b * abs(np.linalg.det(a_star)) / (np.linalg.norm(cart[0]) * np.linalg.norm(cart[1])) < 0.15:
                continue  # nearly parallel
            m0 = np.linalg.inv(b).T
            if int((_explained(hk, m0, a_star, 2 * tol_g) & ~integer).sum()) < 2:
                continue  # this pair spans no net the spots lie on
            m = _refine_matrix(hk, m0, a_star, tol_g)
            if abs(np.linalg.det(m)) > max_det + 1e-6:
                continue
            # the tolerance on M follows from the spot tolerance through |M|²
            m_tol = max(0.02, 0.5 * tol_g / g_ref * float(np.max(np.abs(m))) ** 2 / math.sqrt(n_frac))
            snapped = _snap_matrix(m, min(m_tol, 0.12), 1)
            if snapped is None:
                snapped = _snap_matrix(m, min(m_tol, 0.05), max_denominator)
            if snapped is not None and abs(np.linalg.det(snapped)) > 1e-9:
                yield snapped, 1e-6, False
                if _snap_matrix(m, 2e-3, 12) is None:
                    yield m, 2e-3, True  # the continuous fit competes too (incommensurate)
            else:
                yield m, 2e-3, True


def _structure_key(m: np.ndarray, *, exact: bool) -> tuple:
    """Hashable name of the lattice of `m`.

    Exact (rational) matrices: the Hermite normal form. Others: the reduced
    overlayer basis rounded to 0.002 in substrate units.
    """
    if exact:
        try:
            return tuple(np.round(hermite_normal_form(m, max_denominator=12).ravel(), 6))
        except NetError:
            pass
    red, _ = reduce_net(Net2D(np.asarray(m, float)))
    v = red.vectors
    if v[0, 0] < 0 or (v[0, 0] == 0 and v[0, 1] < 0):
        v = -v
    return ("irrational",) + tuple(np.round(v.ravel() / 0.002).astype(int).tolist())


def _lattice_key(m: np.ndarray) -> tuple:
    """Hashable name of the lattice of m: its HNF when exactly rational, else rounded entries."""
    try:
        return tuple(np.round(hermite_normal_form(m, max_denominator=12).ravel(), 6))
    except NetError:
        return tuple(np.round(m.ravel(), 2))
