"""Lattice points inside a momentum radius (analysis.lattice)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from analysis.errors import ParameterError
from analysis.lattice import lattice_points, screen_g_max
from analysis.nets import parse_substrate, reciprocal
from analysis.optics import wavelength_A


def brute_force(basis, g_max, metric, n=40):
    """Every n @ basis with |n| ≤ `n` inside the radius, lexicographic in n."""
    out = []
    for i in range(-n, n + 1):
        for j in range(-n, n + 1):
            p = np.array([i, j], float) @ basis
            if np.hypot(*(p @ metric)) <= g_max:
                out.append(p)
    return np.array(out).reshape(-1, 2)


@pytest.mark.parametrize("spec", ["Pt(111)", "Cu(100)", "Cu(110)", "W(110)", "oblique:3.1,4.3,104"])
@pytest.mark.parametrize("matrix", [np.eye(2), np.array([[2.0, 1.0], [-1.0, 1.0]]), np.array([[1.5, 0.0], [0.0, 1.5]])])
def test_points_are_those_inside_the_radius_in_lexicographic_order(spec, matrix):
    a_star = reciprocal(parse_substrate(spec)).vectors
    b_star_hk = np.linalg.inv(matrix).T
    g_max = screen_g_max(120.0, 52.0)
    got = lattice_points(b_star_hk, g_max, metric=a_star)
    want = brute_force(b_star_hk, g_max, a_star)
    assert got.shape == want.shape
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)


def test_identity_basis_gives_integer_indices():
    a_star = reciprocal(parse_substrate("Cu(100)")).vectors
    hk = lattice_points(np.eye(2), 1.0, metric=a_star)
    assert np.array_equal(hk, np.rint(hk))
    assert [0.0, 0.0] in hk.tolist() and len(hk) > 1


def test_screen_g_max_is_sin_acceptance_over_wavelength():
    # sin θ = λ |g| (crystallographic momenta, no 2π)
    assert screen_g_max(100.0, 52.0) == pytest.approx(math.sin(math.radians(52.0)) / wavelength_A(100.0), rel=1e-15)
    assert screen_g_max(100.0, 52.0, relativistic=True) > screen_g_max(100.0, 52.0)


def test_too_many_points_raise_a_parameter_error():
    with pytest.raises(ParameterError, match=r"Too many lattice points to enumerate \(\d+ candidates"):
        lattice_points(np.eye(2) * 1e-3, 1.0, max_points=1000)


@pytest.mark.parametrize("g_max", [float("nan"), float("inf"), -1.0])
def test_radius_must_be_finite_and_not_negative(g_max):
    with pytest.raises(ParameterError, match="`g_max` must be a finite momentum"):
        lattice_points(np.eye(2), g_max)


def test_singular_basis_is_refused():
    with pytest.raises(ParameterError, match="singular"):
        lattice_points(np.array([[1.0, 0.0], [2.0, 0.0]]), 1.0)
