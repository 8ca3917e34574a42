"""Tests of analysis.simulate: the forward pattern and the synthetic camera images.

Symmetry of a pattern, derived once for every test below. A point-group operation
of the substrate is an integer matrix W in the substrate basis with W V = V Qᵀ
(V rows a1, a2; Q orthogonal, acting on column vectors). A reciprocal vector
hk A* (A* = V⁻ᵀ) is turned by Q into (hk A*) Qᵀ; from Qᵀ = V⁻¹ W V and
Qᵀ = Q⁻¹ = (V⁻¹ W⁻¹ V)ᵀ = Vᵀ W⁻ᵀ V⁻ᵀ we get V⁻ᵀ Qᵀ = W⁻ᵀ V⁻ᵀ, so

    hk  →  hk @ inv(W).T .

An overlayer B = M V turns into B Qᵀ = M V Qᵀ = M W V: the domain M goes to M @ W.
"""

from __future__ import annotations

import inspect
import json
import math
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import scipy.constants as sc
from numpy.testing import assert_allclose
from scipy.spatial import cKDTree

from analysis.errors import NetError, ParameterError
from analysis.nets import Net2D, parse_substrate, point_group, reciprocal
from analysis.optics import ScreenGeometry, wavelength_A
from analysis.simulate import (
    GunShadow,
    LayerIV,
    acceptance_radius_px,
    forward_pattern,
    render_image,
    render_series,
)

GEOM = ScreenGeometry(511.3, 507.8, 560.0, distortion=0.2, rotation_deg=8.0, ellipticity=1.02, ellipse_deg=30.0)


def _codata_lambda_A(e_eV: float) -> float:
    """λ = h / √(2 m_e e E) from CODATA constants (scipy.constants), Å."""
    return sc.h / math.sqrt(2 * sc.m_e * sc.e * e_eV) * 1e10


def _same_set(a: np.ndarray, b: np.ndarray, tol: float = 1e-7) -> bool:
    if a.shape != b.shape:
        return False
    d, _ = cKDTree(b).query(a)
    return bool(np.all(d < tol))


def _all_domains(sub: Net2D, m) -> list[np.ndarray]:
    """M @ W for every op W of the substrate (duplicates kept; merging takes care of them)."""
    return [np.asarray(m, float) @ op.matrix for op in point_group(sub)]


# ----------------------------------------------------------------- forward pattern


def test_overlayer_index_convention():
    # (b1, b2) = M (a1, a2): M = [[2, 0], [0, 1]] doubles a1, so the extra beams sit at h = 1/2
    sub = parse_substrate("Cu(100)")
    p = forward_pattern(sub, [[[2, 0], [0, 1]]], energy_eV=120.0, geometry=GEOM)
    frac = p.hk[~p.integer]
    assert len(frac) > 0
    assert_allclose(np.abs(frac[:, 0]) % 1.0, 0.5, atol=1e-12)
    assert_allclose(frac[:, 1], np.rint(frac[:, 1]), atol=1e-12)
    # (√3×√3)R30° on the 120° hexagonal basis, matrix [[2, 1], [-1, 1]] (CHECK_VALUES.md §4):
    # its first beams are the (1/3, 1/3)-type spots, at |a*|/√3
    pt = parse_substrate("Pt(111)")
    q = forward_pattern(pt, [[[2, 1], [-1, 1]]], energy_eV=120.0, geometry=GEOM)
    labels = q.labels()
    assert "(1/3, 1/3)" in labels and "(2/3, -1/3)" in labels and "(1/2, 0)" not in labels
    first = q.hk[1]
    assert np.linalg.norm(first @ reciprocal(pt).vectors) == pytest.approx(reciprocal(pt).a / math.sqrt(3))


@pytest.mark.parametrize("spec, matrix", [
    ("Cu(100)", [[2, 0], [0, 1]]),             # two domains
    ("Cu(100)", [[2, 1], [-1, 2]]),            # (√5×√5)R26.6°, mirror pair
    ("Pt(111)", [[3, 1], [-1, 2]]),            # (√7×√7)R19.1°, mirror pair
    ("Pt(111)", [[2, 0], [0, 1]]),             # (2×1), three domains
    ("W(110)", [[2, 0], [0, 1]]),              # p(2×1) on centered rectangular
    ("Ni(110)", [[1, 1], [-1, 1]]),            # c(2×2) on rectangular
    ("oblique:3.1,4.3,104", [[2, 1], [0, 3]]),  # oblique substrate (p2 only)
])
def test_pattern_symmetric_under_substrate_point_group(spec, matrix):
    sub = parse_substrate(spec)
    a_star = reciprocal(sub).vectors
    p = forward_pattern(sub, _all_domains(sub, matrix), energy_eV=140.0, geometry=GEOM)
    mult = p.domains.sum(axis=1)
    tree = cKDTree(p.hk)
    for op in point_group(sub):
        w_inv_t = np.linalg.inv(op.matrix).T
        mapped = p.hk @ w_inv_t
        assert_allclose(mapped @ a_star, (p.hk @ a_star) @ op.cartesian.T, atol=1e-12)  # the derivation
        d, idx = tree.query(mapped)
        assert np.all(d < 1e-7), op.name
        assert np.array_equal(mult[idx], mult)  # as many domains at the image beam
        assert np.array_equal(p.integer[idx], p.integer)


def test_chiral_single_domain_breaks_mirrors_only():
    sub = parse_substrate("Pt(111)")
    p = forward_pattern(sub, [[[3, 1], [-1, 2]]], energy_eV=160.0, geometry=GEOM)  # one √7 domain
    for op in point_group(sub):
        ok = _same_set(p.hk @ np.linalg.inv(op.matrix).T, p.hk)
        assert ok == (op.kind == "rotation"), op.name


def test_exit_angles_follow_sin_theta_lambda_g():
    sub = parse_substrate("Pt(111)")
    for e in (45.0, 100.0, 230.0):
        p = forward_pattern(sub, [[[2, 0], [0, 2]]], energy_eV=e, geometry=GEOM)
        g = np.linalg.norm(p.hk @ reciprocal(sub).vectors, axis=1)
        assert_allclose(np.linalg.norm(p.g_par, axis=1), g, rtol=1e-12)
        assert_allclose(np.sin(np.radians(p.theta_deg)), _codata_lambda_A(e) * g, rtol=1e-9, atol=1e-12)
        assert np.all(p.theta_deg <= GEOM.acceptance_deg + 1e-9)
    # CHECK_VALUES.md §7 [run]: Cu(100) (1,0) at 100 eV leaves at 28.671°
    cu = forward_pattern(parse_substrate("Cu(100)"), energy_eV=100.0, geometry=GEOM)
    i = cu.labels().index("(1, 0)")
    assert cu.theta_deg[i] == pytest.approx(28.671, abs=6e-4)


@pytest.mark.parametrize("seed", range(6))
def test_integer_beam_count_matches_brute_force(seed):
    rng = np.random.default_rng(seed)
    sub = Net2D.from_parameters(rng.uniform(2.0, 4.0), rng.uniform(2.0, 6.0), rng.uniform(25.0, 155.0))
    e = rng.uniform(30.0, 500.0)
    p = forward_pattern(sub, energy_eV=e, geometry=GEOM)
    h, k = np.meshgrid(np.arange(-60, 61), np.arange(-60, 61))
    hk = np.column_stack([h.ravel(), k.ravel()]).astype(float)
    s = _codata_lambda_A(e) * np.linalg.norm(hk @ reciprocal(sub).vectors, axis=1)
    inside = hk[s <= math.sin(math.radians(GEOM.acceptance_deg))]
    assert p.integer.all() and p.domains.shape == (len(p), 0)
    assert _same_set(p.hk, inside)


def test_spot_count_grows_with_energy():
    sub = parse_substrate("Cu(100)")
    energies = [30.0, 60.0, 120.0, 240.0, 480.0]
    counts = [len(forward_pattern(sub, [[[2, 0], [0, 2]]], energy_eV=e, geometry=GEOM)) for e in energies]
    assert all(b > a for a, b in zip(counts, counts[1:]))
    # many beams: their number approaches the disk area / reciprocal cell area (Gauss circle)
    g_max = math.sin(math.radians(GEOM.acceptance_deg)) / wavelength_A(480.0)
    expected = math.pi * g_max**2 * (4 * sub.area)  # p(2×2): reciprocal cell 1 / (4 area)
    assert counts[-1] == pytest.approx(expected, rel=0.1)


def _fraction_set(mats, sub, e, acc_deg):
    """Exact beam set of several rational domains, by brute force with Fractions."""
    a_star = reciprocal(sub).vectors
    s_max = math.sin(math.radians(acc_deg))
    out: dict[tuple, set] = {}
    for d, m in enumerate(mats):
        inv_t = np.linalg.inv(np.asarray(m, float)).T
        for n1 in range(-12, 13):
            for n2 in range(-12, 13):
                hk = np.array([n1, n2]) @ inv_t
                if wavelength_A(e) * np.linalg.norm(hk @ a_star) <= s_max:
                    key = tuple(Fraction(float(x)).limit_denominator(12) for x in hk)
                    out.setdefault(key, set()).add(d)
    return out


def test_merged_beams_record_every_domain():
    sub = parse_substrate("Cu(100)")
    mats = [[[2, 0], [0, 1]], [[1, 0], [0, 2]], [[2, 0], [0, 2]]]
    p = forward_pattern(sub, mats, energy_eV=150.0, geometry=GEOM)
    exact = _fraction_set(mats, sub, 150.0, GEOM.acceptance_deg)
    got = {tuple(Fraction(float(x)).limit_denominator(12) for x in hk): set(np.flatnonzero(row).tolist())
           for hk, row in zip(p.hk, p.domains)}
    assert len(got) == len(p)  # no beam listed twice
    assert got == exact
    i = p.labels().index("(1/2, 0)")
    assert p.domains[i].tolist() == [True, False, True] and not p.integer[i]
    j = p.labels().index("(1, 0)")
    assert p.domains[j].all() and p.integer[j]


def test_incommensurate_overlayer_keeps_pure_substrate_beams():
    sub = parse_substrate("Pt(111)")
    m = 1.1234 * np.eye(2)  # a slightly expanded, aligned overlayer: no coincidence with (1, 0)
    p = forward_pattern(sub, [m], energy_eV=150.0, geometry=GEOM)
    i = p.labels().index("(1, 0)")
    assert p.integer[i] and not p.domains[i].any()
    assert p.domains[0].all()  # both nets contain (0, 0)


def test_azimuth_rotates_beams_and_off_normal_incidence():
    sub = parse_substrate("Ni(110)")
    g0 = ScreenGeometry(500.0, 500.0, 450.0)
    p0 = forward_pattern(sub, energy_eV=110.0, geometry=g0)
    p1 = forward_pattern(sub, energy_eV=110.0, geometry=g0, azimuth_deg=30.0)
    c, s = math.cos(math.radians(30.0)), math.sin(math.radians(30.0))
    rot = np.array([[c, -s], [s, c]])
    order = cKDTree(p1.hk).query(p0.hk)[1]
    assert_allclose(p1.g_par[order], p0.g_par @ rot.T, atol=1e-12)
    # on screen the spots turn by the same angle (counter-clockwise, y down) about the centre
    d0 = p0.xy_px - 500.0
    d1 = p1.xy_px[order] - 500.0
    assert_allclose(d1, d0 @ np.array([[c, s], [-s, c]]).T, atol=1e-9)
    # tilted incidence: the (0,0) beam leaves at the incidence angle, off centre
    lam = wavelength_A(110.0)
    k_in = [math.sin(math.radians(6.0)) / lam, 0.0]
    pt = forward_pattern(sub, energy_eV=110.0, geometry=g0, k_in_par=k_in)
    i = pt.labels().index("(0, 0)")
    assert pt.theta_deg[i] == pytest.approx(6.0, abs=1e-9)
    assert pt.xy_px[i, 0] > 500.0 + 1 and np.allclose(pt.g_par[i], 0.0)


@pytest.mark.parametrize("kw, err, match", [
    ({"overlayers": [[[1, 2], [2, 4]]]}, NetError, "`overlayers\\[0\\]` is singular"),
    ({"overlayers": [[[1, 2, 3], [2, 4, 5]]]}, NetError, "must be a finite 2×2 matrix"),
    ({"energy_eV": -3.0}, ParameterError, "positive number of eV"),
    ({"merge_tol": 0.0}, ParameterError, "`merge_tol` must be a small positive number"),
    ({"k_in_par": [5.0, 0.0]}, ParameterError, "exceeds the incident momentum"),
    ({"geometry": "screen"}, ParameterError, "`geometry` must be a ScreenGeometry"),
])
def test_forward_pattern_bad_input(kw, err, match):
    args = {"overlayers": (), "energy_eV": 100.0, "geometry": GEOM} | kw
    with pytest.raises(err, match=match):
        forward_pattern(parse_substrate("Cu(100)"), **args)


# ----------------------------------------------------------------- rendering


def _quiet(pattern, **kw):
    """Noiseless render: no gun, no background, no read noise, zero offset."""
    args = dict(rng=np.random.default_rng(0), gun=None, background_photons=0.0, read_noise_e=0.0,
                offset_adu=0.0, gain=1.0, noise=False, spot_sigma_px=1.6) | kw
    return render_image(pattern, **args)


def _spot_windows(im, half):
    rows, cols = im.image.shape
    for s in im.truth["spots"]:
        r, c = int(round(s["y"])), int(round(s["x"]))
        if s["hidden"] or s["partly_hidden"] or not (half <= r < rows - half and half <= c < cols - half):
            continue
        yield s, r, c


def test_spot_centroids_match_truth_subpixel():
    p = forward_pattern(parse_substrate("Cu(100)"), [[[1, 1], [-1, 1]]], energy_eV=170.0, geometry=GEOM)
    photons = np.full(len(p), 2.0e5)
    im = _quiet(p, intensities=photons)
    img = im.image.astype(float)
    half = 9
    n, errs = 0, []
    yy, xx = np.mgrid[-half:half + 1, -half:half + 1]
    for s, r, c in _spot_windows(im, half):
        win = img[r - half:r + half + 1, c - half:c + half + 1]
        tot = win.sum()
        errs.append(np.hypot((win * (xx + c)).sum() / tot - s["x"], (win * (yy + r)).sum() / tot - s["y"]))
        assert tot == pytest.approx(s["photons"], rel=1e-4)  # the pixel integral conserves photons
        n += 1
    assert n >= 10
    assert max(errs) < 0.02  # task target; exact erf integrals give ~1e-4 px here


def test_truth_photons_of_a_spot_cut_by_the_screen_edge():
    p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=100.0, geometry=GEOM)
    i = p.labels().index("(1, 0)")
    edge_r = float(np.hypot(*(p.xy_px[i] - GEOM.center_px)))  # the screen edge runs through the spot
    im = _quiet(p, intensities=np.full(len(p), 1e5), screen_radius_px=edge_r)
    s = im.truth["spots"][i]
    r, c = int(round(s["y"])), int(round(s["x"]))
    window = im.image[r - 12:r + 13, c - 12:c + 13].astype(float).sum()
    assert s["hidden"] and window == pytest.approx(s["photons"], rel=1e-3)
    # a straight cut through the centre keeps half the light; the edge here is an arc of radius ~240 px
    assert s["photons"] == pytest.approx(0.5 * s["photons_unshadowed"], rel=0.02)


def test_spot_fit_matches_truth_with_noise():
    # a least-squares Gaussian fit on a noisy frame stays within a few localisation bounds
    from scipy.optimize import least_squares

    p = forward_pattern(parse_substrate("Pt(111)"), [[[2, 0], [0, 2]]], energy_eV=130.0, geometry=GEOM)
    sigma, n_ph = 2.0, 2.0e4
    im = render_image(p, rng=np.random.default_rng(5), intensities=np.full(len(p), n_ph), spot_sigma_px=sigma,
                      gun=None, gain=1.0)
    img = im.image.astype(float)
    half = 7
    yy, xx = np.mgrid[-half:half + 1, -half:half + 1].astype(float)
    errs, bounds = [], []
    for s, r, c in _spot_windows(im, half):
        win = img[r - half:r + half + 1, c - half:c + half + 1]

        def resid(q):
            return (q[3] * np.exp(-((xx - q[0]) ** 2 + (yy - q[1]) ** 2) / (2 * q[2] ** 2)) + q[4] - win).ravel()

        q = least_squares(resid, [s["x"] - c + 0.3, s["y"] - r - 0.3, 2.0, win.max(), win.min()]).x
        errs.append(np.hypot(q[0] + c - s["x"], q[1] + r - s["y"]))
        # Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002), per axis (CHECK_VALUES.md §9)
        b2 = s["background_per_px"] + 9.0  # photons/px plus read noise² (3 e⁻)
        sa2 = sigma**2 + 1 / 12
        bounds.append(math.sqrt(2 * (sa2 / n_ph + 8 * math.pi * sigma**4 * b2 / n_ph**2)))
    assert len(errs) >= 10
    assert np.sqrt(np.mean(np.square(errs))) < 3.0 * np.sqrt(np.mean(np.square(bounds)))
    assert max(errs) < 0.1


def test_background_truth_and_dark_outside_screen():
    p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=100.0, geometry=GEOM)
    im = render_image(p, rng=np.random.default_rng(1), gun=None, intensities=np.zeros(len(p)))
    img = im.image.astype(float)
    cam = im.truth["camera"]
    dark = ~im.masks["screen"]
    yy, xx = np.mgrid[:img.shape[0], :img.shape[1]]
    far = dark & (np.hypot(xx - GEOM.center_x_px, yy - GEOM.center_y_px) > im.truth["screen"]["radius_px"] + 2)
    # outside the screen: the offset and read noise only
    assert img[far].mean() == pytest.approx(cam["offset_adu"], abs=0.5)
    assert img[far].std() == pytest.approx(cam["gain_adu_per_e"] * cam["read_noise_e"], rel=0.05)
    # inside: background per pixel as the truth says (local mean over 7×7 px)
    for s in im.truth["spots"]:
        if s["hidden"] or s["partly_hidden"]:
            continue
        r, c = int(round(s["y"])), int(round(s["x"]))
        local = img[r - 3:r + 4, c - 3:c + 4].mean()
        expect = cam["offset_adu"] + cam["gain_adu_per_e"] * s["background_per_px"]
        assert local == pytest.approx(expect, rel=0.08)
    # the background falls off outward
    centre = img[int(GEOM.center_y_px) - 60:int(GEOM.center_y_px) - 40, int(GEOM.center_x_px) - 10:
                 int(GEOM.center_x_px) + 10].mean()
    edge_r = int(GEOM.center_y_px - 0.9 * im.truth["screen"]["radius_px"])
    edge = img[edge_r - 5:edge_r + 5, int(GEOM.center_x_px) - 10:int(GEOM.center_x_px) + 10].mean()
    assert centre > 1.5 * edge


def test_gun_shadow_hides_spots():
    p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=120.0, geometry=GEOM)
    photons = np.full(len(p), 5e4)
    free = render_image(p, rng=np.random.default_rng(2), gun=None, intensities=photons)
    target = next(s for s in free.truth["spots"] if s["label"] == "(1, 1)")
    ang = math.degrees(math.atan2(-(target["y"] - GEOM.center_y_px), target["x"] - GEOM.center_x_px))
    gun = GunShadow(radius_px=30.0, arm_angle_deg=ang, arm_width_px=20.0)
    im = render_image(p, rng=np.random.default_rng(2), gun=gun, intensities=photons)
    spots = {s["label"]: s for s in im.truth["spots"]}
    assert spots["(0, 0)"]["hidden"] and spots["(0, 0)"]["photons"] < 1e-6  # behind the gun disk
    assert spots["(1, 1)"]["hidden"] and not target["hidden"]
    assert not spots["(-1, -1)"]["hidden"]
    r, c = int(round(target["y"])), int(round(target["x"]))
    cam = im.truth["camera"]
    under = im.image[r - 4:r + 5, c - 4:c + 5].astype(float)
    assert under.mean() < cam["offset_adu"] + 5 * cam["gain_adu_per_e"] * cam["read_noise_e"]
    assert free.image[r - 4:r + 5, c - 4:c + 5].max() > 20 * under.max()
    assert im.masks["gun"][r, c] and im.masks["gun"][int(round(GEOM.center_y_px)), int(round(GEOM.center_x_px))]
    # the arm reaches the screen edge
    edge = np.array([GEOM.center_x_px, GEOM.center_y_px]) + 0.98 * im.truth["screen"]["radius_px"] * np.array(
        [math.cos(math.radians(ang)), -math.sin(math.radians(ang))])
    assert im.masks["gun"][int(round(edge[1])), int(round(edge[0]))]


def test_spots_outside_a_small_screen_are_hidden():
    p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=200.0, geometry=GEOM)
    full = acceptance_radius_px(GEOM)
    im = render_image(p, rng=np.random.default_rng(3), screen_radius_px=0.6 * full, gun=None)
    for s in im.truth["spots"]:
        d = math.hypot(s["x"] - GEOM.center_x_px, s["y"] - GEOM.center_y_px)
        assert s["hidden"] == (d >= 0.6 * full)
    assert any(s["hidden"] for s in im.truth["spots"]) and not all(s["hidden"] for s in im.truth["spots"])


def test_acceptance_radius_follows_geometry():
    # the screen edge is where a beam at the acceptance angle lands: r = s sin θ (1 − d)/(1 − d cos θ)
    g = ScreenGeometry(0.0, 0.0, 500.0, distortion=0.3, acceptance_deg=50.0)
    t = math.radians(50.0)
    assert acceptance_radius_px(g) == pytest.approx(500 * math.sin(t) * 0.7 / (1 - 0.3 * math.cos(t)), rel=1e-9)


def test_bit_depths_and_saturation():
    p = forward_pattern(parse_substrate("Pt(111)"), energy_eV=100.0, geometry=GEOM)
    bright = np.full(len(p), 5e6)
    for bits, dtype, full in ((8, np.uint8, 255), (16, np.uint16, 65535)):
        im = render_image(p, rng=np.random.default_rng(4), bit_depth=bits, intensities=bright)
        assert im.image.dtype == dtype and im.image.shape == (1024, 1024)
        assert im.image.max() == full
        assert any(s["saturated"] for s in im.truth["spots"])
        soft = render_image(p, rng=np.random.default_rng(4), bit_depth=bits, intensities=bright, saturate=False)
        assert soft.image.max() < full and not any(s["saturated"] for s in soft.truth["spots"])
        assert soft.truth["camera"]["gain_adu_per_e"] < im.truth["camera"]["gain_adu_per_e"]
    im8 = render_image(p, rng=np.random.default_rng(4), bit_depth=8, shape=(300, 400))
    assert im8.image.shape == (300, 400) and im8.image.dtype == np.uint8


def test_seeded_determinism_and_json_truth():
    p = forward_pattern(parse_substrate("Pt(111)"), [[[2, 1], [-1, 1]]], energy_eV=90.0, geometry=GEOM)
    a = render_image(p, rng=np.random.default_rng(11))
    b = render_image(p, rng=np.random.default_rng(11))
    c = render_image(p, rng=np.random.default_rng(12))
    assert np.array_equal(a.image, b.image) and a.truth == b.truth
    assert not np.array_equal(a.image, c.image)
    text = json.dumps(a.truth, allow_nan=False)
    back = json.loads(text)
    assert back["energy_eV"] == 90.0 and len(back["spots"]) == len(p)
    assert back["geometry"] == GEOM.to_dict()
    assert ScreenGeometry.from_dict(back["geometry"]) == GEOM
    assert_allclose(back["substrate_vectors_A"], p.substrate.vectors)
    assert_allclose(back["overlayer_matrices"], [[[2, 1], [-1, 1]]])
    assert {"x", "y", "h", "k", "integer", "domains", "photons", "sigma_px", "background_per_px",
            "hidden"} <= set(back["spots"][0])


def test_pixel_convention_top_left_centre():
    # a spot put at (x, y) = (0, 0) lights pixel (row 0, col 0) most, and at (5, 2) pixel (2, 5)
    g = ScreenGeometry(5.0, 2.0, 30.0)
    p = forward_pattern(Net2D(0.5 * np.eye(2)), energy_eV=100.0, geometry=g)
    assert len(p) == 1  # only (0, 0) at this tiny scale
    im = _quiet(p, shape=(12, 16), intensities=[1e4], screen_radius_px=50.0)
    assert np.unravel_index(np.argmax(im.image), im.image.shape) == (2, 5)
    g0 = ScreenGeometry(0.0, 0.0, 30.0)
    im0 = _quiet(forward_pattern(Net2D(0.5 * np.eye(2)), energy_eV=100.0, geometry=g0), shape=(12, 16),
                 intensities=[1e4], screen_radius_px=50.0)
    assert np.unravel_index(np.argmax(im0.image), im0.image.shape) == (0, 0)
    assert im0.image[0, 1] == im0.image[1, 0]


@pytest.mark.parametrize("kw, match", [
    ({"bit_depth": 12}, "`bit_depth` must be 8 or 16"),
    ({"spot_sigma_px": -1.0}, "`spot_sigma_px` must be a number"),
    ({"intensities": [1.0, 2.0]}, "`intensities` must be"),
    ({"rng": 7}, "`rng` must be a numpy.random.Generator"),
    ({"shape": (3, 3)}, "`shape` must be between 8 and 8192"),
    ({"gun": "yes"}, "`gun` must be a GunShadow or None"),
    ({"gain": 0.0}, "`gain` must be > 0"),
    ({"background_photons": -1.0}, "`background_photons` must be ≥ 0"),
])
def test_render_bad_input(kw, match):
    p = forward_pattern(parse_substrate("Cu(100)"), energy_eV=100.0, geometry=GEOM)
    args = {"rng": np.random.default_rng(0)} | kw
    with pytest.raises(ParameterError, match=match):
        render_image(p, **args)


def test_gun_shadow_bad_input():
    with pytest.raises(ParameterError, match="radius and arm width must be ≥ 0"):
        GunShadow(radius_px=-2.0)


# ----------------------------------------------------------------- energy series


def test_render_series_streams_frames():
    sub = parse_substrate("Cu(100)")
    g = ScreenGeometry(64.0, 64.0, 60.0)
    energies = [60.0, 80.0, 100.0]
    gen = render_series(sub, [[[2, 0], [0, 2]]], energies, geometry=g, rng=np.random.default_rng(0),
                        shape=(128, 128))
    assert inspect.isgenerator(gen)
    fn = LayerIV()
    seen = []
    for pat, im in gen:
        assert im.image.shape == (128, 128)
        vis = [s for s in im.truth["spots"] if not s["hidden"]]
        expected = fn(pat)
        for s, e in zip(im.truth["spots"], expected):
            assert s["photons_unshadowed"] == pytest.approx(e)
        seen.append((pat.energy_eV, len(pat), len(vis)))
    assert [e for e, _, _ in seen] == energies
    assert seen[0][1] < seen[-1][1]


def test_layer_iv_peaks_at_kinematic_energies():
    # the (0,0) beam at normal incidence peaks where 2k = n/d, k = √((E + V0)/150.41) Å⁻¹ (no 2π)
    iv = LayerIV(layer_spacing_A=1.8, inner_potential_eV=10.0, half_width_eV=4.0)
    sub = parse_substrate("Cu(100)")
    g = ScreenGeometry(64.0, 64.0, 60.0)
    energies = np.arange(40.0, 200.0, 0.5)
    curve = []
    for e in energies:
        p = forward_pattern(sub, energy_eV=e, geometry=g)
        curve.append(iv(p)[p.labels().index("(0, 0)")])
    curve = np.array(curve)
    h2 = sc.h**2 / (2 * sc.m_e * sc.e) * 1e20  # eV·Å², CODATA
    peaks = [h2 * (n / 3.6) ** 2 - 10.0 for n in (3, 4)]  # ≈ 94.4 and 175.7 eV
    for e_peak in peaks:
        near = (energies > e_peak - 8) & (energies < e_peak + 8)
        assert abs(energies[near][np.argmax(curve[near])] - e_peak) < 1.5


# ----------------------------------------------------------------- committed demo images

_DEMO = sorted((Path(__file__).resolve().parent.parent / "demo_images").glob("*.json"))


@pytest.mark.parametrize("path", _DEMO, ids=[p.stem for p in _DEMO])
def test_demo_images_agree_with_their_truth(path):
    from PIL import Image

    truth = json.loads(path.read_text())
    img = np.array(Image.open(path.with_suffix(".png"))).astype(float)
    assert img.shape == tuple(truth["camera"]["shape"]) and truth["camera"]["bit_depth"] == 16
    half = 6
    yy, xx = np.mgrid[-half:half + 1, -half:half + 1]
    checked = 0
    for s in truth["spots"]:
        if s["hidden"] or s["partly_hidden"] or s["photons"] < 4000:
            continue
        r, c = int(round(s["y"])), int(round(s["x"]))
        win = img[r - half:r + half + 1, c - half:c + half + 1]
        w = np.clip(win - np.median(win), 0, None)  # background removed by the window median
        dx, dy = (w * (xx + c)).sum() / w.sum() - s["x"], (w * (yy + r)).sum() / w.sum() - s["y"]
        assert math.hypot(dx, dy) < 0.35, s["label"]  # centroid with noise: a few tenths at most
        checked += 1
    assert checked >= 5


def test_huge_overlayer_cell_is_refused():
    with pytest.raises(ParameterError, match="Too many beams to enumerate"):
        forward_pattern(parse_substrate("Cu(100)"), [5000.0 * np.eye(2)], energy_eV=100.0, geometry=GEOM)
