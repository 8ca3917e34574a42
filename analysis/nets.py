"""Two-dimensional nets: bases, reciprocal nets, reduction, the five plane nets,
their point-group operations, and surface presets from bulk lattice constants.

Conventions used throughout
---------------------------
* A net is a (2, 2) array whose **rows** are the basis vectors a1, a2 in
  Cartesian surface coordinates (x, y). Real-space nets are in Å.
* The reciprocal net is crystallographic by default, a_i · a*_j = δ_ij, in Å⁻¹
  with **no factor 2π**; pass ``two_pi=True`` for the solid-state convention
  a_i · a*_j = 2π δ_ij.
* A change of basis is a left multiplication by an integer matrix:
  ``reduced.vectors = op @ net.vectors``.
* A point-group operation is an integer matrix W in the net's own basis with
  ``W @ V = V @ Q.T``, Q the orthogonal Cartesian matrix acting on column
  vectors (r' = Q r).
"""

from __future__ import annotations

import functools
import math
import re
from dataclasses import dataclass

import numpy as np

from .errors import NetError

__all__ = [
    "Net2D",
    "SymmetryOp",
    "NET_TYPES",
    "reciprocal",
    "rotate_net",
    "reduce_net",
    "classify_net",
    "symmetrized",
    "conventional_cell",
    "point_group",
    "point_group_name",
    "surface_net",
    "parse_substrate",
    "LATTICE_CONSTANTS_A",
    "SURFACE_FACES",
]

NET_TYPES = ("oblique", "rectangular", "centered-rectangular", "square", "hexagonal")


@dataclass(frozen=True, eq=False)
class Net2D:
    """A 2-D net given by its basis.

    Parameters
    ----------
    vectors : (2, 2) array_like of float
        Rows a1, a2 in Cartesian (x, y) coordinates; Å for a real-space net,
        Å⁻¹ for a reciprocal net (say which convention where it is made).
    label : str, optional
        A name for display, e.g. ``"Pt(111)"``.

    Examples
    --------
    >>> net = Net2D.from_parameters(2.5, 2.5, 120.0)
    >>> print(round(net.a, 6), round(net.gamma_deg, 6), round(net.area, 6))
    2.5 120.0 5.412659
    """

    vectors: np.ndarray
    label: str = ""

    def __post_init__(self):
        v = np.array(self.vectors, dtype=np.float64)
        if v.shape != (2, 2) or not np.all(np.isfinite(v)):
            raise NetError(f"`vectors` must be a finite 2×2 array, got {np.asarray(self.vectors).tolist()}.")
        scale = max(float(np.linalg.norm(v[0]) * np.linalg.norm(v[1])), 1e-300)
        if abs(np.linalg.det(v)) < 1e-9 * scale or scale < 1e-18:
            raise NetError(f"`vectors` must be two independent non-zero rows, got {v.tolist()}.")
        v.flags.writeable = False
        object.__setattr__(self, "vectors", v)

    @classmethod
    def from_parameters(cls, a: float, b: float, gamma_deg: float, *, label: str = "") -> "Net2D":
        """Net with |a1| = a, |a2| = b, angle γ between them; a1 along +x.

        Parameters
        ----------
        a, b : float
            Lengths of a1 and a2 (Å for a real-space net).
        gamma_deg : float
            Angle between them, degrees.
        label : str, keyword-only
            Name kept with the net.

        Returns
        -------
        Net2D
            The net, a2 counter-clockwise from a1.

        Raises
        ------
        NetError
            If a or b is not positive or γ is not strictly between 0° and 180°.
        """
        a, b, g = float(a), float(b), float(gamma_deg)
        if not (a > 0 and b > 0 and math.isfinite(a) and math.isfinite(b)):
            raise NetError(f"Net lengths must be positive, got a={a}, b={b}.")
        if not (0.0 < g < 180.0):
            raise NetError(f"Net angle must lie strictly between 0 and 180 degrees, got {g}.")
        gr = np.deg2rad(g)
        return cls(np.array([[a, 0.0], [b * np.cos(gr), b * np.sin(gr)]]), label=label)

    @property
    def a(self) -> float:
        """|a1| (Å for a real net)."""
        return float(np.linalg.norm(self.vectors[0]))

    @property
    def b(self) -> float:
        """|a2| (Å for a real net)."""
        return float(np.linalg.norm(self.vectors[1]))

    @property
    def gamma_deg(self) -> float:
        """Angle between a1 and a2 in degrees, in (0, 180)."""
        v = self.vectors
        c = float(v[0] @ v[1]) / (self.a * self.b)
        return float(np.degrees(np.arccos(np.clip(c, -1.0, 1.0))))

    @property
    def area(self) -> float:
        """Cell area |a1 × a2| (Å² for a real net)."""
        return float(abs(np.linalg.det(self.vectors)))

    @property
    def handedness(self) -> int:
        """+1 when a1 → a2 turns counter-clockwise, else −1."""
        return 1 if np.linalg.det(self.vectors) > 0 else -1

    def parameters(self) -> tuple[float, float, float]:
        """(a, b, γ in degrees).

        Returns
        -------
        tuple of float
            Lengths in the net's unit and the angle in degrees.
        """
        return self.a, self.b, self.gamma_deg

    def points(self, hk: np.ndarray) -> np.ndarray:
        """Cartesian positions of net points.

        Parameters
        ----------
        hk : (K, 2) array_like of float
            Coordinates in this basis (integer or fractional).

        Returns
        -------
        (K, 2) ndarray of float64
            h a1 + k a2 in the net's unit.
        """
        return np.asarray(hk, dtype=np.float64).reshape(-1, 2) @ self.vectors

    def coordinates(self, xy: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`points`: (K, 2) Cartesian → (K, 2) coordinates in this basis.

        Parameters
        ----------
        xy : (K, 2) array_like of float
            Cartesian points, in the net's unit.

        Returns
        -------
        (K, 2) ndarray of float64
            Their coordinates in the basis (a1, a2).
        """
        return np.asarray(xy, dtype=np.float64).reshape(-1, 2) @ np.linalg.inv(self.vectors)

    def __repr__(self) -> str:
        a, b, g = self.parameters()
        lab = f"{self.label!r}, " if self.label else ""
        return f"Net2D({lab}a={a:.5g}, b={b:.5g}, gamma={g:.5g}°)"


def reciprocal(net: Net2D, *, two_pi: bool = False) -> Net2D:
    """Reciprocal net.

    Parameters
    ----------
    net : Net2D
        Real-space net (Å).
    two_pi : bool, keyword-only
        False (default): crystallographic convention a_i · a*_j = δ_ij, Å⁻¹
        without 2π. True: solid-state convention a_i · a*_j = 2π δ_ij.

    Returns
    -------
    Net2D
        Rows a1*, a2*. Applying it twice (with the same convention) returns `net`.

    Examples
    --------
    >>> np.allclose(reciprocal(Net2D(2.0 * np.eye(2))).vectors, 0.5 * np.eye(2))
    True
    >>> hexnet = Net2D.from_parameters(2.5, 2.5, 120.0)
    >>> print(round(reciprocal(hexnet).a, 6), round(reciprocal(hexnet).gamma_deg, 6))
    0.46188 60.0
    """
    r = np.linalg.inv(net.vectors).T
    if two_pi:
        r = 2.0 * np.pi * r
    return Net2D(r, label=f"{net.label}*" if net.label else "")


def rotate_net(net: Net2D, angle_deg: float) -> Net2D:
    """Rotate `net` counter-clockwise by `angle_deg` about the surface normal.

    Parameters
    ----------
    net : Net2D
        The net (Å).
    angle_deg : float
        Rotation, degrees (counter-clockwise positive).

    Returns
    -------
    Net2D
        The rotated net, rows rotated alike.
    """
    c, s = np.cos(np.deg2rad(angle_deg)), np.sin(np.deg2rad(angle_deg))
    return Net2D(net.vectors @ np.array([[c, s], [-s, c]]), label=net.label)  # rows stay vectors


def reduce_net(net: Net2D, *, tol: float = 2e-4) -> tuple[Net2D, np.ndarray]:
    """Lagrange–Gauss reduction to a reduced primitive basis.

    The result satisfies |a1| ≤ |a2| and |a1 · a2| ≤ |a1|²/2 (within `tol`),
    keeps the handedness of the input (det op = +1), and, when |a1| = |a2|,
    takes the obtuse angle (so a hexagonal net comes out at 120°).

    Parameters
    ----------
    net : Net2D
        Real-space net (Å).
    tol : float, keyword-only
        Dimensionless tolerance for the equal-length test.

    Returns
    -------
    reduced : Net2D
        The reduced basis (same lattice).
    op : (2, 2) ndarray of int64
        ``reduced.vectors == op @ net.vectors``; det op = +1.

    Examples
    --------
    >>> red, op = reduce_net(Net2D([[1.0, 0.0], [7.5, 0.8660254037844386]]))
    >>> print(round(red.gamma_deg, 4), op.tolist())
    120.0 [[1, 0], [-8, 1]]
    """
    v = net.vectors.copy()
    op = np.eye(2, dtype=np.int64)
    for _ in range(200):
        changed = False
        if v[1] @ v[1] < v[0] @ v[0] * (1 - 1e-12):
            v = np.array([v[1], -v[0]])  # proper 90° turn of the index space
            op = np.array([op[1], -op[0]])
            changed = True
        ratio = (v[0] @ v[1]) / (v[0] @ v[0])
        mu = int(np.rint(ratio)) if abs(ratio) > 0.5 + 1e-9 else 0  # no flip-flop at exact ties
        if mu != 0:
            v[1] = v[1] - mu * v[0]
            op[1] = op[1] - mu * op[0]
            changed = True
        if not changed:
            break
    else:  # pragma: no cover - Gauss reduction always terminates
        raise NetError(f"Reduction of {net.vectors.tolist()} did not terminate.")
    la, lb = np.linalg.norm(v[0]), np.linalg.norm(v[1])
    if abs(lb - la) <= tol * la and v[0] @ v[1] > tol * la * lb:
        v = np.array([v[1], -v[0]])
        op = np.array([op[1], -op[0]])
    return Net2D(v, label=net.label), op


def _shape(v: np.ndarray) -> tuple[float, float, float]:
    """(|a1|, |a2|, cos γ) of a (2, 2) basis."""
    la, lb = float(np.linalg.norm(v[0])), float(np.linalg.norm(v[1]))
    return la, lb, float(v[0] @ v[1]) / (la * lb)


def classify_net(net: Net2D, *, tol: float = 2e-4) -> str:
    """Which of the five plane nets `net` is.

    The net is reduced first; special nets are tested before the general ones
    they are limits of (square, rectangular, hexagonal, centered rectangular,
    oblique).

    Parameters
    ----------
    net : Net2D
        Real-space net (Å).
    tol : float, keyword-only
        One dimensionless tolerance: on length ratios (|b/a − 1|), on cosines
        and on the centering condition 2|a1·a2|/|a1|² = 1.

    Returns
    -------
    str
        One of :data:`NET_TYPES`.

    Examples
    --------
    >>> classify_net(Net2D.from_parameters(3.0, 3.0, 60.0))
    'hexagonal'
    >>> classify_net(Net2D.from_parameters(2.74, 2.74, 109.47))
    'centered-rectangular'
    """
    reduced, _ = reduce_net(net, tol=tol)
    v = reduced.vectors
    la, lb, c = _shape(v)
    equal = abs(lb / la - 1.0) <= tol
    if equal and abs(c) <= tol:
        return "square"
    if abs(c) <= tol:
        return "rectangular"
    if equal and abs(abs(c) - 0.5) <= tol:
        return "hexagonal"
    if equal or abs(2.0 * abs(float(v[0] @ v[1])) / (la * la) - 1.0) <= tol:
        return "centered-rectangular"
    return "oblique"


def conventional_cell(net: Net2D, *, tol: float = 2e-4) -> tuple[Net2D, np.ndarray, str]:
    """The conventional cell of `net`.

    For a centered rectangular net this is the rectangular cell of twice the
    primitive area (a ≤ b not guaranteed: a is along the rhombus's long or short
    diagonal as the net gives it); for the other four nets it is the reduced
    primitive cell (hexagonal at 120°).

    Parameters
    ----------
    net : Net2D
        Real-space net (Å).
    tol : float, keyword-only
        Dimensionless tolerance of :func:`classify_net`.

    Returns
    -------
    cell : Net2D
        The conventional cell.
    op : (2, 2) ndarray of int64
        ``cell.vectors == op @ net.vectors``; det op is 1, or 2 for a
        centered rectangular net.
    kind : str
        The net type from :func:`classify_net`.

    Examples
    --------
    >>> cell, op, kind = conventional_cell(Net2D.from_parameters(2.74097, 2.74097, 109.4712))
    >>> print(kind, round(cell.gamma_deg, 3), int(round(np.linalg.det(op))))
    centered-rectangular 90.0 2
    """
    kind = classify_net(net, tol=tol)
    reduced, op = reduce_net(net, tol=tol)
    if kind != "centered-rectangular":
        return reduced, op, kind
    v = reduced.vectors
    la, lb, _ = _shape(v)
    if abs(lb / la - 1.0) <= tol:
        t = np.array([[1, 1], [-1, 1]], dtype=np.int64)  # diagonals of the rhombus
    else:
        s = int(np.sign(v[0] @ v[1]))
        t = np.array([[1, 0], [-s, 2]], dtype=np.int64)  # a1 and 2 a2 − s a1
    cell = Net2D(t @ v, label=net.label)
    if cell.a > cell.b * (1 + tol):  # shorter side first, keep det > 0
        t = np.array([t[1], -t[0]])
        cell = Net2D(t @ v, label=net.label)
    return cell, t @ op, kind


@dataclass(frozen=True, eq=False)
class SymmetryOp:
    """One point-group operation of a net.

    Attributes
    ----------
    matrix : (2, 2) ndarray of int64
        W in the net's own basis: ``W @ V == V @ cartesian.T``.
    cartesian : (2, 2) ndarray of float64
        Q, orthogonal, acting on column vectors.
    kind : str
        ``"rotation"`` (det +1) or ``"mirror"`` (det −1).
    angle_deg : float
        Rotation angle (counter-clockwise, in [0, 360)) or, for a mirror, the
        direction of its line measured from +x, in [0, 180).
    """

    matrix: np.ndarray
    cartesian: np.ndarray
    kind: str
    angle_deg: float

    @property
    def name(self) -> str:
        a = _fmt_angle(self.angle_deg)
        if self.kind == "rotation":
            return "identity" if a == "0" else f"rotation {a}°"
        return f"mirror at {a}°"


def _fmt_angle(x: float) -> str:
    r = round(x, 1)
    return f"{r:.0f}" if abs(r - round(r)) < 1e-9 else f"{r:.1f}"


def point_group(net: Net2D, *, tol: float = 2e-4) -> list[SymmetryOp]:
    """See :func:`_point_group`; results are cached per basis (the ops are read-only).

    Parameters
    ----------
    net : Net2D
        Real-space net (Å).
    tol : float, keyword-only
        Relative tolerance of the metric test of each operation.

    Returns
    -------
    list of SymmetryOp
        The operations W (integer matrices on the basis) that map the net onto itself,
        the identity first.
    """
    key = tuple(np.round(net.vectors.ravel(), 12).tolist())
    return list(_point_group_cached(key, float(tol)))


@functools.lru_cache(maxsize=256)
def _point_group_cached(key: tuple, tol: float) -> tuple:
    return tuple(_point_group(Net2D(np.array(key).reshape(2, 2)), tol=tol))


def _point_group(net: Net2D, *, tol: float = 2e-4) -> list[SymmetryOp]:
    """The holohedral point group of `net` as integer matrices in its own basis.

    Returns
    -------
    list of SymmetryOp
        Identity first, then rotations by increasing angle, then mirrors by
        increasing line angle. Orders: oblique 2, rectangular and centered
        rectangular 4, square 8, hexagonal 12.

    Examples
    --------
    >>> [len(point_group(Net2D.from_parameters(1, 1, a))) for a in (90, 120)]
    [8, 12]
    """
    reduced, op = reduce_net(net, tol=tol)
    v = reduced.vectors
    vinv = np.linalg.inv(v)
    rng = np.arange(-2, 3)
    cands = np.array(np.meshgrid(rng, rng, rng, rng, indexing="ij")).reshape(4, -1).T.reshape(-1, 2, 2)
    ops: list[SymmetryOp] = []
    op_inv = np.rint(np.linalg.inv(op)).astype(np.int64)
    for w in cands:
        if abs(round(np.linalg.det(w))) != 1:
            continue
        qt = vinv @ w @ v  # W V = V Qᵀ  →  Qᵀ = V⁻¹ W V
        if np.max(np.abs(qt @ qt.T - np.eye(2))) > 4 * tol:
            continue
        q = qt.T
        # re-orthogonalise so angles are clean, then express in the caller's basis
        u, _, vt = np.linalg.svd(q)
        q = u @ vt
        w_in = op_inv @ w @ op
        det = round(float(np.linalg.det(q)))
        if det > 0:
            ang = math.degrees(math.atan2(q[1, 0], q[0, 0])) % 360.0
            kind = "rotation"
        else:
            ang = (math.degrees(math.atan2(q[1, 0], q[0, 0])) / 2.0) % 180.0
            kind = "mirror"
        if abs(ang - 360.0) < 1e-6 or abs(ang - 180.0) < 1e-6 and kind == "mirror":
            ang = 0.0
        q.flags.writeable = False
        w_in = w_in.astype(np.int64)
        w_in.flags.writeable = False
        ops.append(SymmetryOp(w_in, q, kind, float(ang)))
    ops.sort(key=lambda s: (s.kind != "rotation", round(s.angle_deg, 6)))
    return ops


def symmetrized(net: Net2D, *, tol: float = 2e-3) -> Net2D:
    """The net of full symmetry nearest to a measured one, in the same basis.

    A net measured from an image misses its type's exact metric by the measurement
    error (a square net at 89.97°, |b|/|a| = 1.0004). The metric G = V Vᵀ is averaged
    over the point group that holds within `tol` (W G Wᵀ for each op W), so the result
    has that group exactly; a1 keeps its direction and the basis its handedness.
    Structure answers that need exact symmetry (Wood notation, domains) use it.

    Parameters
    ----------
    net : Net2D
        The measured real-space net (Å).
    tol : float, keyword-only
        Relative tolerance of the point group that is made exact.

    Returns
    -------
    Net2D
        The symmetric net (Å), same basis and handedness.

    Examples
    --------
    >>> n = symmetrized(Net2D.from_parameters(2.556, 2.557, 89.97))
    >>> round(n.a, 4), round(n.b, 4), round(n.gamma_deg, 6), classify_net(n, tol=1e-9)
    (2.5565, 2.5565, 90.0, 'square')
    """
    v = np.asarray(net.vectors, dtype=np.float64)
    ops = point_group(net, tol=tol)
    g = v @ v.T
    g = sum(op.matrix @ g @ op.matrix.T for op in ops) / len(ops)
    a, b = math.sqrt(g[0, 0]), math.sqrt(g[1, 1])
    cos_g = float(np.clip(g[0, 1] / (a * b), -1.0, 1.0))
    u = v[0] / np.hypot(*v[0])
    side = 1.0 if (v[0, 0] * v[1, 1] - v[0, 1] * v[1, 0]) >= 0 else -1.0
    perp = side * np.array([-u[1], u[0]])
    out = np.array([a * u, b * (cos_g * u + math.sqrt(max(1.0 - cos_g * cos_g, 0.0)) * perp)])
    return Net2D(out, label=net.label)


def point_group_name(net: Net2D, *, tol: float = 2e-4) -> str:
    """Hermann–Mauguin symbol of the net's holohedry: p2, p2mm, c2mm, p4mm or p6mm.

    Parameters
    ----------
    net : Net2D
        Real-space net (Å).
    tol : float, keyword-only
        Relative tolerance (as :func:`point_group`).

    Returns
    -------
    str
        The symbol.
    """
    kind = classify_net(net, tol=tol)
    return {"oblique": "p2", "rectangular": "p2mm", "centered-rectangular": "c2mm",
            "square": "p4mm", "hexagonal": "p6mm"}[kind]


# --------------------------------------------------------------------------- presets

# Bulk lattice constants at room temperature, Å: (structure, a0, c0).
# Source: CRC Handbook of Chemistry and Physics, 97th edition (2016), section 12,
# "Lattice constants of the elements" (values from memory, rounded as commonly
# quoted; tests compare each with ASE's ase.data.reference_states within 1 %).
LATTICE_CONSTANTS_A: dict[str, tuple[str, float, float | None]] = {
    "Al": ("fcc", 4.050, None),
    "Ni": ("fcc", 3.524, None),
    "Cu": ("fcc", 3.615, None),
    "Rh": ("fcc", 3.803, None),
    "Pd": ("fcc", 3.891, None),
    "Ag": ("fcc", 4.086, None),
    "Ir": ("fcc", 3.839, None),
    "Pt": ("fcc", 3.924, None),
    "Au": ("fcc", 4.078, None),
    "Pb": ("fcc", 4.950, None),
    "Fe": ("bcc", 2.866, None),
    "Cr": ("bcc", 2.885, None),
    "V": ("bcc", 3.030, None),
    "Nb": ("bcc", 3.300, None),
    "Mo": ("bcc", 3.147, None),
    "Ta": ("bcc", 3.303, None),
    "W": ("bcc", 3.165, None),
    "Si": ("diamond", 5.431, None),
    "Ge": ("diamond", 5.658, None),
    "C": ("diamond", 3.567, None),
    "Ru": ("hcp", 2.706, 4.282),
    "Co": ("hcp", 2.507, 4.070),
    "Re": ("hcp", 2.761, 4.456),
    "Ti": ("hcp", 2.951, 4.686),
    "Zn": ("hcp", 2.665, 4.947),
    "Mg": ("hcp", 3.209, 5.211),
}

SURFACE_FACES = {
    "fcc": ("100", "110", "111"),
    "bcc": ("100", "110", "111"),
    "diamond": ("100", "111"),
    "hcp": ("0001",),
}

_SQ2 = math.sqrt(2.0)


def surface_net(structure: str, face: str, a0: float, *, label: str = "") -> Net2D:
    """Unreconstructed (1×1) net of a low-index face from the bulk cubic (or hcp a) constant.

    Parameters
    ----------
    structure : {"fcc", "bcc", "diamond", "hcp"}
    face : str
        Miller indices without brackets: "100", "110", "111" (cubic) or "0001" (hcp;
        "001" is accepted as the same face).
    a0 : float
        Bulk lattice constant in Å (for hcp, the in-plane a).
    label : str, keyword-only
        Name kept with the net (e.g. ``"Pt(111)"``).

    Returns
    -------
    Net2D
        Reduced primitive net in Å: square, rectangular (a ≤ b), centered
        rectangular (primitive rhombic cell, obtuse) or hexagonal (120°).

    Examples
    --------
    >>> print(round(surface_net("fcc", "111", 3.924).a, 5))
    2.77469
    """
    structure = structure.lower()
    face = {"001": "0001"}.get(face, face) if structure == "hcp" else face
    if not (a0 > 0 and math.isfinite(a0)):
        raise NetError(f"Lattice constant must be positive, got {a0}.")
    if structure not in SURFACE_FACES or face not in SURFACE_FACES[structure]:
        known = ", ".join(f"{s}({f})" for s, fs in SURFACE_FACES.items() for f in fs)
        raise NetError(f"Unknown face {structure}({face}); known faces: {known}.")
    if (structure, face) in {("fcc", "100"), ("diamond", "100")}:
        net = Net2D.from_parameters(a0 / _SQ2, a0 / _SQ2, 90.0)
    elif (structure, face) == ("fcc", "110"):
        net = Net2D.from_parameters(a0 / _SQ2, a0, 90.0)
    elif (structure, face) in {("fcc", "111"), ("diamond", "111")}:
        net = Net2D.from_parameters(a0 / _SQ2, a0 / _SQ2, 120.0)
    elif (structure, face) == ("bcc", "100"):
        net = Net2D.from_parameters(a0, a0, 90.0)
    elif (structure, face) == ("bcc", "110"):
        net = _centered_rectangular(a0, a0 * _SQ2)
    elif (structure, face) == ("bcc", "111"):
        net = Net2D.from_parameters(a0 * _SQ2, a0 * _SQ2, 120.0)
    else:  # hcp(0001)
        net = Net2D.from_parameters(a0, a0, 120.0)
    return Net2D(net.vectors, label=label)


def _centered_rectangular(a: float, b: float) -> Net2D:
    """Primitive (rhombic, obtuse, reduced) net of the centred a × b rectangle."""
    red, _ = reduce_net(Net2D(np.array([[a, 0.0], [a / 2.0, b / 2.0]])))
    return red


_ACCEPTED = (
    "a surface like 'Pt(111)', 'Cu(100)', 'W(110)', 'Si(111)', 'Ru(0001)'; "
    "a face with a constant like 'fcc(111):3.924'; or a net like 'hexagonal:2.775', "
    "'square:2.55', 'rectangular:2.556,3.615', 'oblique:3.1,4.3,104' (Å, Å, degrees), "
    "'centered-rectangular:3.165,4.476' (conventional cell)"
)

_NET_ARGS = {"hexagonal": 1, "square": 1, "rectangular": 2, "oblique": 3, "centered-rectangular": 2}


def parse_substrate(spec: str) -> Net2D:
    """Substrate net from a short text.

    Parameters
    ----------
    spec : str
        ``Element(hkl)`` from :data:`LATTICE_CONSTANTS_A`, ``structure(hkl):a0``,
        or ``net-type:numbers`` with lengths in Å and the oblique angle in degrees.

    Returns
    -------
    Net2D
        The (1×1) net in Å, reduced and primitive, labelled with `spec`.

    Raises
    ------
    NetError
        (a ValueError) saying what is accepted.

    Examples
    --------
    >>> print(round(parse_substrate("Pt(111)").a, 5), parse_substrate("W(110)").label)
    2.77469 W(110)
    """
    if not isinstance(spec, str) or not spec.strip():
        raise NetError(f"Empty substrate; give {_ACCEPTED}.")
    s = spec.strip()
    m = re.fullmatch(r"(fcc|bcc|hcp|diamond)\s*\(\s*(\d{3,4})\s*\)", s, flags=re.I)
    if m:
        raise NetError(f"{s!r} needs a lattice constant, e.g. '{m.group(1).lower()}({m.group(2)}):3.9'.")
    m = re.fullmatch(r"([A-Za-z]{1,2})\s*\(\s*(\d{3,4})\s*\)", s)
    if m:
        sym = m.group(1).capitalize()
        if sym not in LATTICE_CONSTANTS_A:
            known = ", ".join(sorted(LATTICE_CONSTANTS_A))
            raise NetError(f"Unknown element {sym!r} in {s!r}; known: {known}. Or give {_ACCEPTED}.")
        structure, a0, _ = LATTICE_CONSTANTS_A[sym]
        try:
            return surface_net(structure, m.group(2), a0, label=f"{sym}({m.group(2)})")
        except NetError as err:
            raise NetError(f"{s!r}: {err}") from None
    m = re.fullmatch(r"(fcc|bcc|hcp|diamond)\s*\(\s*(\d{3,4})\s*\)\s*:\s*(\S+)", s, flags=re.I)
    if m:
        a0 = _number(m.group(3), s)
        return surface_net(m.group(1).lower(), m.group(2), a0, label=s)
    m = re.fullmatch(r"([a-z\-]+)\s*:\s*(.+)", s, flags=re.I)
    if m and m.group(1).lower().replace("centred", "centered") in _NET_ARGS:
        kind = m.group(1).lower().replace("centred", "centered")
        nums = [_number(x, s) for x in re.split(r"[,\s]+", m.group(2).strip()) if x]
        if len(nums) != _NET_ARGS[kind]:
            raise NetError(f"{s!r}: '{kind}' takes {_NET_ARGS[kind]} number(s), got {len(nums)}; "
                           f"accepted: {_ACCEPTED}.")
        if any(x <= 0 for x in nums[:2]):
            raise NetError(f"{s!r}: lengths must be positive.")
        if kind == "hexagonal":
            net = Net2D.from_parameters(nums[0], nums[0], 120.0)
        elif kind == "square":
            net = Net2D.from_parameters(nums[0], nums[0], 90.0)
        elif kind == "rectangular":
            net = Net2D.from_parameters(nums[0], nums[1], 90.0)
        elif kind == "oblique":
            net = Net2D.from_parameters(*nums)
        else:
            net = _centered_rectangular(nums[0], nums[1])
        return Net2D(net.vectors, label=s)
    raise NetError(f"Cannot read substrate {s!r}; give {_ACCEPTED}.")


def _number(text: str, spec: str) -> float:
    try:
        x = float(text)
    except ValueError:
        raise NetError(f"{spec!r}: {text!r} is not a number; accepted: {_ACCEPTED}.") from None
    if not math.isfinite(x):
        raise NetError(f"{spec!r}: {text!r} is not a finite number.")
    return x
