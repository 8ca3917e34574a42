"""Predicted beams against observed spots: where a beam lands on the screen, where a
spot could have been seen, one-to-one matching of predictions to spots, and tests for
simple fractional indices.

Positions are (x, y) pixels, x right, y down; reciprocal vectors are crystallographic
(Å⁻¹, no 2π).
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from ..optics import ScreenGeometry, momentum_to_pixels


def _screen_xy(g: np.ndarray, energy_eV: float, geom: ScreenGeometry) -> np.ndarray:
    xy, _ = momentum_to_pixels(g, energy_eV, geom)
    return xy


def _match(pred: np.ndarray, obs_tree: cKDTree, tol, brightness: np.ndarray | None = None
           ) -> tuple[np.ndarray, np.ndarray]:
    """Observed spot for each prediction within tol (a number, or one per prediction):
    (pred index, obs index), one-to-one. The nearest spot, or with `brightness` the
    brightest one within tol (substrate beams outshine satellites crowding around them)."""
    ok = np.all(np.isfinite(pred), axis=1)
    if not ok.any():
        return np.zeros(0, int), np.zeros(0, int)
    tol_each = np.broadcast_to(np.asarray(tol, dtype=np.float64), (len(pred),))[ok]
    if brightness is not None:
        d = np.full(int(ok.sum()), np.inf)
        j = np.full(int(ok.sum()), obs_tree.n)
        for n, (p, t) in enumerate(zip(pred[ok], tol_each)):
            near = obs_tree.query_ball_point(p, t)
            if near:
                k = max(near, key=lambda q: brightness[q])
                j[n], d[n] = k, float(np.hypot(*(obs_tree.data[k] - p)))
    else:
        d, j = obs_tree.query(pred[ok], distance_upper_bound=float(tol_each.max()))
    idx = np.flatnonzero(ok)
    hit = np.isfinite(d) & (d <= tol_each)
    pi, oj, dd = idx[hit], j[hit], d[hit]
    order = np.argsort(dd)  # one-to-one: closest pairs first
    used_o, used_p, keep = set(), set(), []
    for t in order:
        if oj[t] in used_o or pi[t] in used_p:
            continue
        used_o.add(oj[t])
        used_p.add(pi[t])
        keep.append(t)
    keep = np.array(keep, dtype=int)
    return pi[keep], oj[keep]


def _seen(xy: np.ndarray, valid: np.ndarray | None, center: np.ndarray, r_max: float, r_min: float) -> np.ndarray:
    """Which predicted pixel positions lie where a spot could have been seen."""
    ok = np.all(np.isfinite(xy), axis=1)
    r = np.hypot(xy[:, 0] - center[0], xy[:, 1] - center[1])
    ok &= (r <= r_max) & (r >= r_min)
    if valid is not None:
        rows, cols = valid.shape
        safe = np.where(np.isfinite(xy), xy, -1.0)
        ok &= (safe[:, 0] >= 0) & (safe[:, 0] <= cols - 1) & (safe[:, 1] >= 0) & (safe[:, 1] <= rows - 1)
        ci = np.rint(safe[ok, 0]).astype(int)
        ri = np.rint(safe[ok, 1]).astype(int)
        ok[ok] &= valid[ri, ci]
    return ok


def _nn_spacing(tree: cKDTree) -> float:
    """Median nearest-neighbour distance between spots, pixels."""
    if tree.n < 2:
        return np.inf
    d, _ = tree.query(tree.data, k=2)
    return float(np.median(d[:, 1]))


def _is_rational(hk: np.ndarray, max_den: int, tol: float) -> bool:
    for q in range(1, max_den + 1):
        if np.all(np.abs(hk * q - np.rint(hk * q)) <= tol * q):
            return True
    return False


def _rational_residual(hk: np.ndarray, a_star: np.ndarray, max_den: int = 8) -> np.ndarray:
    """Distance (Å⁻¹) of each hk to the nearest fraction with denominator ≤ max_den."""
    best = np.full(len(hk), np.inf)
    for q in range(1, max_den + 1):
        d = (hk - np.rint(hk * q) / q) @ a_star
        best = np.minimum(best, np.hypot(d[:, 0], d[:, 1]))
    return best
