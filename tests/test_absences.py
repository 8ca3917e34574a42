"""Plane groups from systematic absences (analysis/indexing/absences.py) and the renderer's
glide extinctions (analysis/simulate/extinction.py).

Sources of the extinction rules: International Tables for Crystallography Vol. A, the
plane groups' reflection conditions (from memory): pg (No. 4, glide line ∥ b) 0k: k = 2n;
p2mg (No. 7) h0: h = 2n; p2gg (No. 8) h0: h = 2n and 0k: k = 2n; p4gm (No. 12) 0k: k = 2n
(h0 by the 4-fold). They are also checked here against a structure factor summed over the
general positions of p2gg, which needs no table.

The rendered patterns are ours: the expected values are the truth given to the renderer
(matrices, which domains, which beams the glides remove). Through the whole pipeline the
camera model is given (as a calibration), so only the overlayer reading is under test.
"""

from __future__ import annotations

import numpy as np
import pytest

from analysis.errors import ParameterError
from analysis.indexing.absences import extinct_mask
from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.pipeline import analyze_image
from analysis.serialize import result_to_dict
from analysis.simulate import forward_pattern
from analysis.simulate.extinction import glide_factors, glide_intensities
from analysis.simulate.photograph import photograph
from analysis.superstructure import same_lattice

GEOM = ScreenGeometry(517.5, 502.5, 640.0, distortion=0.22, rotation_deg=7.0)


def _p2gg_structure_factor(h, k, atoms):
    """F(hk) of one atom type on the four general positions of p2gg, (x, y), (−x, −y),
    (½ − x, ½ + y), (½ + x, ½ − y) (fractional cell coordinates)."""
    f = 0j
    for x, y in atoms:
        for px, py in ((x, y), (-x, -y), (0.5 - x, 0.5 + y), (0.5 + x, 0.5 - y)):
            f += np.exp(2j * np.pi * (h * px + k * py))
    return f


def test_extinction_rule_agrees_with_the_p2gg_structure_factor():
    # a p2gg (2×2) cell on a square substrate; its beams n = (n1, n2) are at hk = n / 2
    m = np.array([[2, 0], [0, 2]])
    atoms = [(0.13, 0.31), (0.37, 0.08)]  # any general positions
    n = np.array([(a, b) for a in range(-5, 6) for b in range(-5, 6)])
    hk = n / 2.0
    zero = np.array([abs(_p2gg_structure_factor(a, b, atoms)) < 1e-9 for a, b in n])
    predicted = extinct_mask(hk, m, 0) | extinct_mask(hk, m, 1)
    # every beam the rule removes has F = 0; the others are zero only by accident (none here)
    assert np.array_equal(zero, predicted)
    # the table's wording: h0 with h odd and 0k with k odd
    assert set(map(tuple, n[predicted])) == {(a, 0) for a in (-5, -3, -1, 1, 3, 5)} | \
        {(0, b) for b in (-5, -3, -1, 1, 3, 5)}


def test_renderer_removes_the_glide_beams_and_keeps_beams_other_domains_fill():
    sub = parse_substrate("Cu(100)")
    mats = [np.array([[4, 0], [0, 2]]), np.array([[0, 4], [-2, 0]])]
    pat = forward_pattern(sub, mats, energy_eV=120.0, geometry=GEOM)
    f = glide_factors(pat, [[0, 1], [0, 1]], residual=0.0)
    at = {tuple(np.round(h, 6)): v for h, v in zip(pat.hk, f)}
    # (1/4, 0): an odd beam of the first domain only -> gone
    assert at[(0.25, 0.0)] == 0.0
    # (0, 1/2): odd in the first domain, an even beam of the second -> half its photons
    assert at[(0.0, 0.5)] == 0.5
    assert at[(0.5, 0.5)] == 1.0 and at[(1.0, 0.0)] == 1.0
    with pytest.raises(ParameterError, match="one entry per domain"):
        glide_factors(pat, [[0]])
    with pytest.raises(ParameterError, match="in \\[0, 1\\]"):
        glide_factors(pat, [[0], [0]], residual=2.0)


def _analyse(spec, mats, axes, energy, *, tilt_deg=None, residual=0.0, seed=0):
    sub = parse_substrate(spec)
    pat = forward_pattern(sub, mats, energy_eV=energy, geometry=GEOM)
    effects, options = [], {}
    if tilt_deg is not None:
        effects, options = ["off_normal"], {"off_normal": {"tilt_deg": tilt_deg, "azimuth_deg": 40.0}}
    ph = photograph(pat, rng=np.random.default_rng(seed), effects=effects, options=options,
                    intensities=glide_intensities(axes, rng=np.random.default_rng(seed + 100), residual=residual))
    calib = None if tilt_deg is not None else GEOM  # off normal the camera model must find the incidence
    return analyze_image(ph.analysis_input, energy_eV=energy, substrate=spec, calibration=calib)


def _absent_without_glides(res, monkeypatch, matrix=None) -> int:
    """The A term of `matrix` (default: the best model's) with every glide exemption switched off."""
    import analysis.indexing.overlayers as ov

    monkeypatch.setattr(ov, "glide_excused", lambda ctx, mats, hk: np.zeros(len(hk), bool))
    f = res.index.substrate
    m = res.index.best.matrix if matrix is None else matrix
    raw = ov.evaluate_model(f.hk, f.integer, f, m, energy_eV=res.energy_eV, intensity=res.intensity,
                            valid_mask=res.measurement.valid, reliable=res.trusted)
    monkeypatch.undo()
    return raw.absent


def _check_excused(res, monkeypatch):
    """A counts the missing beams except the odd beams of the glide lines found (each once)."""
    pg = res.index.plane_group
    odd = {tuple(b) for g in pg.glide_lines for b in np.round(g.missing, 6).tolist()}
    assert len(odd) >= 2
    assert res.index.best.absent == _absent_without_glides(res, monkeypatch) - len(odd)


def _check_model(best, mats, wood, kind):
    assert (best.wood, best.kind, best.n_domains) == (wood, kind, len(mats))
    for m in mats:
        assert any(same_lattice(np.asarray(d, float), m) for d in best.domains)


@pytest.mark.slow
def test_p2gg_2x2_glide_absences_do_not_count_against_the_cell(monkeypatch):
    res = _analyse("Cu(100)", [np.array([[2, 0], [0, 2]])], [[0, 1]], 120.0)
    best, pg = res.index.best, res.index.plane_group
    _check_model(best, [np.eye(2) * 2], "p(2×2)", "commensurate")
    # the (h/2, 0), (0, k/2) beams with h, k odd are missing and are not held against p(2×2)
    assert best.absent == 0 and best.score_terms["absent"] == 0
    _check_excused(res, monkeypatch)
    assert pg.groups == ("p2gg", "p4gm")
    missing = {tuple(b) for g in pg.glide_lines for b in np.round(g.missing, 6).tolist()}
    assert {(0.5, 0.0), (-0.5, 0.0), (0.0, 0.5), (0.0, -0.5)} <= missing
    out = result_to_dict(res)["overlayer"]
    assert out["plane_group"]["symbol"] == "p2gg or p4gm" and len(out["plane_group"]["glide_lines"]) == 2
    assert [p["wood"] for p in out["phases"]] == ["p(2×2)"]


@pytest.mark.slow
def test_one_glide_line_on_a_rectangular_substrate(monkeypatch):
    # (2×2) on Ni(110) with a glide along b1 = 2a1 only: (h/2, 0) odd missing, (0, k/2) seen
    res = _analyse("Ni(110)", [np.array([[2, 0], [0, 2]])], [[0]], 110.0)
    best, pg = res.index.best, res.index.plane_group
    _check_model(best, [np.eye(2) * 2], "p(2×2)", "commensurate")
    _check_excused(res, monkeypatch)
    assert pg.groups == ("pg", "p2mg")
    assert [g.axis.tolist() for g in pg.glide_lines] == [[2, 0]]


@pytest.mark.slow
def test_domains_that_fill_each_others_glide_absences(monkeypatch):
    # p2gg (4×2) in two rotational domains on Cu(100): the odd beams along the short axis
    # of one domain, (0, ±1/2), are even beams of the other, so they are seen and are no
    # evidence; the long axis' odd beams, (±1/4, 0), (±3/4, 0)…, are missing
    mats = [np.array([[4, 0], [0, 2]]), np.array([[0, 4], [-2, 0]])]
    res = _analyse("Cu(100)", mats, [[0, 1], [0, 1]], 120.0)
    best, pg = res.index.best, res.index.plane_group
    _check_model(best, mats, "p(4×2)", "commensurate")
    _check_excused(res, monkeypatch)
    assert sorted(g.domain for g in pg.glide_lines) == [0, 1]
    assert all(abs(g.axis).max() == 4 for g in pg.glide_lines)  # along the long (4a) axis
    filled = {tuple(b) for a in pg.open_axes for b in np.round(a["filled_beams"], 6).tolist()}
    assert (0.0, 0.5) in filled or (0.0, -0.5) in filled
    # the short axis cannot be told: one glide seen, p2gg not excluded
    assert pg.groups == ("pg", "p2mg", "p2gg")


@pytest.mark.slow
@pytest.mark.parametrize("tilt_deg, residual", [(2.0, 0.03), (3.0, 0.06)])
def test_glide_absences_partly_lifted_off_normal(tilt_deg, residual):
    # off normal incidence the glide no longer cancels the odd beams exactly: rendered with
    # a few per cent of their photons left (our render's choice), they are weak, not gone
    res = _analyse("Cu(100)", [np.array([[2, 0], [0, 2]])], [[0, 1]], 120.0, tilt_deg=tilt_deg, residual=residual)
    best, pg = res.index.best, res.index.plane_group
    _check_model(best, [np.eye(2) * 2], "p(2×2)", "commensurate")
    assert best.absent == 0
    assert pg.groups == ("p2gg", "p4gm")
    for g in pg.glide_lines:
        assert len(g.missing) + len(g.weak) >= 2
        assert np.all(g.weak[:, 2] <= 0.25) if len(g.weak) else True


@pytest.mark.slow
def test_no_glide_is_read_where_the_odd_beams_are_bright():
    res = _analyse("Cu(100)", [np.array([[2, 0], [0, 2]])], [[]], 120.0)
    pg = res.index.plane_group
    assert pg.groups == () and pg.glide_lines == () and pg.tested_domains == (0,)


@pytest.mark.slow
def test_a_cell_too_large_reads_no_glide_from_the_beams_it_lacks(monkeypatch):
    # c(2×2) rendered without glides: p(2×2) lacks every (h/2, 0) and (0, k/2) beam, as a p2gg
    # (2×2) would, but also half of its other beams, so the absences are the lattice's, not a glide's
    from analysis.indexing.absences import read_plane_group
    from analysis.indexing.overlayers import _context, evaluate_model

    res = _analyse("Cu(100)", [np.array([[1, 1], [-1, 1]])], [[]], 120.0)
    _check_model(res.index.best, [np.array([[1, 1], [-1, 1]])], "c(2×2)", "commensurate")
    f = res.index.substrate
    ctx = _context(f.hk, f.integer, f, res.energy_eV, res.intensity, res.measurement.valid, 2.5,
                   reliable=res.trusted)
    pg = read_plane_group(ctx, [np.eye(2) * 2])
    assert pg.glide_lines == () and pg.tested_domains == ()
    big = evaluate_model(f.hk, f.integer, f, np.eye(2) * 2, energy_eV=res.energy_eV, intensity=res.intensity,
                         valid_mask=res.measurement.valid, reliable=res.trusted)
    assert big.absent >= 8 and big.absent == _absent_without_glides(res, monkeypatch, np.eye(2) * 2)
