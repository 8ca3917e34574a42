"""Superstructure matrices, Wood notation, domains, kind and coverage.

Sources of the reference values:
- Wood notation: E. A. Wood, J. Appl. Phys. 35, 1306 (1964) (from memory);
- matrix notation: R. L. Park & H. H. Madden, Surf. Sci. 11, 188 (1968) (from memory);
- the textbook structures as tabulated in M. A. Van Hove, W. H. Weinberg & C.-M. Chan,
  Low-Energy Electron Diffraction (Springer, 1986) and K. Hermann, Crystallography and
  Surface Structure (Wiley-VCH, 2017) (from memory); each matrix below was worked by hand
  on the stated basis and the exact angles are arctan values (e.g. √7: arctan(√3/5)).
- which (√N×√N) cells exist: ASE's ase.build.root_surface_analysis (reference library).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, example, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from analysis.errors import NetError
from analysis.nets import Net2D, classify_net
from analysis.superstructure import (
    as_matrix,
    classify_superstructure,
    coincidence_cell,
    coverage,
    domains,
    format_matrix,
    hermite_normal_form,
    overlayer_net,
    overlayer_reciprocal,
    parse_matrix,
    parse_wood,
    same_lattice,
    superstructure_matrix,
    wood_notation,
)

# a1 = a(1, 0), a2 = a(−1/2, √3/2): the 120° hexagonal basis ("hex120")
HEX = Net2D.from_parameters(2.775, 2.775, 120.0)  # Pt(111) 1×1, a = 3.924/√2 Å
SQUARE = Net2D.from_parameters(2.556, 2.556, 90.0)  # Cu(100) 1×1, a = 3.615/√2 Å
RECT = Net2D.from_parameters(2.556, 2.556 * math.sqrt(2.0), 90.0)  # a × √2 a
# bcc(110): centred a0 × a0√2, primitive rhombus a0√3/2 at 109.47° (W, a0 = 3.165 Å)
CRECT = Net2D.from_parameters(3.165 * math.sqrt(3) / 2, 3.165 * math.sqrt(3) / 2,
                              math.degrees(math.acos(-1 / 3)))

# (substrate, matrix, Wood text, domain count, coverage for one adsorbate per cell)
TEXTBOOK = [
    (SQUARE, [[2, 0], [0, 2]], "p(2×2)", 1, 0.25),
    (SQUARE, [[1, 1], [-1, 1]], "c(2×2)", 1, 0.5),
    (SQUARE, [[2, 1], [-1, 2]], "(√5×√5)R26.6°", 2, 0.2),
    (SQUARE, [[2, 2], [-1, 1]], "(2√2×√2)R45°", 2, 0.25),
    (SQUARE, [[2, 0], [0, 1]], "p(2×1)", 2, 0.5),
    (HEX, [[2, 1], [-1, 1]], "(√3×√3)R30°", 1, 1 / 3),
    (HEX, [[3, 1], [-1, 2]], "(√7×√7)R19.1°", 2, 1 / 7),
    (HEX, [[4, 1], [-1, 3]], "(√13×√13)R13.9°", 2, 1 / 13),
    (HEX, [[5, 2], [-2, 3]], "(√19×√19)R23.4°", 2, 1 / 19),
    (HEX, [[4, 2], [-2, 2]], "(2√3×2√3)R30°", 1, 1 / 12),
    (HEX, [[2, 0], [0, 2]], "p(2×2)", 1, 0.25),
    (HEX, [[2, 0], [0, 1]], "p(2×1)", 3, 0.5),
    (HEX, [[2, 1], [0, 2]], "c(4×2)", 3, 0.25),
    (HEX, [[7, 0], [0, 7]], "p(7×7)", 1, 1 / 49),
    (RECT, [[1, 1], [-1, 1]], "c(2×2)", 1, 0.5),
    (RECT, [[2, 0], [0, 1]], "p(2×1)", 1, 0.5),
    (CRECT, [[2, 0], [0, 1]], "p(2×1)", 2, 0.5),
]


@pytest.mark.parametrize("sub, m, text, n_dom, theta", TEXTBOOK)
def test_textbook_wood_notation_from_matrix(sub, m, text, n_dom, theta):
    assert wood_notation(sub, m).text == text


@pytest.mark.parametrize("sub, m, text, n_dom, theta", TEXTBOOK)
def test_textbook_matrix_from_wood_notation(sub, m, text, n_dom, theta):
    # the parsed matrix spans the same lattice as the hand-worked one
    assert same_lattice(parse_wood(text, sub), m)


@pytest.mark.parametrize("sub, m, text, n_dom, theta", TEXTBOOK)
def test_textbook_domain_counts(sub, m, text, n_dom, theta):
    # counts: |G| / |stabiliser|, with |p4mm| = 8, |p6mm| = 12, |p2mm| = |c2mm| = 4
    assert len(domains(sub, m)) == n_dom


@pytest.mark.parametrize("sub, m, text, n_dom, theta", TEXTBOOK)
def test_textbook_coverage(sub, m, text, n_dom, theta):
    assert coverage(m) == pytest.approx(theta, rel=1e-12)


def test_sqrt3_matrix_on_hex120_and_hex60_bases():
    # hex120 [[2,1],[-1,1]]; 60° basis [[1,1],[-1,2]]; basis change M120 = M60·[[1,0],[1,1]]
    hex60 = Net2D.from_parameters(2.775, 2.775, 60.0)
    assert_allclose(parse_wood("(√3×√3)R30°", HEX), [[2, 1], [-1, 1]], atol=1e-12)
    assert_allclose(parse_wood("(√3×√3)R30°", hex60), [[1, 1], [-1, 2]], atol=1e-12)
    # V60 = T V120 with T = [[1,0],[1,1]], so M120 = M60 T: the same lattice in another basis
    assert same_lattice(np.array([[1, 1], [-1, 2]]) @ np.array([[1, 0], [1, 1]]), [[2, 1], [-1, 1]])


def test_exact_rotation_angles():
    # arctan values worked by hand: √7 19.1066°, √13 13.8979°, √19 23.4132°, √5 26.5651°
    for sub, m, angle in [(HEX, [[3, 1], [-1, 2]], 19.1066), (HEX, [[4, 1], [-1, 3]], 13.8979),
                          (HEX, [[5, 2], [-2, 3]], 23.4132), (SQUARE, [[2, 1], [-1, 2]], 26.5651)]:
        assert abs(wood_notation(sub, m).angle_deg) == pytest.approx(angle, abs=1e-4)


def test_c2x2_on_square_names_the_primitive_form_too():
    w = wood_notation(SQUARE, [[1, 1], [-1, 1]])
    assert (w.text, w.primitive) == ("c(2×2)", "(√2×√2)R45°")


def test_c4x2_on_hexagonal_says_no_primitive_wood_form_exists():
    # the primitive c(4×2) cell on a hexagonal net is the 2 × √3 rectangle (90° on a 120° net)
    w = wood_notation(HEX, [[2, 1], [0, 2]])
    assert w.primitive is None and w.text == "c(4×2)"
    assert "No primitive Wood notation" in w.note and "rectangular" in w.note
    assert classify_net(overlayer_net(HEX, [[2, 1], [0, 2]])) == "rectangular"


def test_no_wood_notation_for_an_oblique_cell_on_a_square_net():
    w = wood_notation(SQUARE, [[2, 1], [0, 3]])
    assert w.text is None and "(2 1 / 0 3)" in w.note


def test_c4x2_on_square():
    # c(4×2) on a square net: centred 4a × 2a cell, primitive (2a1 + a2, 2a2) worked by hand
    assert wood_notation(SQUARE, [[2, 1], [0, 2]]).text == "c(4×2)"
    assert len(domains(SQUARE, [[2, 1], [0, 2]])) == 2


@pytest.mark.parametrize("sub, text", [
    (HEX, "(sqrt3xsqrt3)R30"), (HEX, "(√3×√3)R30°"), (HEX, "(r3xr3)R30"), (HEX, "(sqrt(3) x sqrt(3)) R30 deg"),
])
def test_parse_wood_accepts_ascii_and_unicode(sub, text):
    assert_allclose(parse_wood(text, sub), [[2, 1], [-1, 1]], atol=1e-12)


def test_parse_wood_p_and_c_prefixes():
    assert_allclose(parse_wood("p(2x1)", SQUARE), [[2, 0], [0, 1]])
    assert same_lattice(parse_wood("c(4x2)", HEX), [[2, 1], [0, 2]])


@pytest.mark.parametrize("bad", ["", "2x2", "(2y2)", "c(0x2)", "(√x3)R30"])
def test_parse_wood_rejects_bad_text(bad):
    with pytest.raises(NetError, match="Wood notation"):
        parse_wood(bad, SQUARE)


def test_root_cells_agree_with_ase():
    # reference library: ase.build.root_surface_analysis lists the N for which a
    # (√N×√N)Rφ cell of the same shape exists on fcc(111) (hexagonal) and fcc(100) (square)
    ase_build = pytest.importorskip("ase.build")
    expect_hex = {int(x) for x in ase_build.root_surface_analysis(ase_build.fcc111("Pt", (1, 1, 3)), 31)}
    expect_sq = {int(x) for x in ase_build.root_surface_analysis(ase_build.fcc100("Cu", (1, 1, 3)), 20)}

    def root_cells(sub, nmax):
        found = set()
        for n in range(1, nmax + 1):
            for a in (d for d in range(1, n + 1) if n % d == 0):  # every index-n sublattice as an HNF
                d = n // a
                for b in range(d):
                    w = wood_notation(sub, [[a, b], [0, d]])
                    if w.basis is None:
                        continue
                    over = overlayer_net(sub, w.basis)  # the primitive Wood cell
                    if math.isclose(over.a, over.b) and math.isclose(over.a ** 2, n * sub.a ** 2):
                        found.add(n)
        return found

    assert root_cells(HEX, 31) == expect_hex
    assert root_cells(SQUARE, 20) == expect_sq


def test_reciprocal_overlayer_relation():
    # (b1*, b2*) = (M⁻¹)ᵀ (a1*, a2*): b_i · b*_j = δ_ij
    m = np.array([[3.0, 1.0], [-1.0, 2.0]])
    b = overlayer_net(HEX, m).vectors
    bs = overlayer_reciprocal(HEX, m).vectors
    assert_allclose(b @ bs.T, np.eye(2), atol=1e-12)
    assert_allclose(superstructure_matrix(HEX, overlayer_net(HEX, m)), m, atol=1e-12)


def test_kind_commensurate_coincidence_incommensurate_none():
    assert classify_superstructure(HEX, [[1, 0], [0, 1]]).kind == "none"
    assert classify_superstructure(HEX, [[-1, 1], [-1, 0]]).kind == "none"  # another basis of 1×1
    assert classify_superstructure(HEX, [[2, 1], [-1, 1]]).kind == "commensurate"
    k = classify_superstructure(HEX, [[1.5, 0], [0, 1.5]])
    assert k.kind == "coincidence"
    assert_allclose(k.coincidence_cell, [[3, 0], [0, 3]])  # 4 overlayer cells on 9 substrate cells
    inc = classify_superstructure(HEX, [[1.0 + 1 / 12.3, 0], [0, 1.0 + 1 / 12.3]])
    assert inc.kind == "incommensurate"
    # a 13-on-12 style approximant: 12/11 ≈ 1.0909 is among the nearest small cells
    best = inc.approximants[0]
    assert best.strain < 2e-3
    assert all(a.strain >= best.strain for a in inc.approximants)


def test_point_on_line_flag():
    # one integer column: overlayer rows lie on substrate lines (Hooks, Fritz & Ward 2001, from memory)
    k = classify_superstructure(SQUARE, [[1.0, 0.4], [0.0, 1.7]], max_denominator=3)
    assert k.kind == "incommensurate" and k.point_on_line


def test_coincidence_cell_contains_both_lattices():
    m = np.array([[4 / 3, 1 / 3], [-1 / 3, 5 / 3]])
    c = coincidence_cell(m)
    n = c @ np.linalg.inv(m)  # the cell in overlayer units must be integer too
    assert_allclose(c, np.rint(c), atol=1e-12)
    assert_allclose(n, np.rint(n), atol=1e-9)


def test_hnf_is_canonical():
    assert_allclose(hermite_normal_form([[2, 1], [-1, 1]]), [[1, 2], [0, 3]])
    assert np.array_equal(hermite_normal_form([[2, 0], [0, 1]]), hermite_normal_form([[2, 0], [4, 1]]))


def test_domain_operations_are_named():
    d = domains(HEX, [[3, 1], [-1, 2]])
    assert d[0].op_name == "identity"
    assert d[1].op.kind == "mirror"
    assert wood_notation(HEX, d[1].matrix).text == "(√7×√7)R19.1°"
    assert wood_notation(HEX, d[1].matrix).angle_deg == pytest.approx(-19.1066, abs=1e-4)


def test_bad_matrices():
    with pytest.raises(NetError, match="singular"):
        as_matrix([[1, 2], [2, 4]])
    with pytest.raises(NetError, match="2×2"):
        as_matrix([1, 2, 3])
    with pytest.raises(NetError, match="four numbers"):
        parse_matrix("1 2 3")
    # finite entries whose cell area overflows a float (a model typed in the web app)
    with pytest.raises(NetError, match="too large: its cell area"):
        parse_matrix("1e308 0 / 0 1e308")
    assert_allclose(parse_matrix("2 1 / -1 1"), [[2, 1], [-1, 1]])
    assert_allclose(parse_matrix("[[3/2, 0], [0, 3/2]]"), [[1.5, 0], [0, 1.5]])
    assert format_matrix([[2, 1], [-1, 1]]) == "(2 1 / -1 1)"


# --------------------------------------------------------------------------- properties

_unimodular = st.sampled_from([np.array(u) for u in (
    [[1, 0], [0, 1]], [[1, 1], [0, 1]], [[1, 0], [-2, 1]], [[0, 1], [-1, 0]], [[2, 1], [1, 1]],
    [[1, -1], [1, 0]], [[-1, 0], [0, -1]], [[3, 2], [1, 1]])])
_small_int = st.integers(min_value=-4, max_value=4)


@st.composite
def _int_matrix(draw):
    m = np.array([[draw(_small_int) for _ in range(2)] for _ in range(2)], dtype=float)
    assume(abs(np.linalg.det(m)) > 0.5)
    return m


@settings(max_examples=60, deadline=None)
@given(m=_int_matrix(), u=_unimodular, sub=st.sampled_from([HEX, SQUARE, RECT, CRECT]))
def test_equivalent_matrices_give_the_same_answers(m, u, sub):
    um = u @ m  # another basis of the same overlayer lattice
    assert np.array_equal(hermite_normal_form(um), hermite_normal_form(m))
    assert same_lattice(um, m)
    assert wood_notation(sub, um).text == wood_notation(sub, m).text
    assert len(domains(sub, um)) == len(domains(sub, m))
    assert coverage(um) == pytest.approx(coverage(m))
    assert classify_superstructure(sub, um).kind == classify_superstructure(sub, m).kind


@settings(max_examples=60, deadline=None)
@given(m=_int_matrix(), sub=st.sampled_from([HEX, SQUARE, RECT, CRECT]))
# found by hypothesis: (5×3)R70.5° on bcc(110), whose rounded angle read literally is no lattice
@example(m=np.array([[3.0, -3.0], [3.0, 2.0]]), sub=CRECT)
# (6×3)R70.5° on bcc(110) names two lattices that are not domains of one another (turned by
# ±70.5° from a1, which is no mirror line of that net): the reader must say so
@example(m=np.array([[3.0, 2.0], [-3.0, 4.0]]), sub=CRECT)
def test_wood_to_matrix_to_wood_round_trip(m, sub):
    import warnings

    from analysis.superstructure import AmbiguousWoodWarning

    w = wood_notation(sub, m)
    if w.text is None or "." in w.text.split("R")[0]:
        return  # no Wood form, or sides written as rounded decimals (approximate by nature)
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        back = parse_wood(w.text, sub)
    # the text keeps |φ|, so the parsed lattice is the input or its mirror domain, unless the
    # reader warned that the text fits two lattices
    ambiguous = any(issubclass(x.category, AmbiguousWoodWarning) for x in said)
    assert ambiguous or any(same_lattice(back, d.matrix, tol=1e-6) for d in domains(sub, m))
    assert wood_notation(sub, back).text == w.text


@settings(max_examples=40, deadline=None)
@given(m=_int_matrix(), sub=st.sampled_from([HEX, SQUARE, RECT, CRECT]))
def test_domains_are_closed_under_the_point_group(m, sub):
    from analysis.nets import point_group

    ds = domains(sub, m)
    for op in point_group(sub):
        for d in ds:
            assert any(same_lattice(d.matrix @ op.matrix, e.matrix) for e in ds)
    # orbit-stabiliser: the count divides the group order
    assert len(point_group(sub)) % len(ds) == 0


def test_wood_text_that_fits_two_lattices_says_so():
    import warnings

    from analysis.superstructure import AmbiguousWoodWarning

    # worked by hand: on the bcc(110) rhombus (γ = 109.47°), −a2 lies 70.53° clockwise of a1,
    # so (5×3)R70.5° is b1 = −5 a2, b2 = 3 a1 + 2 a2; read literally (70.5° counter-clockwise)
    # it would be no lattice at all
    assert np.array_equal(parse_wood("(5×3)R70.5°", CRECT), [[0, -5], [3, 2]])
    with pytest.warns(AmbiguousWoodWarning, match="fits two lattices"):
        parse_wood("(6×3)R70.5°", CRECT)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the usual cases are not ambiguous
        assert np.array_equal(parse_wood("(√3×√3)R30°", HEX), [[2, 1], [-1, 1]])
        assert np.array_equal(parse_wood("(√7×√7)R19.1°", HEX), [[3, 1], [-1, 2]])


def test_wood_names_stay_importable_from_superstructure():
    import subprocess
    import sys

    from analysis import superstructure, wood

    for name in wood.__all__:
        assert getattr(superstructure, name) is getattr(wood, name)
        assert name in superstructure.__all__ or name == "AmbiguousWoodWarning"
    with pytest.raises(AttributeError, match="no attribute 'not_a_name'"):
        superstructure.not_a_name  # noqa: B018
    # either module may be imported first (wood builds on superstructure, never the reverse at import)
    for first in ("analysis.wood", "analysis.superstructure"):
        code = f"import {first}; from analysis.superstructure import parse_wood; import analysis.wood"
        subprocess.run([sys.executable, "-c", code], check=True)
