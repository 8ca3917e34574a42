"""webapp.comparison: which quantities of two saved analyses differ."""

from __future__ import annotations

from webapp.comparison import compare_results


def _rows(a, b):
    return {r.label: r for r in compare_results(a, b)}


def _analysis(matrix, domains, *, a=2.775, sigma=None, wood="p(2×2)", kind="commensurate"):
    return {"parameters": {"substrate": "Pt(111)", "energy_eV": 96.0},
            "result": {"overlayer": {"kind": kind, "wood": wood, "matrix": matrix, "domains": domains},
                       "substrate": {"a_angstrom": a, "sigma": {"a_angstrom": sigma}}}}


def test_another_basis_of_the_same_lattice_is_the_same_structure():
    # (√3×√3)R30° on a hexagonal net: (2 1 / -1 1) and (1 -1 / 1 2) are two bases of one lattice
    # (their quotient is integer with determinant ±1), the rotated domain pair alike
    one = _analysis([[2, 1], [-1, 1]], [[[2, 1], [-1, 1]]], wood="(√3×√3)R30°")
    two = _analysis([[1, -1], [1, 2]], [[[1, -1], [1, 2]]], wood="(√3×√3)R30°")
    rows = _rows(one, two)
    assert not rows["Matrix"].differs and not rows["Domains"].differs
    assert not any(r.differs for r in rows.values())


def test_a_different_cell_or_domain_count_differs():
    p2x2 = _analysis([[2, 0], [0, 2]], [[[2, 0], [0, 2]]])
    c = _analysis([[2, 0], [0, 1]], [[[2, 0], [0, 1]], [[1, 0], [0, 2]]], wood="p(2×1)")
    rows = _rows(p2x2, c)
    assert rows["Matrix"].differs and rows["Domains"].differs and rows["Wood notation"].differs
    assert not rows["Kind"].differs and not rows["Substrate"].differs
    # the same cell, one domain against two rotated ones: the domains differ, the matrix not
    rows = _rows(_analysis([[2, 0], [0, 1]], [[[2, 0], [0, 1]]]), c)
    assert not rows["Matrix"].differs and rows["Domains"].differs


def test_lattice_constants_differ_beyond_their_uncertainty():
    m = [[2, 0], [0, 2]]
    # 2.775 ± 0.010 against 2.800 ± 0.010: 0.025 < 2·√2·0.010 = 0.028, the same; with ± 0.005 it differs
    assert not _rows(_analysis(m, [m], a=2.775, sigma=0.010), _analysis(m, [m], a=2.800, sigma=0.010))["Substrate a"].differs
    assert _rows(_analysis(m, [m], a=2.775, sigma=0.005), _analysis(m, [m], a=2.800, sigma=0.005))["Substrate a"].differs
    # without uncertainties: 0.5 % of the mean
    assert not _rows(_analysis(m, [m], a=2.775), _analysis(m, [m], a=2.785))["Substrate a"].differs
    assert _rows(_analysis(m, [m], a=2.775), _analysis(m, [m], a=2.80))["Substrate a"].differs


def test_missing_results_compare_without_error():
    rows = _rows({"parameters": {}, "result": None}, _analysis([[2, 0], [0, 2]], [[[2, 0], [0, 2]]]))
    assert rows["Matrix"].a == "—" and rows["Matrix"].differs
    assert not _rows({"parameters": {}, "result": None}, {"parameters": {}, "result": None})["Matrix"].differs


def test_the_phases_found_are_compared_by_their_cells():
    # Pt(111) basis a1 = a(1, 0), a2 = a(-1/2, √3/2), worked by hand: (√3×√3)R30° = (2 1 / -1 1);
    # (2 2 / 0 2) spans the same lattice as p(2×2) = (2 0 / 0 2)
    def res(*phases):
        return {"parameters": {}, "result": {"overlayer": {"phases": [
            {"wood": w, "matrix": m, "intensity_share": s} for w, m, s in phases]}}}

    p2x2, sqrt3 = ("p(2×2)", [[2, 0], [0, 2]], 0.66), ("(√3×√3)R30°", [[2, 1], [-1, 1]], 0.34)
    rows = {r.label: r for r in compare_results(res(p2x2, sqrt3), res(("p(2×2)", [[2, 2], [0, 2]], 0.7), sqrt3))}
    assert not rows["Phases"].differs and rows["Phases"].a == "p(2×2) (66 %); (√3×√3)R30° (34 %)"
    rows = {r.label: r for r in compare_results(res(p2x2, sqrt3), res(p2x2))}
    assert rows["Phases"].differs and rows["Phases"].b == "p(2×2) (66 %)"
