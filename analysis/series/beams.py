"""The beams followed through a series and their symmetry-equivalence classes.

:func:`beams_from_nets` lists every beam of a substrate and its overlayer domains that
reaches the screen (:class:`BeamSet`); :func:`symmetry_ops` gives the point-group
operations that decide which beams are equivalent. Parallel momenta are Å⁻¹ without 2π.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..nets import Net2D, point_group, reciprocal
from ..optics import ScreenGeometry
from ..superstructure import beam_label

__all__ = ["BeamSet", "beam_label", "beams_from_nets", "symmetry_ops"]


@dataclass(frozen=True, eq=False)
class BeamSet:
    """The beams to follow through a series.

    Attributes
    ----------
    hk : (K, 2) ndarray of float64
        Indices in the substrate reciprocal basis (fractional for overlayer beams).
    g_par : (K, 2) ndarray of float64
        Parallel momentum in the optics' surface axes, Å⁻¹ without 2π.
    labels : tuple of str
        ``(h,k)`` headings from :func:`beam_label`.
    integer : (K,) ndarray of bool
        Integer-order (substrate) beams.
    group : (K,) ndarray of int64
        Symmetry-equivalence class of each beam (0, 1, …); equal numbers are equivalent.
    symmetry : str
        Name of the point group used for the classes.
    """

    hk: np.ndarray
    g_par: np.ndarray
    labels: tuple
    integer: np.ndarray
    group: np.ndarray
    symmetry: str = "1"

    def __post_init__(self):
        hk = np.array(self.hk, dtype=np.float64).reshape(-1, 2)
        k = hk.shape[0]
        for name, dtype, shape in (("hk", np.float64, (k, 2)), ("g_par", np.float64, (k, 2)),
                                   ("integer", bool, (k,)), ("group", np.int64, (k,))):
            a = np.array(getattr(self, name), dtype=dtype)
            if a.shape != shape:
                raise ParameterError(f"BeamSet `{name}` must have shape {shape}, got {a.shape}.")
            a.flags.writeable = False
            object.__setattr__(self, name, a)
        if len(self.labels) != k:
            raise ParameterError(f"BeamSet has {k} beams but {len(self.labels)} labels.")
        object.__setattr__(self, "labels", tuple(self.labels))

    def __len__(self) -> int:
        return int(self.hk.shape[0])

    def index(self, label_or_hk) -> int:
        """Position of a beam given its label ``"(1,0)"`` or its (h, k).

        Parameters
        ----------
        label_or_hk : str or (h, k)
            The beam.

        Returns
        -------
        int
            Its position in the set.
        """
        if isinstance(label_or_hk, str):
            key = label_or_hk.replace(" ", "")
            if key in self.labels:
                return self.labels.index(key)
            raise ParameterError(f"No beam {label_or_hk!r}; known: {', '.join(self.labels[:12])}…")
        hk = np.asarray(label_or_hk, dtype=np.float64).reshape(2)
        d = np.max(np.abs(self.hk - hk), axis=1)
        j = int(np.argmin(d)) if len(self) else -1
        if j < 0 or d[j] > 1e-6:
            raise ParameterError(f"No beam with indices {hk.tolist()}.")
        return j

    @classmethod
    def from_hk(cls, substrate: Net2D, hk, *, azimuth_deg: float = 0.0, symmetry: str = "auto") -> "BeamSet":
        """Beams given by their substrate indices (e.g. from an indexed pattern).

        Parameters
        ----------
        substrate : Net2D
            Real-space substrate net, Å.
        hk : (K, 2) array_like of float
            The beams' indices in the substrate's reciprocal basis.
        azimuth_deg : float, keyword-only
            Counter-clockwise rotation of the sample axes in the optics' frame.
        symmetry : str, keyword-only
            As for :func:`symmetry_ops`.

        Returns
        -------
        BeamSet
            The beams with their equivalence classes.
        """
        hk = np.asarray(hk, dtype=np.float64).reshape(-1, 2)
        c, s = math.cos(math.radians(azimuth_deg)), math.sin(math.radians(azimuth_deg))
        g = hk @ reciprocal(substrate).vectors @ np.array([[c, s], [-s, c]])
        integer = np.all(np.abs(hk - np.rint(hk)) < 1e-6, axis=1)
        ops, name = symmetry_ops(substrate, symmetry)
        group = _orbits(g, [q for q in ops if _maps_set(g, q)])
        return cls(hk, g, tuple(beam_label(*x) for x in hk), integer, group, name)


def _maps_set(g: np.ndarray, q: np.ndarray, tol: float = 1e-6) -> bool:
    """True when the Cartesian operation `q` maps the set of momenta `g` onto itself."""
    if len(g) == 0:
        return True
    scale = max(float(np.max(np.abs(g))), 1e-12)
    img = g @ q.T
    d = np.max(np.abs(img[:, None, :] - g[None, :, :]), axis=2)
    return bool(np.all(np.min(d, axis=1) <= tol * scale))


def _orbits(g: np.ndarray, ops: Sequence[np.ndarray], tol: float = 1e-6) -> np.ndarray:
    """Equivalence class (0, 1, …, in order of first appearance) of each momentum."""
    k = len(g)
    parent = np.arange(k)

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    scale = max(float(np.max(np.abs(g))) if k else 1.0, 1e-12)
    for q in ops:
        img = g @ q.T
        d = np.max(np.abs(img[:, None, :] - g[None, :, :]), axis=2)
        j = np.argmin(d, axis=1)
        for i in np.flatnonzero(d[np.arange(k), j] <= tol * scale):
            a, b = find(i), find(int(j[i]))
            if a != b:
                parent[max(a, b)] = min(a, b)
    roots = np.array([find(i) for i in range(k)], dtype=np.int64)
    _, first, inv = np.unique(roots, return_index=True, return_inverse=True)
    rank = np.argsort(np.argsort(first))
    return rank[inv].astype(np.int64)


_THREEFOLD_FACES = re.compile(r"\((111|0001|001)\)", re.I)


def symmetry_ops(substrate: Net2D, symmetry: str = "auto") -> tuple[list[np.ndarray], str]:
    """Cartesian point-group operations used to decide which beams are equivalent.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å); its label names the face for ``"auto"``.
    symmetry : str
        ``"full"`` — the holohedry of the net (p2 … p6mm); ``"p3m1"`` — hexagonal nets:
        rotations by 120° and the mirror lines through the reciprocal basis vectors
        (fcc(111), bcc(111), diamond(111), hcp(0001) surfaces: (1,0), (0,-1), (-1,1)
        equivalent, (0,1) not); ``"p31m"`` — the other three mirrors; ``"p3"``, ``"p6"``,
        ``"p4"``, ``"p2"``, ``"p1"``: rotations only; ``"auto"`` — ``"p3m1"`` for a substrate
        labelled as a (111) or (0001) face, else ``"full"``.

    Returns
    -------
    ops : list of (2, 2) ndarray of float64
        Orthogonal matrices acting on column vectors, identity first.
    name : str
        The group used.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> ops, name = symmetry_ops(parse_substrate("Pt(111)"))
    >>> print(name, len(ops), len(symmetry_ops(parse_substrate("Cu(100)"))[0]))
    p3m1 6 8
    """
    s = str(symmetry).strip().lower()
    group = point_group(substrate)
    if s == "auto":
        s = "p3m1" if (_THREEFOLD_FACES.search(substrate.label or "") and len(group) == 12) else "full"
    if s in ("none", "1"):
        s = "p1"
    rot = [op for op in group if op.kind == "rotation"]
    mir = [op for op in group if op.kind == "mirror"]

    def rotations(step: float) -> list:
        return [op for op in rot if abs((op.angle_deg / step) - round(op.angle_deg / step)) < 1e-6]

    if s == "full":
        chosen = group
        s = {2: "p2", 4: "p2mm", 8: "p4mm", 12: "p6mm"}.get(len(group), "full")
    elif s in ("p1", "p2", "p3", "p4", "p6"):
        n = int(s[1])
        chosen = rotations(360.0 / n)
        if len(chosen) != n:
            raise ParameterError(f"Symmetry {symmetry!r} does not fit a {len(group)}-operation net.")
    elif s in ("p3m1", "p31m"):
        if len(group) != 12:
            raise ParameterError(f"Symmetry {symmetry!r} needs a hexagonal substrate.")
        a_star = reciprocal(substrate).vectors
        phi = math.degrees(math.atan2(a_star[0, 1], a_star[0, 0])) % 180.0
        if s == "p31m":
            phi = (phi + 30.0) % 180.0
        keep = [op for op in mir if min(abs(op.angle_deg - phi - t) for t in (-180, -120, -60, 0, 60, 120, 180)) < 1e-4]
        chosen = rotations(120.0) + keep
    else:
        raise ParameterError(f"Unknown symmetry {symmetry!r}; use auto, full, p3m1, p31m, p1, p2, p3, p4 or p6.")
    return [np.array(op.cartesian, dtype=np.float64) for op in chosen], s


def beams_from_nets(substrate: Net2D, overlayers: Sequence = (), *, energy_max_eV: float,
                    geometry: ScreenGeometry, azimuth_deg: float = 0.0, all_domains: bool = False,
                    symmetry: str = "auto") -> BeamSet:
    """Every beam of a substrate and its overlayer domains that reaches the screen in a series.

    Beams move inwards as the energy rises, so the set visible at the highest energy is
    the largest; beams outside the acceptance at lower energies are flagged per frame.

    Parameters
    ----------
    substrate : Net2D
        Real-space (1×1) net, Å.
    overlayers : sequence of (2, 2) array_like of float
        Superstructure matrices M, ``overlayer = M @ substrate``.
    energy_max_eV : float, keyword-only
        Highest energy of the series.
    geometry : ScreenGeometry, keyword-only
        Only its acceptance angle matters here.
    azimuth_deg : float, keyword-only
        Sample azimuth (as :func:`analysis.simulate.forward_pattern`).
    all_domains : bool, keyword-only
        Add every symmetry-equivalent domain of each matrix (``superstructure.domains``).
    symmetry : str, keyword-only
        Point group for the equivalence classes (:func:`symmetry_ops`); only the
        operations that map the whole beam set onto itself are used.

    Returns
    -------
    BeamSet
        Sorted by |g| then azimuth.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> b = beams_from_nets(parse_substrate("Cu(100)"), energy_max_eV=100.0,
    ...                     geometry=ScreenGeometry(0.0, 0.0, 100.0))
    >>> print(len(b), b.labels[:2], len(set(b.group.tolist())))
    9 ('(0,0)', '(0,1)') 3
    """
    from ..simulate import forward_pattern

    mats = [np.asarray(m, dtype=np.float64) for m in overlayers]
    if all_domains and mats:
        from ..superstructure import domains

        mats = [d.matrix for m in mats for d in domains(substrate, m)]
    pat = forward_pattern(substrate, mats, energy_eV=float(energy_max_eV), geometry=geometry,
                          azimuth_deg=azimuth_deg)
    ops, name = symmetry_ops(substrate, symmetry)
    c, s = math.cos(math.radians(azimuth_deg)), math.sin(math.radians(azimuth_deg))
    rot = np.array([[c, -s], [s, c]])
    ops = [rot @ q @ rot.T for q in ops]  # the operations in the optics' (rotated) frame
    used = [q for q in ops if _maps_set(pat.g_par, q)]
    group = _orbits(pat.g_par, used)
    if len(used) != len(ops):
        name = f"{name} ({len(used)} of {len(ops)} operations keep the beam set)"
    return BeamSet(pat.hk, pat.g_par, tuple(beam_label(*x) for x in pat.hk), pat.integer, group, name)
