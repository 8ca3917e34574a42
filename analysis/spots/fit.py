"""Profile fits of spots: the vectorised Levenberg–Marquardt fitter (:class:`_Fitter`),
one-spot fits of candidates and their conversion to spot records, the model image of
fitted spots, the variance law from fit residuals, the two-spot fit that splits close
pairs, and the flag bits a fit sets.

Spot records between the steps are dicts of arrays (``rc``, ``amp``, ``sr``, ``st``,
``off``, ``snr``, ``rchi2``, ``u``, ``sig``, ``flags``; :func:`_spots_dict`).
"""

from __future__ import annotations

import math

import numpy as np

from ..profiles import GAUSSIAN

_PROFILE = GAUSSIAN  # the profile fitted to every spot

FLAG_SATURATED = 1  # a pixel near the centre is at full scale (it is left out of the fit)
FLAG_NEAR_EDGE = 2  # a masked pixel lies within 3 σ of the centre
FLAG_FIT_FAILED = 4  # the Gaussian fit did not converge; centre from the filtered peak
FLAG_SPLIT = 8  # one of a close pair separated by a two-spot fit
FLAG_NAMES = {FLAG_SATURATED: "saturated", FLAG_NEAR_EDGE: "near_mask_edge",
              FLAG_FIT_FAILED: "fit_failed", FLAG_SPLIT: "split_pair"}
_FLAG_BLEND = 128  # internal: residual peak beside the spot (cleared before the table)


class _Fitter:
    """Vectorised Levenberg–Marquardt fit of a spot profile with a local offset.

    Model (per spot, axes along the radial direction u and across it): the profile
    plus an offset b, e.g. for :data:`analysis.profiles.GAUSSIAN`
        A exp(−ρ²/2σ_r² − τ²/2σ_t²) + b,  ρ = (p − p0)·u,  τ = (p − p0)·u⊥.
    Pixel weights are 1/variance with variance = noise² + gain · model (IRLS).
    """

    def __init__(self, half: int, profile=_PROFILE):
        self.half = half
        self.profile = profile
        self.n_par = profile.n_params + 1  # the profile's parameters, then the offset b
        self.dr, self.dc = fitter_grid(half)  # (W, W) row and column offsets in the window

    def patches(self, arrays, centres):
        """Gather (K, W, W) windows of each array around rounded `centres` (clamped at the edges)."""
        r0 = np.rint(centres[:, 0]).astype(np.int64)
        c0 = np.rint(centres[:, 1]).astype(np.int64)
        rr = r0[:, None, None] + self.dr.astype(np.int64)[None]
        cc = c0[:, None, None] + self.dc.astype(np.int64)[None]
        inside = (rr >= 0) & (rr < arrays[0].shape[0]) & (cc >= 0) & (cc < arrays[0].shape[1])
        rr_, cc_ = np.clip(rr, 0, arrays[0].shape[0] - 1), np.clip(cc, 0, arrays[0].shape[1] - 1)
        out = [a[rr_, cc_] for a in arrays]
        return r0, c0, inside, out, (rr, cc)

    def fit(self, data, noise2, w_ok, p, u, gain, *, n_iter=20, sigma_bounds=(0.4, 12.0), restart=False):
        """data, noise2, w_ok: (K, W, W); p: (K, P + 1) the profile's parameters with the centre
        as offsets in the window, then the offset b (Gaussian: [A, dr0, dc0, log sr, log st, b]).

        Returns (p, covariance (K, P + 1, P + 1), reduced χ², model (K, W, W)). Spots leave the
        iteration as soon as their centre moves by less than 10⁻³ px, after three
        iterations; with `restart` (`p` is a previous solution) after one, and a lightly
        damped step below 10⁻³ px ends the fit even when it does not lower χ² (at the
        minimum, rounding and the reweighting reject such steps). `sigma_bounds` (px) are
        (low, high): scalars, or arrays broadcasting against the profile's widths, (K, n)
        for one row per spot (equal bounds hold a width).
        """
        k, n = len(p), self.n_par
        cen, wid = self.profile.centre_params, self.profile.log_width_params
        p = np.array(p, dtype=np.float64)
        lo, hi = np.log(np.asarray(sigma_bounds[0], float)), np.log(np.asarray(sigma_bounds[1], float))
        lam = np.full(k, 1e-2)
        act = np.arange(k)
        if isinstance(noise2, float) or np.ndim(noise2) == 0:
            noise2 = np.broadcast_to(noise2, data.shape)
        mdl, aux = self._model(p, u)  # model of the active spots at their current parameters
        for it in range(n_iter):
            if len(act) == 0:
                break
            d, n2, ok, uu = data[act], noise2[act], w_ok[act], u[act]
            pa = p[act]
            w = self._weights(mdl, pa, n2, ok, gain)
            chi2 = np.sum(w * (d - mdl) ** 2, axis=(1, 2))
            ka = len(act)
            jf = self._jac(aux, uu).reshape(ka, n, -1)  # (K, P + 1, pixels)
            jtw = jf * w.reshape(ka, 1, -1)
            hmat = np.matmul(jtw, jf.transpose(0, 2, 1))
            grad = np.matmul(jtw, (d - mdl).reshape(ka, -1, 1))[:, :, 0]
            diag = np.einsum("kii->ki", hmat)
            hd = hmat + (lam[act, None] * np.maximum(diag, 1e-12))[:, :, None] * np.eye(n)[None]
            hd = hd + 1e-12 * np.eye(n)[None]
            try:
                step = np.linalg.solve(hd, grad[:, :, None])[:, :, 0]
            except np.linalg.LinAlgError:
                step = np.stack([np.linalg.lstsq(h, g, rcond=None)[0] for h, g in zip(hd, grad)])
            step[:, cen] = np.clip(step[:, cen], -1.5, 1.5)
            step[:, wid] = np.clip(step[:, wid], -0.5, 0.5)
            pn = pa + step
            pn[:, wid] = np.clip(pn[:, wid], lo[act] if lo.ndim == 2 else lo, hi[act] if hi.ndim == 2 else hi)
            mdl_n, aux_n = self._model(pn, uu)
            chi2_n = np.sum(w * (d - mdl_n) ** 2, axis=(1, 2))
            better = np.isfinite(chi2_n) & (chi2_n <= chi2)
            p[act] = np.where(better[:, None], pn, pa)
            small = np.abs(step[:, cen]).max(axis=1) < 1e-3
            flat = small & ~better & (lam[act] < 1.0) if restart else np.zeros(len(act), bool)
            lam[act] = np.where(better, np.maximum(lam[act] / 5, 1e-7), lam[act] * 10)
            b3 = better[:, None, None]
            mdl = np.where(b3, mdl_n, mdl)
            aux = tuple(np.where(b3, xn, x) for xn, x in zip(aux_n, aux))
            done = better & small | flat | (lam[act] > 1e6)
            if it >= (0 if restart else 2) and done.any():
                act, keep = act[~done], ~done
                mdl, aux = mdl[keep], tuple(x[keep] for x in aux)
        # covariance at the solution
        mdl, aux = self._model(p, u)
        w = self._weights(mdl, p, noise2, w_ok, gain)
        jf = self._jac(aux, u).reshape(k, n, -1)
        hmat = np.matmul(jf * w.reshape(k, 1, -1), jf.transpose(0, 2, 1))
        try:
            cov = np.linalg.inv(hmat + 1e-12 * np.eye(n)[None])
        except np.linalg.LinAlgError:
            cov = np.full((k, n, n), np.nan)
        chi2 = np.sum(w * (data - mdl) ** 2, axis=(1, 2))
        npix = np.maximum(w_ok.reshape(k, -1).sum(axis=1) - n, 1)
        return p, cov, chi2 / npix, mdl

    def _model(self, p, u):
        """(K, W, W) profile plus offset, and the profile's state for :meth:`_jac`."""
        val, state = self.profile.evaluate(p, u, self.dr, self.dc)
        return val + p[:, -1, None, None], state

    @staticmethod
    def _weights(mdl, p, noise2, ok, gain):
        v = noise2 + gain * np.clip(mdl - p[:, -1, None, None], 0, None) if gain else noise2
        return np.where(ok, 1.0 / v, 0.0)

    def _jac(self, state, u):
        k = len(u)
        jac = np.empty((k, self.n_par) + self.dr.shape)  # (K, P + 1, W, W): one contiguous plane per parameter
        self.profile.derivatives(state, u, out=jac[:, :-1])
        jac[:, -1] = 1.0
        return jac


def _spots_dict(rc, amp, sr, st, off, snr, rchi2, u, sig, flags):
    return {"rc": rc, "amp": amp, "sr": sr, "st": st, "off": off, "snr": snr, "rchi2": rchi2, "u": u,
            "sig": sig, "flags": flags}


def _concat(a, b):
    return {k: np.concatenate([a[k], b[k]]) for k in a}


def _take(a, idx):
    return {k: v[idx] for k, v in a.items()}


class _FixedAxis:
    """Spot axes held fixed in the image instead of radial: the point-spread function is
    elongated along one image direction (astigmatic optics, a tilted sensor, steps along
    one crystal direction), so every spot's long axis lies along `u_rc` (row, col) and its
    width along that axis is `elongation` × the width across it."""

    __slots__ = ("u_rc", "elongation")

    def __init__(self, u_rc, elongation: float):
        u = np.asarray(u_rc, dtype=np.float64).reshape(2)
        self.u_rc = u / np.hypot(*u)
        self.elongation = float(elongation)


def _start_widths(orient, sigma_px, k):
    """(K,) starting σ along and across each spot's axis: round `sigma_px`, or, along a
    fixed elongated axis, `sigma_px` × √elongation and ÷ √elongation (same area)."""
    e = math.sqrt(orient.elongation) if isinstance(orient, _FixedAxis) else 1.0
    return np.full(k, sigma_px * e), np.full(k, sigma_px / e)


def _unit_radial(rc, centre):
    if isinstance(centre, _FixedAxis):
        return np.tile(centre.u_rc, (len(rc), 1))
    v = rc - centre[None]
    nrm = np.hypot(v[:, 0], v[:, 1])
    u = np.where(nrm[:, None] > 1e-9, v / np.maximum(nrm, 1e-9)[:, None], np.array([[1.0, 0.0]]))
    return u


def _fit_candidates(fitter, res, noise, ok_fit, valid, cand, snr_map, centre, gain, sigma_px, others=None):
    cand = np.asarray(cand, dtype=np.float64).reshape(-1, 2)
    k = len(cand)
    if k == 0:
        return _spots_dict(np.zeros((0, 2)), *(np.zeros(0) for _ in range(6)), np.zeros((0, 2)),
                           np.zeros((0, 2)), np.zeros(0, np.uint8))
    res64 = res.astype(np.float64) if res.dtype != np.float64 else res
    arrays = [res64, noise, ok_fit, valid] + ([others] if others is not None else [])
    r0, c0, inside, (data, nz, okp, vp, *om), _ = fitter.patches(arrays, cand)
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(om[0], 0.0, None) if (gain and om) else 0.0)
    u = _unit_radial(cand, centre)
    h = fitter.half
    amp0 = np.maximum(data[:, h, h], 1e-3)
    s_r, s_t = _start_widths(centre, sigma_px, k)
    p = np.column_stack([amp0, np.zeros(k), np.zeros(k), np.log(s_r), np.log(s_t), np.zeros(k)])
    p, cov, rchi2, _ = fitter.fit(data, nz2, okp, p, u, gain)
    return _from_fit(p, cov, r0, c0, u, snr_map[r0, c0], vp & inside, okp, sigma_px, h, cand)


def _from_fit(p, cov, r0, c0, u, snr, vpatch, okp, sigma_px, h, cand, flags0=None):
    k = len(p)
    rc = np.column_stack([r0 + p[:, 1], c0 + p[:, 2]])
    sr, st = np.exp(p[:, 3]), np.exp(p[:, 4])
    with np.errstate(invalid="ignore"):
        sig = np.sqrt(np.abs(np.column_stack([cov[:, 1, 1], cov[:, 2, 2]])))
    # near a masked pixel: any invalid pixel within 3 σ of the centre
    d2 = (fitter_grid(h)[0][None] - p[:, 1, None, None]) ** 2 + (fitter_grid(h)[1][None] - p[:, 2, None, None]) ** 2
    near = np.any(~vpatch & (d2 <= (3 * sigma_px) ** 2), axis=(1, 2))
    # a spot cut by a mask edge may have its centre beyond the edge (it is then not reported)
    far = np.hypot(p[:, 1], p[:, 2]) > 0.5 * h
    failed = ~np.all(np.isfinite(p), axis=1) | (p[:, 0] <= 0) | (far & ~near) | \
        (np.hypot(p[:, 1], p[:, 2]) > h) | (np.maximum(sr, st) > 4.0 * sigma_px) | ~np.all(np.isfinite(sig), axis=1)
    flags = np.zeros(k, np.uint8) if flags0 is None else flags0.copy()
    flags[failed] |= FLAG_FIT_FAILED
    rc = np.where(failed[:, None], cand, rc)
    sr = np.where(failed, sigma_px, sr)
    st = np.where(failed, sigma_px, st)
    sig = np.where(failed[:, None], 0.5, sig)
    amp = np.where(failed, np.maximum(p[:, 0], 0.0), p[:, 0])
    flags[near] |= FLAG_NEAR_EDGE
    return _spots_dict(rc, amp, sr, st, p[:, 5], np.asarray(snr, float), np.zeros(k), u, sig, flags)


_GRIDS: dict = {}


def fitter_grid(h):
    """(row, col) offsets of a (2 h + 1)² window from its centre, two (W, W) float64 arrays
    (shared, read-only)."""
    if h not in _GRIDS:
        o = np.arange(-h, h + 1, dtype=np.float64)
        grid = np.meshgrid(o, o, indexing="ij")
        for g in grid:
            g.flags.writeable = False
        _GRIDS[h] = grid
    return _GRIDS[h]


def _gain_from_spots(fitter, res, noise, ok_fit, spots, half, min_spots: int = 1):
    """Variance per unit signal from the fit residuals of bright spots: r² − noise² ≈ g · model;
    None from fewer than `min_spots` usable spots."""
    good = ((spots["flags"] & FLAG_FIT_FAILED) == 0)
    if good.sum() == 0:
        return None
    sub = _take(spots, good)
    mdl = _render(noise.shape, sub["rc"], sub["amp"], sub["sr"], sub["st"], sub["u"], half)
    _, _, inside, (data, own, nz, okp), _ = fitter.patches([res - mdl, mdl, noise, ok_fit], sub["rc"])
    r2 = (data - sub["off"][:, None, None]) ** 2 - nz**2
    use = okp & inside & (own > 5.0 * nz)
    if use.sum() < 30:
        return None
    # one estimate per spot, then the median: a badly fitted blend cannot dominate
    num = np.sum(np.where(use, own * r2, 0.0), axis=(1, 2))
    den = np.sum(np.where(use, own * own, 0.0), axis=(1, 2))
    ok = use.sum(axis=(1, 2)) >= 5
    if ok.sum() < max(min_spots, 1):
        return None
    per = num[ok] / den[ok]
    g = float(np.median(per) if len(per) >= 3 else np.min(per))
    return g if g > 0 else None


def _render(shape, rc, amp, sr, st, u, half) -> np.ndarray:
    """Sum of the fitted profiles (no offsets) as an image, each on a square window of
    half-width `half` around its rounded centre, or less where the profile is below
    10⁻⁹ of its peak beyond (one very wide spot need not make every window wide)."""
    out = np.zeros(shape)
    if len(rc) == 0:
        return out
    h_own = np.minimum(half, _PROFILE.window_half_px(sr, st))
    for h in np.unique(h_own):
        g = np.flatnonzero(h_own == h)
        h = int(h)
        _add_windows(out, rc[g], _PROFILE.window(rc[g], amp[g], sr[g], st[g], u[g], h))
    return out


def _spot_windows(spots, half, *, centre_rc=None):
    """(K, W, W) model of each spot (no offset) on (2 `half` + 1)² windows centred at the
    integer `centre_rc` (K, 2), default the rounded centres."""
    return _PROFILE.window(spots["rc"], spots["amp"], spots["sr"], spots["st"], spots["u"], half,
                           centre_rc=centre_rc)


def _add_windows(out, rc, val):
    """Add (K, W, W) windows `val` centred on the rounded `rc` into the image `out`, in place."""
    w = val.shape[1]
    h = w // 2
    r0 = (np.rint(rc[:, 0]).astype(np.int64) - h).tolist()
    c0 = (np.rint(rc[:, 1]).astype(np.int64) - h).tolist()
    m, n = out.shape
    for k, (a, b) in enumerate(zip(r0, c0)):  # window by window: no index arrays
        if 0 <= a and a + w <= m and 0 <= b and b + w <= n:
            out[a:a + w, b:b + w] += val[k]
            continue
        ra, rb, ca, cb = max(a, 0), min(a + w, m), max(b, 0), min(b + w, n)
        if ra < rb and ca < cb:
            out[ra:rb, ca:cb] += val[k, ra - a:rb - a, ca - b:cb - b]


def _split_pairs(fitter, res, noise, ok_fit, valid, spots, centre, gain, sigma_px, shape, half, min_snr,
                 hints=None):
    """Replace wide, bright spots by two spots when a two-Gaussian fit is much better."""
    good = (spots["flags"] & FLAG_FIT_FAILED) == 0
    if good.sum() == 0:
        return spots
    s_ref = float(np.median(np.sqrt(spots["sr"][good] * spots["st"][good]))) if good.sum() >= 5 else sigma_px
    s_ref = min(max(s_ref, 0.5 * sigma_px), 2.0 * sigma_px)
    # widths relative to the point-spread's own shape (an elongated spread is no pair)
    e = math.sqrt(centre.elongation) if isinstance(centre, _FixedAxis) else 1.0
    smaj = np.maximum(spots["sr"] / e, spots["st"] * e)
    smin = np.minimum(spots["sr"] / e, spots["st"] * e)
    nz_c = noise[np.clip(np.rint(spots["rc"][:, 0]).astype(int), 0, shape[0] - 1),
                 np.clip(np.rint(spots["rc"][:, 1]).astype(int), 0, shape[1] - 1)]
    pk = spots["amp"] / nz_c
    wide = (smaj > 1.3 * s_ref) & (smaj > 1.2 * smin)
    cand = np.flatnonzero(good & (wide | ((spots["flags"] & _FLAG_BLEND) > 0)) & (pk > 2.0 * min_snr))
    if len(cand) == 0:
        return spots
    sub = _take(spots, cand)
    hint = np.full((len(cand), 3), np.nan) if hints is None else hints[cand]
    has = np.all(np.isfinite(hint), axis=1)
    # window: on the spot, or halfway to its companion's residual peak
    # (an elongated spot is more likely an even pair about its own centre: keep its window)
    shift = has & ~wide[cand]
    win = np.where(shift[:, None], 0.5 * (sub["rc"] + np.where(has[:, None], hint[:, :2], 0.0)), sub["rc"])
    mdl = _render(shape, spots["rc"], spots["amp"], spots["sr"], spots["st"], spots["u"], half)
    r0, c0, inside, (data, nz, okp, vp, mp), _ = fitter.patches([res - mdl, noise, ok_fit, valid, mdl], win)
    own = _spot_windows(sub, half, centre_rc=np.column_stack([r0, c0]))
    data = data + own
    okp = okp & inside
    nz2 = nz**2 + (gain * np.clip(mp - own, 0.0, None) if gain else 0.0)
    k = len(cand)
    # one-spot chi² with the current parameters
    w1 = np.where(okp, 1.0 / (nz2 + (gain * np.clip(own, 0, None) if gain else 0.0)), 0.0)
    chi1 = np.sum(w1 * (data - own - sub["off"][:, None, None]) ** 2, axis=(1, 2))
    # two spots of common width s along the major axis
    along_r = sub["sr"] >= sub["st"]
    axis = np.where(along_r[:, None], sub["u"], np.column_stack([-sub["u"][:, 1], sub["u"][:, 0]]))
    sep = np.sqrt(np.maximum(smaj[cand] ** 2 - s_ref**2, 0.25)) * 1.0
    dr0, dc0 = sub["rc"][:, 0] - r0, sub["rc"][:, 1] - c0
    q = np.column_stack([sub["amp"] * 0.6, dr0 + axis[:, 0] * sep, dc0 + axis[:, 1] * sep,
                         sub["amp"] * 0.6, dr0 - axis[:, 0] * sep, dc0 - axis[:, 1] * sep,
                         np.full(k, math.log(s_ref)), sub["off"]])
    q, chi2 = _fit_pair(fitter, data, nz2, okp, q, gain)
    if has.any():  # also try the spot itself plus its companion at the residual peak; keep the better
        qh = np.column_stack([sub["amp"][has], dr0[has], dc0[has], np.maximum(hint[has, 2], 1e-3),
                              hint[has, 0] - r0[has], hint[has, 1] - c0[has], np.full(int(has.sum()),
                              math.log(s_ref)), sub["off"][has]])
        qh, ch = _fit_pair(fitter, data[has], nz2[has], okp[has], qh, gain)
        take = np.isfinite(ch) & (ch < chi2[has])
        idx = np.flatnonzero(has)[take]
        q[idx], chi2[idx] = qh[take], ch[take]
    s2 = np.exp(q[:, 6])
    a1, a2 = q[:, 0], q[:, 3]
    d = np.hypot(q[:, 1] - q[:, 4], q[:, 2] - q[:, 5])
    sig_pair = np.minimum(a1, a2) / nz[:, half, half] * math.sqrt(math.pi) * s2  # matched-filter significance
    accept = (chi1 - chi2 > np.maximum(30.0, 0.15 * chi1)) & (sig_pair >= min_snr) & (d > 0.8 * s2) & \
        (d < 2 * half) & np.isfinite(chi2) & (s2 < 1.5 * s_ref)
    if not accept.any():
        return spots
    keep = np.ones(len(spots["rc"]), bool)
    keep[cand[accept]] = False
    idx = np.flatnonzero(accept)
    new_rc = np.vstack([np.column_stack([r0[idx] + q[idx, 1], c0[idx] + q[idx, 2]]),
                        np.column_stack([r0[idx] + q[idx, 4], c0[idx] + q[idx, 5]])])
    m = len(idx)
    base = _take(sub, np.concatenate([idx, idx]))
    new = dict(base)
    new["rc"] = new_rc
    new["amp"] = np.concatenate([a1[idx], a2[idx]])
    new["sr"] = new["st"] = np.concatenate([s2[idx], s2[idx]])
    new["u"] = _unit_radial(new_rc, centre)
    new["sig"] = np.full((2 * m, 2), np.nan)
    new["flags"] = (base["flags"] | FLAG_SPLIT).astype(np.uint8)
    spots = _concat(_take(spots, keep), new)
    return spots


def _fit_pair(fitter, data, noise2, okp, q, gain, n_iter=30):
    """LM fit of two round profiles of common width plus offset: q = [A1, r1, c1, A2, r2, c2, log s, b]."""
    prof = fitter.profile
    k = len(q)
    lam = np.full(k, 1e-2)
    axis = np.tile([1.0, 0.0], (2 * k, 1))  # a round profile: any axis

    def model(q):
        # the two members as 2K rows of profile parameters (A, r, c, log σ_r = log σ_t = log s)
        p = np.concatenate([q[:, [0, 1, 2, 6, 6]], q[:, [3, 4, 5, 6, 6]]])
        val, state = prof.evaluate(p, axis, fitter.dr, fitter.dc)
        return val[:k] + val[k:] + q[:, 7, None, None], state

    def weights(mdl, q):
        v = noise2 + (gain * np.clip(mdl - q[:, 7, None, None], 0, None) if gain else 0.0)
        return np.where(okp, 1.0 / v, 0.0)

    mdl, _ = model(q)
    w = weights(mdl, q)
    chi2 = np.sum(w * (data - mdl) ** 2, axis=(1, 2))
    for _ in range(n_iter):
        mdl, state = model(q)
        d1, d2 = np.split(prof.derivatives(state, axis), 2)  # (K, 5, W, W) each
        jac = np.stack([d1[:, 0], d1[:, 1], d1[:, 2], d2[:, 0], d2[:, 1], d2[:, 2],
                        d1[:, 3] + d1[:, 4] + d2[:, 3] + d2[:, 4], np.ones_like(mdl)], axis=-1).reshape(k, -1, 8)
        ww = w.reshape(k, -1)
        res = (data - mdl).reshape(k, -1)
        jtw = jac * ww[:, :, None]
        hm = np.einsum("kpi,kpj->kij", jtw, jac)
        g = np.einsum("kpi,kp->ki", jtw, res)
        diag = np.einsum("kii->ki", hm)
        hd = hm + (lam[:, None] * np.maximum(diag, 1e-12))[:, :, None] * np.eye(8)[None]
        try:
            step = np.linalg.solve(hd + 1e-12 * np.eye(8)[None], g[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            break
        step[:, [1, 2, 4, 5]] = np.clip(step[:, [1, 2, 4, 5]], -1.5, 1.5)
        step[:, 6] = np.clip(step[:, 6], -0.5, 0.5)
        qn = q + step
        mn, _ = model(qn)
        cn = np.sum(w * (data - mn) ** 2, axis=(1, 2))
        better = np.isfinite(cn) & (cn <= chi2)
        q = np.where(better[:, None], qn, q)
        lam = np.where(better, np.maximum(lam / 5, 1e-7), lam * 10)
        mdl, _ = model(q)
        w = weights(mdl, q)
        chi2 = np.sum(w * (data - mdl) ** 2, axis=(1, 2))
    return q, chi2


def _dedupe(spots, dmin):
    from scipy.spatial import cKDTree

    if len(spots["rc"]) < 2:
        return spots
    pairs = cKDTree(spots["rc"]).query_pairs(dmin)
    if not pairs:
        return spots
    drop = np.zeros(len(spots["rc"]), bool)
    for i, j in pairs:
        drop[j if spots["amp"][i] >= spots["amp"][j] else i] = True
    return _take(spots, ~drop)
