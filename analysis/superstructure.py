"""Superstructures on a substrate net: matrices, lattice equivalence, kind
(commensurate / coincidence / incommensurate), coverage, domains, and matrices
as text. Wood notation, both ways, lives in :mod:`analysis.wood`; its public
names are also reachable from here.

Relations (rows are vectors, Å; reciprocal without 2π):

* real space: ``overlayer.vectors = M @ substrate.vectors``, i.e.
  b1 = m11 a1 + m12 a2, b2 = m21 a1 + m22 a2 (matrix notation);
* reciprocal space: (b1*, b2*) = (M⁻¹)ᵀ (a1*, a2*), so an overlayer beam
  n1 b1* + n2 b2* has fractional substrate indices ``n @ inv(M).T``;
* a substrate point-group operation W (``W @ V == V @ Q.T``) turns the
  overlayer into the domain with matrix ``M @ W``;
* two matrices describe the same overlayer lattice when ``M1 @ inv(M2)`` is an
  integer matrix of determinant ±1.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from fractions import Fraction
from functools import reduce

import numpy as np

from .errors import NetError
from .nets import Net2D, SymmetryOp, point_group, reciprocal, reduce_net

__all__ = [
    "as_matrix",
    "overlayer_net",
    "overlayer_reciprocal",
    "superstructure_matrix",
    "coverage",
    "rational_matrix",
    "hermite_normal_form",
    "same_lattice",
    "coincidence_cell",
    "Approximant",
    "Kind",
    "classify_superstructure",
    "Domain",
    "domains",
    "WoodNotation",  # this and the next two from .wood, through __getattr__
    "wood_notation",
    "parse_wood",
    "nice_matrix",
    "format_matrix",
    "fraction_text",
    "beam_label",
    "parse_matrix",
]

_EXACT = 1e-9


def as_matrix(matrix) -> np.ndarray:
    """Validate a superstructure matrix: (2, 2), finite, non-singular.

    Parameters
    ----------
    matrix : array_like
        Anything numpy reads as a (2, 2) array of numbers.

    Returns
    -------
    (2, 2) ndarray of float64
        A copy of the matrix.

    Raises
    ------
    NetError
        With the offending input in the message.
    """
    try:
        m = np.array(matrix, dtype=np.float64)
    except (TypeError, ValueError):
        raise NetError(f"A superstructure matrix must be 2×2 numbers, got {matrix!r}.") from None
    if m.shape != (2, 2) or not np.all(np.isfinite(m)):
        raise NetError(f"A superstructure matrix must be 2×2 finite numbers, got {np.asarray(matrix).tolist()}.")
    with np.errstate(over="ignore", invalid="ignore"):
        det = np.linalg.det(m)
    if not np.isfinite(det):  # finite entries whose cell area overflows, e.g. 1e308 on the diagonal
        raise NetError(f"The superstructure matrix {m.tolist()} is too large: its cell area (determinant) is "
                       "not a finite number.")
    if abs(det) < 1e-9:
        raise NetError(f"The superstructure matrix {m.tolist()} is singular (determinant 0).")
    return m


def _snap(m: np.ndarray, tol: float = 1e-9) -> np.ndarray:
    """Round entries within `tol` of an integer to that integer."""
    r = np.rint(m)
    return np.where(np.abs(m - r) <= tol, r, m) + 0.0  # + 0.0 turns -0.0 into 0.0


def overlayer_net(substrate: Net2D, matrix) -> Net2D:
    """Real-space overlayer net, ``M @ substrate.vectors`` (Å).

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å), rows a1, a2.
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.

    Returns
    -------
    Net2D
        Rows b1, b2 in Å.
    """
    return Net2D(as_matrix(matrix) @ substrate.vectors)


def overlayer_reciprocal(substrate: Net2D, matrix, *, two_pi: bool = False) -> Net2D:
    """Reciprocal overlayer net (M⁻¹)ᵀ A*, Å⁻¹ (no 2π unless `two_pi`).

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å), rows a1, a2.
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.
    two_pi : bool, keyword-only
        Include the factor 2π (solid-state convention).

    Returns
    -------
    Net2D
        Rows b1*, b2* in Å⁻¹.

    Examples
    --------
    >>> sub = Net2D(2.0 * np.eye(2))
    >>> np.allclose(overlayer_reciprocal(sub, [[2, 0], [0, 2]]).vectors, 0.25 * np.eye(2))
    True
    """
    m = as_matrix(matrix)
    return Net2D(np.linalg.inv(m).T @ reciprocal(substrate, two_pi=two_pi).vectors)


def superstructure_matrix(substrate: Net2D, overlayer: Net2D, *, snap_tol: float = 1e-9) -> np.ndarray:
    """M with ``overlayer.vectors = M @ substrate.vectors``; near-integers snapped.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å), rows a1, a2.
    overlayer : Net2D
        Real-space overlayer net (Å), rows b1, b2.
    snap_tol : float, keyword-only
        Entries within this absolute distance of an integer are set to it.

    Returns
    -------
    (2, 2) ndarray of float64
        The real-space superstructure matrix M, substrate basis.

    Examples
    --------
    >>> sub = Net2D.from_parameters(2.775, 2.775, 120.0)
    >>> over = Net2D(np.array([[2, 1], [-1, 1]]) @ sub.vectors)
    >>> superstructure_matrix(sub, over).tolist()
    [[2.0, 1.0], [-1.0, 1.0]]
    """
    return _snap(overlayer.vectors @ np.linalg.inv(substrate.vectors), snap_tol)


def coverage(matrix, *, per_cell: float = 1.0) -> float:
    """Coverage in monolayers (adsorbates per substrate cell): per_cell / |det M|.

    Parameters
    ----------
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.
    per_cell : float, keyword-only
        Adsorbates per overlayer cell.

    Returns
    -------
    float
        Adsorbates per substrate cell (monolayers).

    Examples
    --------
    >>> print(coverage([[2, 0], [0, 2]]), round(coverage([[2, 1], [-1, 1]]), 6))
    0.25 0.333333
    """
    return float(per_cell) / abs(float(np.linalg.det(as_matrix(matrix))))


def rational_matrix(matrix, *, max_denominator: int = 12, tol: float = 1e-6) -> list[list[Fraction]] | None:
    """Entries of `matrix` as fractions with denominators ≤ `max_denominator`, or None.

    `tol` is absolute on the entries (in substrate-vector units).

    Parameters
    ----------
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.
    max_denominator : int, keyword-only
        Largest denominator allowed.
    tol : float, keyword-only
        Largest distance of an entry from its fraction.

    Returns
    -------
    list of list of Fraction, or None
        The entries row by row; None when an entry is no such fraction.
    """
    m = as_matrix(matrix)
    out = []
    for row in m:
        fr = []
        for x in row:
            f = Fraction(float(x)).limit_denominator(max_denominator)
            if abs(float(f) - x) > tol:
                return None
            fr.append(f)
        out.append(fr)
    return out


def _egcd(a: int, b: int) -> tuple[int, int, int]:
    """(g, x, y) with x a + y b = g = gcd(a, b) ≥ 0."""
    x0, y0, x1, y1 = 1, 0, 0, 1
    while b:
        q, a, b = a // b, b, a % b
        x0, x1 = x1, x0 - q * x1
        y0, y1 = y1, y0 - q * y1
    if a < 0:
        a, x0, y0 = -a, -x0, -y0
    return a, x0, y0


def _hnf_rows(rows: np.ndarray) -> np.ndarray:
    """Upper-triangular Hermite normal form [[a, b], [0, d]] (a, d > 0, 0 ≤ b < d)
    of the rank-2 lattice generated by the integer rows (k, 2)."""
    rows = [tuple(int(v) for v in r) for r in np.asarray(rows, dtype=object)]
    # gcd on the first column, combining rows pairwise
    piv = (0, 0)
    rest = []
    for r in rows:
        if r[0] == 0:
            rest.append(r)
            continue
        if piv[0] == 0:
            rest.append(piv)
            piv = r
            continue
        g, x, y = _egcd(piv[0], r[0])
        new_piv = (x * piv[0] + y * r[0], x * piv[1] + y * r[1])
        other = ((r[0] // g) * piv[0] - (piv[0] // g) * r[0], (r[0] // g) * piv[1] - (piv[0] // g) * r[1])
        piv = new_piv
        rest.append(other)
    d = reduce(math.gcd, (abs(r[1]) for r in rest if r[0] == 0), 0)
    if piv[0] == 0 or d == 0:
        raise NetError(f"The rows {np.asarray(rows).tolist()} do not span a 2-D lattice.")
    if piv[0] < 0:
        piv = (-piv[0], -piv[1])
    b = piv[1] % d
    return np.array([[piv[0], b], [0, d]], dtype=object).astype(np.int64)


def _common_denominator(matrix, max_denominator: int) -> tuple[np.ndarray, int]:
    fr = rational_matrix(matrix, max_denominator=max_denominator)
    if fr is None:
        raise NetError(f"The matrix {np.asarray(matrix).tolist()} is not rational with denominators ≤ {max_denominator}.")
    den = reduce(math.lcm, (f.denominator for row in fr for f in row), 1)
    ints = np.array([[int(f * den) for f in row] for row in fr], dtype=np.int64)
    return ints, den


def hermite_normal_form(matrix, *, max_denominator: int = 12) -> np.ndarray:
    """Canonical matrix of the lattice spanned by the rows of a rational `matrix`.

    Two rational matrices describe the same overlayer lattice if and only if
    their Hermite normal forms are equal. The form is upper triangular
    [[a, b], [0, d]] with a, d > 0 and 0 ≤ b < d (for integer matrices; the
    rational case is the integer form of ``D M`` divided by the common
    denominator D).

    Parameters
    ----------
    matrix : (2, 2) array_like of float
        Rational matrix whose rows span the lattice (substrate basis).
    max_denominator : int, keyword-only
        Largest denominator the entries are read with.

    Returns
    -------
    (2, 2) ndarray of float64
        The upper-triangular canonical form.

    Examples
    --------
    >>> hermite_normal_form([[2, 1], [-1, 1]]).tolist()
    [[1.0, 2.0], [0.0, 3.0]]
    >>> np.array_equal(hermite_normal_form([[1, 1], [-1, 1]]), hermite_normal_form([[0, 2], [1, 1]]))
    True
    """
    ints, den = _common_denominator(matrix, max_denominator)
    return _hnf_rows(ints).astype(np.float64) / den


def same_lattice(m1, m2, *, tol: float = 1e-6) -> bool:
    """True when `m1` and `m2` span the same lattice (``m1 @ inv(m2)`` unimodular integer).

    `tol` is absolute on the entries of ``m1 @ inv(m2)``.

    Parameters
    ----------
    m1, m2 : (2, 2) array_like of float
        Real-space superstructure matrices on one substrate.
    tol : float, keyword-only
        Absolute tolerance on the entries of ``m1 @ inv(m2)``.

    Returns
    -------
    bool
        Whether the two span one lattice.

    Examples
    --------
    >>> same_lattice([[2, 1], [-1, 1]], [[1, 2], [0, 3]]), same_lattice([[2, 0], [0, 1]], [[1, 0], [0, 2]])
    (True, False)
    """
    t = as_matrix(m1) @ np.linalg.inv(as_matrix(m2))
    return bool(np.all(np.abs(t - np.rint(t)) <= tol) and abs(abs(np.linalg.det(np.rint(t))) - 1) < 0.5)


def _fractions(matrix, max_denominator: int) -> list[list[Fraction]]:
    fr = rational_matrix(matrix, max_denominator=max_denominator)
    if fr is None:
        raise NetError(f"The matrix {np.asarray(matrix).tolist()} is not rational with denominators ≤ {max_denominator}.")
    return fr


def _same_lattice_fast(m1: np.ndarray, m2: np.ndarray, tol: float = 1e-6) -> bool:
    """:func:`same_lattice` for validated float (2, 2) arrays, without the checks (hot loops)."""
    d2 = m2[0, 0] * m2[1, 1] - m2[0, 1] * m2[1, 0]
    d1 = m1[0, 0] * m1[1, 1] - m1[0, 1] * m1[1, 0]
    if abs(abs(d1) - abs(d2)) > 1e-3 * max(abs(d1), abs(d2)) + tol:
        return False  # different cell areas: different lattices
    inv2 = np.array([[m2[1, 1], -m2[0, 1]], [-m2[1, 0], m2[0, 0]]]) / d2
    t = m1 @ inv2
    r = np.rint(t)
    return bool(np.all(np.abs(t - r) <= tol) and abs(abs(r[0, 0] * r[1, 1] - r[0, 1] * r[1, 0]) - 1) < 0.5)


def coincidence_cell(matrix, *, max_denominator: int = 12) -> np.ndarray:
    """Smallest common cell of substrate and overlayer lattices, in the substrate basis.

    The lattice of points shared by the substrate lattice Z² and the overlayer
    lattice (rows of M): the dual of the sum of the dual lattices, computed in
    exact rational arithmetic. Returns an integer matrix C (as float) in
    Hermite normal form; |det C| substrate cells hold |det C| / |det M|
    overlayer cells.

    Parameters
    ----------
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.
    max_denominator : int, keyword-only
        Largest denominator the entries are read with.

    Returns
    -------
    (2, 2) ndarray of float64
        Integer matrix C of the common cell, substrate basis, Hermite normal form.

    Examples
    --------
    >>> coincidence_cell([[1.5, 0], [0, 1.5]]).tolist()
    [[3.0, 0.0], [0.0, 3.0]]
    """
    (a, b), (c, d) = _fractions(as_matrix(matrix), max_denominator)
    det = a * d - b * c
    dual = [[d / det, -c / det], [-b / det, a / det]]  # rows of inv(M).T span the overlayer dual
    den = reduce(math.lcm, (f.denominator for row in dual for f in row), 1)
    gens = np.array([[den, 0], [0, den]] + [[int(f * den) for f in row] for row in dual], dtype=object)
    h = _hnf_rows(gens)  # the sum of the duals, times den
    (p, q), (_, r) = [[Fraction(int(x), den) for x in row] for row in h]
    # the dual of the lattice with rows [[p, q], [0, r]] has rows inv(...).T = [[1/p, 0], [-q/(p r), 1/r]]
    cell = np.array([[Fraction(1) / p, Fraction(0)], [-q / (p * r), Fraction(1) / r]], dtype=object)
    if any(x.denominator != 1 for x in cell.ravel()):  # pragma: no cover - duality keeps it integral
        raise NetError(f"Coincidence cell of {np.asarray(matrix).tolist()} is not integral.")
    return _hnf_rows(np.array([[int(x) for x in row] for row in cell], dtype=object)).astype(np.float64)


@dataclass(frozen=True, eq=False)
class Approximant:
    """A small coincidence cell near an incommensurate overlayer.

    Attributes
    ----------
    matrix : (2, 2) ndarray of float64
        The rational matrix it replaces M with.
    cell : (2, 2) ndarray of float64
        Its coincidence cell in the substrate basis.
    strain : float
        Largest relative change of the overlayer vector lengths/directions,
        max_i |(M_q − M)_i V| / |(M V)_i| (dimensionless).
    """

    matrix: np.ndarray
    cell: np.ndarray
    strain: float

    @property
    def substrate_cells(self) -> int:
        return int(round(abs(np.linalg.det(self.cell))))

    @property
    def overlayer_cells(self) -> float:
        return abs(np.linalg.det(self.cell)) / abs(np.linalg.det(self.matrix))


@dataclass(frozen=True, eq=False)
class Kind:
    """What kind of superstructure a matrix describes.

    Attributes
    ----------
    kind : str
        ``"none"`` (the (1×1) net itself), ``"commensurate"`` (integer M),
        ``"coincidence"`` (rational M) or ``"incommensurate"``.
    point_on_line : bool
        One column of M is integer: overlayer points lie on substrate lines.
    coincidence_cell : ndarray or None
        For coincidence lattices, the smallest common cell (substrate basis).
    approximants : list of Approximant
        For incommensurate overlayers, the nearest small coincidence cells by size.
    """

    kind: str
    point_on_line: bool = False
    coincidence_cell: np.ndarray | None = None
    approximants: list = field(default_factory=list)


def classify_superstructure(substrate: Net2D, matrix, *, tol: float = 1e-6, max_denominator: int = 12,
                            n_approximants: int = 4) -> Kind:
    """Commensurate, coincidence or incommensurate.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å).
    matrix : (2, 2) array_like
        Real-space superstructure matrix.
    tol : float, keyword-only
        Absolute tolerance on matrix entries for "integer" and "rational"
        (a measured matrix needs a looser one, e.g. 5e-3).
    max_denominator : int, keyword-only
        Largest denominator that still counts as a coincidence lattice.
    n_approximants : int, keyword-only
        How many nearby coincidence cells an incommensurate matrix lists.

    Returns
    -------
    Kind
        The kind, whether overlayer points lie on substrate lines, the coincidence
        cell or the approximants.

    Examples
    --------
    >>> sq = Net2D(np.eye(2))
    >>> [classify_superstructure(sq, m).kind for m in ([[1, 0], [0, 1]], [[2, 0], [0, 1]], [[1.5, 0], [0, 1.5]])]
    ['none', 'commensurate', 'coincidence']
    """
    m = as_matrix(matrix)
    if np.all(np.abs(m - np.rint(m)) <= tol):
        mi = np.rint(m)
        kind = "none" if abs(abs(np.linalg.det(mi)) - 1) < 0.5 else "commensurate"
        return Kind(kind, point_on_line=False)
    col_int = np.all(np.abs(m - np.rint(m)) <= tol, axis=0)
    if rational_matrix(m, max_denominator=max_denominator, tol=tol) is not None:
        fr = _snap_rational(m, max_denominator)
        return Kind("coincidence", point_on_line=bool(col_int.any()),
                    coincidence_cell=coincidence_cell(fr, max_denominator=max_denominator))
    return Kind("incommensurate", point_on_line=bool(col_int.any()),
                approximants=_approximants(substrate, m, max_denominator, n_approximants))


def _snap_rational(m: np.ndarray, max_denominator: int) -> np.ndarray:
    return np.array([[float(Fraction(float(x)).limit_denominator(max_denominator)) for x in row] for row in m])


def _approximants(substrate: Net2D, m: np.ndarray, max_den: int, n: int) -> list[Approximant]:
    rows = m @ substrate.vectors
    best: dict[tuple, Approximant] = {}
    for q in range(1, max_den + 1):
        mq = np.rint(m * q) / q
        if abs(np.linalg.det(mq)) < 1e-9:
            continue
        strain = float(np.max(np.linalg.norm((mq - m) @ substrate.vectors, axis=1) / np.linalg.norm(rows, axis=1)))
        cell = coincidence_cell(mq, max_denominator=max_den)
        key = tuple(hermite_normal_form(mq, max_denominator=max_den).ravel())
        if key not in best or best[key].strain > strain:
            best[key] = Approximant(mq, cell, strain)
    ranked = sorted(best.values(), key=lambda a: (a.substrate_cells, a.strain))
    # keep those that improve the strain as the cell grows (a Pareto front)
    front, s_best = [], math.inf
    for a in ranked:
        if a.strain < s_best - 1e-12:
            front.append(a)
            s_best = a.strain
    return front[-n:][::-1] if len(front) > n else front[::-1]


# --------------------------------------------------------------------------- domains

@dataclass(frozen=True, eq=False)
class Domain:
    """One rotational or mirror domain of an overlayer.

    Attributes
    ----------
    matrix : (2, 2) ndarray of float64
        Superstructure matrix of this domain in the substrate basis.
    op : SymmetryOp
        The substrate operation that turns the first domain into this one.
    """

    matrix: np.ndarray
    op: SymmetryOp

    @property
    def op_name(self) -> str:
        return self.op.name


def domains(substrate: Net2D, matrix, *, tol: float = 1e-6, sym_tol: float = 2e-4) -> list[Domain]:
    """Distinct overlayer lattices under the substrate's point group.

    The count is |G| / |{W ∈ G : M W spans the same lattice as M}|. The first
    domain is `matrix` itself (identity); each further one names the rotation
    or mirror that makes it. Rotations are preferred to mirrors when both make
    the same domain.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å), rows a1, a2.
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.
    tol : float, keyword-only
        Absolute tolerance on entries when two domains are compared.
    sym_tol : float, keyword-only
        Relative tolerance of the substrate's point group (:func:`analysis.nets.point_group`).

    Returns
    -------
    list of Domain
        Each domain's matrix and the substrate operation that makes it; `matrix` first.

    Examples
    --------
    >>> sq = Net2D(np.eye(2))
    >>> len(domains(sq, [[2, 0], [0, 1]])), len(domains(sq, [[1, 1], [-1, 1]]))
    (2, 1)
    """
    m = as_matrix(matrix)
    if np.linalg.det(m) * np.linalg.det(substrate.vectors) < 0:
        m = m[::-1].copy()  # same lattice, basis of the substrate's handedness
    found: list[Domain] = []
    for op in point_group(substrate, tol=sym_tol):
        mw = _snap(m @ op.matrix)
        if np.linalg.det(mw) * np.linalg.det(m) < 0:
            mw = mw[::-1].copy()
        if any(_same_lattice_fast(mw, d.matrix, tol) for d in found):
            continue
        found.append(Domain(_nice_or_self(substrate, mw), op))
    return found


def _nice_or_self(substrate: Net2D, m: np.ndarray) -> np.ndarray:
    try:
        n = nice_matrix(substrate, m)
    except NetError:  # pragma: no cover - nice_matrix only fails on singular input
        return m
    n = _snap(n)
    n.flags.writeable = False
    return n


def nice_matrix(substrate: Net2D, matrix) -> np.ndarray:
    """A readable basis of the overlayer lattice, as a matrix in the substrate basis.

    The primitive Wood cell when one exists (e.g. [[2, 1], [−1, 1]] for
    (√3×√3)R30° on a 120° basis); otherwise the reduced overlayer basis with the
    handedness of the input.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å), rows a1, a2.
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.

    Returns
    -------
    (2, 2) ndarray of float64
        A matrix of the same lattice in a readable basis.
    """
    from .wood import wood_notation  # wood.py builds on this module, not the other way

    m = as_matrix(matrix)
    w = wood_notation(substrate, m)
    if w.basis is not None:
        b = w.basis
        if np.sign(np.linalg.det(b)) == np.sign(np.linalg.det(m)):
            return b.copy()
    red, _ = reduce_net(Net2D(m @ substrate.vectors))
    return _snap(red.vectors @ np.linalg.inv(substrate.vectors))


def fraction_text(x: float, *, max_denominator: int = 12, tol: float = 1e-6, fmt: str = ".4g") -> str:
    """A number as a simple fraction when it is one (``1/2``, ``-2/3``, ``3``), else decimal.

    Parameters
    ----------
    x : float
        The number.
    max_denominator : int, keyword-only
        Largest denominator written as a fraction.
    tol : float, keyword-only
        Largest distance of `x` from that fraction.
    fmt : str, keyword-only
        Format of a number that is no simple fraction.

    Returns
    -------
    str
        The number as text.

    Examples
    --------
    >>> fraction_text(0.5), fraction_text(-2 / 3), fraction_text(3.0), fraction_text(0.1234567)
    ('1/2', '-2/3', '3', '0.1235')
    """
    f = Fraction(float(x)).limit_denominator(max_denominator)
    if abs(float(f) - x) > tol:
        return format(float(x), fmt)
    return str(f.numerator) if f.denominator == 1 else f"{f.numerator}/{f.denominator}"


def beam_label(h: float, k: float, *, sep: str = ",", max_denominator: int = 12) -> str:
    """Beam label in substrate units, e.g. ``(1/2,0)``, ``(-1,1)``; `sep` joins h and k.

    Parameters
    ----------
    h, k : float
        Beam indices in the substrate's reciprocal basis.
    sep : str, keyword-only
        Text between h and k.
    max_denominator : int, keyword-only
        Largest denominator written as a fraction.

    Returns
    -------
    str
        The label.

    Examples
    --------
    >>> beam_label(0.5, 0.0), beam_label(2 / 3, -1 / 3, sep=", ")
    ('(1/2,0)', '(2/3, -1/3)')
    """
    return f"({fraction_text(h, max_denominator=max_denominator)}{sep}" \
           f"{fraction_text(k, max_denominator=max_denominator)})"


def format_matrix(matrix, *, digits: int = 3) -> str:
    """``(m11 m12 / m21 m22)`` with integers and small fractions shown exactly.

    Parameters
    ----------
    matrix : (2, 2) array_like of float
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.
    digits : int, keyword-only
        Significant digits of entries that are not simple fractions.

    Returns
    -------
    str
        The matrix on one line, rows separated by ``/``.

    Examples
    --------
    >>> format_matrix([[2, 1], [-1, 1]]), format_matrix([[1.5, 0], [0, 1 / 3]])
    ('(2 1 / -1 1)', '(3/2 0 / 0 1/3)')
    """
    m = np.asarray(matrix, dtype=np.float64)

    def one(x):
        return fraction_text(x, tol=10 ** -(digits + 2), fmt=f".{digits}f")

    return f"({one(m[0, 0])} {one(m[0, 1])} / {one(m[1, 0])} {one(m[1, 1])})"


def _parse_num(s: str) -> float:
    if "/" in s:
        a, b = s.split("/")
        return float(a) / float(b)
    return float(s)


def parse_matrix(text: str) -> np.ndarray:
    """Read a matrix typed by a user: ``"2 1 / -1 1"``, ``"[[2,1],[-1,1]]"``, ``"2,1;-1,1"``.

    Fractions like ``3/2`` are allowed only with the row separator ``;`` or in
    brackets form. Raises NetError naming what was given.

    Parameters
    ----------
    text : str
        The matrix as typed.

    Returns
    -------
    (2, 2) ndarray of float64
        The real-space superstructure matrix, rows as typed.
    """
    if not isinstance(text, str) or not text.strip():
        raise NetError("Empty matrix; write four numbers like '2 1 / -1 1' or '[[2,1],[-1,1]]'.")
    t = text.strip()
    if ";" in t:
        rows = t.split(";")
    elif "/" in t and "[" not in t:
        rows = t.strip("()").split("/")
    else:
        rows = re.findall(r"\[([^\[\]]*)\]", t) or [t]
    nums = []
    for r in rows:
        for tok in re.split(r"[\s,]+", r.strip().strip("()")):
            if tok:
                try:
                    nums.append(_parse_num(tok))
                except (ValueError, ZeroDivisionError):
                    raise NetError(f"Cannot read {tok!r} in matrix {text!r}; use numbers like 2, -1, 1.5 or 3/2.") from None
    if len(nums) != 4:
        raise NetError(f"A matrix needs four numbers, got {len(nums)} in {text!r}.")
    return as_matrix(np.array(nums).reshape(2, 2))


_WOOD_NAMES = frozenset({"WoodNotation", "wood_notation", "parse_wood", "AmbiguousWoodWarning"})


def __getattr__(name: str):
    """The Wood notation names, kept importable from here; loaded on first use."""
    if name in _WOOD_NAMES:
        from . import wood

        return getattr(wood, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
