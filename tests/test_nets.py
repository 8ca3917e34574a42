"""Tests of analysis.nets against ASE (an independent crystallography library) and 2-D facts."""

from __future__ import annotations

import math

import numpy as np
import pytest
from ase.build import bcc100, bcc110, bcc111, diamond111, fcc100, fcc110, fcc111, hcp0001
from ase.cell import Cell
from ase.data import atomic_numbers, reference_states
from ase.geometry import minkowski_reduce
from numpy.testing import assert_allclose

from analysis.errors import NetError
from analysis.nets import (
    LATTICE_CONSTANTS_A,
    Net2D,
    classify_net,
    parse_substrate,
    point_group,
    point_group_name,
    reciprocal,
    reduce_net,
    surface_net,
)

# ASE's names of the five 2-D Bravais lattices (ase.lattice) mapped to ours.
_ASE_NAMES = {"OBL": "oblique", "RECT": "rectangular", "CRECT": "centered-rectangular",
              "SQR": "square", "HEX2D": "hexagonal"}


def _cell3(v2: np.ndarray) -> Cell:
    """A 2-D basis embedded in 3-D with a zero third vector (ASE's 2-D convention)."""
    c = np.zeros((3, 3))
    c[:2, :2] = v2
    return Cell(c)


def _ase_kind(v2: np.ndarray) -> str:
    return _ASE_NAMES[_cell3(v2).get_bravais_lattice().name]


# ----------------------------------------------------------------- reciprocal nets


@pytest.mark.parametrize("a, b, gamma", [(3.0, 4.0, 75.0), (3.0, 4.0, 90.0), (2.5, 2.5, 90.0),
                                         (2.5, 2.5, 120.0), (2.74097, 2.74097, 109.4712), (1.7, 5.2, 33.0)])
def test_reciprocal_matches_ase(a, b, gamma):
    net = Net2D.from_parameters(a, b, gamma)
    # ASE Cell.reciprocal(): "does not include factor of 2 pi"
    ref = _cell3(net.vectors).reciprocal()[:2, :2]
    assert_allclose(reciprocal(net).vectors, ref, atol=1e-12)
    assert_allclose(reciprocal(net, two_pi=True).vectors, 2 * np.pi * ref, atol=1e-12)


@pytest.mark.parametrize("a, b, gamma, ra, rb", [
    # CHECK_VALUES.md §2 [run]: |a*| = 1/(a sin γ), |b*| = 1/(b sin γ)
    (3.0, 4.0, 75.0, 0.345092, 0.258819),
    (3.0, 4.0, 90.0, 0.333333, 0.250000),
    (2.5, 2.5, 90.0, 0.400000, 0.400000),
    (2.5, 2.5, 120.0, 0.461880, 0.461880),
])
def test_reciprocal_table(a, b, gamma, ra, rb):
    rec = reciprocal(Net2D.from_parameters(a, b, gamma))
    # table rounded to 6 decimals
    assert abs(rec.a - ra) < 6e-7 and abs(rec.b - rb) < 6e-7


@pytest.mark.parametrize("seed", range(6))
def test_reciprocal_2d_facts(seed):
    rng = np.random.default_rng(seed)
    a, b = rng.uniform(1.5, 6.0, 2)
    gamma = rng.uniform(20.0, 160.0)
    net = Net2D.from_parameters(a, b, gamma)
    rec = reciprocal(net)
    # γ* = 180° − γ; area* = 1 / area; a_i · a*_j = δ_ij; applying twice gives the net back
    assert rec.gamma_deg == pytest.approx(180.0 - gamma, abs=1e-9)
    assert rec.area == pytest.approx(1.0 / net.area, rel=1e-12)
    assert_allclose(net.vectors @ rec.vectors.T, np.eye(2), atol=1e-12)
    assert_allclose(reciprocal(rec).vectors, net.vectors, atol=1e-12)


def test_reciprocal_keeps_square_and_inverts_rectangle():
    sq = reciprocal(Net2D.from_parameters(2.556, 2.556, 90.0))
    assert classify_net(sq) == "square" and sq.a == pytest.approx(1 / 2.556, rel=1e-12)
    rect = reciprocal(Net2D.from_parameters(2.556, 3.615, 90.0))
    # the aspect ratio is inverted: b*/a* = a/b
    assert rect.b / rect.a == pytest.approx(2.556 / 3.615, rel=1e-12)


def test_hexagonal_reciprocal_length():
    a = 2.775
    rec = reciprocal(Net2D.from_parameters(a, a, 120.0))
    # |a*| = 2 / (a √3) for a hexagonal net; γ* = 60°
    assert rec.a == pytest.approx(2.0 / (a * math.sqrt(3.0)), rel=1e-12)
    assert rec.gamma_deg == pytest.approx(60.0, abs=1e-9)
    assert classify_net(rec) == "hexagonal"


# ----------------------------------------------------------------- classification


@pytest.mark.parametrize("a, b, gamma", [
    (3.0, 4.0, 75.0), (3.0, 4.0, 90.0), (2.5, 2.5, 90.0), (2.5, 2.5, 120.0), (2.5, 2.5, 60.0),
    (2.74097, 2.74097, 109.4712), (3.0, 3.0, 80.0), (2.0, 5.0, 90.0), (3.0, 3.4, 104.0),
    (3.0, 3.0, 50.0),
])
def test_classification_matches_ase(a, b, gamma):
    net = Net2D.from_parameters(a, b, gamma)
    assert classify_net(net) == _ase_kind(net.vectors)


@pytest.mark.parametrize("seed", range(20))
def test_classification_matches_ase_on_random_bases_of_special_nets(seed):
    # a special net written in a random (non-reduced) unimodular basis must still be found
    rng = np.random.default_rng(seed)
    kind_params = [(2.5, 2.5, 90.0), (2.5, 2.5, 120.0), (2.0, 3.3, 90.0), (3.0, 3.0, 72.0), (2.2, 3.1, 81.0)]
    a, b, g = kind_params[seed % len(kind_params)]
    base = Net2D.from_parameters(a, b, g).vectors
    u = np.array([[1, 0], [0, 1]])
    for _ in range(3):  # product of random shears: integer, det 1
        s = rng.integers(-2, 3)
        u = u @ (np.array([[1, s], [0, 1]]) if rng.random() < 0.5 else np.array([[1, 0], [s, 1]]))
    v = u @ base
    assert classify_net(Net2D(v)) == _ase_kind(v) == _ase_kind(base)


def test_classification_tolerance_edges():
    # CHECK_VALUES.md §2 [run]: with eps = 2e-4, b = a(1 + 1e-5) is square, b = a(1 + 1e-3) rectangular
    for f, kind in ((1e-5, "square"), (1e-3, "rectangular")):
        v = Net2D.from_parameters(2.5, 2.5 * (1 + f), 90.0).vectors
        assert classify_net(Net2D(v)) == kind == _ase_kind(v)


# ----------------------------------------------------------------- surface presets vs ase.build


def _ase_surface_cell(builder, symbol, a0, **kw) -> np.ndarray:
    slab = builder(symbol, size=(1, 1, 2), a=a0, vacuum=6.0, **kw)
    return np.array(slab.cell)


_PRESETS = [
    ("fcc", "111", fcc111, "Cu", 3.615),
    ("fcc", "111", fcc111, "Pt", 3.924),
    ("fcc", "100", fcc100, "Cu", 3.615),
    ("fcc", "110", fcc110, "Ni", 3.524),
    ("bcc", "110", bcc110, "W", 3.165),
    ("bcc", "100", bcc100, "Fe", 2.866),
    ("bcc", "111", bcc111, "Mo", 3.147),
    ("diamond", "111", diamond111, "Si", 5.431),
    ("hcp", "0001", hcp0001, "Ru", 2.706),
]


@pytest.mark.parametrize("structure, face, builder, symbol, a0", _PRESETS)
def test_surface_presets_match_ase_build(structure, face, builder, symbol, a0):
    kw = {"c": 4.282} if structure == "hcp" else {}
    cell3 = _ase_surface_cell(builder, symbol, a0, **kw)
    red3, _ = minkowski_reduce(cell3, pbc=[True, True, False])  # ASE's own reduction
    ref = red3[:2, :2]
    net = surface_net(structure, face, a0)
    la, lb = sorted(np.linalg.norm(ref, axis=1))
    ref_cos = abs(ref[0] @ ref[1]) / (la * lb)
    red, _ = reduce_net(net)
    assert (red.a, red.b) == pytest.approx((la, lb), rel=1e-9)
    assert net.area == pytest.approx(abs(np.linalg.det(ref)), rel=1e-9)
    assert abs(math.cos(math.radians(red.gamma_deg))) == pytest.approx(ref_cos, abs=1e-9)
    assert classify_net(net) == _ase_kind(ref)


def test_surface_values_from_check_values():
    # CHECK_VALUES.md §3 [run]: Cu fcc111 2.55619, Pt 2.77469, W bcc110 CRECT(a=2.74097, alpha=70.5288)
    assert surface_net("fcc", "111", 3.615).a == pytest.approx(2.55619, abs=6e-6)
    assert surface_net("fcc", "111", 3.924).a == pytest.approx(2.77469, abs=6e-6)
    w = surface_net("bcc", "110", 3.165)
    assert w.a == pytest.approx(2.74097, abs=6e-6)
    assert 180.0 - w.gamma_deg == pytest.approx(70.5288, abs=1e-4)


@pytest.mark.parametrize("symbol", sorted(LATTICE_CONSTANTS_A))
def test_lattice_constants_match_ase_reference_states(symbol):
    structure, a0, c0 = LATTICE_CONSTANTS_A[symbol]
    ref = reference_states[atomic_numbers[symbol]]
    # ase.data.reference_states (rounded literature values): same structure, a within 1 %
    assert ref["symmetry"] == structure
    assert a0 == pytest.approx(ref["a"], rel=0.01)
    if c0 is not None:
        assert c0 / a0 == pytest.approx(ref["c/a"], rel=0.01)


# ----------------------------------------------------------------- reduction


@pytest.mark.parametrize("seed", range(12))
def test_reduce_net_invariants(seed):
    rng = np.random.default_rng(seed)
    v = rng.uniform(-3.0, 3.0, (2, 2))  # Å
    if abs(np.linalg.det(v)) < 0.05:
        v[1, 1] += 1.0
    net = Net2D(v)
    reduced, op = reduce_net(net)
    r = reduced.vectors
    assert op.dtype.kind == "i"
    assert_allclose(op @ v, r, atol=1e-12)
    assert round(np.linalg.det(op)) == 1  # documented: handedness kept
    la, lb = np.linalg.norm(r, axis=1)
    assert la <= lb * (1 + 1e-12)
    assert abs(r[0] @ r[1]) <= la * la / 2 * (1 + 1e-9)
    assert reduced.area == pytest.approx(net.area, rel=1e-12)
    # reduced lengths are unique: compare with ASE's Minkowski reduction
    ref, _ = minkowski_reduce(np.vstack([np.column_stack([v, [0, 0]]), [0, 0, 1.0]]), pbc=[True, True, False])
    assert sorted(np.linalg.norm(ref[:2, :2], axis=1)) == pytest.approx([la, lb], rel=1e-9)


def test_reduce_hexagonal_gives_obtuse_angle():
    red, _ = reduce_net(Net2D.from_parameters(2.5, 2.5, 60.0))
    assert red.gamma_deg == pytest.approx(120.0, abs=1e-9)


# ----------------------------------------------------------------- point groups


@pytest.mark.parametrize("params, order, name", [
    ((3.0, 4.0, 75.0), 2, "p2"), ((3.0, 4.0, 90.0), 4, "p2mm"), ((2.74, 2.74, 109.47), 4, "c2mm"),
    ((2.5, 2.5, 90.0), 8, "p4mm"), ((2.5, 2.5, 120.0), 12, "p6mm"), ((2.5, 2.5, 60.0), 12, "p6mm"),
])
def test_point_group_orders_and_closure(params, order, name):
    net = Net2D.from_parameters(*params)
    ops = point_group(net)
    v = net.vectors
    assert len(ops) == order and point_group_name(net) == name
    assert ops[0].name == "identity"
    mats = {tuple(o.matrix.ravel()) for o in ops}
    assert len(mats) == order
    for o in ops:
        q = o.cartesian
        assert_allclose(q @ q.T, np.eye(2), atol=1e-9)
        assert_allclose(o.matrix @ v, v @ q.T, atol=1e-9)  # W V = V Qᵀ
        assert (o.kind == "rotation") == (np.linalg.det(q) > 0)
    for o1 in ops:  # closure: the product of two ops is an op
        for o2 in ops:
            assert tuple((o1.matrix @ o2.matrix).ravel()) in mats


# ----------------------------------------------------------------- parse_substrate


@pytest.mark.parametrize("spec, a, b, gamma, kind", [
    ("Pt(111)", 3.924 / math.sqrt(2), 3.924 / math.sqrt(2), 120.0, "hexagonal"),
    ("Cu(100)", 3.615 / math.sqrt(2), 3.615 / math.sqrt(2), 90.0, "square"),
    ("Ni(110)", 3.524 / math.sqrt(2), 3.524, 90.0, "rectangular"),
    ("W(110)", 3.165 * math.sqrt(3) / 2, 3.165 * math.sqrt(3) / 2, 109.4712206, "centered-rectangular"),
    ("Ru(0001)", 2.706, 2.706, 120.0, "hexagonal"),
    ("fcc(111):3.924", 3.924 / math.sqrt(2), 3.924 / math.sqrt(2), 120.0, "hexagonal"),
    ("hexagonal:2.775", 2.775, 2.775, 120.0, "hexagonal"),
    ("square:2.55", 2.55, 2.55, 90.0, "square"),
    ("rectangular:2.556,3.615", 2.556, 3.615, 90.0, "rectangular"),
    ("oblique:3.1,4.3,104", 3.1, 4.3, 104.0, "oblique"),
    # rhombus (a/2, ±b/2) of the centred a × b cell: side √(a² + b²)/2, cos γ = (a² − b²)/(a² + b²)
    ("centered-rectangular:3.165,4.476", math.hypot(3.165, 4.476) / 2, math.hypot(3.165, 4.476) / 2,
     math.degrees(math.acos((3.165**2 - 4.476**2) / (3.165**2 + 4.476**2))), "centered-rectangular"),
])
def test_parse_substrate_good(spec, a, b, gamma, kind):
    net = parse_substrate(spec)
    assert (net.a, net.b) == pytest.approx((a, b), rel=1e-6)
    assert net.gamma_deg == pytest.approx(gamma, abs=1e-5)
    assert classify_net(net) == kind
    assert net.label == spec


@pytest.mark.parametrize("spec, match", [
    ("", "Empty substrate"),
    ("Xx(111)", "Unknown element 'Xx'"),
    ("Cu(123)", "Unknown face fcc\\(123\\)"),
    ("fcc(112):3.9", "Unknown face fcc\\(112\\)"),
    ("square:abc", "'abc' is not a number"),
    ("rectangular:2.5", "'rectangular' takes 2 number"),
    ("square:-1", "lengths must be positive"),
    ("oblique:3,4,190", "strictly between 0 and 180"),
    ("hcp(0001):nan", "not a finite number"),
    ("banana", "Cannot read substrate 'banana'"),
    ("fcc(111)", "'fcc\\(111\\)' needs a lattice constant"),
])
def test_parse_substrate_bad(spec, match):
    with pytest.raises(NetError, match=match):
        parse_substrate(spec)


def test_net2d_rejects_bad_vectors():
    with pytest.raises(NetError, match="two independent non-zero rows"):
        Net2D([[1.0, 0.0], [2.0, 0.0]])
    with pytest.raises(NetError, match="finite 2×2 array"):
        Net2D([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
