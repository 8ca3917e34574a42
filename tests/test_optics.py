"""Tests of analysis.optics: wavelength against CODATA, exit angles, the camera projection."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.constants as sc
from numpy.testing import assert_allclose

from analysis.errors import ParameterError
from analysis.optics import (
    ScreenGeometry,
    exit_angles_deg,
    local_jacobian,
    GEOMETRY_PARAMETERS,
    momentum_to_pixels,
    pixel_derivatives,
    pixels_to_momentum,
    sin_theta,
    wavelength_A,
)


def _codata_wavelength_A(e_eV, relativistic=False):
    """λ = h / p straight from CODATA constants (scipy.constants), in Å."""
    e = np.asarray(e_eV, dtype=np.float64) * sc.e  # J
    p2 = 2.0 * sc.m_e * e
    if relativistic:
        p2 = p2 * (1.0 + e / (2.0 * sc.m_e * sc.c**2))
    return sc.h / np.sqrt(p2) * 1e10


# ----------------------------------------------------------------- wavelength


@pytest.mark.parametrize("relativistic", [False, True])
def test_wavelength_matches_codata(relativistic):
    e = np.geomspace(5.0, 2000.0, 25)
    assert_allclose(wavelength_A(e, relativistic=relativistic), _codata_wavelength_A(e, relativistic), rtol=1e-12)


@pytest.mark.parametrize("e, lam, lam_rel", [
    # CHECK_VALUES.md §1 [run, scipy.constants CODATA 2022], rounded to 6 decimals
    (50.0, 1.734428, 1.734386),
    (100.0, 1.226426, 1.226366),
    (150.0, 1.001373, 1.001299),
    (200.0, 0.867214, 0.867129),
    (500.0, 0.548474, 0.548340),
])
def test_wavelength_table(e, lam, lam_rel):
    assert wavelength_A(e) == pytest.approx(lam, abs=6e-7)
    assert wavelength_A(e, relativistic=True) == pytest.approx(lam_rel, abs=6e-7)


def test_common_150_4_form():
    # common practice: λ[Å] = √(150.4 / E); it is 0.004 % low, so it agrees within 0.01 %
    e = np.linspace(20.0, 1000.0, 50)
    assert_allclose(np.sqrt(150.4 / e), wavelength_A(e), rtol=1e-4)
    assert not np.allclose(np.sqrt(150.4 / e), wavelength_A(e), rtol=1e-5)  # the difference is real


@pytest.mark.parametrize("bad", [0.0, -5.0, float("nan"), float("inf"), [100.0, -1.0]])
def test_bad_energy_raises(bad):
    with pytest.raises(ParameterError, match="positive number of eV"):
        wavelength_A(bad)


def test_bad_energy_in_projection_raises():
    g = ScreenGeometry(100.0, 100.0, 80.0)
    with pytest.raises(ParameterError, match="positive number of eV"):
        momentum_to_pixels([[0.1, 0.0]], -20.0, g)
    with pytest.raises(ParameterError, match="positive number of eV"):
        pixels_to_momentum([[110.0, 100.0]], 0.0, g)


# ----------------------------------------------------------------- exit angles


@pytest.mark.parametrize("a_s, theta", [
    # CHECK_VALUES.md §7 [run]: (1,0) beam at 100 eV, normal incidence
    (3.615 / math.sqrt(2), 28.671),   # Cu(100), a0 = 3.615 Å
    (3.924 / math.sqrt(2) * math.sqrt(3) / 2, 30.689),  # Pt(111): |a*| = 2/(a√3), so 1/|a*| = a√3/2
    (5.431 / math.sqrt(2), 18.624),   # Si(100) 1×1
])
def test_exit_angles_check_values(a_s, theta):
    assert exit_angles_deg([[1.0 / a_s, 0.0]], 100.0)[0] == pytest.approx(theta, abs=6e-4)


def test_exit_angle_is_arcsin_lambda_g_and_nan_when_evanescent():
    g = np.array([[0.3, 0.1], [0.0, 0.55], [2.0, 0.0]])
    lam = _codata_wavelength_A(60.0)
    th = exit_angles_deg(g, 60.0)
    assert_allclose(th[:2], np.degrees(np.arcsin(lam * np.hypot(g[:2, 0], g[:2, 1]))), rtol=1e-12)
    assert np.isnan(th[2])  # λ|g| > 1: the beam does not leave the crystal


def test_off_normal_incidence_specular_beam():
    # the (0,0) beam leaves at the incidence angle: |k_in∥| = sin θ_in / λ
    lam = wavelength_A(120.0)
    k_in = np.array([math.sin(math.radians(7.0)) / lam, 0.0])
    assert sin_theta([[0.0, 0.0]], 120.0, k_in_par=k_in)[0] == pytest.approx(math.sin(math.radians(7.0)))


# ----------------------------------------------------------------- projection


def _random_geometry(rng) -> ScreenGeometry:
    return ScreenGeometry(center_x_px=rng.uniform(300, 700), center_y_px=rng.uniform(300, 700),
                          scale_px=rng.uniform(300, 900), distortion=rng.uniform(0.0, 0.7),
                          rotation_deg=rng.uniform(-180, 180), ellipticity=rng.uniform(0.9, 1.1),
                          ellipse_deg=rng.uniform(0, 180), acceptance_deg=rng.uniform(40, 60))


@pytest.mark.parametrize("seed", range(8))
def test_pixels_momentum_round_trip(seed):
    rng = np.random.default_rng(seed)
    geom = _random_geometry(rng)
    e = rng.uniform(30.0, 400.0)
    kmax = math.sin(math.radians(geom.acceptance_deg)) / wavelength_A(e)
    r = kmax * np.sqrt(rng.uniform(0, 1, 200))
    phi = rng.uniform(0, 2 * np.pi, 200)
    k = np.column_stack([r * np.cos(phi), r * np.sin(phi)])
    xy, vis = momentum_to_pixels(k, e, geom)
    assert vis.all() and np.isfinite(xy).all()
    assert_allclose(pixels_to_momentum(xy, e, geom), k, atol=1e-9 * kmax)
    # and the other way round, from pixels
    back, _ = momentum_to_pixels(pixels_to_momentum(xy, e, geom), e, geom)
    assert_allclose(back, xy, atol=1e-7)


def test_beyond_acceptance_is_invisible():
    geom = ScreenGeometry(500.0, 500.0, 450.0, acceptance_deg=50.0)
    lam = wavelength_A(100.0)
    k = np.array([[math.sin(math.radians(49.0)) / lam, 0.0], [math.sin(math.radians(51.0)) / lam, 0.0]])
    xy, vis = momentum_to_pixels(k, 100.0, geom)
    assert vis.tolist() == [True, False]
    assert np.isfinite(xy[0]).all() and np.isnan(xy[1]).all()


def test_distant_camera_r_sqrt_e_constant():
    # CHECK_VALUES.md §7 [derived]: a distant camera sees r ∝ sin θ = λ|g| ∝ |g| / √E
    geom = ScreenGeometry(512.0, 512.0, 600.0, rotation_deg=13.0)
    g = np.array([[0.35, 0.12]])
    e = np.array([60.0, 90.0, 150.0, 260.0, 400.0])
    r = np.array([np.hypot(*(momentum_to_pixels(g, ei, geom)[0][0] - 512.0)) for ei in e])
    assert_allclose(r * np.sqrt(e), r[0] * np.sqrt(e[0]), rtol=1e-12)
    # a near camera (d = R/L = 0.4) breaks the rule: the test can tell the two apart
    near = ScreenGeometry(512.0, 512.0, 600.0, distortion=0.4)
    rn = np.array([np.hypot(*(momentum_to_pixels(g, ei, near)[0][0] - 512.0)) for ei in e])
    assert np.ptp(rn * np.sqrt(e)) / (rn[0] * np.sqrt(e[0])) > 1e-3


def test_image_orientation_convention():
    # +x surface direction at rotation 0 goes right; +y goes up the image (y_px decreases)
    geom = ScreenGeometry(200.0, 200.0, 100.0)
    xy, _ = momentum_to_pixels([[0.2, 0.0], [0.0, 0.2]], 100.0, geom)
    assert xy[0, 0] > 200.0 and xy[0, 1] == pytest.approx(200.0)
    assert xy[1, 1] < 200.0 and xy[1, 0] == pytest.approx(200.0)


@pytest.mark.parametrize("seed", range(5))
def test_local_jacobian_matches_finite_differences(seed):
    rng = np.random.default_rng(100 + seed)
    geom = _random_geometry(rng)
    e = rng.uniform(40.0, 300.0)
    h = 1e-6  # Å⁻¹; central differences, error O(h²) plus rounding ~1e-10 / h
    cols = []
    for j in range(2):
        dk = np.zeros((2, 2))
        dk[0, j], dk[1, j] = h, -h
        xy, _ = momentum_to_pixels(dk, e, geom)
        cols.append((xy[0] - xy[1]) / (2 * h))
    fd = np.column_stack(cols)
    jac = local_jacobian(e, geom)
    assert_allclose(jac, fd, rtol=1e-5, atol=1e-5 * np.abs(jac).max())


def _nudged(geom: ScreenGeometry, name: str, dx: float) -> ScreenGeometry:
    d = geom.to_dict()
    if name == "log_scale":
        d["scale_px"] *= math.exp(dx)
    elif name in ("e1", "e2"):
        eps, b = d["ellipticity"] - 1.0, math.radians(2.0 * d["ellipse_deg"])
        e1, e2 = eps * math.cos(b), eps * math.sin(b)
        e1, e2 = (e1 + dx, e2) if name == "e1" else (e1, e2 + dx)
        d["ellipticity"], d["ellipse_deg"] = 1.0 + math.hypot(e1, e2), math.degrees(0.5 * math.atan2(e2, e1)) % 180
    else:
        d[name] += dx
    return ScreenGeometry(**d)


@pytest.mark.parametrize("seed", range(4))
def test_pixel_derivatives_match_central_differences(seed):
    # the exact derivatives used by the camera fits against central differences of the model itself
    rng = np.random.default_rng(300 + seed)
    geom = dataclasses.replace(_random_geometry(rng), ellipticity=1.0 + rng.uniform(0.01, 0.06),
                               ellipse_deg=rng.uniform(0, 180))
    if seed % 2:  # the beam off normal and the camera off the screen axis
        geom = dataclasses.replace(geom, incidence_x=rng.uniform(-0.05, 0.05), incidence_y=rng.uniform(-0.05, 0.05),
                                   perspective_x=rng.uniform(-0.08, 0.08), perspective_y=rng.uniform(-0.08, 0.08))
    e = rng.uniform(40.0, 300.0)
    k = rng.normal(0.0, 0.25, (8, 2))
    k[0] = 0.0  # the specular beam, where the polar form is singular
    xy, d_k, d_g = pixel_derivatives(k, e, geom)
    assert_allclose(xy, momentum_to_pixels(k, e, geom)[0], atol=1e-9)
    h = 1e-6
    for j in range(2):
        kp, km = k.copy(), k.copy()
        kp[:, j] += h
        km[:, j] -= h
        fd = (momentum_to_pixels(kp, e, geom)[0] - momentum_to_pixels(km, e, geom)[0]) / (2 * h)
        assert_allclose(d_k[:, :, j], fd, rtol=1e-5, atol=1e-5 * np.nanmax(np.abs(d_k)))
    for i, name in enumerate(GEOMETRY_PARAMETERS):
        fd = (momentum_to_pixels(k, e, _nudged(geom, name, h))[0] -
              momentum_to_pixels(k, e, _nudged(geom, name, -h))[0]) / (2 * h)
        assert_allclose(d_g[:, :, i], fd, rtol=1e-4, atol=1e-4 * max(np.nanmax(np.abs(d_g[:, :, i])), 1.0)), name


@pytest.mark.parametrize("kw, match", [
    ({"scale_px": -1.0}, "`scale_px` must be positive"),
    ({"distortion": 1.0}, "`distortion` \\(R/L\\) must be in \\[0, 1\\)"),
    ({"ellipticity": 0.0}, "`ellipticity` must be positive"),
    ({"acceptance_deg": 95.0}, "`acceptance_deg` must be in \\(0, 90\\]"),
])
def test_bad_geometry_raises(kw, match):
    args = {"center_x_px": 10.0, "center_y_px": 10.0, "scale_px": 100.0} | kw
    with pytest.raises(ParameterError, match=match):
        ScreenGeometry(**args)


def test_geometry_dict_round_trip_and_unknown_field():
    g = ScreenGeometry(1.0, 2.0, 300.0, distortion=0.2, rotation_deg=5.0)
    assert ScreenGeometry.from_dict(g.to_dict()) == g
    with pytest.raises(ParameterError, match="Unknown screen-geometry fields \\['zoom'\\]"):
        ScreenGeometry.from_dict(g.to_dict() | {"zoom": 2.0})
