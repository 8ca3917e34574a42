"""I(V) curves: smoothing, and the averaging of symmetry-equivalent beams.

:func:`smooth_curve` smooths one curve with a Gaussian that never bridges a gap;
:func:`average_equivalent` scales the members of each equivalence class to a common
level, averages them (:class:`BeamGroup`) and rates their agreement with the Pendry
and Zanazzi–Jona R-factors. Energies are eV; intensities are in the frames' units.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..rfactor import pairwise_pendry_r, zanazzi_jona_r
from .track import IVResult

__all__ = ["BeamGroup", "average_equivalent", "smooth_curve"]


def smooth_curve(energy_eV, intensity, *, fwhm_eV: float) -> np.ndarray:
    """Gaussian smoothing of one I(V) curve that never bridges a gap.

    Parameters
    ----------
    energy_eV : (F,) array_like of float
        Monotonic energies, eV.
    intensity : (F,) array_like of float
        NaN marks missing points; they stay NaN and neighbours on either side of a gap
        are smoothed separately.
    fwhm_eV : float, keyword-only
        Full width at half maximum of the Gaussian kernel, eV (0 returns a copy).

    Returns
    -------
    (F,) ndarray of float64
        The smoothed curve (NaN where the input is).

    Examples
    --------
    >>> e = np.arange(0.0, 10.0)
    >>> out = smooth_curve(e, [0, 0, 0, 0, 9, 0, 0, np.nan, 5, 5], fwhm_eV=2.0)
    >>> print(round(float(out[4]), 3), np.isnan(out[7]), out[8:].tolist())
    4.231 True [5.0, 5.0]
    """
    e = np.asarray(energy_eV, dtype=np.float64).reshape(-1)
    y = np.asarray(intensity, dtype=np.float64).reshape(-1)
    if e.shape != y.shape:
        raise ParameterError(f"`energy_eV` has {e.size} points but `intensity` has {y.size}.")
    if not (fwhm_eV >= 0 and math.isfinite(fwhm_eV)):
        raise ParameterError(f"`fwhm_eV` must be ≥ 0 eV, got {fwhm_eV!r}.")
    out = y.copy()
    if fwhm_eV == 0 or y.size == 0:
        return out
    s = fwhm_eV / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    ok = np.isfinite(y)
    run_id = np.cumsum(np.concatenate([[0], (ok[1:] != ok[:-1]).astype(int)]))
    for r in np.unique(run_id[ok]):
        sel = np.flatnonzero(run_id == r)
        d = e[sel, None] - e[None, sel]
        w = np.exp(-0.5 * (d / s) ** 2)
        out[sel] = (w @ y[sel]) / w.sum(axis=1)
    return out


@dataclass(frozen=True, eq=False)
class BeamGroup:
    """Symmetry-equivalent beams averaged into one curve.

    Attributes
    ----------
    label : str
        Heading of the group (its first member).
    members : tuple of str
        Labels of the beams averaged.
    energy_eV : (F,) ndarray of float64
    intensity : (F,) ndarray of float64
        Mean of the members valid at each energy, each member scaled to the group's
        mean over their common energies; NaN where no member is valid.
    sigma : (F,) ndarray of float64
    n_used : (F,) ndarray of int64
        Members averaged at each energy.
    r_pendry : float
        Pendry R-factor pooled over all member pairs (NaN for a single beam).
    r_zj : float
        Mean reduced Zanazzi–Jona R-factor over ordered member pairs (NaN for one beam).
    overlap_eV : float
        Energy range in eV where every member is valid.
    range_eV : float
        Energy range in eV where at least one member is valid.
    """

    label: str
    members: tuple
    energy_eV: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    n_used: np.ndarray
    r_pendry: float
    r_zj: float
    overlap_eV: float
    range_eV: float


def _covered_eV(e: np.ndarray, ok: np.ndarray) -> float:
    both = ok[1:] & ok[:-1]
    return float(np.sum(np.abs(np.diff(e)) * both))


def average_equivalent(result: IVResult, *, v0i_eV: float = 4.0, smooth_eV: float = 0.0,
                       include_empty: bool = False) -> list[BeamGroup]:
    """Average the symmetry-equivalent beams of a series and rate their agreement.

    Parameters
    ----------
    result : IVResult
        What :func:`analysis.series.track_series` measured.
    v0i_eV : float, keyword-only
        V0i for the Pendry R-factor among members, eV.
    smooth_eV : float, keyword-only
        Gaussian FWHM applied to each member first (0: none).
    include_empty : bool, keyword-only
        Keep groups with no valid point.

    Returns
    -------
    list of BeamGroup
        In the order of the beams' equivalence classes.
    """
    e = result.energy_eV
    order = np.argsort(e)
    es = e[order]
    groups: list[BeamGroup] = []
    for gid in np.unique(result.beams.group):
        idx = np.flatnonzero(result.beams.group == gid)
        curves, sigmas = [], []
        for j in idx:
            _, i, s = result.curve(int(j))
            i, s = i[order], s[order]
            if smooth_eV:
                i = smooth_curve(es, i, fwhm_eV=smooth_eV)
            curves.append(i)
            sigmas.append(s)
        cur = np.array(curves)
        sig = np.array(sigmas)
        ok = np.isfinite(cur)
        if not ok.any() and not include_empty:
            continue
        keep = ok.any(axis=1)  # members never seen do not count
        idx, cur, sig, ok = idx[keep] if keep.any() else idx, cur[keep] if keep.any() else cur, \
            sig[keep] if keep.any() else sig, ok[keep] if keep.any() else ok
        common = ok.all(axis=0)
        factors = np.ones(len(idx))
        if len(idx) > 1 and common.sum() >= 3:
            sums = np.nansum(np.where(common, cur, 0.0), axis=1)
            if np.all(sums > 0):
                factors = sums.mean() / sums
        scaled = cur * factors[:, None]
        n_used = ok.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(n_used > 0, np.nansum(np.where(ok, scaled, 0.0), axis=0) / np.maximum(n_used, 1), np.nan)
            sg = np.sqrt(np.nansum(np.where(ok, (sig * factors[:, None]) ** 2, 0.0), axis=0)) / np.maximum(n_used, 1)
        sg = np.where(n_used > 0, sg, np.nan)
        r_p = r_zj = float("nan")
        if len(idx) > 1:
            pairs = [(es, scaled[m]) for m in range(len(idx))]
            r = pairwise_pendry_r(pairs, v0i_eV=v0i_eV)
            r_p = r.value
            zj = [zanazzi_jona_r(es, scaled[a], scaled[b]) for a in range(len(idx)) for b in range(len(idx)) if a != b]
            zj = [z for z in zj if np.isfinite(z)]
            r_zj = float(np.mean(zj)) if zj else float("nan")
        inv = np.argsort(order)  # back to frame order
        labels = tuple(result.beams.labels[j] for j in idx)
        groups.append(BeamGroup(labels[0], labels, e.copy(), mean[inv], sg[inv], n_used[inv].astype(np.int64),
                                r_p, r_zj, _covered_eV(es, common), _covered_eV(es, n_used > 0)))
    return groups
