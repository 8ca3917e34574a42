"""Pendry and Zanazzi–Jona R-factors."""

from fractions import Fraction

import numpy as np
import pytest
from numpy.testing import assert_allclose

from analysis.errors import ParameterError
from analysis.rfactor import pairwise_pendry_r, pendry_r, pendry_y, r_factor, zanazzi_jona_r

# Lorentzian test curves (the project's reference set for the Pendry R-factor, computed with numpy.gradient
# and the trapezoid rule from the formula of Pendry, J. Phys. C 13, 937 (1980)): peaks (eV), amplitudes,
# half-width 5 eV, background 0.02, 30–400 eV in 0.5 eV steps.
PEAKS_EV = (55, 92, 140, 190, 255, 330)
AMPS = (1.0, 0.6, 1.3, 0.5, 0.9, 0.4)
E = np.arange(30.0, 400.0 + 1e-9, 0.5)


def lorentz_curve(e, shift_eV=0.0):
    return 0.02 + sum(a * 25.0 / ((e - shift_eV - p) ** 2 + 25.0) for p, a in zip(PEAKS_EV, AMPS))


def test_identical_and_scaled_curves_give_zero():
    # R_P(I, I) = 0 and R_P(I, cI) = 0: Pendry, J. Phys. C 13, 937 (1980) (L = I'/I is scale-free)
    i = lorentz_curve(E)
    assert pendry_r(E, i, i) == 0.0
    assert pendry_r(E, i, 7.5 * i) < 1e-24
    assert zanazzi_jona_r(E, i, i) == 0.0
    assert zanazzi_jona_r(E, i, 0.2 * i) < 1e-12


def test_inverse_curve_gives_two():
    # Y(1/I) = −Y(I) exactly in the continuum, so R_P = ∫4Y²/∫2Y² = 2 (CHECK_VALUES §8);
    # numerical derivatives of 1/I differ by O(h²), hence the 1e-3 tolerance.
    i = lorentz_curve(E)
    assert_allclose(pendry_r(E, i, 1.0 / i), 2.0, atol=1e-3)


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("v0i", [1.0, 4.0, 6.5])
def test_y_is_bounded_by_half_inverse_v0i(seed, v0i):
    # |Y| = |L| / (1 + V0i² L²) ≤ 1 / (2 V0i) for every real L (AM–GM)
    rng = np.random.default_rng(seed)
    e = np.sort(rng.uniform(20.0, 300.0, 400))
    e = np.unique(e)
    i = np.exp(rng.normal(0.0, 2.0, e.size))
    y = pendry_y(e, i, v0i_eV=v0i)
    assert np.all(np.abs(y) <= 1.0 / (2.0 * v0i) + 1e-15)
    assert np.max(np.abs(y)) > 0.5 / (2.0 * v0i)  # the bound is approached, not trivially met


@pytest.mark.parametrize("shift, expected", [(0.5, 0.0050), (1.0, 0.0197), (2.0, 0.0739), (4.0, 0.2450)])
def test_shifted_lorentzian_curve_matches_check_values(shift, expected):
    # CHECK_VALUES §8 [run]: V0i = 4 eV, numpy.gradient, trapezoid rule
    r = pendry_r(E, lorentz_curve(E), lorentz_curve(E, shift), v0i_eV=4.0)
    assert_allclose(r, expected, atol=6e-5)  # the reference is given to 4 decimals


def test_hand_worked_example():
    # Pendry's formula by hand, V0i = 1 eV, E = 0..4 eV in 1 eV steps, trapezoid rule.
    # a = 1,2,3,4,5: I' = 1 everywhere, Y = I/(I² + 1) = 1/2, 2/5, 3/10, 4/17, 5/26.
    # b = 1,1,2,3,5: numpy.gradient gives I' = 0, 1/2, 1, 3/2, 2 (one-sided at the ends),
    # Y = I I'/(I² + I'²) = 0, 2/5, 2/5, 2/5, 10/29.
    ya = [Fraction(1, 2), Fraction(2, 5), Fraction(3, 10), Fraction(4, 17), Fraction(5, 26)]
    yb = [Fraction(0), Fraction(2, 5), Fraction(2, 5), Fraction(2, 5), Fraction(10, 29)]
    w = [Fraction(1, 2), 1, 1, 1, Fraction(1, 2)]  # trapezoid weights, h = 1 eV
    num = sum(wi * (p - q) ** 2 for wi, p, q in zip(w, ya, yb))
    den = sum(wi * (p * p + q * q) for wi, p, q in zip(w, ya, yb))
    e = np.arange(5.0)
    assert_allclose(pendry_y(e, [1, 2, 3, 4, 5], v0i_eV=1.0), [float(x) for x in ya], rtol=1e-14)
    assert_allclose(pendry_y(e, [1, 1, 2, 3, 5], v0i_eV=1.0), [float(x) for x in yb], rtol=1e-14)
    assert_allclose(pendry_r(e, [1, 2, 3, 4, 5], [1, 1, 2, 3, 5], v0i_eV=1.0), float(num / den), rtol=1e-13)


def test_unrelated_curves_average_near_one():
    # CHECK_VALUES §8 [run]: uncorrelated pairs average ≈ 1
    rng = np.random.default_rng(3)
    rs = []
    for _ in range(40):
        pa, pb = rng.uniform(30, 400, 8), rng.uniform(30, 400, 8)
        a = 0.02 + sum(25.0 / ((E - p) ** 2 + 25.0) for p in pa)
        b = 0.02 + sum(25.0 / ((E - p) ** 2 + 25.0) for p in pb)
        rs.append(pendry_r(E, a, b))
    assert 0.85 < np.mean(rs) < 1.15


def test_gaps_split_runs_and_overlap_is_counted():
    i = lorentz_curve(E)
    j = lorentz_curve(E, 1.0)
    j_gap = j.copy()
    j_gap[(E > 150) & (E < 160)] = np.nan
    full = pendry_r(E, i, j)
    gapped = pendry_r(E, i, j_gap)
    assert np.isfinite(gapped) and abs(gapped - full) < 0.01
    r = r_factor([(E, i)], [(E, j_gap)])
    # 30–400 eV minus the open interval (150, 160) on a 0.5 eV grid: runs 30–150 and 160–400
    assert_allclose(r.overlap_eV, [120.0 + 240.0])


def test_different_grids_are_compared_on_their_overlap():
    ea = np.arange(50.0, 300.0, 0.5)
    eb = np.arange(100.0, 400.0, 1.0)
    r = r_factor([(ea, lorentz_curve(ea))], [(eb, lorentz_curve(eb))])
    assert_allclose(r.overlap_eV, [299.5 - 100.0], atol=0.5)
    assert r.value < 2e-3  # same curve; only interpolation of the 1 eV grid differs


def test_multi_beam_pendry_is_pooled_not_averaged():
    i1, i2 = lorentz_curve(E), lorentz_curve(E)[::-1].copy()
    s1, s2 = lorentz_curve(E, 2.0), lorentz_curve(E, -4.0)[::-1].copy()
    r = r_factor([(E, i1), (E, i2)], [(E, s1), (E, s2)])
    num = den = 0.0
    for a, b in ((i1, s1), (i2, s2)):
        ya, yb = pendry_y(E, a), pendry_y(E, b)
        num += np.trapezoid((ya - yb) ** 2, E)
        den += np.trapezoid(ya**2 + yb**2, E)
    assert_allclose(r.value, num / den, rtol=1e-12)
    assert r.per_beam[0] < r.value < r.per_beam[1]


def test_pairwise_equivalent_beams():
    a, b = lorentz_curve(E), 3.0 * lorentz_curve(E, 1.0)
    r = pairwise_pendry_r([(E, a), (E, b), (E, a)])
    assert r.per_beam.shape == (3,)
    assert r.per_beam[1] == 0.0  # pair (0, 2) is identical
    assert_allclose(r.per_beam[0], 0.0197, atol=6e-5)  # the 1 eV shift of CHECK_VALUES §8


def test_bad_input_messages():
    with pytest.raises(ParameterError, match="v0i_eV"):
        pendry_y(E, lorentz_curve(E), v0i_eV=0.0)
    with pytest.raises(ParameterError, match="increase strictly"):
        pendry_r([1.0, 3.0, 2.0], [1, 2, 3], [1, 2, 3])
    with pytest.raises(ParameterError, match="energy has 3 points but intensity has 2"):
        pendry_y([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(ParameterError, match="at least 2 equivalent beams"):
        pairwise_pendry_r([(E, lorentz_curve(E))])
    with pytest.raises(ParameterError, match="'pendry' or 'zanazzi-jona'"):
        r_factor([(E, E)], [(E, E)], kind="other")
    assert np.isnan(pendry_r([1.0, 2.0], [1.0, 2.0], [1.0, 2.0]))  # too short to differentiate
