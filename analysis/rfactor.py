"""Reliability factors between I(V) curves: Pendry's R_P and the Zanazzi–Jona R_ZJ.

Curves are (energy, intensity) pairs: ``energy_eV`` a (N,) increasing array in eV and
``intensity`` a (N,) array in any linear unit; NaN marks points that are missing
(a beam off the screen, under the gun, saturated). Two curves are compared only on
their common energy range, on points where both are valid; a gap splits a curve into
runs, and derivatives are never taken across a gap.

Pendry, J. Phys. C 13, 937 (1980):

    L = I′ / I,   Y = L / (1 + V0i² L²) = I I′ / (I² + V0i² I′²),
    R_P = Σ_beams ∫ (Y_a − Y_b)² dE  /  Σ_beams ∫ (Y_a² + Y_b²) dE,

with V0i the imaginary part of the inner potential (≈ 4–5 eV). R_P is 0 for identical
curves, 0 for curves that differ by a constant factor, 2 for anti-correlated curves
(I and 1/I), and ≈ 1 for unrelated ones.

Zanazzi & Jona, Surf. Sci. 62, 61 (1977) (the form used here is written from memory):

    c = ∫ I_a / ∫ I_b,
    w(E) = |c I_b″ − I_a″| / (|I_a′| + max |I_a′|),
    R_ZJ = ∫ w |c I_b′ − I_a′| dE / (0.027 ∫ I_a dE),

returned as the "reduced" value (divided by 0.027, its expected value for unrelated
curves). Curve ``a`` plays the role of the experiment.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .errors import ParameterError

__all__ = [
    "pendry_y",
    "pendry_r",
    "zanazzi_jona_r",
    "r_factor",
    "pairwise_pendry_r",
    "RFactor",
    "ZJ_NORMALISATION",
]

# Normalisation of the Zanazzi–Jona R-factor (its mean for uncorrelated curves);
# Zanazzi & Jona, Surf. Sci. 62, 61 (1977), from memory.
ZJ_NORMALISATION = 0.027

_MIN_RUN = 3  # points needed for a derivative that is not pure end-point differences


@dataclass(frozen=True, eq=False)
class RFactor:
    """An R-factor over several beams.

    Attributes
    ----------
    value : float
        The combined R-factor (NaN when no beam has a common energy range).
    per_beam : (B,) ndarray of float64
        The R-factor of each beam pair on its own (NaN where there is no overlap).
    overlap_eV : (B,) ndarray of float64
        Energy range in eV over which each pair was compared (sum of its runs).
    kind : str
        ``"pendry"`` or ``"zanazzi-jona"``.
    v0i_eV : float
        V0i used for the Pendry Y-function (eV).
    """

    value: float
    per_beam: np.ndarray
    overlap_eV: np.ndarray
    kind: str
    v0i_eV: float

    @property
    def total_overlap_eV(self) -> float:
        """Sum of the beams' compared energy ranges, eV."""
        return float(np.sum(self.overlap_eV))


def _check_v0i(v0i_eV: float) -> float:
    v = float(v0i_eV)
    if not (v > 0 and np.isfinite(v)):
        raise ParameterError(f"`v0i_eV` must be a positive number of eV, got {v0i_eV!r}.")
    return v


def _as_curve(energy_eV, intensity, what: str) -> tuple[np.ndarray, np.ndarray]:
    e = np.asarray(energy_eV, dtype=np.float64).ravel()
    i = np.asarray(intensity, dtype=np.float64).ravel()
    if e.shape != i.shape:
        raise ParameterError(f"{what}: energy has {e.size} points but intensity has {i.size}.")
    if e.size and not np.all(np.isfinite(e)):
        raise ParameterError(f"{what}: energies must be finite numbers.")
    if e.size > 1 and np.any(np.diff(e) <= 0):
        k = int(np.flatnonzero(np.diff(e) <= 0)[0])
        raise ParameterError(f"{what}: energies must increase strictly, got {e[k]:g} then {e[k + 1]:g} eV.")
    return e, i


def _runs(valid: np.ndarray) -> list[slice]:
    """Contiguous runs of True in `valid` with at least _MIN_RUN points."""
    v = np.concatenate([[False], valid, [False]])
    d = np.diff(v.astype(np.int8))
    starts, stops = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    return [slice(a, b) for a, b in zip(starts, stops) if b - a >= _MIN_RUN]


def pendry_y(energy_eV, intensity, *, v0i_eV: float = 4.0) -> np.ndarray:
    """Pendry's Y-function of one curve.

    Parameters
    ----------
    energy_eV : (N,) array_like of float
        Strictly increasing energies in eV.
    intensity : (N,) array_like of float
        Intensities; NaN marks missing points (derivatives stop at gaps).
    v0i_eV : float, keyword-only
        Imaginary part of the inner potential, eV (> 0).

    Returns
    -------
    (N,) ndarray of float64
        Y in eV⁻¹, |Y| ≤ 1 / (2 V0i); NaN on missing points and on runs shorter
        than 3 points. Derivatives use :func:`numpy.gradient` (second order inside).

    Examples
    --------
    >>> e = np.linspace(50.0, 60.0, 101)
    >>> y = pendry_y(e, np.exp(0.1 * e), v0i_eV=4.0)   # L = 0.1 eV⁻¹ everywhere
    >>> print(round(float(y[50]), 5), round(0.1 / (1 + 16 * 0.01), 5))
    0.08621 0.08621
    """
    v0i = _check_v0i(v0i_eV)
    e, i = _as_curve(energy_eV, intensity, "pendry_y")
    y = np.full(e.shape, np.nan)
    for run in _runs(np.isfinite(i)):
        ii = i[run]
        d = np.gradient(ii, e[run])
        den = ii * ii + v0i * v0i * d * d
        with np.errstate(invalid="ignore", divide="ignore"):
            y[run] = np.where(den > 0, ii * d / np.where(den > 0, den, 1.0), 0.0)
    return y


def _common(ea, ia, eb, ib, step_eV) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Both curves on one grid over their common range; NaN where either is missing."""
    if ea.shape == eb.shape and np.allclose(ea, eb, rtol=0, atol=1e-9) and step_eV is None:
        grid = ea
        a, b = ia.copy(), ib.copy()
    else:
        lo, hi = max(ea[0], eb[0]), min(ea[-1], eb[-1])
        if not hi > lo:
            return np.empty(0), np.empty(0), np.empty(0)
        if step_eV is None:
            step = min(np.min(np.diff(ea)), np.min(np.diff(eb)))
        else:
            step = float(step_eV)
            if not (step > 0 and np.isfinite(step)):
                raise ParameterError(f"`step_eV` must be positive, got {step_eV!r}.")
        n = int(np.floor((hi - lo) / step + 1e-9)) + 1
        grid = lo + step * np.arange(n)
        a, b = _interp_gapped(ea, ia, grid), _interp_gapped(eb, ib, grid)
    both = np.isfinite(a) & np.isfinite(b)
    a[~both] = np.nan
    b[~both] = np.nan
    return grid, a, b


def _interp_gapped(e: np.ndarray, i: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Linear interpolation that never bridges a missing point (NaN there instead)."""
    if e.size < 2:
        return np.full(x.shape, np.nan)
    j = np.clip(np.searchsorted(e, x, side="right"), 1, e.size - 1)
    e0, e1, i0, i1 = e[j - 1], e[j], i[j - 1], i[j]
    t = (x - e0) / (e1 - e0)
    out = i0 + t * (i1 - i0)
    exact0, exact1 = np.isclose(t, 0.0, atol=1e-9), np.isclose(t, 1.0, atol=1e-9)
    out = np.where(exact0, i0, np.where(exact1, i1, out))
    ok = np.where(exact0, np.isfinite(i0), np.where(exact1, np.isfinite(i1), np.isfinite(i0) & np.isfinite(i1)))
    ok &= (x >= e[0] - 1e-9) & (x <= e[-1] + 1e-9)
    out[~ok] = np.nan
    return out


def _pendry_parts(grid, a, b, v0i) -> tuple[float, float, float]:
    """(∫(Ya − Yb)², ∫(Ya² + Yb²), compared range in eV) over the valid runs."""
    num = den = width = 0.0
    for run in _runs(np.isfinite(a)):
        e = grid[run]
        ya, yb = pendry_y(e, a[run], v0i_eV=v0i), pendry_y(e, b[run], v0i_eV=v0i)
        num += float(np.trapezoid((ya - yb) ** 2, e))
        den += float(np.trapezoid(ya * ya + yb * yb, e))
        width += float(e[-1] - e[0])
    return num, den, width


def pendry_r(energy_eV, intensity_a, intensity_b, *, v0i_eV: float = 4.0,
             energy_b_eV=None, step_eV: float | None = None) -> float:
    """Pendry R-factor between two curves.

    Parameters
    ----------
    energy_eV : (N,) array_like of float
        Energies of `intensity_a` (eV, strictly increasing).
    intensity_a, intensity_b : array_like of float
        The two curves; NaN marks missing points.
    v0i_eV : float, keyword-only
        Imaginary part of the inner potential, eV.
    energy_b_eV : (M,) array_like of float, optional
        Energies of `intensity_b` when they differ from `energy_eV`; both curves are then
        interpolated linearly onto a common grid over the overlap.
    step_eV : float, optional
        Step of that common grid (default: the finer of the two steps).

    Returns
    -------
    float
        R_P in [0, 2]; NaN when the curves have no common range of 3 valid points.

    Examples
    --------
    >>> e = np.arange(30.0, 200.0, 0.5)
    >>> i = 1.0 + np.sin(e / 7.0) ** 2
    >>> print(round(pendry_r(e, i, 3.0 * i), 12), round(pendry_r(e, i, 1.0 / i), 3))
    0.0 2.0
    """
    v0i = _check_v0i(v0i_eV)
    ea, ia = _as_curve(energy_eV, intensity_a, "curve a")
    eb, ib = _as_curve(ea if energy_b_eV is None else energy_b_eV, intensity_b, "curve b")
    grid, a, b = _common(ea, ia, eb, ib, step_eV)
    num, den, _ = _pendry_parts(grid, a, b, v0i)
    return num / den if den > 0 else float("nan")


def zanazzi_jona_r(energy_eV, intensity_a, intensity_b, *, energy_b_eV=None,
                   step_eV: float | None = None) -> float:
    """Reduced Zanazzi–Jona R-factor between curve a (experiment) and curve b.

    Missing-point rules as in :func:`pendry_r`.

    Parameters
    ----------
    energy_eV : (N,) array_like of float
        Energies of `intensity_a` (eV, strictly increasing).
    intensity_a, intensity_b : array_like of float
        Experiment and the curve compared with it; NaN marks missing points.
    energy_b_eV : (M,) array_like of float, optional, keyword-only
        Energies of `intensity_b` when they differ from `energy_eV`.
    step_eV : float, optional, keyword-only
        Step of the common grid (default: the finer of the two steps).

    Returns
    -------
    float
        R_ZJ / 0.027 (≥ 0); 0 for identical curves and for curves that differ by a
        constant factor; NaN when there is no common range.

    Examples
    --------
    >>> e = np.arange(30.0, 200.0, 0.5)
    >>> i = 1.0 + np.sin(e / 7.0) ** 2
    >>> print(round(zanazzi_jona_r(e, i, 5.0 * i), 12))
    0.0
    """
    ea, ia = _as_curve(energy_eV, intensity_a, "curve a")
    eb, ib = _as_curve(ea if energy_b_eV is None else energy_b_eV, intensity_b, "curve b")
    grid, a, b = _common(ea, ia, eb, ib, step_eV)
    num, den, _ = _zj_parts(grid, a, b)
    return num / den if den > 0 else float("nan")


def _zj_parts(grid, a, b) -> tuple[float, float, float]:
    runs = _runs(np.isfinite(a))
    if not runs:
        return 0.0, 0.0, 0.0
    sa = sum(float(np.trapezoid(a[r], grid[r])) for r in runs)
    sb = sum(float(np.trapezoid(b[r], grid[r])) for r in runs)
    if sb == 0.0:
        return 0.0, 0.0, 0.0
    c = sa / sb
    d1 = [(np.gradient(a[r], grid[r]), np.gradient(b[r], grid[r])) for r in runs]
    amax = max(float(np.max(np.abs(da))) for da, _ in d1)
    num = width = 0.0
    for r, (da, db) in zip(runs, d1):
        e = grid[r]
        d2a, d2b = np.gradient(da, e), np.gradient(db, e)
        w = np.abs(c * d2b - d2a) / (np.abs(da) + amax) if amax > 0 else np.zeros_like(e)
        num += float(np.trapezoid(w * np.abs(c * db - da), e))
        width += float(e[-1] - e[0])
    return num, ZJ_NORMALISATION * abs(sa), width


def r_factor(curves_a: Sequence[tuple], curves_b: Sequence[tuple], *, kind: str = "pendry",
             v0i_eV: float = 4.0, step_eV: float | None = None) -> RFactor:
    """R-factor over several beams.

    Parameters
    ----------
    curves_a, curves_b : sequence of (energy_eV, intensity) pairs
        Beam ``j`` of `curves_a` is compared with beam ``j`` of `curves_b`; each pair of
        arrays is (N_j,) with energies in eV. NaN marks missing points.
    kind : {"pendry", "zanazzi-jona"}, keyword-only
        Pendry: Σ∫(Ya − Yb)² / Σ∫(Ya² + Yb²) over all beams (beams weighted by their
        overlap automatically). Zanazzi–Jona: the mean of the beams' reduced R_ZJ,
        weighted by each beam's compared energy range.
    v0i_eV : float, keyword-only
        Imaginary part of the inner potential, eV (Pendry only).
    step_eV : float, optional, keyword-only
        Common-grid step where a pair's energies differ (eV).

    Returns
    -------
    RFactor
        The value and each beam's R-factor.

    Examples
    --------
    >>> e = np.arange(40.0, 300.0, 1.0)
    >>> a = [(e, 1 + np.cos(e / 9.0) ** 2), (e, 2 + np.sin(e / 13.0))]
    >>> r = r_factor(a, [(e, 2 * i) for _, i in a])
    >>> print(round(r.value, 12), r.overlap_eV.tolist())
    0.0 [259.0, 259.0]
    """
    if len(curves_a) != len(curves_b):
        raise ParameterError(f"`curves_a` has {len(curves_a)} beams but `curves_b` has {len(curves_b)}.")
    if kind not in ("pendry", "zanazzi-jona"):
        raise ParameterError(f"`kind` must be 'pendry' or 'zanazzi-jona', got {kind!r}.")
    v0i = _check_v0i(v0i_eV)
    nums, dens, widths = [], [], []
    for j, ((ea, ia), (eb, ib)) in enumerate(zip(curves_a, curves_b)):
        ea, ia = _as_curve(ea, ia, f"beam {j} (a)")
        eb, ib = _as_curve(eb, ib, f"beam {j} (b)")
        grid, a, b = _common(ea, ia, eb, ib, step_eV)
        parts = _pendry_parts(grid, a, b, v0i) if kind == "pendry" else _zj_parts(grid, a, b)
        nums.append(parts[0])
        dens.append(parts[1])
        widths.append(parts[2])
    nums, dens, widths = map(np.asarray, (nums, dens, widths))
    with np.errstate(invalid="ignore", divide="ignore"):
        per = np.where(dens > 0, nums / np.where(dens > 0, dens, 1.0), np.nan)
    if kind == "pendry":
        value = float(nums.sum() / dens.sum()) if dens.sum() > 0 else float("nan")
    else:
        ok = np.isfinite(per) & (widths > 0)
        value = float(np.sum(per[ok] * widths[ok]) / np.sum(widths[ok])) if ok.any() else float("nan")
    return RFactor(value, per, widths.astype(np.float64), kind, v0i)


def pairwise_pendry_r(curves: Sequence[tuple], *, v0i_eV: float = 4.0,
                      step_eV: float | None = None) -> RFactor:
    """Pendry R-factor among equivalent beams: all pairs pooled.

    Parameters
    ----------
    curves : sequence of (energy_eV, intensity) pairs
        Two or more curves that symmetry says should be identical.
    v0i_eV : float, keyword-only
        Imaginary part of the inner potential, eV.
    step_eV : float, optional, keyword-only
        Common-grid step where a pair's energies differ (eV).

    Returns
    -------
    RFactor
        `value` = Σ_pairs ∫(Y_i − Y_j)² / Σ_pairs ∫(Y_i² + Y_j²); `per_beam` and
        `overlap_eV` list the pairs in the order (0,1), (0,2), …, (1,2), ….

    Examples
    --------
    >>> e = np.arange(40.0, 300.0, 1.0)
    >>> i = 1 + np.cos(e / 9.0) ** 2
    >>> print(round(pairwise_pendry_r([(e, i), (e, 2 * i), (e, 0.5 * i)]).value, 12))
    0.0
    """
    n = len(curves)
    if n < 2:
        raise ParameterError(f"`curves` needs at least 2 equivalent beams, got {n}.")
    pa, pb = [], []
    for i in range(n):
        for j in range(i + 1, n):
            pa.append(curves[i])
            pb.append(curves[j])
    return r_factor(pa, pb, kind="pendry", v0i_eV=v0i_eV, step_eV=step_eV)
