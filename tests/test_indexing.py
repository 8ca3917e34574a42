"""From a camera image to the superstructure, end to end, on our own synthetic images.

Truth comes from the renderer (analysis.simulate), which knows every beam's indices;
the structures and their Wood notation, domain counts and kinds are textbook cases
(E. A. Wood, J. Appl. Phys. 35, 1306 (1964); Van Hove, Weinberg & Chan, Low-Energy
Electron Diffraction (Springer 1986) — both from memory). The images vary net type,
energy, noise, camera distance (R/L), centre offset, gun direction, size and bit depth.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from analysis.errors import FitError
from analysis.nets import Net2D, parse_substrate, reciprocal
from analysis.optics import ScreenGeometry
from analysis.pipeline import analyze_image, try_model
from analysis.serialize import predicted_spots, result_to_dict
from analysis.simulate import GunShadow, forward_pattern, render_image
from analysis.superstructure import domains, parse_wood, same_lattice


def symmetric_intensities(pattern, populations=None, *, photons=30000.0, fractional=0.35):
    """Photons per beam depending only on |g| (so symmetry-equivalent beams agree, as at
    normal incidence), times the population of the domain that makes a fractional beam."""
    s = np.sin(np.radians(pattern.theta_deg))
    base = photons * (0.3 + 0.7 * np.exp(-(s / 0.5) ** 2)) * (0.75 + 0.25 * np.cos(9.0 * s) ** 2)
    out = np.where(pattern.integer, base, fractional * base)
    if populations is not None and pattern.n_domains:
        pop = np.asarray(populations, float)
        frac = ~pattern.integer
        w = (pattern.domains * pop[None, :]).sum(axis=1) / np.maximum(pattern.domains.sum(axis=1), 1)
        out = np.where(frac, out * w, out)
    return out


def render(sub, mats, *, energy, seed=0, shape=(1024, 1024), bit_depth=16, distortion=0.22, rotation=7.0,
           offset=(6.0, -9.0), gun_angle=235.0, photons=30000.0, populations=None, background=40.0):
    rows, cols = shape
    scale = 0.62 * min(shape)
    geom = ScreenGeometry(cols / 2 - 0.5 + offset[0], rows / 2 - 0.5 + offset[1], scale, distortion=distortion,
                          rotation_deg=rotation)
    pat = forward_pattern(sub, mats, energy_eV=energy, geometry=geom)
    rng = np.random.default_rng(seed)
    gun = dataclasses.replace(GunShadow.scaled(0.45 * min(shape)), arm_angle_deg=gun_angle)
    im = render_image(pat, shape=shape, rng=rng, gun=gun, bit_depth=bit_depth, background_photons=background,
                      intensities=symmetric_intensities(pat, populations, photons=photons))
    return im, pat


def all_domain_matrices(sub, text_or_matrix):
    m = parse_wood(text_or_matrix, sub) if isinstance(text_or_matrix, str) else np.asarray(text_or_matrix, float)
    return [d.matrix for d in domains(sub, m)]


def assert_domains_match(found, truth, *, tol=1e-6):
    assert len(found) == len(truth), f"found {len(found)} domains, truth {len(truth)}"
    for t in truth:
        assert any(same_lattice(np.asarray(f, float), t, tol=tol) for f in found), f"domain {t.tolist()} not found"


# (substrate, structure, domains rendered (None = all), energy eV, expected Wood, expected kind, extra render kw)
CASES = {
    "p2x2-hex": ("Pt(111)", "p(2x2)", None, 96.0, "p(2×2)", "commensurate", {}),
    "sqrt3-hex": ("Ru(0001)", "(√3×√3)R30°", None, 112.0, "(√3×√3)R30°", "commensurate",
                  {"bit_depth": 8, "photons": 9000.0, "background": 12.0}),
    "c2x2-square": ("Cu(100)", "c(2x2)", None, 130.0, "c(2×2)", "commensurate", {"gun_angle": 300.0}),
    "c2x2-square-small-8bit": ("Cu(100)", "c(2x2)", None, 150.0, "c(2×2)", "commensurate",
                               {"shape": (512, 512), "bit_depth": 8, "photons": 12000.0, "background": 15.0}),
    "p2x1-square-two-domains": ("Cu(100)", "p(2x1)", None, 140.0, "p(2×1)", "commensurate",
                                {"distortion": 0.35, "seed": 3}),
    "2x1-hex-three-domains": ("Pt(111)", "p(2x1)", None, 100.0, "p(2×1)", "commensurate",
                              {"populations": (1.0, 0.55, 0.3)}),
    "sqrt7-hex-mirror-pair": ("Pt(111)", "(√7×√7)R19.1°", None, 140.0, "(√7×√7)R19.1°", "commensurate",
                              {"shape": (768, 768), "offset": (-12.0, 4.0)}),
    # the largest rotated cell the issue names: two mirror domains, 166 fractional beams at 60 eV
    "sqrt19-hex-mirror-pair": ("Pt(111)", "(√19×√19)R23.4°", None, 60.0, "(√19×√19)R23.4°", "commensurate", {}),
    "2sqrt2-square": ("Cu(100)", "(2√2×√2)R45°", None, 120.0, "(2√2×√2)R45°", "commensurate", {}),
    "c4x2-hex": ("Pt(111)", "c(4x2)", None, 110.0, "c(4×2)", "commensurate", {"rotation": -21.0}),
    "7x7-hex": ("Si(111)", "(7x7)", None, 45.0, "p(7×7)", "commensurate", {"distortion": 0.1}),
    "rect-2x1": ("Cu(110)", "p(2x1)", None, 120.0, "p(2×1)", "commensurate", {}),
    "crect-p2x1": ("W(110)", "p(2x1)", None, 110.0, "p(2×1)", "commensurate", {"gun_angle": 90.0}),
    "oblique-substrate": ("oblique:3.1,4.3,104", [[2, 0], [0, 1]], None, 110.0, "p(2×1)", "commensurate", {}),
    "clean-1x1": ("Pt(111)", None, None, 150.0, "(1×1)", "none", {}),
    "oblique-overlayer-on-square": ("Cu(100)", [[2, 1], [0, 3]], None, 120.0, None, "commensurate",
                                    {"shape": (900, 900)}),
    "coincidence-hex": ("Pt(111)", [[1.5, 0], [0, 1.5]], None, 130.0, "(1.5×1.5)", "coincidence", {}),
}


@pytest.mark.parametrize("name", list(CASES))
def test_superstructure_found_from_the_image(name):
    spec, structure, ndom, energy, wood, kind, kw = CASES[name]
    sub = parse_substrate(spec)
    truth = all_domain_matrices(sub, structure) if structure is not None else []
    mats = truth if ndom is None else truth[:ndom]
    im, _ = render(sub, mats, energy=energy, **kw)
    res = analyze_image(im.image, energy_eV=energy, substrate=spec)
    best = res.index.best
    assert best.kind == kind
    assert best.wood == wood
    if kind == "coincidence":
        kd = best.details.kind
        assert kd.coincidence_cell is not None and abs(np.linalg.det(kd.coincidence_cell)) == pytest.approx(9)
    if structure is None:
        assert best.n_domains == 1 and same_lattice(best.matrix, np.eye(2))
    else:
        assert_domains_match(best.domains, mats)
    # the centre is found within a pixel of the truth
    assert np.hypot(*(np.array(res.index.substrate.geometry.center_px) - im.truth["center_px"])) < 1.0


def assert_same_fractional_spots(res, im, tol_px=2.0):
    """The model's predicted fractional beams sit where the renderer put them, and vice versa
    (compared in the image, so the choice of substrate basis does not matter)."""
    pred = predicted_spots(res.index.predicted)
    p = np.array([[q["x"], q["y"]] for dom in pred["domains"] for q in dom]).reshape(-1, 2)
    t = np.array([[s["x"], s["y"]] for s in im.truth["spots"] if not s["integer"] and not s["hidden"]])
    valid = res.measurement.valid
    inside = np.array([valid[int(round(y)), int(round(x))] if 0 <= x < valid.shape[1] and 0 <= y < valid.shape[0]
                       else False for x, y in p])
    for q in t:
        assert np.min(np.hypot(*(p - q).T)) < tol_px
    for q in p[inside]:
        assert np.min(np.hypot(*(t - q).T)) < tol_px


def _moire_image(energy, seed=2, orders=1):
    """An aligned hexagonal layer of 2.46 Å on a 2.715 Å hexagonal net (graphene/Ir(111)-like
    lattice constants, from memory) with multiple-scattering satellites h + n₁Δ₁ + n₂Δ₂ around the
    substrate beams (Δ_i = b*_i − a*_i, order max(|n₁|, |n₂|, |n₁ + n₂|) ≤ `orders`), weaker than
    the layer's own beams and fading with order."""
    import dataclasses as dc

    from analysis.optics import momentum_to_pixels

    sub = parse_substrate("hexagonal:2.715")
    m = (2.46 / 2.715) * np.eye(2)
    _, pat = render(sub, [m], energy=energy)
    b_star = np.linalg.inv(m).T  # overlayer reciprocal basis in substrate hk units
    delta = b_star - np.eye(2)  # the moiré vectors
    steps = [(i, j) for i in range(-orders, orders + 1) for j in range(-orders, orders + 1)
             if (i, j) != (0, 0) and max(abs(i), abs(j), abs(i + j)) <= orders]
    order = np.array([max(abs(i), abs(j), abs(i + j)) for i, j in steps], dtype=np.float64)
    # the layer's own first-order beams are h + Δ for h a first-order substrate beam: leave them out
    sat, sat_order = [], []
    for hk in pat.hk[pat.integer]:
        for (i, j), o in zip(steps, order):
            q = hk + np.array([i, j], float) @ delta
            if np.min(np.hypot(*(pat.hk - q).T)) > 1e-6:
                sat.append(q)
                sat_order.append(o)
    sat, sat_order = np.array(sat), np.array(sat_order)
    a_star = reciprocal(sub).vectors
    xy, vis = momentum_to_pixels(sat @ a_star, energy, pat.geometry)
    ok = vis & np.all(np.isfinite(xy), axis=1)
    sat, xy, sat_order = sat[ok], xy[ok], sat_order[ok]
    ext = dc.replace(pat, hk=np.vstack([pat.hk, sat]), g_par=np.vstack([pat.g_par, sat @ a_star]),
                     xy_px=np.vstack([pat.xy_px, xy]),
                     theta_deg=np.concatenate([pat.theta_deg, np.zeros(len(sat)) + 20.0]),
                     integer=np.concatenate([pat.integer, np.zeros(len(sat), bool)]),
                     domains=np.vstack([pat.domains, np.zeros((len(sat), 1), bool)]))
    inten = np.concatenate([symmetric_intensities(pat), 1200.0 / sat_order])  # satellites are weaker
    img = render_image(ext, shape=(1024, 1024), rng=np.random.default_rng(seed), intensities=inten)
    return img, sub


def _check_moire(res, sub):
    best = res.index.best
    assert best.kind == "incommensurate"
    assert best.n_domains == 1
    net = Net2D(np.asarray(best.matrix) @ sub.vectors)
    assert net.a == pytest.approx(2.46, rel=0.005)
    d = result_to_dict(res)
    # moiré period a1 a2 / |a1 − a2| ≈ 26.2 Å
    assert d["overlayer"]["moire_period_angstrom"] == pytest.approx(2.46 * 2.715 / (2.715 - 2.46), rel=0.05)
    assert any("satellite" in n for n in best.notes)


def test_moire_with_satellites_on_hexagonal():
    # at 150 eV two rings of substrate beams reach the screen and fix the camera distortion
    img, sub = _moire_image(150.0)
    _check_moire(analyze_image(img.image, energy_eV=150.0, substrate="hexagonal:2.715"), sub)


def test_moire_with_higher_order_satellites_is_one_domain():
    # satellites up to the third order fill the screen with a fine moiré net near every substrate
    # beam; a distorted cell in six rotated domains explained a few more of them than the aligned
    # layer with first-order satellites and was reported (0.907×0.830) with 6 domains
    img, sub = _moire_image(150.0, orders=3)
    _check_moire(analyze_image(img.image, energy_eV=150.0, substrate="hexagonal:2.715"), sub)


@pytest.mark.parametrize("energy", [60.0, 70.0, 120.0])
def test_moire_with_satellites_one_substrate_ring(energy):
    # one ring of substrate beams leaves the camera distortion loose; the layer's own beams (brighter
    # than its satellites) and the satellites must still give the aligned single layer
    img, sub = _moire_image(energy)
    _check_moire(analyze_image(img.image, energy_eV=energy, substrate="hexagonal:2.715"), sub)


def test_single_domain_on_a_stepped_surface_is_reported_as_such():
    # one (2×1) domain on a square net (the other suppressed, as on a vicinal surface)
    sub = parse_substrate("Cu(100)")
    truth = all_domain_matrices(sub, "p(2x1)")
    im, _ = render(sub, truth[:1], energy=130.0)
    res = analyze_image(im.image, energy_eV=130.0, substrate="Cu(100)")
    best = res.index.best
    assert best.n_domains == 1 and best.total_domains == 2
    assert best.wood in ("p(2×1)", "p(1×2)")
    assert_same_fractional_spots(res, im)


def test_incommensurate_hexagonal_overlayer_on_a_square_net():
    # a hexagonal layer of 3.05 Å rotated 10° on Cu(100): no integer or small-fraction matrix
    sub = parse_substrate("Cu(100)")
    over = Net2D.from_parameters(3.05, 3.05, 120.0)
    c, s = math.cos(math.radians(10.0)), math.sin(math.radians(10.0))
    over_rot = over.vectors @ np.array([[c, s], [-s, c]])
    m = over_rot @ np.linalg.inv(sub.vectors)
    truth = all_domain_matrices(sub, m)
    im, _ = render(sub, truth, energy=90.0)
    best = analyze_image(im.image, energy_eV=90.0, substrate="Cu(100)").index.best
    assert best.kind == "incommensurate"
    assert best.wood is None
    assert len(best.domains) == len(truth)
    found_net = Net2D(np.asarray(best.matrix) @ sub.vectors)
    assert found_net.area == pytest.approx(Net2D(over_rot).area, rel=0.01)


def test_reference_image_measures_lattice_constants():
    # Clean Cu(100) reference at 175 eV fixes the camera; the overlayer image at 120 eV then
    # measures the substrate net. Truth: the rendered net (a = 3.615/√2 Å, handbook value in nets.py).
    sub = parse_substrate("Cu(100)")
    ref, _ = render(sub, [], energy=175.0, seed=4)
    im, _ = render(sub, all_domain_matrices(sub, "c(2x2)"), energy=120.0, seed=5)
    res = analyze_image(im.image, energy_eV=120.0, substrate="Cu(100)", reference=ref.image,
                        reference_energy_eV=175.0)
    net = res.index.substrate.net
    assert res.index.substrate.scale_source == "calibration"
    assert net.a == pytest.approx(sub.a, rel=0.005)
    assert net.b == pytest.approx(sub.b, rel=0.005)
    assert net.gamma_deg == pytest.approx(90.0, abs=0.5)
    sig = res.index.substrate.sigma
    assert 0 < sig["a_A"] < 0.01


def test_json_contract_keys_and_conventions():
    sub = parse_substrate("Pt(111)")
    im, _ = render(sub, all_domain_matrices(sub, "p(2x2)"), energy=96.0)
    d = result_to_dict(analyze_image(im.image, energy_eV=96.0, substrate="Pt(111)"))
    assert set(d) >= {"center_px", "spots", "substrate", "overlayer", "candidates"}
    assert set(d["spots"][0]) >= {"x", "y", "h", "k", "intensity", "snr"}
    assert set(d["substrate"]) >= {"net", "a_star_px", "a_angstrom", "b_angstrom", "gamma_deg"}
    assert set(d["overlayer"]) >= {"kind", "matrix", "domains", "wood", "coverage"}
    assert d["overlayer"]["wood"] == "p(2×2)" and d["overlayer"]["coverage"] == pytest.approx(0.25)
    assert d["overlayer"]["domains"][0] == d["overlayer"]["matrix"]
    # the overlayer's own net (it comes with the model): p(2×2) on a hexagonal net is hexagonal, 2a
    assert d["overlayer"]["net"]["type"] == "hexagonal"
    assert d["overlayer"]["net"]["a_angstrom"] == pytest.approx(2 * sub.a)
    # a_star_px: the camera model's derivative at the centre applied to the reciprocal basis;
    # |a*| in px = scale · λ · |a*| (distant-camera limit of r = s sin θ)
    lam = 12.2643 / math.sqrt(96.0)  # Å, √(150.41/E) (CODATA via scipy, see test_optics)
    g = im.truth["geometry"]
    expect = g["scale_px"] * lam * reciprocal(sub).a
    assert np.linalg.norm(d["substrate"]["a_star_px"][0]) == pytest.approx(expect, rel=0.02)
    # spot indices: integer spots carry integers; every h, k is null or a number
    ints = [s for s in d["spots"] if s["kind"] == "integer"]
    assert ints and all(float(s["h"]).is_integer() and float(s["k"]).is_integer() for s in ints)
    # the centre is in pixel (x, y): compare with the renderer's truth
    assert np.allclose(d["center_px"], im.truth["center_px"], atol=1.0)


def test_spots_cut_by_the_gun_shadow_are_not_trusted():
    # truth: the renderer marks beams partly behind the gun shadow or the screen edge; exactly those
    # spots carry trusted = false in the JSON (their centres are biased and do not count in scores)
    sub = parse_substrate("Pt(111)")
    im, _ = render(sub, all_domain_matrices(sub, "p(2x2)"), energy=96.0)
    d = result_to_dict(analyze_image(im.image, energy_eV=96.0, substrate="Pt(111)"))
    xy = np.array([[t["x"], t["y"]] for t in im.truth["spots"]])
    cut = np.array([t["partly_hidden"] for t in im.truth["spots"]])
    pairs = [(s["trusted"], bool(cut[np.argmin(np.hypot(*(xy - [s["x"], s["y"]]).T))])) for s in d["spots"]]
    assert any(c for _, c in pairs) and all(t != c for t, c in pairs)


def test_untrusted_spots_still_count_when_no_fractional_spot_is_trusted():
    # if every fractional spot had a cut centre, leaving them all out would leave nothing to judge:
    # the search then counts them all (truth: the rendered p(2×2))
    from analysis.indexing import find_overlayers

    sub = parse_substrate("Pt(111)")
    im, _ = render(sub, all_domain_matrices(sub, "p(2x2)"), energy=96.0)
    res = analyze_image(im.image, energy_eV=96.0, substrate="Pt(111)")
    fit = res.index.substrate
    models = find_overlayers(fit.hk, fit.integer, fit, energy_eV=96.0, intensity=res.intensity,
                             valid_mask=res.measurement.valid, reliable=fit.integer.copy())
    assert models[0].wood == "p(2×2)" and models[0].unexplained == 0


def _tilted(spec, wood, energy, tilt_deg):
    """The pattern with the beam off the surface normal by `tilt_deg` (k_in∥ = sin(tilt) / λ)."""
    from analysis.optics import wavelength_A

    sub = parse_substrate(spec)
    mats = all_domain_matrices(sub, wood)
    k = math.sin(math.radians(tilt_deg)) / wavelength_A(energy)
    geom = ScreenGeometry(517.5, 502.5, 640.0, distortion=0.22, rotation_deg=7.0)
    pat = forward_pattern(sub, mats, energy_eV=energy, geometry=geom,
                          k_in_par=[k * math.cos(0.7), k * math.sin(0.7)])
    gun = dataclasses.replace(GunShadow.scaled(460.0), arm_angle_deg=235.0)
    return render_image(pat, shape=(1024, 1024), rng=np.random.default_rng(0), gun=gun,
                        intensities=symmetric_intensities(pat))


@pytest.mark.parametrize("spec, wood, energy", [("Pt(111)", "p(2x2)", 110.0), ("Cu(100)", "c(2x2)", 130.0)])
def test_a_beam_one_degree_off_normal_is_tolerated(spec, wood, energy):
    # normal incidence is assumed; a small misalignment must not change the answer
    im = _tilted(spec, wood, energy, 1.0)
    best = analyze_image(im.image, energy_eV=energy, substrate=spec).index.best
    assert (best.wood, best.n_domains) == (wood.replace("x", "×"), 1)


@pytest.mark.parametrize("spec, wood, energy", [("Cu(100)", "c(2x2)", 130.0), ("Pt(111)", "p(2x2)", 110.0)])
def test_a_beam_three_degrees_off_normal(spec, wood, energy):
    # the camera model carries the incidence (sin θ of the specular beam): the answer stays
    # right, the fitted incidence is the render's sin 3° = 0.0523, and the reported centre is
    # the specular (0,0) beam the renderer drew
    im = _tilted(spec, wood, energy, 3.0)
    res = analyze_image(im.image, energy_eV=energy, substrate=spec)
    best, geom = res.index.best, res.index.substrate.geometry
    assert (best.wood, best.n_domains) == (wood.replace("x", "×"), 1)
    assert math.hypot(geom.incidence_x, geom.incidence_y) == pytest.approx(math.sin(math.radians(3.0)), abs=0.008)
    spec_xy = next((b["x"], b["y"]) for b in im.truth["spots"] if (b["h"], b["k"]) == (0.0, 0.0))
    assert np.hypot(*(np.array(result_to_dict(res)["center_px"]) - spec_xy)) < 0.5


def test_typed_model_counts_explained_spots():
    sub = parse_substrate("Pt(111)")
    im, _ = render(sub, all_domain_matrices(sub, "(√3×√3)R30°"), energy=112.0)
    res = analyze_image(im.image, energy_eV=112.0, substrate="Pt(111)")
    good = try_model(res, "(sqrt3xsqrt3)R30")
    bad = try_model(res, "2 0 / 0 2")
    assert good.unexplained == 0 and good.explained > 10
    assert bad.unexplained == good.explained  # p(2×2) shares no fractional spot with √3
    assert bad.absent > 0


def test_image_without_spots_gives_a_clear_error():
    sub = parse_substrate("Pt(111)")
    im, _ = render(sub, [], energy=150.0, photons=0.0)
    with pytest.raises(FitError, match="spots found"):
        analyze_image(im.image, energy_eV=150.0, substrate="Pt(111)")


def test_dim_integer_beams_and_an_off_centre_gun():
    # Within an I(V) series integer beams are not always the brightest: here every beam's
    # intensity is a smooth function of |g| and energy alone (sums of Lorentzians), so only
    # the screen-size scale prior and the simplest superstructure single out the reading.
    # The gun disk sits 29 px off the pattern centre (the centre must come from ±g pairs).
    sub = parse_substrate("Cu(100)")
    geom = ScreenGeometry(514.8, 507.4, 614.4, distortion=0.12, rotation_deg=5.0)
    gun = GunShadow(offset_x_px=25.0, offset_y_px=-15.0, radius_px=30.0, arm_angle_deg=250.0, arm_width_px=22.0)
    energy = 200.0
    pat = forward_pattern(sub, [[[2, 0], [0, 2]]], energy_eV=energy, geometry=geom)
    g_abs = np.hypot(pat.g_par[:, 0], pat.g_par[:, 1])

    def curve(g):
        peaks = np.random.default_rng(int(round(g * 1e5))).uniform(40, 420, 10)
        return 0.05 + float(np.sum(36.0 / ((energy - peaks) ** 2 + 36.0)))

    inten = 1e5 * np.array([curve(g) for g in g_abs])
    im = render_image(pat, shape=(1024, 1024), rng=np.random.default_rng(0), intensities=inten, gun=gun,
                      spot_sigma_px=2.5)
    res = analyze_image(im.image, energy_eV=energy, substrate="Cu(100)")
    assert res.index.best.wood == "p(2×2)"
    assert np.hypot(*(np.array(res.index.substrate.geometry.center_px) - geom.center_px)) < 0.5


def test_joint_camera_and_overlayer_fit_recovers_distortion_from_satellites():
    # truth: our own camera model; one ring of substrate beams cannot fix R/L, but the layer's beams
    # and the satellites g_sub ± (b* − a*) sit at other radii and do, once b* is fitted with the camera
    from analysis.indexing.camera_refit import _OverlayerTerms, _refine
    from analysis.optics import ScreenGeometry, momentum_to_pixels

    sub = parse_substrate("hexagonal:2.715")
    a_star = reciprocal(sub).vectors
    truth = ScreenGeometry(512.0, 500.0, 640.0, distortion=0.22, rotation_deg=7.0)
    b0 = (2.715 / 2.46) * np.eye(2)  # overlayer reciprocal basis in substrate units
    h_sub = np.array([(1, 0), (0, 1), (-1, 1), (-1, 0), (0, -1), (1, -1)], float)
    steps = np.array([(1, 0), (0, 1), (1, 1), (-1, 0), (0, -1), (-1, -1)], float)
    h = [*h_sub, *np.zeros((6, 2))]
    u = [*np.zeros((6, 2)), *h_sub]  # substrate beams, then the layer's own first-order beams
    for hs in h_sub:  # satellites: substrate beam + (u B0) − (the matching substrate step)
        for step in steps:
            h.append(hs - step)
            u.append(step)
    terms_true = _OverlayerTerms(np.array(h), np.array(u), np.tile(np.eye(2), (len(h), 1, 1)), b0)
    xy, vis = momentum_to_pixels(terms_true.hk(b0) @ a_star, 100.0, truth)
    keep = vis & np.all(np.isfinite(xy), axis=1)
    start = dataclasses.replace(truth, distortion=0.35, scale_px=655.0)
    terms = _OverlayerTerms(terms_true.h[keep], terms_true.u[keep], terms_true.t[keep], b0 * 1.006)
    geom, _, res, _ = _refine(xy[keep], None, 100.0, start, a_star,
                              ("center_x_px", "center_y_px", "scale_px", "rotation_deg", "distortion"), False,
                              overlayer=terms)
    assert geom.distortion == pytest.approx(0.22, abs=1e-4)
    assert geom.scale_px == pytest.approx(640.0, rel=1e-5)
    assert np.abs(res).max() < 1e-4


@settings(max_examples=300, deadline=None)
@given(st.lists(st.floats(-20, 20, allow_nan=False), min_size=4, max_size=4), st.integers(1, 12),
       st.floats(1e-5, 0.2))
@example([0.0, 0.0, 1.5, 0.05], 10, 0.125)  # found by hypothesis: a tie below float resolution
def test_matrix_snapping_is_the_closest_fraction(entries, max_den, tol):
    # reference: the standard library's Fraction.limit_denominator (closest fraction, bounded denominator)
    from fractions import Fraction

    from analysis.indexing.candidates import _snap_matrix

    m = np.array(entries).reshape(2, 2)
    got = _snap_matrix(m, tol, max_den)
    if np.all(np.abs(m - np.rint(m)) <= tol):
        assert np.array_equal(got, np.rint(m))
        return
    ref = [float(Fraction(x).limit_denominator(max_den)) for x in m.ravel()]
    if any(abs(r - x) > tol for r, x in zip(ref, m.ravel())):
        assert got is None
    else:
        # as close as the reference's fraction (a tie within float resolution may go either way:
        # 0.05 is 1/20 + 3e-18 in binary, so 1/10 is closer than 0 only below float precision)
        assert got is not None
        assert all(abs(g - x) <= abs(r - x) + 1e-12 for g, r, x in zip(got.ravel(), ref, m.ravel()))


def test_score_terms_add_up_to_every_score():
    # three unequally populated (2×1) domains bring the population gain, and irrational rivals
    # with satellites the handicap: every term of the table is exercised
    spec, structure, _, energy, _, _, kw = CASES["2x1-hex-three-domains"]
    sub = parse_substrate(spec)
    im, _ = render(sub, all_domain_matrices(sub, structure), energy=energy, **kw)
    res = analyze_image(im.image, energy_eV=energy, substrate=spec)
    models = res.index.models
    assert models[0].score_terms["populations"] > 0
    assert any(m.score_terms["irrational"] > 0 and m.score_terms["satellites"] > 0 for m in models)
    for m in models:
        assert m.score_terms.total == m.score
    for f in res.index.substrate_candidates:
        assert f.score_terms.total == f.score
    typed = try_model(res, "2 0 / 0 2")
    assert typed.score_terms.total == typed.score
    assert typed.score_terms["irrational"] == typed.score_terms["populations"] == 0.0


def test_score_formulas_in_the_docs_are_the_code():
    from pathlib import Path

    from analysis.indexing import score

    developers = (Path(__file__).resolve().parents[1] / "DEVELOPERS.md").read_text(encoding="utf-8")
    for table in (score.OVERLAYER_TERMS, score.SUBSTRATE_TERMS):
        assert score.formula(table) in score.__doc__
        assert score.formula(table) in developers


def test_serialize_formats_and_computes_nothing():
    # every number of the JSON comes with the result objects: at run time serialize imports
    # only the exception, the JSON cleaner and the text formatters
    import ast
    from pathlib import Path

    import analysis.serialize as ser

    tree = ast.parse(Path(ser.__file__).read_text(encoding="utf-8"))
    imported = {(node.module, a.name) for node in tree.body if isinstance(node, ast.ImportFrom)
                for a in node.names}
    assert imported == {("__future__", "annotations"), ("typing", "TYPE_CHECKING"), ("errors", "ParameterError"),
                        ("jsonsafe", "json_safe"), ("superstructure", "beam_label"),
                        ("superstructure", "format_matrix")}


def test_population_test_puts_measured_indices_on_the_model_grid():
    # Three (2×1) domains on a hexagonal net with populations 1 : 0.8 : 0.6 (a render's truth:
    # intensity ∝ population × a per-class structure factor). Measured indices carry ±0.01 of
    # noise; rounded to 3 decimals each spot was its own symmetry class and the test said nothing.
    from analysis.indexing.overlayers import _population_test
    from analysis.nets import point_group

    sub = parse_substrate("hexagonal:2.7")
    ops = point_group(sub)
    mats = all_domain_matrices(sub, "p(2x1)")
    rng = np.random.default_rng(1)
    hk, by, inten = [], [], []
    for d, (m, pop) in enumerate(zip(mats, (1.0, 0.8, 0.6))):
        b = np.linalg.inv(np.asarray(m, float)).T  # rows: the domain's reciprocal basis (hk units)
        for u in [(1, 0), (-1, 0), (1, 1), (-1, -1), (1, -1), (-1, 1), (3, 0), (-3, 0)]:
            g = np.array(u, float) @ b
            if np.allclose(g, np.rint(g)):
                continue
            cls = round(float(np.hypot(*(g @ reciprocal(sub).vectors))), 3)
            hk.append(g + rng.normal(0.0, 0.01, 2))
            by.append(d)
            inten.append(pop * (1000.0 if cls < 0.3 else 400.0) * rng.normal(1.0, 0.02))
    hk, by, inten = np.array(hk), np.array(by), np.array(inten)
    assert _population_test(hk, by, inten, ops) is None  # without the grid: no classes shared
    assert _population_test(hk, by, inten, ops, denominator=2) > 3.0


@pytest.mark.parametrize("seed", [1, 2, 4])
def test_a_clean_surface_with_hot_pixels_dust_and_stray_spots_reads_clean(seed):
    # A clean Fe(100) (1×1) photographed with hot pixels and dust (the realism layer) and three
    # faint stray blobs at random places. An irrational net fits any two stray spots exactly
    # (four free parameters) and was reported as an incommensurate overlayer; the answer must
    # be "none" with the strays listed as unexplained. Truth: the render has no overlayer.
    from analysis.simulate.photograph import photograph

    sub = parse_substrate("Fe(100)")
    rng = np.random.default_rng(seed)
    energy = float(rng.uniform(110.0, 170.0))
    geom = ScreenGeometry(512.0 + rng.uniform(-20, 20), 500.0 + rng.uniform(-20, 20), 640.0, distortion=0.2,
                          rotation_deg=rng.uniform(0.0, 90.0))
    ph = photograph(forward_pattern(sub, [], energy_eV=energy, geometry=geom), rng=rng,
                    effects=("hot_pixels", "dust"))
    img = ph.image.astype(np.float64)
    yy, xx = np.indices(img.shape)
    for x, y in rng.uniform(250.0, 780.0, (3, 2)):
        img += 0.15 * img.max() * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * 2.0**2))
    res = analyze_image(img, energy_eV=energy, substrate="Fe(100)")
    best = res.index.best
    assert (best.kind, best.wood) == ("none", "(1×1)")
    d = result_to_dict(res)
    assert d["overlayer"]["kind"] == "none"
    assert sum(s["kind"] == "unexplained" for s in d["spots"]) >= 1


@pytest.mark.parametrize("fa, fb", [(1.038, 1.015), (1.015, 1.038), (0.97, 1.0)])
def test_named_constants_a_few_per_cent_off_still_read_c2x2(fa, fb):
    # a strained film or an alloy: the substrate named with a and b a few per cent off their true
    # values (and not by the same factor, so the camera scale cannot take it up). Cu(110) c(2×2)
    # was read as another cell on a mis-shaped net; the truth is the render's c(2×2).
    sub = parse_substrate("Cu(110)")
    im, _ = render(sub, all_domain_matrices(sub, "c(2x2)"), energy=130.0)
    spec = f"rectangular:{sub.a * fa:.4f},{sub.b * fb:.4f}"
    best = analyze_image(im.image, energy_eV=130.0, substrate=spec).index.best
    assert (best.wood, best.kind, best.n_domains) == ("c(2×2)", "commensurate", 1)
