"""Overlayer models for the fractional-order spots: :func:`find_overlayers` (the search),
:func:`evaluate_model` / :func:`model_from_matrix` (one matrix, e.g. typed by hand),
the symmetry domains of a matrix, the population test of multi-domain models, and
:func:`model_indices` (the exact indices of the spots a model explains).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from fractions import Fraction
from typing import TYPE_CHECKING

import numpy as np
from scipy.spatial import cKDTree

from ..errors import FitError, NetError, ParameterError
from ..lattice import lattice_points, screen_g_max
from ..nets import Net2D, classify_net, point_group, reciprocal, symmetrized
from ..optics import ScreenGeometry, wavelength_A
from ..superstructure import (
    Kind,
    _same_lattice_fast,
    classify_superstructure,
    coincidence_cell,
    coverage,
    format_matrix,
    nice_matrix,
    overlayer_net,
    rational_matrix,
    wood_notation,
)
from ..wood import WoodNotation
from .absences import glide_excused
from .candidates import _candidate_matrices, _explained, _lattice_key, _snap_matrix, _structure_key
from .matching import _screen_xy, _seen
from .score import ScoreBreakdown, irrational_handicap, overlayer_breakdown, population_gain

if TYPE_CHECKING:  # annotations only
    from .substrate import SubstrateFit


@dataclass(frozen=True, eq=False)
class ModelDetails:
    """The objects behind an :class:`OverlayerModel`'s plain fields.

    Attributes
    ----------
    kind : analysis.superstructure.Kind
        The classification of the first domain's matrix (``.kind`` is the model's
        `kind`; coincidence cell and approximants when they apply).
    wood_notation : analysis.wood.WoodNotation
        The Wood notation of the first domain (``.text`` is the model's `wood`).
    intensity_ratio : float or None
        Variance ratio of the population test of a multi-domain model
        (None: one domain, no intensities, or too few spots to tell).
    tol_g : float
        The matching tolerance the model was scored with, in Å⁻¹ (no 2π).
    """

    kind: Kind
    wood_notation: WoodNotation
    intensity_ratio: float | None
    tol_g: float


@dataclass(frozen=True, eq=False)
class OverlayerModel:
    """One superstructure model for the fractional-order spots.

    Attributes
    ----------
    matrix : (2, 2) ndarray
        Real-space matrix of the first domain, substrate basis.
    domains : list of (2, 2) ndarray
        Every domain used (the first is `matrix`).
    domain_ops : list of str
        The substrate operation that makes each domain.
    kind : str
        none / commensurate / coincidence / incommensurate.
    wood : str or None
    wood_note : str
    coverage : float
        Adsorbates per substrate cell for one per overlayer cell.
    explained, unexplained, absent : int
        Fractional spots explained; fractional spots left unexplained;
        predicted fractional spots absent where they could have been seen.
    explained_by : (K,) ndarray of int
        For every input spot, the domain that explains it (−1 none, −2 substrate).
    score : float
        The overlayer score (:mod:`.score`), ``score_terms.total``.
    score_terms : ScoreBreakdown
        The score's named terms (:data:`.score.OVERLAYER_TERMS`) for this model.
    net : Net2D
        The overlayer's real-space net, ``matrix @ substrate`` (Å).
    net_type : str
        Its plane-net type.
    angle_to_substrate_deg : float
        Angle from a1 to b1, degrees in [−180, 180).
    moire_period_A : float or None
        Incommensurate models: the period of the beat between overlayer and
        substrate nets (Å); None otherwise.
    same_beams_as : tuple of (str, int)
        Other rational models among the candidates whose domains put beams at exactly the
        same places (name, domain count): the spot positions cannot tell them from this one,
        only intensities can (e.g. p(2×2) and three domains of p(2×1) on a hexagonal net).
    total_domains : int
        Number of symmetry domains of the matrix on the substrate (used or not).
    notes : tuple of str
        Remarks for the reader (e.g. spots explained as satellites).
    details : ModelDetails or None
        The classification, Wood notation, population test and tolerance behind
        the plain fields (None only for a model constructed directly).
    """

    matrix: np.ndarray
    domains: list
    domain_ops: list
    kind: str
    wood: str | None
    wood_note: str
    coverage: float
    explained: int
    unexplained: int
    absent: int
    explained_by: np.ndarray
    score: float
    total_domains: int = 1
    notes: tuple = ()
    details: ModelDetails | None = None
    score_terms: ScoreBreakdown | None = None
    net: Net2D | None = None
    net_type: str | None = None
    angle_to_substrate_deg: float | None = None
    moire_period_A: float | None = None
    same_beams_as: tuple = ()

    @property
    def n_domains(self) -> int:
        return len(self.domains)


def _net_facts(substrate: Net2D, matrix, kind: str) -> dict:
    """The fields of :class:`OverlayerModel` that follow from its matrix on the `substrate` net."""
    m = np.asarray(matrix, dtype=np.float64)
    over = overlayer_net(substrate, m)
    a1 = substrate.vectors[0]
    b1 = over.vectors[0]
    ang = math.degrees(math.atan2(b1[1], b1[0]) - math.atan2(a1[1], a1[0]))
    return {"net": over, "net_type": classify_net(over, tol=2e-3),
            "angle_to_substrate_deg": (ang + 180.0) % 360.0 - 180.0,
            "moire_period_A": _moire_period(m, substrate) if kind == "incommensurate" else None}


def _moire_period(m: np.ndarray, substrate: Net2D) -> float | None:
    """Period (Å) of the beat between overlayer and substrate nets: the real-space net of
    the shortest differences b*_i − a*_j of their reciprocal vectors (a moiré)."""
    a_star = reciprocal(substrate).vectors
    b_star = np.linalg.inv(m).T @ a_star
    vecs = [b - a for b in (b_star[0], b_star[1], b_star[0] + b_star[1], b_star[0] - b_star[1])
            for a in (a_star[0], a_star[1], a_star[0] + a_star[1], a_star[0] - a_star[1], -a_star[0], -a_star[1])]
    vecs = sorted(vecs, key=lambda v: float(np.hypot(*v)))
    first = vecs[0]
    second = next((v for v in vecs[1:] if abs(first[0] * v[1] - first[1] * v[0]) > 1e-6 * np.hypot(*first) * np.hypot(*v)),
                  None)
    if second is None or np.hypot(*first) < 1e-9:
        return None
    try:
        moire = Net2D(np.linalg.inv(np.array([first, second])).T)
    except ValueError:
        return None
    return float(min(moire.a, moire.b))


def model_indices(hk: np.ndarray, model: OverlayerModel) -> np.ndarray:
    """The exact (model) indices of the spots a model explains; NaN elsewhere. (K, 2).

    Parameters
    ----------
    hk : (K, 2) ndarray of float
        Fractional indices of the spots (substrate basis).
    model : OverlayerModel
        The model (its domains and which domain explains each spot).

    Returns
    -------
    (K, 2) ndarray of float64
        Exact indices in the substrate basis; integers for substrate beams, NaN for
        spots the model leaves unexplained or explains only as satellites.
    """
    out = np.full_like(np.asarray(hk, dtype=np.float64), np.nan)
    by = model.explained_by
    out[by == -2] = np.rint(hk[by == -2])
    for d, m in enumerate(model.domains):
        sel = by == d
        if sel.any():
            n = np.rint(hk[sel] @ np.asarray(m).T)
            pred = n @ np.linalg.inv(m).T
            ok = np.hypot(*((pred - hk[sel]) @ np.eye(2)).T) < 0.5  # satellites keep NaN below
            out[np.flatnonzero(sel)[ok]] = pred[ok]
    return out


def _domain_matrices(m: np.ndarray, ops) -> tuple[list[np.ndarray], list[str]]:
    """Distinct domains M W (W in the substrate group), right-handed like M, with the op names."""
    w = np.array([op.matrix for op in ops], dtype=np.float64)
    mw = np.einsum("ij,gjk->gik", m, w)
    flip = np.linalg.det(mw) * np.linalg.det(m) < 0
    mw[flip] = mw[flip][:, ::-1]
    # same lattice: mw_i mw_j⁻¹ is an integer matrix of determinant ±1
    t = np.einsum("aij,bjk->abik", mw, np.linalg.inv(mw))
    r = np.rint(t)
    same = np.all(np.abs(t - r) <= 1e-6, axis=(2, 3)) & \
        (np.abs(np.abs(r[..., 0, 0] * r[..., 1, 1] - r[..., 0, 1] * r[..., 1, 0]) - 1) < 0.5)
    keep = [g for g in range(len(w)) if not same[g, :g].any()]
    return [mw[g].copy() for g in keep], [ops[g].name for g in keep]


@dataclass(frozen=True, eq=False)
class _Context:
    """What every model is scored against (computed once per pattern)."""

    hk: np.ndarray
    integer: np.ndarray
    a_star: np.ndarray
    geom: ScreenGeometry
    energy_eV: float
    tol_g: float
    ops: list
    tree: cKDTree
    r_max: float
    g_max: float
    valid_mask: np.ndarray | None
    intensity: np.ndarray | None
    substrate: Net2D
    max_denominator: int = 6
    reliable: np.ndarray | None = None  # (K,) spots whose centres are trusted (None: all)
    net: Net2D | None = None  # the substrate net as read (the fit's): models state their own net on it


def _context(hk, integer, substrate_fit: SubstrateFit, energy_eV, intensity, valid_mask, tol_px,
             max_denominator: int = 6, reliable=None) -> _Context:
    hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
    reliable = np.ones(len(hk), bool) if reliable is None else np.asarray(reliable, dtype=bool).reshape(len(hk))
    frac = ~np.asarray(integer, dtype=bool)
    if int((frac & reliable).sum()) < 2:  # too few trusted fractional spots to judge by: count them all
        reliable = np.ones(len(hk), bool)
    geom = substrate_fit.geometry
    a_star = substrate_fit.reciprocal_net.vectors
    lam = wavelength_A(energy_eV)
    center = np.array(geom.center_px)
    obs_xy = _screen_xy(hk @ a_star, energy_eV, geom)
    r_obs = np.hypot(obs_xy[:, 0] - center[0], obs_xy[:, 1] - center[1])
    r_max = float(np.nanmax(r_obs)) * 1.02 if len(r_obs) else 0.0
    # Wood notation, kind and domains need the substrate's exact symmetry: a net measured from an
    # image (a reference calibration) misses it by its error, so the nearest symmetric net is used
    sub = symmetrized(Net2D(substrate_fit.net.vectors), tol=2e-3)
    return _Context(hk=hk, integer=np.asarray(integer, dtype=bool), a_star=a_star, geom=geom,
                    energy_eV=float(energy_eV), tol_g=tol_px / (geom.scale_px * lam),
                    ops=point_group(sub, tol=2e-3), tree=cKDTree(hk @ a_star), r_max=r_max,
                    g_max=screen_g_max(energy_eV, min(geom.acceptance_deg, 80.0)),
                    valid_mask=valid_mask, intensity=None if intensity is None else np.asarray(intensity, float),
                    substrate=sub, max_denominator=int(max_denominator), reliable=reliable,
                    net=substrate_fit.net)


@dataclass(frozen=True, eq=False)
class _Scored:
    """One matrix scored with its domains (what :func:`_describe` turns into a model).

    Attributes
    ----------
    domains : list of (2, 2) ndarray of float64
        The domains chosen (the smallest set that explains the spots, or all), real-space matrices.
    domain_ops : list of str
        The substrate operation that makes each chosen domain.
    all_domains : list of (2, 2) ndarray of float64
        Every symmetry domain of the matrix, chosen or not.
    explained, unexplained : int
        Fractional spots explained / left unexplained (every spot, trusted or not).
    satellites : int
        Of the explained, those explained only as multiple-scattering satellites.
    satellites_allowed : bool
        Satellites were accepted (a continuous fit, a candidate for an incommensurate model).
    explained_by : (K,) ndarray of int
        For every spot, the rank of the chosen domain that explains it (−1 none, −2 substrate).
    absent : int or None
        Predicted fractional beams absent where a spot could be seen; None until counted.
    terms : ScoreBreakdown
        The overlayer score's named terms (A included once `absent` is counted).
    bound : float
        The score before A is counted: an upper bound of `score`.
    total_domains : int
        Number of symmetry domains of the matrix (``len(all_domains)``).
    """

    domains: list
    domain_ops: list
    all_domains: list
    explained: int
    unexplained: int
    satellites: int
    satellites_allowed: bool
    explained_by: np.ndarray
    absent: int | None
    terms: ScoreBreakdown
    bound: float

    @property
    def score(self) -> float:
        """The score so far: ``terms.total`` (equal to `bound` until `absent` is counted)."""
        return self.terms.total

    @property
    def total_domains(self) -> int:
        return len(self.all_domains)


#: A layer whose first-order beams each lie within this fraction of |a*| (the shortest substrate
#: beam) of a substrate beam forms a moiré with it (near coincidence: misfit and twist of a few
#: per cent, e.g. a graphene-like layer on a close-packed metal).
_MOIRE_MISMATCH = 0.2
#: Highest order n of the moiré satellites h + n₁Δ₁ + n₂Δ₂ (max(|n₁|, |n₂|, |n₁ + n₂|) ≤ n).
_MOIRE_ORDER = 4


def _satellite_steps(bs: np.ndarray, a_star: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(D, V, 2) layer beams (hk units) that a multiple-scattering satellite adds to a substrate beam,
    and (D,) which domains form a moiré.

    Generally the first-order beams ± b1*, ± b2*, ± (b1* ± b2*). When the layer's first-order
    beams nearly coincide with substrate beams (a moiré: b_i* = h_i + Δ_i with |Δ_i| small), the
    double diffraction between the two nets puts beams at every h + n₁Δ₁ + n₂Δ₂, i.e. a substrate
    beam plus the layer beam n₁b1* + n₂b2*, and several orders are seen (order ≤ `_MOIRE_ORDER`).

    >>> a_star = np.eye(2)
    >>> v, m = _satellite_steps(np.array([[[1.1, 0.0], [0.0, 1.1]]]), a_star)   # a moiré
    >>> v.shape, m.tolist()
    ((1, 60, 2), [True])
    >>> v, m = _satellite_steps(np.array([[[0.5, 0.0], [0.0, 0.5]]]), a_star)   # a (2×2)
    >>> v.shape, m.tolist()
    ((1, 8, 2), [False])
    """
    first = np.stack([bs[:, 0], bs[:, 1], bs[:, 0] + bs[:, 1], bs[:, 0] - bs[:, 1]], axis=1)
    first = np.concatenate([first, -first], axis=1)  # (D, 8, 2)
    a_min = float(np.min(np.linalg.norm(a_star, axis=1)))
    delta = (bs - np.rint(bs)) @ a_star  # (D, 2, 2) Å⁻¹
    is_moire = np.all(np.linalg.norm(delta, axis=2) <= _MOIRE_MISMATCH * a_min, axis=1) & \
        np.all(np.linalg.norm(np.rint(bs), axis=2) > 0, axis=1)
    if not is_moire.any():
        return first, is_moire
    n = _MOIRE_ORDER
    orders = np.array([(i, j) for i in range(-n, n + 1) for j in range(-n, n + 1)
                       if (i, j) != (0, 0) and max(abs(i), abs(j), abs(i + j)) <= n], dtype=np.float64)
    many = np.einsum("vi,dij->dvj", orders, bs)  # (D, V, 2)
    # domains that are no moiré keep their first-order steps (padded by repeating them)
    reps = -(-len(orders) // first.shape[1])
    padded = np.tile(first, (1, reps, 1))[:, : len(orders)]
    return np.where(is_moire[:, None, None], many, padded), is_moire


def _distinct_nets(bs: np.ndarray, a_star: np.ndarray, tol_g: float) -> int:
    """How many of the (D, 2, 2) reciprocal bases `bs` (hk units) span different nets, two nets
    being the same when each basis vector of one lies within `tol_g` (Å⁻¹, twice over the
    first shell) of a point of the other.

    >>> bs = np.array([np.eye(2) * 1.1, [[0.0, 1.1], [-1.1, -1.1]], np.eye(2) * 0.5])
    >>> _distinct_nets(bs, np.eye(2), 0.01)
    2
    """
    reps: list[np.ndarray] = []
    for b in bs:
        inv_b = np.linalg.inv(b)
        for r in reps:
            q = r @ inv_b  # r's vectors in b's basis
            if np.all(np.linalg.norm((q - np.rint(q)) @ b @ a_star, axis=1) <= tol_g) and \
                    abs(abs(np.linalg.det(np.rint(q))) - 1.0) < 1e-9:
                break
        else:
            reps.append(b)
    return len(reps)


def _score(ctx: _Context, matrix, *, all_domains: bool, satellites: bool, absent: bool = True) -> _Scored:
    """Explained / unexplained / absent counts and the score of one matrix with its domains.

    With ``absent=False`` the (costly) count of missing beams is left for
    :func:`_with_absent`; ``score`` is then an upper bound.
    """
    m = np.asarray(matrix, dtype=np.float64)
    if np.linalg.det(m) < 0:  # report bases with the substrate's handedness (det M > 0)
        m = m[::-1].copy()
    hk, a_star, tol_g = ctx.hk, ctx.a_star, ctx.tol_g
    frac = ~ctx.integer
    mats, names = _domain_matrices(m, ctx.ops)
    ms = np.array(mats)
    bs = np.linalg.inv(ms).transpose(0, 2, 1)  # reciprocal bases (D, 2, 2), hk units
    # distance of every spot to each domain's net: hk ≈ rint(hk Mᵀ) B
    near = np.einsum("dkj,dji->dki", np.rint(np.einsum("ki,dji->dkj", hk, ms)), bs)
    dd = (hk[None] - near) @ a_star
    dist = np.hypot(dd[..., 0], dd[..., 1])  # (D, K) Å⁻¹
    expl = (dist <= tol_g) & frac[None, :]
    primary = expl.copy()
    moire = np.zeros(len(mats), bool)
    if satellites:  # a substrate beam plus a low-order beam of the layer
        v, moire = _satellite_steps(bs, a_star)
        sh = hk[None, None] - v[:, :, None, :]
        dd = (sh - np.rint(sh)) @ a_star
        dist = np.minimum(dist, np.hypot(dd[..., 0], dd[..., 1]).min(axis=1))
        expl = (dist <= tol_g) & frac[None, :]
    if all_domains:
        chosen = list(range(len(mats)))
    else:  # greedy: the smallest set of domains that explains the spots (a domain earns its
        # place by beams of its own; satellites only count for domains already chosen)
        chosen, covered = [], np.zeros(len(hk), bool)
        while True:
            gains = [int((primary[i] & ~covered).sum()) if i not in chosen else -1 for i in range(len(mats))]
            best = int(np.argmax(gains))
            if gains[best] < (1 if not chosen else 2):
                break
            chosen.append(best)
            # a further domain must explain spots the chosen ones cannot, even as their satellites
            covered |= expl[best]
        chosen = chosen or [0]
    by = np.full(len(hk), -1)
    by[ctx.integer] = -2
    for rank in range(len(chosen) - 1, -1, -1):
        by[expl[chosen[rank]]] = rank
    covered = expl[chosen].any(axis=0) & frac
    e = int(covered.sum())
    e_sat = e - int((primary[chosen].any(axis=0) & frac).sum())
    u = int(frac.sum()) - e
    # the score counts spots with trusted centres only (not cut by a mask edge, fit converged):
    # a biased centre must not decide between models
    rel = ctx.reliable
    e_r = int((covered & rel).sum())
    e_sat_r = e_r - int((primary[chosen].any(axis=0) & frac & rel).sum())
    u_r = int((frac & rel).sum()) - e_r
    det = abs(float(np.linalg.det(mats[chosen[0]])))
    # the tighter fit wins a tie: the miss of each explained spot, in tolerances
    miss = dist[chosen].min(axis=0)[covered & rel] / tol_g
    own_li = sat_li = None
    if e_sat and ctx.intensity is not None:  # a layer's own beams outshine its multiple-scattering satellites
        own = primary[chosen].any(axis=0) & frac & rel
        sat_only = covered & rel & ~own
        li = np.log(np.clip(ctx.intensity, 1e-9, None))
        own_li, sat_li = li[own], li[sat_only]
    terms = overlayer_breakdown(explained=e_r, satellites=e_sat_r, unexplained=u_r, n_domains=len(chosen),
                                det=det, miss=miss, own_log_i=own_li, satellite_log_i=sat_li,
                                moire=bool(moire[chosen].any()),
                                symmetry_domains=_distinct_nets(bs, a_star, tol_g) if moire.any() else None,
                                denominator=1 if satellites else _common_denominator(m))
    bound = terms.total  # A not counted yet: an upper bound of the score
    sc = _Scored(domains=[mats[i] for i in chosen], domain_ops=[names[i] for i in chosen], all_domains=mats,
                 explained=e, unexplained=u, satellites=e_sat, satellites_allowed=bool(satellites),
                 explained_by=by, absent=None, terms=terms, bound=bound)
    return _with_absent(ctx, sc) if absent else sc


def _with_absent(ctx: _Context, sc: _Scored) -> _Scored:
    """Count predicted fractional beams missing where they could be seen; finish the score."""
    if sc.absent is not None:
        return sc
    absent = weight = 0
    center = np.array(ctx.geom.center_px)
    a_star = ctx.a_star
    try:
        pts = [lattice_points(np.linalg.inv(m).T, ctx.g_max, metric=a_star) for m in sc.domains]
    except ParameterError:
        raise FitError("The overlayer net is too fine to enumerate on this screen.") from None
    pts = np.concatenate(pts) if pts else np.zeros((0, 2))  # every domain at once
    pts = pts[np.any(np.abs(pts - np.rint(pts)) > 1e-6, axis=1)]
    if len(pts):
        seen = _seen(_screen_xy(pts @ a_star, ctx.energy_eV, ctx.geom), ctx.valid_mask, center, ctx.r_max, 0.0)
        if seen.any():
            d, _ = ctx.tree.query(pts[seen] @ a_star, distance_upper_bound=ctx.tol_g)
            missing = ~np.isfinite(d)
            if missing.any() and not sc.satellites_allowed:  # odd beams of glide lines the spots show
                missing[missing] = ~glide_excused(ctx, sc.domains, pts[seen][missing])
            absent = weight = int(np.sum(missing))
            if absent and not sc.satellites_allowed:
                # a rational net's beams of one symmetry class (the substrate's point group, all
                # domains together) share one intensity: a class missing is one dark class, not
                # one absence per beam. A continuous fit, whose beams its free parameters place,
                # answers for each predicted beam.
                _, n_c = np.unique(_class_keys(pts[seen][missing], ctx.ops), axis=0, return_counts=True)
                weight = _absent_weight(n_c)
    return dataclasses.replace(sc, absent=absent, terms=sc.terms.replace(absent=weight))


def _absent_weight(n_missing: np.ndarray) -> float:
    """What the absent beams weigh in the score: Σ over symmetry classes of 1 + log₂ n, n the
    class's members missing. Beams of one class (the substrate's point group acting on all
    domains together) share one intensity at normal incidence, so a whole class dark is one
    fact (a structure factor near zero), not n independent absences; its further members still
    count a little (log₂ n), since unequal domain populations and an off-normal beam break
    the equality.

    Examples
    --------
    >>> _absent_weight(np.array([1, 1])), _absent_weight(np.array([4]))
    (2.0, 3.0)
    """
    n = np.asarray(n_missing, dtype=np.float64)
    return float(np.sum(1.0 + np.log2(n)))


def _class_keys(hk: np.ndarray, ops) -> np.ndarray:
    """(N, 2) key of each beam's symmetry class: the lexicographically largest image of its
    index (substrate units) under the substrate's point group."""
    inv_t = np.array([np.linalg.inv(op.matrix).T for op in ops])
    img = np.round(np.einsum("si,gij->sgj", np.asarray(hk, float).reshape(-1, 2), inv_t), 3) + 0.0
    k0 = img[:, :, 0].max(axis=1)
    k1 = np.where(img[:, :, 0] == k0[:, None], img[:, :, 1], -np.inf).max(axis=1)
    return np.column_stack([k0, k1])


def _common_denominator(m: np.ndarray) -> int:
    """q, the least common denominator of a rational matrix's entries (≤ 12; 1 when not rational).

    The same in every basis of the cell (integer changes of basis keep it).

    >>> _common_denominator(np.array([[3, 0], [0, 1.5]])), _common_denominator(np.array([[2, 1], [-1, 1]]))
    (2, 1)
    """
    fr = rational_matrix(m, max_denominator=12)
    return 1 if fr is None else math.lcm(*(f.denominator for row in fr for f in row))


def _describe(ctx: _Context, sc: _Scored, *, kind_tol: float) -> OverlayerModel:
    """Turn a scored matrix into a model with kind, Wood notation and coverage."""
    m = sc.domains[0]
    # a continuous fit names only the coincidences the search itself would have snapped to;
    # closer high-order ones are listed as its approximants
    kind = classify_superstructure(ctx.substrate, m, tol=kind_tol,
                                   max_denominator=ctx.max_denominator if sc.satellites_allowed else 12)
    if kind.kind in ("commensurate", "coincidence", "none"):  # exact, and in a readable basis
        snapped = [_snap_matrix(d, kind_tol, 12) for d in sc.domains]
        mats = [nice_matrix(ctx.substrate, d if q is None else q) for d, q in zip(sc.domains, snapped)]
        m = mats[0]
    else:
        mats = sc.domains
    w = wood_notation(ctx.substrate, m, tol=1e-6 if kind.kind != "incommensurate" else 2e-3)
    ratio = None
    if ctx.intensity is not None and len(mats) > 1:
        ratio = _population_test(ctx.hk, sc.explained_by, ctx.intensity, ctx.ops,
                                 denominator=_index_denominator(mats[0]) if kind.kind != "incommensurate" else None)
    notes = []
    if sc.satellites:
        notes.append(f"{sc.satellites} spots explained as multiple-scattering satellites")
    return OverlayerModel(matrix=m, domains=mats, domain_ops=sc.domain_ops, kind=kind.kind, wood=w.text,
                          wood_note=w.note, coverage=coverage(m), explained=sc.explained, unexplained=sc.unexplained,
                          absent=sc.absent, explained_by=sc.explained_by, score=sc.score, total_domains=sc.total_domains,
                          notes=tuple(notes), score_terms=sc.terms,
                          details=ModelDetails(kind=kind, wood_notation=w, intensity_ratio=ratio, tol_g=ctx.tol_g),
                          **_net_facts(ctx.net, m, kind.kind))


def evaluate_model(hk: np.ndarray, integer: np.ndarray, substrate_fit: SubstrateFit, matrix, *,
                   energy_eV: float, intensity: np.ndarray | None = None, valid_mask: np.ndarray | None = None,
                   tol_px: float = 2.5, all_domains: bool = False, satellites: bool = False,
                   kind_tol: float = 1e-6, reliable: np.ndarray | None = None) -> OverlayerModel:
    """Score one superstructure matrix (with its symmetry domains) against the spots.

    Parameters
    ----------
    hk : (K, 2) ndarray
        Fractional indices of all spots (substrate basis).
    integer : (K,) ndarray of bool
        Spots taken as substrate beams.
    substrate_fit : SubstrateFit
        The substrate reading (camera model and reciprocal net).
    matrix : (2, 2) array_like
        Real-space matrix of one domain.
    energy_eV : float, keyword-only
        Electron energy, eV.
    intensity : (K,) ndarray of float, optional, keyword-only
        Integrated spot intensities (counts).
    valid_mask : (M, N) ndarray of bool, optional, keyword-only
        Pixels where a spot could be seen: predicted beams there without a spot count as absent.
    tol_px : float, keyword-only
        Matching tolerance, pixels.
    all_domains : bool
        Use every symmetry domain (a model typed by hand); otherwise the
        smallest set of domains that explains the spots (greedy).
    satellites : bool
        Also accept first-order multiple-scattering spots (substrate beam ±
        an overlayer beam), for incommensurate overlayers.
    kind_tol : float
        Absolute tolerance on the matrix entries for integer / rational.
    reliable : (K,) ndarray of bool, optional
        Spots whose centres are trusted; only they count in the score
        (the counts reported cover every spot).

    Returns
    -------
    OverlayerModel
        The matrix (first domain) with its domains, kind, Wood notation, coverage, counts
        and score.
    """
    ctx = _context(hk, integer, substrate_fit, energy_eV, intensity, valid_mask, tol_px, reliable=reliable)
    sc = _score(ctx, matrix, all_domains=all_domains, satellites=satellites)
    return _describe(ctx, sc, kind_tol=kind_tol)


_INTENSITY_SCATTER = 0.1  # relative scatter of equivalent beams' intensities taken as noise


def _index_denominator(matrix) -> int | None:
    """The n with every beam of a rational overlayer at indices in (1/n)ℤ (n = |det| of its
    integer coincidence matrix), or None for an irrational one.

    >>> _index_denominator([[2, 0], [0, 1]]), _index_denominator([[1.5, 0], [0, 1.5]])
    (2, 9)
    """
    q = _snap_matrix(np.asarray(matrix, dtype=np.float64), 1e-6, 12)
    if q is None:
        return None
    try:
        return int(round(abs(np.linalg.det(coincidence_cell(q)))))
    except NetError:
        return None


def _population_test(hk: np.ndarray, by: np.ndarray, intensity: np.ndarray, ops, *,
                     denominator: int | None = None) -> float | None:
    """Variance ratio of log intensities within symmetry classes, without / with per-domain populations.

    Classes are orbits of beam indices under the full substrate group. A ratio
    well above 1 says the domains are unequally populated, which a
    single-domain model cannot produce. `denominator` n puts the measured
    indices on the model's grid (1/n)ℤ first, so equivalent beams share a class.
    """
    sel = by >= 0
    if sel.sum() < 6:
        return None
    li = np.log(np.clip(intensity[sel], 1e-9, None))
    hk_sel = hk[sel] if not denominator else np.rint(hk[sel] * denominator) / denominator
    _, cls = np.unique(_class_keys(hk_sel, ops), axis=0, return_inverse=True)
    cls = cls.ravel()
    dom = by[sel]

    # least squares on class and domain indicators, with the class effects absorbed first
    # (the within-class transformation, exact for indicator columns): only the few domain
    # columns are fitted, however many classes there are
    n_cls = int(cls.max()) + 1
    count = np.bincount(cls, minlength=n_cls).astype(float)

    def within(v):  # v minus its class mean, for a vector or the columns of a matrix
        sums = np.zeros((n_cls,) + v.shape[1:])
        np.add.at(sums, cls, v)
        return v - (sums / count.reshape((-1,) + (1,) * (v.ndim - 1)))[cls]

    r0 = within(li)
    doms = np.unique(dom)
    d = within((dom[:, None] == doms[None, 1:]).astype(float))
    rank_d = int(np.linalg.matrix_rank(d)) if d.shape[1] else 0
    if len(li) - (n_cls + rank_d) < 4:
        return None  # too few spots per class to tell
    v0 = float(r0 @ r0) / max(len(li) - n_cls, 1)
    if d.shape[1]:
        beta, *_ = np.linalg.lstsq(d, r0, rcond=None)
        r1 = r0 - d @ beta
        v1 = float(r1 @ r1) / max(len(li) - n_cls - rank_d, 1)
    else:
        v1 = v0
    # measured spot intensities scatter by ~10 % between equivalent beams (common practice for
    # LEED: screen and camera non-uniformity), so differences of a few per cent between domains
    # are no evidence of unequal populations, however precise the counts
    floor = _INTENSITY_SCATTER**2
    return float((v0 + floor) / (v1 + floor))


def model_from_matrix(hk, integer, substrate_fit, matrix, *, energy_eV, **kw) -> OverlayerModel:
    """A model typed by hand: every symmetry domain of `matrix` (see :func:`evaluate_model`).

    Parameters
    ----------
    hk : (K, 2) ndarray of float
        Fractional indices of all spots (substrate basis).
    integer : (K,) ndarray of bool
        Spots taken as substrate beams.
    substrate_fit : SubstrateFit
        The substrate reading.
    matrix : (2, 2) array_like of float
        Real-space matrix of one domain.
    energy_eV : float, keyword-only
        Electron energy, eV.
    **kw
        The other options of :func:`evaluate_model`.

    Returns
    -------
    OverlayerModel
        The model with every symmetry domain of `matrix`.
    """
    return evaluate_model(hk, integer, substrate_fit, matrix, energy_eV=energy_eV, all_domains=True, **kw)


def find_overlayers(hk: np.ndarray, integer: np.ndarray, substrate_fit: SubstrateFit, *, energy_eV: float,
                    intensity: np.ndarray | None = None, valid_mask: np.ndarray | None = None,
                    tol_px: float = 2.5, max_det: float = 64.0, max_denominator: int = 6,
                    n_results: int = 5, reliable: np.ndarray | None = None) -> list[OverlayerModel]:
    """Search superstructure matrices that explain the fractional-order spots.

    Candidates come from pairs of short observed beam vectors (and their
    differences, to recover beams hidden by the gun); each pair is a
    reciprocal basis B*, refined by least squares on the spots it explains,
    turned into M = (B*⁻¹)ᵀ and snapped to an integer matrix
    (commensurate) or one with denominators ≤ `max_denominator` (coincidence)
    when the spots allow; the unsnapped fit competes as an incommensurate
    model (with multiple-scattering satellites allowed). Each is scored with
    its domains (see :mod:`.score`); the best few are described.

    Returns
    -------
    list of OverlayerModel
        Best first. A clean surface gives one model, the identity, kind ``none``.

    Parameters
    ----------
    hk : (K, 2) ndarray of float
        Fractional indices of all spots (substrate basis).
    integer : (K,) ndarray of bool
        Spots taken as substrate beams.
    substrate_fit : SubstrateFit
        The substrate reading (camera model and reciprocal net).
    energy_eV : float, keyword-only
        Electron energy, eV.
    intensity : (K,) ndarray of float, optional, keyword-only
        Integrated spot intensities (counts).
    valid_mask : (M, N) ndarray of bool, optional, keyword-only
        Pixels where a spot could be seen: predicted beams there without a spot count as absent.
    tol_px : float, keyword-only
        Matching tolerance, pixels.
    max_det : float, keyword-only
        Largest cell area tried, in substrate cells.
    max_denominator : int, keyword-only
        Largest denominator of a coincidence matrix.
    n_results : int, keyword-only
        Models returned at most.
    reliable : (K,) ndarray of bool, optional, keyword-only
        Spots whose centres are trusted; only they count in the score.
    """
    ctx = _context(hk, integer, substrate_fit, energy_eV, intensity, valid_mask, tol_px, max_denominator, reliable)
    if int((~ctx.integer).sum()) == 0:
        return [_describe(ctx, _score(ctx, np.eye(2), all_domains=False, satellites=False), kind_tol=1e-6)]
    a_star, tol_g = ctx.a_star, ctx.tol_g
    seen: set = set()
    scored: list[tuple[_Scored, float]] = []
    for c, ktol, sat in _candidate_matrices(ctx.hk, ctx.integer, a_star, tol_g, ctx.intensity, max_det=max_det,
                                            max_denominator=max_denominator):
        key = _structure_key(c, exact=not sat)
        if key in seen:
            continue
        seen.add(key)
        if int((_explained(ctx.hk, c, a_star, tol_g) & ~ctx.integer).sum()) < 2 and not sat:
            continue
        sc = _score(ctx, c, all_domains=False, satellites=sat, absent=False)
        if not sat:  # every domain of this structure is now known
            seen.update(_structure_key(d, exact=True) for d in sc.all_domains)
        scored.append((sc, ktol))
    # the bare substrate always competes: a few stray spots do not make a superstructure
    scored.append((_score(ctx, np.eye(2), all_domains=False, satellites=False, absent=False), 1e-6))
    # branch and bound: finish the scores best bound first, until no bound can enter the list;
    # irrational fits are ranked with the handicap _prefer_simple gives them
    def rank(sc: _Scored, key="score"):
        return getattr(sc, key) - (irrational_handicap(sc.explained, len(sc.domains)) if sc.satellites_allowed else 0.0)

    scored.sort(key=lambda t: -rank(t[0], "bound"))
    done: list[tuple[_Scored, float]] = []
    for sc, kt in scored:
        if len(done) >= 2 * n_results and rank(sc, "bound") < sorted(rank(d) for d, _ in done)[-2 * n_results]:
            break
        done.append((_with_absent(ctx, sc), kt))
    done.sort(key=lambda t: -rank(t[0]))
    scored = []
    for sc, kt in done:  # irrational fits of one lattice (other bases, other starts) count once
        if sc.satellites_allowed and any(
                o.satellites_allowed and len(o.domains) == len(sc.domains) and
                any(_same_lattice_fast(sc.domains[0], x, 0.02) for x in o.all_domains) for o, _ in scored):
            continue
        scored.append((sc, kt))
    models = _prefer_simple([_describe(ctx, sc, kind_tol=kt) for sc, kt in scored[: n_results + 1]])
    judged = []  # (significant, model), each model's chance computed once
    for mm in models:
        chance = _chance_explained(ctx, mm)
        ok = _significant(mm, chance)
        judged.append((ok, mm if ok else dataclasses.replace(
            mm, notes=mm.notes + (f"not significant: {int(mm.score_terms['explained'])} spots explained, where "
                                  f"{chance:.1f} would fall on its beams by chance (or fewer than a net "
                                  f"with its free parameters fits)",))))
    judged.sort(key=lambda t: (not t[0], -t[1].score))  # "none" before a chance fit
    models = [mm for _, mm in judged]
    out, keys = [], []
    for mm in models:
        key = (mm.wood, mm.n_domains, mm.kind) if mm.wood else (mm.n_domains, mm.kind, _lattice_key(mm.matrix))
        if key in keys:
            continue
        if mm.kind == "incommensurate":  # an unsnapped copy of a rational model listed already
            near = _snap_matrix(np.asarray(mm.matrix, float), 0.02, 12)
            if near is not None and any(o.kind != "incommensurate" and o.n_domains == mm.n_domains and
                                        _same_lattice_fast(near, np.asarray(o.matrix, float), 1e-6) for o in out):
                continue
        keys.append(key)
        out.append(mm)
    out = out[:n_results]
    if not out:
        return out
    lead = _lead_with_plainest_domain(ctx, out[0])
    twins = tuple((o.wood or format_matrix(o.matrix), o.n_domains) for o in out[1:] if _same_beams(lead, o))
    if twins:
        lead = dataclasses.replace(lead, same_beams_as=twins, notes=lead.notes + tuple(
            f"{name} in {n} domain{'s' if n > 1 else ''} puts its beams at the same places: only the spots' "
            f"intensities tell the two apart (unequal domain populations, or I(V) curves)" for name, n in twins))
    return [lead] + out[1:]


_RATIONAL_KINDS = ("commensurate", "coincidence")


def _beam_set(model: OverlayerModel, reach: float = 2.0) -> frozenset:
    """The fractional beams (h, k) with |h|, |k| ≤ `reach` of all the model's domains,
    as exact fractions (rational models only)."""
    out = set()
    for d in model.domains:
        m = np.asarray(d, dtype=np.float64)
        n_max = int(math.ceil(reach * float(np.abs(m).sum(axis=0).max()))) + 1
        n = np.stack(np.meshgrid(np.arange(-n_max, n_max + 1), np.arange(-n_max, n_max + 1)), -1).reshape(-1, 2)
        hk = n @ np.linalg.inv(m).T  # beams of this domain: (h, k) = n M⁻ᵀ
        hk = hk[np.all(np.abs(hk) <= reach + 1e-9, axis=1)]
        for h, k in hk:
            out.add((Fraction(float(h)).limit_denominator(144), Fraction(float(k)).limit_denominator(144)))
    return frozenset(out)


def _same_beams(a: OverlayerModel, b: OverlayerModel) -> bool:
    """True when two different rational models put beams at exactly the same places."""
    if a.kind not in _RATIONAL_KINDS or b.kind not in _RATIONAL_KINDS:
        return False
    if a.n_domains == b.n_domains and _same_lattice_fast(np.asarray(a.matrix, float), np.asarray(b.matrix, float), 1e-6):
        return False
    return _beam_set(a) == _beam_set(b)


def _lead_with_plainest_domain(ctx: _Context, mm: OverlayerModel) -> OverlayerModel:
    """Put first the domain whose Wood cell reads most plainly (m ≥ n, least rotation).

    Domains related by a substrate mirror name the same structure, e.g. (2×1)
    and (1×2) on a centred rectangular net; the report names it by the plainer one.
    """
    if mm.n_domains < 2 or mm.kind == "incommensurate":
        return mm
    woods = [wood_notation(ctx.substrate, d) for d in mm.domains]

    def key(w):
        if w.text is None:
            return (1, 0.0, 0.0)
        return (0, float(w.n > w.m + 1e-9), abs(w.angle_deg), -w.angle_deg)

    k = min(range(len(woods)), key=lambda i: key(woods[i]))
    if k == 0:
        return mm
    order = [k] + [i for i in range(mm.n_domains) if i != k]
    by = mm.explained_by.copy()
    remap = {old: new for new, old in enumerate(order)}
    by = np.array([remap.get(int(b), int(b)) if b >= 0 else int(b) for b in by])
    w = woods[k]
    return dataclasses.replace(mm, matrix=mm.domains[k], domains=[mm.domains[i] for i in order],
                               domain_ops=[mm.domain_ops[i] for i in order], wood=w.text, wood_note=w.note,
                               explained_by=by, details=dataclasses.replace(mm.details, wood_notation=w),
                               **_net_facts(ctx.net, mm.domains[k], mm.kind))


#: Fewest trusted fractional spots a model must explain to count as an overlayer: an irrational
#: basis has four free parameters, so it fits any two spots exactly (and, with the many bases
#: tried, often three); a rational matrix is one of a discrete family and may rest on two.
_MIN_EXPLAINED = {"incommensurate": 4, "coincidence": 3, "commensurate": 2}


def _significant(mm: OverlayerModel, chance: float = 0.0) -> bool:
    """Whether a model explains more fractional spots than its freedom fits by chance, and
    clearly more than stray spots put on its beams by chance (`chance`, the expected number:
    :func:`_chance_explained`; "clearly": by three Poisson σ).

    >>> from types import SimpleNamespace as NS
    >>> terms = {"explained": 2.0}
    >>> _significant(NS(kind="incommensurate", score_terms=terms)), _significant(NS(kind="commensurate", score_terms=terms))
    (False, True)
    >>> _significant(NS(kind="commensurate", score_terms={"explained": 40.0}), chance=30.0)
    False
    """
    if mm.kind == "none":
        return True
    e = mm.score_terms["explained"]
    return e >= _MIN_EXPLAINED.get(mm.kind, 2) and e >= chance + 3.0 * math.sqrt(chance)


def _chance_explained(ctx: _Context, mm: OverlayerModel) -> float:
    """Expected number of the trusted fractional spots that would land on a model's beams
    by chance if they were strewn evenly over the screen: their number times the share of
    reciprocal space within the matching tolerance of a predicted beam. Per substrate
    cell a domain of |det M| = m puts m − 1 fractional beams, and a model with satellites
    one more per satellite step (:func:`_satellite_steps`).
    """
    if mm.kind == "none":
        return 0.0
    rel = ctx.reliable if ctx.reliable is not None else np.ones(len(ctx.hk), bool)
    n = int((~ctx.integer & rel).sum())
    mats = [np.asarray(d, dtype=np.float64) for d in mm.domains]
    per_cell = sum(max(abs(float(np.linalg.det(m))) - 1.0, 0.0) for m in mats)
    if mm.score_terms["satellites"] > 0:  # its satellites explain spots: their positions count too
        bs = np.linalg.inv(np.array(mats)).transpose(0, 2, 1)
        per_cell += len(mats) * _satellite_steps(bs, ctx.a_star)[0].shape[1]
    cell = abs(float(np.linalg.det(ctx.a_star)))
    share = min(1.0, per_cell * math.pi * ctx.tol_g**2 / cell)
    return n * share


def _prefer_simple(models: list[OverlayerModel]) -> list[OverlayerModel]:
    """Adjust scores: an irrational matrix must explain clearly more than a rational one;
    a multi-domain model gains when the intensities say the domains are unequally
    populated (which a single-domain model cannot produce)."""
    out = []
    for mm in models:
        h = irrational_handicap(mm.explained, mm.n_domains) if mm.kind == "incommensurate" else 0.0
        ratio = mm.details.intensity_ratio if mm.details is not None else None
        # only where positions cannot tell (rational models, no satellites); repays the domain penalty, no more
        p = 0.0
        if mm.n_domains > 1 and ratio is not None and mm.kind != "incommensurate":
            p = population_gain(ratio, mm.n_domains)
        terms = mm.score_terms.replace(irrational=h, populations=p)
        out.append(dataclasses.replace(mm, score=terms.total, score_terms=terms))
    return out
