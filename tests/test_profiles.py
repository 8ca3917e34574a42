"""The spot profile: its evaluation paths agree, its derivatives and closed forms hold."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from analysis.profiles import GAUSSIAN, GaussianProfile


def _spots(k=6, seed=0):
    rng = np.random.default_rng(seed)
    rc = rng.uniform(20.0, 40.0, (k, 2))
    amp = rng.uniform(10.0, 1000.0, k)
    sr, st = rng.uniform(0.8, 3.0, k), rng.uniform(0.8, 3.0, k)
    ang = rng.uniform(0.0, 2 * np.pi, k)
    u = np.column_stack([np.cos(ang), np.sin(ang)])
    return rc, amp, sr, st, u


def _grid(half):
    o = np.arange(-half, half + 1, dtype=np.float64)
    return np.meshgrid(o, o, indexing="ij")


def test_window_and_fit_evaluation_agree():
    rc, amp, sr, st, u = _spots()
    half = 9
    at = np.rint(rc)
    p = np.column_stack([amp, rc - at, np.log(sr), np.log(st)])
    val, _ = GAUSSIAN.evaluate(p, u, *_grid(half))
    win = GAUSSIAN.window(rc, amp, sr, st, u, half)
    assert np.allclose(win, val, rtol=1e-12, atol=1e-12 * amp.max())
    # a window centred elsewhere is the same profile, shifted
    off = at.astype(np.int64) + [2, -1]
    shifted = GAUSSIAN.window(rc, amp, sr, st, u, half, centre_rc=off)
    p2 = np.column_stack([amp, rc - off, np.log(sr), np.log(st)])
    assert np.allclose(shifted, GAUSSIAN.evaluate(p2, u, *_grid(half))[0], rtol=1e-12, atol=1e-12 * amp.max())


def test_derivatives_match_central_differences():
    rc, amp, sr, st, u = _spots(seed=1)
    dr, dc = _grid(7)
    p = np.column_stack([amp, rc - np.rint(rc), np.log(sr), np.log(st)])
    jac = GAUSSIAN.derivatives(GAUSSIAN.evaluate(p, u, dr, dc)[1], u)
    assert jac.shape == (len(p), GAUSSIAN.n_params) + dr.shape
    for i in range(GAUSSIAN.n_params):
        h = 1e-6 * max(1.0, float(np.abs(p[:, i]).max()))
        e = np.zeros(GAUSSIAN.n_params)
        e[i] = h
        num = (GAUSSIAN.evaluate(p + e, u, dr, dc)[0] - GAUSSIAN.evaluate(p - e, u, dr, dc)[0]) / (2 * h)
        assert np.allclose(jac[:, i], num, rtol=1e-5, atol=1e-6 * amp.max()), i


def test_pixel_integrals_hold_the_volume_and_approach_point_samples_for_wide_spots():
    rc = np.array([[30.3, 41.8], [5.5, 7.25]])
    sigma, amount = np.array([1.1, 4.0]), np.array([1000.0, 250.0])
    r, c, v = GAUSSIAN.pixel_integrals(rc, sigma, amount, 30)
    assert r.shape == c.shape == (2, 61) and v.shape == (2, 61, 61)
    assert r[0, 30] == 30 and c[0, 30] == 42
    assert np.allclose(v.sum(axis=(1, 2)), amount, rtol=1e-12)
    # a wide spot's pixel mean is its value at the pixel centre plus 1/24 of its curvature
    # along each axis, at most peak / (12 σ²) away
    peak = amount[1] / (2 * np.pi * sigma[1] ** 2)
    sampled = GAUSSIAN.window(rc[1:], np.array([peak]), sigma[1:], sigma[1:], np.array([[1.0, 0.0]]), 30)[0]
    gap = np.abs(v[1] - sampled).max()
    assert 0.5 < gap / (peak / (12 * sigma[1] ** 2)) < 1.0


def test_filtered_spot_is_the_convolution_with_the_matched_filter():
    rc, amp, sr, st = np.array([[40.0, 40.0]]), np.array([500.0]), np.array([2.5]), np.array([1.5])
    u = np.array([[0.6, 0.8]])
    img = np.zeros((81, 81))
    img[20:61, 20:61] = GAUSSIAN.window(rc, amp, sr, st, u, 20)[0]
    sigma_f = 2.0
    conv = ndi.gaussian_filter(img, sigma_f, truncate=8.0, mode="constant")
    a2, sr2, st2 = GAUSSIAN.filtered(amp, sr, st, sigma_f)
    model = GAUSSIAN.window(rc, a2, sr2, st2, u, 20)[0]
    # the sampled kernel sums to 1; the rest is sampling of a smooth spot
    assert np.abs(conv[20:61, 20:61] - model).max() < 1e-3 * a2[0]


def test_closed_forms():
    g = GaussianProfile()
    assert g.volume(2.0, 1.5, 3.0) == pytest.approx(2 * np.pi * 9.0)
    assert g.fwhm(1.0) == pytest.approx(2.3548200450309493)  # 2 √(2 ln 2)
    # at the reach a spot is 1/ratio of its peak; at or below ratio 1 it reaches nowhere
    d = g.reach_px(2.0, np.array([100.0, 1.0, 0.5]))
    assert np.exp(-0.5 * (d[0] / 2.0) ** 2) == pytest.approx(0.01) and d[1] == d[2] == 0.0
    a2, s_r, s_t = g.squared(3.0, 2.0, 4.0)
    x = np.linspace(-3, 3, 7)
    assert np.allclose((3.0 * np.exp(-0.5 * (x / 2.0) ** 2)) ** 2, a2 * np.exp(-0.5 * (x / s_r) ** 2))
    assert s_t == pytest.approx(4.0 / np.sqrt(2))
    # beyond the window half-width a spot is below 10⁻⁹ of its peak
    h = int(g.window_half_px(np.array([2.0]), np.array([1.0]))[0])
    assert np.exp(-0.5 * (h / 2.0) ** 2) < 1e-9


def test_round_unit_values_are_the_unit_volume_round_gaussian_bit_for_bit():
    d2 = np.random.default_rng(3).uniform(0.0, 60.0, (4, 50))  # px²
    for sg in (0.7, 1.3, 2.9):
        # exp(−d²/2σ²)/(2πσ²) written out: the profile-fit template must not drift by a bit
        want = np.exp(-d2 / (2.0 * sg * sg)) / (2.0 * np.pi * sg * sg)
        assert np.array_equal(GAUSSIAN.round_unit_values(d2, sg), want)
    # its volume is one: summed over a fine grid (0.05 px cells) out to 8 σ
    o = np.arange(-16.0, 16.0 + 1e-9, 0.05)
    d2 = np.add.outer(o**2, o**2)
    assert abs(GAUSSIAN.round_unit_values(d2, 2.0).sum() * 0.05**2 - 1.0) < 1e-9
