"""The camera fit's bounded Levenberg–Marquardt (indexing.camera_refit._bounded_lm) against
scipy.optimize.least_squares (trust-region reflective with bounds) as the reference."""

import numpy as np
from scipy.optimize import least_squares

from analysis.indexing.camera_refit import _bounded_lm


def _problem():
    # a decay a·exp(−b t) + c·t² fitted to a rising curve: the unconstrained optimum has b < 0,
    # so with b ≥ 0 the optimum sits on that bound while a and c stay free
    t = np.linspace(0.0, 2.0, 30)
    y = 1.5 * np.exp(0.4 * t) + 0.1 * np.sin(7 * t)
    f = lambda p: p[0] * np.exp(-p[1] * t) + p[2] * t**2 - y  # noqa: E731
    j = lambda p: np.column_stack([np.exp(-p[1] * t), -p[0] * t * np.exp(-p[1] * t), t**2])  # noqa: E731
    return f, j, np.array([1.0, 0.3, 0.0]), np.array([-10.0, 0.0, -10.0]), np.array([10.0, 5.0, 10.0])


def test_an_optimum_on_a_bound_matches_scipy_and_converges_in_few_steps():
    f, j, x0, lo, hi = _problem()
    calls = []
    x, _ = _bounded_lm(lambda p: (calls.append(1), f(p))[1], j, x0, lo, hi, rtol=1e-10)
    ref = least_squares(f, x0, jac=j, bounds=(lo, hi), method="trf", xtol=1e-14, ftol=1e-14, gtol=1e-14)
    assert ref.active_mask[1] == -1  # the reference also ends on the lower bound of b
    assert x[1] == 0.0
    np.testing.assert_allclose(x, ref.x, atol=1e-7)
    # a parameter held at its bound must not stall the others (a clipped step zig-zags):
    # a quadratic-convergence fit of three parameters needs a handful of steps, not dozens
    assert len(calls) <= 20, len(calls)
