"""Wood notation of a superstructure, both ways: :func:`wood_notation` writes the
notation of a matrix (``(√3×√3)R30°``, ``c(2×2)``, ``p(2×1)``), :func:`parse_wood`
reads one back into a matrix.

A primitive Wood cell (m×n)Rφ of an overlayer on the substrate net (a1, a2) has
b1 = m R(φ) a1 and b2 = n R(φ) a2 (rotation counter-clockwise, rows are vectors, Å),
so it keeps the substrate's angle; its matrix M satisfies
``overlayer.vectors = M @ substrate.vectors``. The centred form c(m×n)Rφ is a cell
of twice the area with its centre on the overlayer lattice.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from .errors import NetError
from .nets import Net2D, classify_net, point_group, reduce_net
from .superstructure import _parse_num, _snap, as_matrix, domains, format_matrix, same_lattice

__all__ = ["WoodNotation", "wood_notation", "parse_wood", "AmbiguousWoodWarning"]


@dataclass(frozen=True, eq=False)
class WoodNotation:
    """Wood notation of an overlayer, or why there is none.

    Attributes
    ----------
    text : str or None
        What the trade writes, e.g. ``"(√3×√3)R30°"``, ``"c(2×2)"``,
        ``"p(2×1)"``; None when no Wood notation exists.
    primitive : str or None
        The primitive-cell form when it exists (e.g. ``"(√2×√2)R45°"`` for c(2×2)).
    centered : str or None
        The centred-cell form when one with the substrate's angle exists.
    m, n : float
        Length ratios |b1|/|a1|, |b2|/|a2| of the cell `text` names.
    angle_deg : float
        Signed rotation of that cell (counter-clockwise positive).
    basis : (2, 2) ndarray or None
        Matrix of the primitive Wood cell in the substrate basis (None if absent).
    note : str
        Plain words for the user (e.g. that only the centred form exists).
    """

    text: str | None
    primitive: str | None
    centered: str | None
    m: float
    n: float
    angle_deg: float
    basis: np.ndarray | None
    note: str

    def __str__(self) -> str:
        return self.text or "none exists"


def _fmt_length(x: float, tol: float) -> str:
    r = round(x)
    if abs(x - r) <= tol * max(1.0, x):
        return str(int(r))
    x2 = x * x
    r2 = round(x2)
    if abs(x2 - r2) <= 2 * tol * max(1.0, x2):
        k, s = 1, int(r2)
        for f in range(int(math.isqrt(s)), 1, -1):
            if s % (f * f) == 0:
                k, s = f, s // (f * f)
                break
        return ("" if k == 1 else str(k)) + f"√{s}"
    for den in range(2, 7):
        if abs(x * den - round(x * den)) <= tol * den * max(1.0, x):
            return f"{x:.6g}" if den in (2, 4, 5) else f"{round(x * den)}/{den}"
    return f"{x:.3f}"


def _fmt_rotation(angle_deg: float) -> str:
    a = abs(angle_deg)
    r = round(a, 1)
    if r < 0.05:
        return ""
    s = f"{r:.0f}" if abs(r - round(r)) < 1e-9 else f"{r:.1f}"
    return f"R{s}°"


def _lattice_vectors(basis: np.ndarray, radius: float) -> np.ndarray:
    """All non-zero lattice vectors (Cartesian rows) of length ≤ `radius`."""
    red, _ = reduce_net(Net2D(basis))
    n = min(int(math.ceil(radius * max(red.a, red.b) / red.area)) + 1, 80)
    r = np.arange(-n, n + 1)
    ij = np.array(np.meshgrid(r, r, indexing="ij")).reshape(2, -1).T
    xy = ij @ red.vectors
    keep = (np.hypot(xy[:, 0], xy[:, 1]) <= radius * (1 + 1e-9)) & np.any(ij != 0, axis=1)
    return xy[keep]


def _wood_cells(substrate: Net2D, lattice_xy: np.ndarray, *, index: int, tol: float):
    """Cells (p, q) of the lattice with p ∥ R(φ) a1, q ∥ R(φ) a2, area index × area(L).

    index 1: primitive cells; index 2: centred cells ((p + q)/2 in the lattice).
    Yields (|φ_w|, φ_w, m, n, p, q, φ) sorted with the smallest rotation first, where
    φ is the angle from a1 and φ_w the Wood angle (φ modulo the substrate's rotations).
    """
    a1, a2 = substrate.vectors
    area_l = abs(np.linalg.det(lattice_xy))
    red, _ = reduce_net(Net2D(lattice_xy))
    radius = 2.5 * math.sqrt(index) * max(red.a, red.b) + max(substrate.a, substrate.b)
    vecs = _lattice_vectors(lattice_xy, radius)
    inv_l = np.linalg.inv(lattice_xy)
    lengths = np.hypot(vecs[:, 0], vecs[:, 1])
    order = np.argsort(lengths, kind="stable")
    vecs, lengths = vecs[order], lengths[order]
    ang_a1 = math.atan2(a1[1], a1[0])
    # rotating the substrate basis by a symmetry rotation gives an equivalent basis,
    # so the Wood angle counts modulo the smallest rotation of the substrate
    step = 2 * math.pi / sum(1 for op in point_group(substrate) if op.kind == "rotation")
    # every (p, q) pair at once: q ∥ R(φ_p) a2 (same sense), area index × area(L), and for
    # index 2 the cell centre on the lattice; for each p the shortest such q makes the cell
    phi = np.arctan2(vecs[:, 1], vecs[:, 0]) - ang_a1
    phi = (phi + math.pi) % (2 * math.pi) - math.pi
    phi_w = (phi + step / 2) % step - step / 2  # in [−step/2, step/2)
    phi_w = np.where(np.abs(phi_w + step / 2) < 1e-9, step / 2, phi_w)
    c, s = np.cos(phi), np.sin(phi)
    u = np.column_stack([c * a2[0] - s * a2[1], s * a2[0] + c * a2[1]]) / substrate.b  # (P, 2)
    cross = u[:, 1, None] * vecs[None, :, 0] - u[:, 0, None] * vecs[None, :, 1]  # (P, Q)
    dot = u @ vecs.T
    area = np.abs(vecs[:, 0, None] * vecs[None, :, 1] - vecs[:, 1, None] * vecs[None, :, 0])
    ok = (np.abs(cross) <= tol * lengths[None, :]) & (dot > 0) & \
        (np.abs(area - index * area_l) <= 1e-6 * area_l * index)
    if index == 2:
        cc = ((vecs[:, None, :] + vecs[None, :, :]) / 2.0) @ inv_l
        ok &= np.all(np.abs(cc - np.rint(cc)) <= 1e-6, axis=2)
    out = []
    for i in np.flatnonzero(ok.any(axis=1)):
        j = int(np.argmax(ok[i]))
        out.append((round(abs(math.degrees(phi_w[i])), 6), math.degrees(phi_w[i]), lengths[i] / substrate.a,
                    lengths[j] / substrate.b, vecs[i], vecs[j], math.degrees(phi[i])))
    # least Wood rotation, R+ before R−, m ≥ n, then the cell nearest the substrate axes themselves
    out.sort(key=lambda t: (t[0], -round(t[1], 6), -round(t[2], 9), round(abs(t[6]), 6), -round(t[6], 6)))
    return out


def wood_notation(substrate: Net2D, matrix, *, tol: float = 1e-6) -> WoodNotation:
    """Wood notation of the overlayer `matrix` on `substrate`, when one exists.

    A primitive Wood cell (m×n)Rφ has b1 ∥ R(φ) a1, b2 ∥ R(φ) a2 with one
    rotation φ, so it keeps the substrate's angle. The centred form c(m×n)Rφ
    is a cell of twice the area with its centre on the lattice. Trade usage
    is followed: the centred form is written when it is unrotated and the
    primitive one is rotated or missing (c(2×2) rather than (√2×√2)R45°;
    c(4×2) on a hexagonal net, where no primitive Wood cell exists). A
    primitive unrotated cell with integer sides gets the prefix ``p``, except
    (1×1). The angle is written as its magnitude rounded to 0.1°.

    Parameters
    ----------
    substrate : Net2D
        Real-space substrate net (Å).
    matrix : (2, 2) array_like
        Real-space superstructure matrix.
    tol : float, keyword-only
        Relative tolerance on directions and lengths (loosen for measured matrices).

    Returns
    -------
    WoodNotation
        ``.text`` the notation (None when no Wood cell exists, ``.note`` then says
        why), with the cell's sides ``.m``, ``.n`` (substrate lengths) and rotation
        ``.angle_deg``.

    Examples
    --------
    >>> hexnet = Net2D.from_parameters(1.0, 1.0, 120.0)
    >>> print(wood_notation(hexnet, [[2, 1], [-1, 1]]).text, wood_notation(Net2D(np.eye(2)), [[1, 1], [-1, 1]]).text)
    (√3×√3)R30° c(2×2)
    """
    m = as_matrix(matrix)
    key = (substrate.vectors.tobytes(), m.tobytes(), float(tol))
    hit = _WOOD_CACHE.get(key)
    if hit is None:
        if len(_WOOD_CACHE) >= 4096:
            _WOOD_CACHE.clear()
        hit = _WOOD_CACHE[key] = _wood_notation(substrate, m, tol)
    return hit


_WOOD_CACHE: dict = {}  # the search names the same cells many times; results are immutable


def _wood_notation(substrate: Net2D, m: np.ndarray, tol: float) -> WoodNotation:
    lattice_xy = m @ substrate.vectors
    prim = _wood_cells(substrate, lattice_xy, index=1, tol=max(tol, 1e-9))
    cent = _wood_cells(substrate, lattice_xy, index=2, tol=max(tol, 1e-9))
    inv_v = np.linalg.inv(substrate.vectors)

    def text(cell, prefix):
        _, phi, mm, nn = cell[:4]
        rot = _fmt_rotation(phi)
        sides = f"({_fmt_length(mm, max(tol, 1e-6))}×{_fmt_length(nn, max(tol, 1e-6))})"
        if prefix == "p" and (rot or not (_is_int(mm, tol) and _is_int(nn, tol)) or
                              (_is_int(mm, tol) and _is_int(nn, tol) and round(mm) == round(nn) == 1)):
            prefix = ""
        return f"{prefix}{sides}{rot}"

    p_text = text(prim[0], "p") if prim else None
    c_text = text(cent[0], "c") if cent else None
    basis = _snap(np.array([prim[0][4], prim[0][5]]) @ inv_v) if prim else None
    if basis is not None:
        basis.setflags(write=False)
    use_centered = cent and abs(cent[0][1]) < 0.05 and (not prim or abs(prim[0][1]) >= 0.05)
    if use_centered:
        _, phi, mm, nn = cent[0][:4]
        if prim:
            note = f"c-cell form; the primitive cell is {p_text}."
        else:
            kind = classify_net(Net2D(lattice_xy))
            note = (f"No primitive Wood notation exists (the primitive overlayer cell is {kind}, "
                    f"{_cell_angle(lattice_xy):.0f}° on a "
                    f"{substrate.gamma_deg:.0f}° net); {c_text} is the centred-cell setting the trade writes.")
        return WoodNotation(c_text, p_text, c_text, mm, nn, phi, basis, note)
    if prim:
        _, phi, mm, nn = prim[0][:4]
        return WoodNotation(p_text, p_text, c_text, mm, nn, phi, basis, "")
    return WoodNotation(None, None, c_text, math.nan, math.nan, math.nan, None,
                        f"No Wood notation exists; matrix notation {format_matrix(m)}.")


def _cell_angle(lattice_xy: np.ndarray) -> float:
    red, _ = reduce_net(Net2D(lattice_xy))
    return red.gamma_deg


def _is_int(x: float, tol: float) -> bool:
    return abs(x - round(x)) <= max(tol, 1e-6) * max(1.0, x)


_NUM = r"(?:\d+(?:\.\d+)?(?:/\d+)?)"
_LEN = rf"(?:{_NUM}?\s*(?:√|sqrt|r)\s*\(?\s*{_NUM}\s*\)?|{_NUM})"
_WOOD_RE = re.compile(
    rf"^\s*(?P<prefix>[pc])?\s*\(\s*(?P<m>{_LEN})\s*[x×X*]\s*(?P<n>{_LEN})\s*\)"
    rf"\s*(?:R\s*(?P<rot>[-+]?\d+(?:\.\d+)?)\s*(?:°|deg|º)?)?\s*$",
    flags=re.IGNORECASE,
)


def _parse_length(s: str) -> float:
    s = s.replace(" ", "").lower()
    mm = re.fullmatch(rf"({_NUM})?(?:√|sqrt|r)\(?({_NUM})\)?", s)
    if mm:
        k = _parse_num(mm.group(1)) if mm.group(1) else 1.0
        return k * math.sqrt(_parse_num(mm.group(2)))
    return _parse_num(s)


def parse_wood(text: str, substrate: Net2D) -> np.ndarray:
    """Matrix of a Wood notation on `substrate`.

    Accepts unicode and ASCII forms: ``(√3×√3)R30°``, ``(sqrt3xsqrt3)R30``,
    ``c(4x2)``, ``p(2x1)``, ``(2√2×√2)R45°``, ``(r7xr7)R19.1``. The rotation is
    counter-clockwise. For ``c(m×n)`` the primitive cell ((C1 + C2)/2, C2) of the
    centred cell is returned. The text keeps the angle rounded (to its last
    written digit) and without its sense, so the matrix is the simplest
    commensurate one (integer first, then entries in 1/q up to q = 12) whose cell
    has the written sides and, within that rounding, the written angle in either
    sense; with no such matrix, the exact (incommensurate) cell. When two lattices
    that are not domains of one another fit the text, `AmbiguousWoodWarning` names both.

    Parameters
    ----------
    text : str
        The Wood notation, unicode or ASCII.
    substrate : Net2D
        Real-space substrate net (Å); its angle decides which cells exist.

    Returns
    -------
    (2, 2) ndarray of float64
        Real-space superstructure matrix M, ``overlayer = M @ substrate``.

    Raises
    ------
    NetError
        When the text is not a Wood notation, or names a cell that is no lattice
        of the substrate's angle (zero size).

    Examples
    --------
    >>> hexnet = Net2D.from_parameters(2.775, 2.775, 120.0)
    >>> parse_wood("(sqrt3xsqrt3)R30", hexnet).tolist()
    [[2.0, 1.0], [-1.0, 1.0]]
    """
    if not isinstance(text, str):
        raise NetError(f"A Wood notation must be text, got {text!r}.")
    mt = _WOOD_RE.match(text.replace("\u2009", " "))
    if not mt:
        raise NetError(f"Cannot read Wood notation {text!r}; write e.g. '(√3×√3)R30°', "
                       "'(sqrt3xsqrt3)R30', 'c(2x2)' or 'p(2x1)'.")
    m, n = _parse_length(mt.group("m")), _parse_length(mt.group("n"))
    if m <= 0 or n <= 0:
        raise NetError(f"Wood notation {text!r} has a zero side.")
    rot = mt.group("rot") or "0"
    centred = (mt.group("prefix") or "").lower() == "c"
    return _commensurate_reading(substrate, m, n, float(rot), centred=centred, text=text,
                                 angle_tol_deg=_half_last_digit(rot) + 1e-9,
                                 side_rtol=max(_side_rtol(mt.group("m"), m), _side_rtol(mt.group("n"), n)))


class AmbiguousWoodWarning(UserWarning):
    """Two different lattices (not symmetry domains of one) fit a Wood notation's rounded text."""


def _half_last_digit(number_text: str) -> float:
    """Half a unit of the last written digit: '30' → 0.5, '19.1' → 0.05, '26.57' → 0.005."""
    digits = number_text.split(".")[1] if "." in number_text else ""
    return 0.5 * 10.0 ** (-len(digits))


def _side_rtol(length_text: str, value: float) -> float:
    """Relative rounding of a written side: exact for integers, fractions and roots; half the
    last digit of a decimal ('3.61' → 0.005 / 3.61)."""
    t = length_text.replace(" ", "")
    if "." not in t:
        return 1e-9
    return _half_last_digit(re.findall(r"\d+\.\d+", t)[0]) / max(value, 1e-9) + 1e-9


def _wood_cell_matrix(substrate: Net2D, m: float, n: float, phi_deg: float, centred: bool) -> np.ndarray:
    """The (real) matrix of the Wood cell: b1 = m R(φ) a1, b2 = n R(φ) a2, rotation counter-clockwise."""
    phi = math.radians(phi_deg)
    c, s = math.cos(phi), math.sin(phi)
    cell = np.diag([m, n]) @ substrate.vectors @ np.array([[c, s], [-s, c]])  # rows rotate CCW
    if centred:
        cell = np.array([(cell[0] + cell[1]) / 2.0, cell[1]])
    return cell @ np.linalg.inv(substrate.vectors)


def _fits_text(substrate: Net2D, mat: np.ndarray, m: float, n: float, phi_deg: float, centred: bool,
               angle_tol_deg: float, side_rtol: float) -> bool:
    """Does the cell of `mat` read as the text: sides m, n and both vectors turned by φ within rounding?"""
    if centred:  # back from the primitive ((C1 + C2)/2, C2) to the centred cell (C1, C2)
        mat = np.array([2.0 * mat[0] - mat[1], mat[1]])
    cell = mat @ substrate.vectors
    want = np.array([m, n]) * np.array([substrate.a, substrate.b])
    sides = np.linalg.norm(cell, axis=1)
    if not np.all(np.abs(sides - want) <= side_rtol * want + 1e-9):
        return False
    turn = np.degrees(np.arctan2(cell[:, 1], cell[:, 0]) - np.arctan2(substrate.vectors[:, 1], substrate.vectors[:, 0]))
    miss = (turn - phi_deg + 180.0) % 360.0 - 180.0
    return bool(np.all(np.abs(miss) <= angle_tol_deg))


def _commensurate_reading(substrate: Net2D, m: float, n: float, phi_deg: float, *, centred: bool, text: str,
                          angle_tol_deg: float, side_rtol: float, max_denominator: int = 12) -> np.ndarray:
    """The matrix a Wood text means on `substrate`: the simplest commensurate lattice it allows.

    The text keeps the angle rounded and only its size, so both senses of rotation are tried
    (their lattices are mirror domains where the substrate has a mirror through a1). For each,
    matrices with entries in 1/q (q = 1, 2, ... `max_denominator`) near the exact Wood cell are
    tried, the smallest q first; a candidate must reproduce the sides and the rotation of both
    cell vectors within the text's rounding. The reading with the smallest q wins (the written
    sense first on a tie); when the two senses give lattices that are not symmetry domains of
    one another, `AmbiguousWoodWarning` says so. No fit: the exact (incommensurate) cell.
    """
    found = []
    for sense in (1.0, -1.0):
        exact = _wood_cell_matrix(substrate, m, n, sense * phi_deg, centred)
        for q in range(1, max_denominator + 1):
            base = np.rint(exact * q)
            hit = None
            for step in _NEIGHBOUR_STEPS:  # the rounded angle may push an entry past the half
                cand = (base + step) / q
                if abs(np.linalg.det(cand)) > 1e-9 and _fits_text(substrate, cand, m, n, sense * phi_deg, centred,
                                                                  angle_tol_deg, side_rtol):
                    if hit is None or np.abs(cand - exact).max() < np.abs(hit - exact).max():
                        hit = cand
            if hit is not None:
                found.append((q, -sense, hit))
                break
    if not found:
        return _snap(_wood_cell_matrix(substrate, m, n, phi_deg, centred), 1e-9)
    if len(found) == 2 and found[0][0] == found[1][0]:  # a tie: the reading this text names back first
        said = (centred, m, n, abs(phi_deg))
        found = [(q, -_names_back(substrate, mat, said), sense, mat) for q, sense, mat in found]
    else:
        found = [(q, 0, sense, mat) for q, sense, mat in found]
    found.sort(key=lambda f: f[:3])
    best = found[0][3]
    if len(found) == 2 and found[1][0] == found[0][0] and found[1][1] == found[0][1]:
        other = found[1][3]
        if not any(same_lattice(other, d.matrix, tol=1e-6) for d in domains(substrate, best)):
            import warnings

            warnings.warn(f"Wood notation {text!r} fits two lattices on this substrate, "
                          f"{format_matrix(best)} and {format_matrix(other)}; the first is used.",
                          AmbiguousWoodWarning, stacklevel=3)
    return best


def _names_back(substrate: Net2D, mat: np.ndarray, said: tuple) -> bool:
    """Does `wood_notation` name the lattice of `mat` with the same prefix, sides and |angle|?"""
    text = wood_notation(substrate, mat).text
    mt = _WOOD_RE.match(text or "")
    if not mt:
        return False
    centred, m, n, phi = said
    return ((mt.group("prefix") or "").lower() == "c") == centred and \
        math.isclose(_parse_length(mt.group("m")), m, rel_tol=1e-3) and \
        math.isclose(_parse_length(mt.group("n")), n, rel_tol=1e-3) and \
        abs(abs(float(mt.group("rot") or 0)) - phi) < 0.051


_NEIGHBOUR_STEPS = np.array(np.meshgrid(*[[0, -1, 1]] * 4, indexing="ij")).reshape(4, -1).T.reshape(-1, 2, 2)
