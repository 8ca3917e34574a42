"""Spots that share a fit window: which they are, and their joint refits (block
Gauss–Seidel over a colouring of the overlap graph, each spot fitted with its
neighbours' models removed).
"""

from __future__ import annotations

import numpy as np

from .fit import (
    _FixedAxis,
    FLAG_FIT_FAILED,
    FLAG_NEAR_EDGE,
    _PROFILE,
    _add_windows,
    _concat,
    _fit_candidates,
    _from_fit,
    _render,
    _spot_windows,
    _spots_dict,
    _start_widths,
    _take,
    _unit_radial,
)


def _fit_pass1(fitter, res, noise, ok_fit, valid, cand, s1, f1, centre, gain, sigma_px, shape, half):
    """Fit isolated candidates alone; candidates sharing a window start from the filter
    peaks and are fitted with each other's models removed."""
    cand = np.asarray(cand).reshape(-1, 2)
    crowded = np.zeros(len(cand), bool)
    if len(cand) > 1:
        amp = 2.0 * np.maximum(f1[cand[:, 0], cand[:, 1]], 0.0)
        idx = _crowded(cand.astype(float), amp, noise[cand[:, 0], cand[:, 1]], sigma_px, half)
        crowded[idx] = True
    spots = _fit_candidates(fitter, res, noise, ok_fit, valid, cand[~crowded], s1, centre, gain, sigma_px, None)
    if crowded.any():
        cc = cand[crowded].astype(np.float64)
        k = len(cc)
        ri, ci = cand[crowded, 0], cand[crowded, 1]
        init = _spots_dict(cc, 2.0 * np.maximum(f1[ri, ci], 1e-3), *_start_widths(centre, sigma_px, k),
                           np.zeros(k), s1[ri, ci].astype(float), np.zeros(k), _unit_radial(cc, centre),
                           np.full((k, 2), np.nan), np.zeros(k, np.uint8))
        spots = _concat(spots, init)
        spots = _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half,
                                  sweeps=60)
    return spots


def _crowded(rc, amp, nz, sigma_px, half) -> np.ndarray:
    """Indices of spots whose fit window reaches a neighbour's light (down to 0.1 noise)."""
    from scipy.spatial import cKDTree

    if len(rc) < 2:
        return np.zeros(0, int)
    reach = _PROFILE.reach_px(sigma_px, np.asarray(amp) / (0.1 * np.maximum(nz, 1e-12)))
    reach = np.minimum(reach, 12.0 * sigma_px)
    pairs = cKDTree(rc).query_pairs(float(half * 1.5 + reach.max()) + 1.0, output_type="ndarray")
    if len(pairs) == 0:
        return np.zeros(0, int)
    d = np.hypot(*(rc[pairs[:, 0]] - rc[pairs[:, 1]]).T)
    near = (d <= 2.0 * half + 1) | (d <= half * 1.5 + np.maximum(reach[pairs[:, 0]], reach[pairs[:, 1]]))
    return np.unique(pairs[near].ravel())


def _refit_weighted(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half, *,
                    crowded_too: bool):
    """Refit spots from their current solution after the weights changed (a new `gain`).

    Spots alone in their window are refitted in one batch; crowded ones only with
    `crowded_too` (else the joint refit that follows does it).
    """
    spots = {k: v.copy() for k, v in spots.items()}
    k = len(spots["rc"])
    ri = np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, shape[0] - 1)
    ci = np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, shape[1] - 1)
    nz_c = noise[ri, ci]
    alone = np.ones(k, bool)
    alone[_crowded(spots["rc"], spots["amp"], nz_c, sigma_px, half)] = False
    if alone.any():
        ids = np.flatnonzero(alone)
        # the model image only needs the spots themselves: nobody else reaches their windows
        mdl = _render(shape, spots["rc"][ids], spots["amp"][ids], spots["sr"][ids], spots["st"][ids],
                      spots["u"][ids], half)
        _refit_batch(fitter, res, noise, ok_fit, valid, spots, ids, nz_c[ids], mdl, gain, sigma_px, shape, half,
                     1e-3)
    if crowded_too and not alone.all():
        spots = _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half,
                                  sweeps=60)
    return spots


def _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half, sweeps=2,
                      tol_px: float = 1e-3, max_refits: int = 6, max_fails: int = 2):
    """Refit spots that share a window, each with the others' models removed.

    Block Gauss–Seidel over the crowded spots: spots whose windows overlap are
    never in the same batch (a greedy colouring of the overlap graph), so every
    batch is fitted against its neighbours' newest models and pairs cannot
    swap back and forth from one sweep to the next. The model image is kept
    current by redrawing only the spots that changed. After a sweep only spots
    that changed, or that have a neighbour that changed, are fitted again; a
    spot has changed when its centre moved by `tol_px` or more, or its model by
    more than 2 % of the local noise. At most `sweeps` sweeps, and at most
    `max_refits` fits of any one spot (a spot that still changes after that
    many, typically a false detection on a sharp edge, keeps its last fit);
    a spot whose fit failed `max_fails` times is not fitted again.
    """
    if len(spots["rc"]) < 2:
        return spots
    shp = noise.shape
    ri = np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, shp[0] - 1)
    ci = np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, shp[1] - 1)
    crowded = _crowded(spots["rc"], spots["amp"], noise[ri, ci], sigma_px, half)
    if len(crowded) == 0:
        return spots
    spots = {k: v.copy() for k, v in spots.items()}
    mdl = _render(shape, spots["rc"], spots["amp"], spots["sr"], spots["st"], spots["u"], half)
    nb_ptr, nb_idx = _overlap_graph(spots["rc"][crowded], half)
    colour = _greedy_colours(nb_ptr, nb_idx)
    nz_c = noise[ri[crowded], ci[crowded]]
    active = np.ones(len(crowded), bool)
    refits = np.zeros(len(crowded), np.int64)
    fails = np.zeros(len(crowded), np.int64)
    for _ in range(sweeps):
        active &= (refits < max_refits) & (fails < max_fails)
        if not active.any():
            break
        changed = np.zeros(len(crowded), bool)
        for c in np.unique(colour[active]):
            batch = np.flatnonzero(active & (colour == c))
            changed[batch] = _refit_batch(fitter, res, noise, ok_fit, valid, spots, crowded[batch], nz_c[batch],
                                          mdl, gain, sigma_px, shape, half, tol_px)
        refits[active] += 1
        fails[active] += (spots["flags"][crowded[active]] & FLAG_FIT_FAILED) > 0
        active = changed.copy()
        active[nb_idx[np.repeat(changed, np.diff(nb_ptr))]] = True
    return spots


def _overlap_graph(rc, half):
    """CSR neighbour lists (ptr, idx) of spots whose (2 half + 1)² windows overlap, with
    3 px to spare for centres that move during the fits."""
    from scipy.spatial import cKDTree

    k = len(rc)
    pairs = cKDTree(rc).query_pairs(2.0 * half + 3.0, p=np.inf, output_type="ndarray") if k > 1 else \
        np.zeros((0, 2), int)
    a = np.concatenate([pairs[:, 0], pairs[:, 1]])
    b = np.concatenate([pairs[:, 1], pairs[:, 0]])
    order = np.argsort(a, kind="stable")
    ptr = np.zeros(k + 1, np.int64)
    np.cumsum(np.bincount(a, minlength=k), out=ptr[1:])
    return ptr, b[order]


def _greedy_colours(ptr, idx):
    """A colour per node such that no two neighbours share one (greedy, in index order)."""
    k = len(ptr) - 1
    col = np.full(k, -1, np.int64)
    for i in range(k):
        used = col[idx[ptr[i]:ptr[i + 1]]]
        used = used[used >= 0]
        if used.size == 0:
            col[i] = 0
            continue
        free = np.ones(used.max() + 2, bool)
        free[used] = False
        col[i] = int(np.argmax(free))
    return col


def _refit_batch(fitter, res, noise, ok_fit, valid, spots, ids, nz_c, mdl, gain, sigma_px, shape, half, tol_px):
    """Refit spots `ids` (no two overlapping) against the current model image `mdl`, write the
    results into `spots` and redraw them in `mdl`; True where a spot changed."""
    sub = _take(spots, ids)
    own = _spot_windows(sub, half)
    r0, c0, inside, (rp, nz, okp, vp, mp), _ = fitter.patches([res, noise, ok_fit, valid, mdl], sub["rc"])
    data = rp - mp + own
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(mp - own, 0.0, None) if gain else 0.0)  # the neighbours' shot noise
    p = np.column_stack([sub["amp"], sub["rc"][:, 0] - r0, sub["rc"][:, 1] - c0, np.log(sub["sr"]),
                         np.log(sub["st"]), sub["off"]])
    keep_failed = (sub["flags"] & FLAG_FIT_FAILED) > 0
    p, cov, _, _ = fitter.fit(data, nz2, okp, p, sub["u"], gain, n_iter=10, restart=True)
    new = _from_fit(p, cov, r0, c0, sub["u"], sub["snr"], vp & inside, okp, sigma_px, half, sub["rc"],
                    flags0=(sub["flags"] & ~np.uint8(FLAG_FIT_FAILED | FLAG_NEAR_EDGE)).astype(np.uint8))
    failed = (new["flags"] & FLAG_FIT_FAILED) > 0
    new["rc"] = np.where((keep_failed & failed)[:, None], sub["rc"], new["rc"])
    # a failed fit says little about the height: the neighbours see the residual peak instead
    # (a fit that went negative still reports no light, as a failed first fit does)
    h = fitter.half
    new["amp"] = np.where(failed & (new["amp"] > 0), np.maximum(data[:, h, h], 0.0), new["amp"])
    for key in spots:
        spots[key][ids] = new[key]
    moved = np.hypot(*(new["rc"] - sub["rc"]).T)
    # largest change of each model: amplitude, shift (max slope A/σ) and width (max A Δlog σ)
    dmodel = np.abs(new["amp"] - sub["amp"]) + np.maximum(new["amp"], sub["amp"]) * (
        _PROFILE.max_slope * moved / np.minimum(np.minimum(new["sr"], new["st"]), np.minimum(sub["sr"], sub["st"]))
        + _PROFILE.max_log_width_slope * np.maximum(np.abs(np.log(new["sr"] / sub["sr"])), np.abs(np.log(new["st"] / sub["st"]))))
    changed = (moved >= tol_px) | (dmodel > 0.02 * nz_c) | (new["flags"] != sub["flags"])
    if changed.any():
        o = _take(sub, changed)
        n = _take(new, changed)
        _add_windows(mdl, o["rc"], -_spot_windows(o, half))
        _add_windows(mdl, n["rc"], _spot_windows(n, half))
    return changed


def _refit_cut(fitter, res, noise, ok_fit, valid, spots, orient, gain, sigma_px, shape, half):
    """Refit spots cut by a mask edge (the screen's rim, the gun shadow) with their shape held,
    the others' models removed.

    With part of its light beyond the edge, a spot's widths along and across the cut,
    its offset and its centre trade off against each other, and a free fit drifts off
    along the cut. The cut spot keeps the area of its free fit (its geometric-mean σ,
    measured mostly along the edge) in the shape every spot has: round, or along the
    spread's fixed axis with its elongation, when the data allow it: the held fit is kept
    only where its χ² exceeds the free fit's by less than 6 (two widths fewer: the 95 %
    point of χ² with 2 degrees of freedom), so a spot that is itself elongated (its own
    broadening) keeps its free fit. A refit that fails keeps the free fit too.
    """
    cut = np.flatnonzero(((spots["flags"] & FLAG_NEAR_EDGE) > 0) & ((spots["flags"] & FLAG_FIT_FAILED) == 0))
    if len(cut) == 0:
        return spots
    spots = {k: v.copy() for k, v in spots.items()}
    mdl = _render(shape, spots["rc"], spots["amp"], spots["sr"], spots["st"], spots["u"], half)
    sub = _take(spots, cut)
    own = _spot_windows(sub, half)
    r0, c0, inside, (rp, nz, okp, vp, mp), _ = fitter.patches([res, noise, ok_fit, valid, mdl], sub["rc"])
    data = rp - mp + own
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(mp - own, 0.0, None) if gain else 0.0)
    # each keeps its own area (geometric-mean σ) in the shape of the spread: round, or along
    # the fixed axis with the spread's elongation
    s_own = np.sqrt(sub["sr"] * sub["st"])
    e = np.sqrt(orient.elongation) if isinstance(orient, _FixedAxis) else 1.0
    ls = np.column_stack([np.log(s_own * e), np.log(s_own / e)])
    free = np.column_stack([sub["amp"], sub["rc"][:, 0] - r0, sub["rc"][:, 1] - c0, np.log(sub["sr"]),
                            np.log(sub["st"]), sub["off"]])
    _, _, rchi_free, _ = fitter.fit(data, nz2, okp, free, sub["u"], gain, n_iter=0)
    p = free.copy()
    p[:, fitter.profile.log_width_params] = ls
    held = np.exp(ls)
    p, cov, rchi_held, _ = fitter.fit(data, nz2, okp, p, sub["u"], gain, sigma_bounds=(held, held))
    npix = np.maximum(okp.reshape(len(cut), -1).sum(axis=1) - fitter.n_par, 1)
    new = _from_fit(p, cov, r0, c0, sub["u"], sub["snr"], vp & inside, okp, sigma_px, half, sub["rc"],
                    flags0=(sub["flags"] & ~np.uint8(FLAG_FIT_FAILED | FLAG_NEAR_EDGE)).astype(np.uint8))
    ok = ((new["flags"] & FLAG_FIT_FAILED) == 0) & ((rchi_held - rchi_free) * npix < 6.0)
    for key in spots:
        spots[key][cut[ok]] = new[key][ok]
    return spots

