"""Line profiles: values against analytic images, distances against the camera model."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from analysis.errors import ImageError, ParameterError
from analysis.nets import parse_substrate, reciprocal
from analysis.optics import ScreenGeometry, momentum_to_pixels
from analysis.profile_line import line_profile


def test_linear_image_is_sampled_exactly_along_and_across():
    # truth: the analytic plane I = 2x + 3y + 1; linear interpolation reproduces a plane exactly,
    # and the mean across a line centred on it is the value on the centre line
    yy, xx = np.mgrid[:80, :100].astype(float)
    img = 2.0 * xx + 3.0 * yy + 1.0
    a, b = np.array([12.3, 70.1]), np.array([88.8, 9.6])
    p = line_profile(img, a, b, width_px=5, step_px=0.25)
    assert_allclose(p.xy_px[0], a)
    assert_allclose(p.xy_px[-1], b)
    assert_allclose(p.intensity, 2.0 * p.xy_px[:, 0] + 3.0 * p.xy_px[:, 1] + 1.0, rtol=0, atol=1e-9)
    assert_allclose(p.distance_px[-1], math.hypot(*(b - a)), rtol=1e-12)
    assert np.all(np.diff(p.distance_px) <= 0.25 + 1e-12)


def test_width_averages_across_the_line():
    # truth: a Gaussian ridge along x, σ = 2 px, crossed by a horizontal line 1 px above
    # its crest: the mean over 5 parallel lines at offsets −2…2 px is the mean of the five
    # analytic values exp(−(1 + o)²/2σ²) (cubic interpolation of a smooth ridge: < 1e-3)
    yy, xx = np.mgrid[:64, :64].astype(float)
    img = 100.0 * np.exp(-((yy - 31.0) ** 2) / (2 * 2.0**2))
    p = line_profile(img, (10.0, 32.0), (50.0, 32.0), width_px=5, order=3)
    o = np.arange(-2.0, 3.0)
    expect = np.mean(100.0 * np.exp(-((1.0 + o) ** 2) / 8.0))
    assert_allclose(p.intensity, expect, rtol=1e-3)
    one = line_profile(img, (10.0, 32.0), (50.0, 32.0), width_px=1, order=3)
    assert_allclose(one.intensity, 100.0 * math.exp(-1.0 / 8.0), rtol=1e-3)
    assert not np.allclose(one.intensity, p.intensity, rtol=1e-2)  # the width does change the answer


@pytest.mark.parametrize("distortion", [0.0, 0.3])
def test_distance_from_the_00_beam_to_the_10_beam_is_one_brillouin_zone(distortion):
    # truth: Cu(100) surface constant a0/√2 = 3.615/√2 Å (a0 from memory, handbook value;
    # ../shared/CHECK_VALUES.md §3): |a*| = 1/a. The (1,0) beam's pixel comes from the camera
    # model; a straight line from the centre is radial, so its momentum length is |a*|.
    sub = parse_substrate("Cu(100)")
    a_star = reciprocal(sub).a
    assert_allclose(a_star, math.sqrt(2) / 3.615, rtol=2e-3)
    geom = ScreenGeometry(200.0, 180.0, 260.0, distortion=distortion, rotation_deg=17.0)
    energy = 120.0
    xy, _ = momentum_to_pixels([[0.0, 0.0], reciprocal(sub).vectors[0]], energy, geom)
    img = np.ones((400, 400))
    p = line_profile(img, xy[0], xy[1], energy_eV=energy, geometry=geom, a_star_invA=a_star)
    assert_allclose(p.distance_invA[-1], a_star, rtol=1e-9)
    assert_allclose(p.distance_bz_percent[-1], 100.0, rtol=1e-9)
    assert np.all(np.diff(p.distance_invA) > 0)
    if distortion == 0.0:  # a distant camera maps momentum linearly onto the image
        assert_allclose(p.distance_invA / p.distance_invA[-1], p.distance_px / p.distance_px[-1], atol=1e-12)
    else:  # this camera compresses the outer screen: the momentum grows faster than the pixels there
        half = len(p) // 2
        assert p.distance_invA[half] / a_star < p.distance_px[half] / p.distance_px[-1]


def test_masked_and_outside_samples_are_left_out():
    img = np.arange(100.0).reshape(10, 10)
    mask = np.ones((10, 10), bool)
    mask[:, 5:] = False
    p = line_profile(img, (0.0, 2.0), (9.0, 2.0), mask=mask, order=0, step_px=1.0)
    assert_allclose(p.intensity[:5], img[2, :5])
    assert np.all(np.isnan(p.intensity[5:]))
    q = line_profile(img, (-5.0, 2.0), (4.0, 2.0), step_px=1.0)
    assert np.all(np.isnan(q.intensity[:5])) and np.all(np.isfinite(q.intensity[5:]))
    csv = q.to_csv().splitlines()
    assert csv[0].startswith("x,y,distance_px") and csv[1].endswith(",")  # missing intensity: an empty cell


def test_bad_input_gets_a_plain_message():
    img = np.zeros((20, 20))
    with pytest.raises(ParameterError, match="no length"):
        line_profile(img, (3, 3), (3, 3))
    with pytest.raises(ParameterError, match="width_px"):
        line_profile(img, (3, 3), (9, 9), width_px=0)
    with pytest.raises(ParameterError, match="start_xy"):
        line_profile(img, (3, float("nan")), (9, 9))
    with pytest.raises(ParameterError, match="mask"):
        line_profile(img, (3, 3), (9, 9), mask=np.ones((5, 5), bool))
    with pytest.raises(ParameterError, match="both"):
        line_profile(img, (3, 3), (9, 9), energy_eV=100.0)
    with pytest.raises(ImageError, match="2-D"):
        line_profile(np.zeros(5), (3, 3), (9, 9))
