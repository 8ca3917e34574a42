"""The phases and plane-group panels of the analyse page as plain functions: what they show for a
clean surface, for two phases, for a glide reading, and that odd or missing fields never break them.

Extinction rule shown (International Tables for Crystallography Vol. A, plane group pg with the
glide line along b, reflection conditions, from memory): 0k: k = 2n, so on a (2×1) cell with the
glide along 2a₁ the beams (±1/2, 0), (±3/2, 0) are missing.
"""

from __future__ import annotations

from dash_helpers import text_of

from webapp.pages.analyse.phases import phases_panel, plane_group_panel


def test_a_clean_surface_shows_neither_panel():
    assert phases_panel(None) is None and phases_panel({"phases": []}) is None
    assert plane_group_panel(None) is None and plane_group_panel({"plane_group": None}) is None


def test_two_phases_each_with_its_cell_share_and_coverage():
    ov = {"phases": [
        {"kind": "commensurate", "wood": "p(2×2)", "matrix": [[2, 0], [0, 2]], "domains": [[[2, 0], [0, 2]]],
         "coverage": 0.25, "intensity_share": 0.66, "explained": 28},
        {"kind": "commensurate", "wood": None, "matrix": [[2, 1], [-1, 1]], "domains": None,
         "coverage": None, "intensity_share": "not a number", "spots": [1, 2, 3]},
    ]}
    text = text_of(phases_panel(ov))
    assert "2 phases side by side" in text
    assert "p(2×2)" in text and "0.25 ML" in text and "66\u00a0%" in text and "28" in text
    # the second phase: no Wood notation, its matrix, its own spot count, unknown values as dashes
    assert "no Wood notation" in text and "(2 1 / -1 1)" in text and "–" in text


def test_a_glide_line_with_its_missing_weak_and_filled_beams():
    pg = {"symbol": "pg or p2mg", "groups": ["pg", "p2mg"], "cell": "rectangular", "note": "One glide line.",
          "glide_lines": [{"domain": 0, "axis": [2, 0], "missing_beams": [[0.5, 0.0], [-0.5, 0.0], [1.5, 0.0]],
                           "weak_beams": [{"h": -1.5, "k": 0.0, "relative_intensity": 0.12}],
                           "filled_by_other_domains": [[0.0, 0.5]]}],
          "open_axes": [{"domain": 1, "axis": [0, 1], "filled_beams": [[0.5, 0.0]]}], "tested_domains": [0]}
    text = text_of(plane_group_panel({"plane_group": pg}))
    assert "Allowed by the missing beams: pg, p2mg" in text
    assert "Domain 1: glide line along 2a₁" in text
    assert "(1/2, 0), (−1/2, 0), (3/2, 0)" in text and "(−3/2, 0) at 12\u00a0%" in text
    assert "also made by another domain, so no evidence: (0, 1/2)" in text
    assert "Domain 2, along a₂: cannot be told" in text


def test_odd_fields_do_not_break_the_plane_group_panel():
    text = text_of(plane_group_panel({"plane_group": {"glide_lines": ["junk", {"axis": None}], "open_axes": [3]}}))
    assert "Glide lines seen, no plane group singled out" in text
    text = text_of(plane_group_panel({"plane_group": {"glide_lines": [
        {"domain": None, "axis": ["x"], "missing_beams": [[None, 0.5], "ab"], "weak_beams": [{"h": 1}]}]}}))
    assert "Domain 1: glide line along ?" in text and "(?, 1/2)" in text
