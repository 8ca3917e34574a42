"""Order–disorder transition from a superstructure beam's intensity against temperature.

Below a continuous order–disorder transition the long-range order parameter falls as
m ∝ (1 − T/Tc)^β, and a superstructure beam's integrated intensity, which goes with m²,
as (1 − T/Tc)^(2β); above Tc only a background is left. :func:`fit_order_disorder` fits

    I(T) = A · max(1 − T/Tc, 0)^(2β) + B   [+ C · (T − T̄) with a sloping background]

by weighted least squares and reports Tc with its one-standard-deviation uncertainty
(from the covariance, scaled by the reduced χ² when that exceeds 1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import FitError, ParameterError

__all__ = ["OrderDisorderFit", "fit_order_disorder"]


@dataclass(frozen=True, eq=False)
class OrderDisorderFit:
    """Result of :func:`fit_order_disorder`.

    Attributes
    ----------
    tc, tc_sigma : float
        Transition temperature and its 1σ uncertainty (the parameter's unit).
    beta, beta_sigma : float
        Exponent β of the order parameter (the intensity goes with 2β).
    amplitude, background, slope : float
        A, B and C of the model (C is 0 for a flat background).
    chi2_red : float
        Reduced χ² of the fit.
    tc_spread : float
        Half the range of Tc over refits that change what the form cannot describe (a
        sloping background; only the upper half of the points below Tc; the ordered side
        only; without the points within 3 % of Tc, where finite domains round the
        transition): a guide to the systematic error, which `tc_sigma` (statistics only)
        leaves out.
    n_points : int
    """

    tc: float
    tc_sigma: float
    beta: float
    beta_sigma: float
    amplitude: float
    background: float
    slope: float
    chi2_red: float
    n_points: int
    t_mean: float = 0.0
    tc_spread: float = 0.0

    def model(self, t) -> np.ndarray:
        """The fitted intensity at temperatures `t`.

        Parameters
        ----------
        t : float or array_like of float
            Temperatures, in the unit of the fit.

        Returns
        -------
        ndarray of float64
            The intensity.
        """
        return _model(np.asarray(t, dtype=np.float64), self.amplitude, self.tc, self.beta, self.background,
                      self.slope, self.t_mean)

    def to_dict(self) -> dict:
        """The fit's numbers (Tc, β, amplitude, background, their uncertainties).

        Returns
        -------
        dict
            Plain JSON types.
        """
        return {"tc": self.tc, "tc_sigma": self.tc_sigma, "beta": self.beta, "beta_sigma": self.beta_sigma,
                "amplitude": self.amplitude, "background": self.background, "slope": self.slope,
                "chi2_red": self.chi2_red, "n_points": self.n_points, "tc_spread": self.tc_spread}


def _model(t, a, tc, beta, b, c, t_mean):
    x = np.clip(1.0 - t / tc, 0.0, None)
    return a * x ** (2.0 * beta) + b + c * (t - t_mean)


def fit_order_disorder(t, intensity, sigma=None, *, beta: float | None = None, sloping_background: bool = False,
                       t_range=None, spread: bool = True) -> OrderDisorderFit:
    """Fit I(T) = A·(1 − T/Tc)^(2β) + background to a superstructure beam's intensity.

    Parameters
    ----------
    t : (F,) array_like of float
        Temperature of each frame (any absolute unit, e.g. K).
    intensity : (F,) array_like of float
        The beam's (or family's) integrated intensity; NaN points are left out.
    sigma : (F,) array_like of float, optional
        Uncertainty of each intensity; default equal weights.
    beta : float, optional, keyword-only
        Hold β fixed at this value (e.g. 0.125); default fitted in [0.02, 1].
    sloping_background : bool, keyword-only
        Fit a background linear in T instead of a constant.
    t_range : (t_min, t_max), optional, keyword-only
        Use only the points inside.
    spread : bool, keyword-only
        Also refit four ways (see `OrderDisorderFit.tc_spread`) and report half the range
        of the Tc found as `tc_spread`.

    Returns
    -------
    OrderDisorderFit
        Tc, β and the background with their uncertainties.

    Raises
    ------
    FitError
        Fewer points than parameters + 2, no intensity falling with T, or no convergence.

    Examples
    --------
    >>> t = np.linspace(200.0, 400.0, 41)
    >>> y = 1000.0 * np.clip(1 - t / 330.0, 0, None) ** 0.25 + 50.0
    >>> fit = fit_order_disorder(t, y)
    >>> print(round(fit.tc, 2), round(fit.beta, 3), round(fit.background, 1))
    330.0 0.125 50.0
    """
    from scipy.optimize import least_squares

    t = np.asarray(t, dtype=np.float64).reshape(-1)
    y = np.asarray(intensity, dtype=np.float64).reshape(-1)
    if t.size != y.size:
        raise ParameterError(f"`t` and `intensity` must have one value per frame, got {t.size} and {y.size}.")
    s = np.ones_like(y) if sigma is None else np.asarray(sigma, dtype=np.float64).reshape(-1)
    if s.size != y.size:
        raise ParameterError(f"`sigma` must have one value per frame, got {s.size} for {y.size}.")
    if beta is not None and not (isinstance(beta, (int, float)) and 0 < beta <= 2):
        raise ParameterError(f"`beta` must be a number in (0, 2], got {beta!r}.")
    ok = np.isfinite(t) & np.isfinite(y) & np.isfinite(s) & (s > 0) & (t > 0)
    if t_range is not None:
        lo, hi = (float(v) for v in t_range)
        ok &= (t >= lo) & (t <= hi)
    t, y, s = t[ok], y[ok], s[ok]
    n_par = 3 + (beta is None) + bool(sloping_background)
    if t.size < n_par + 2:
        raise FitError(f"Too few points ({t.size}) to fit the order–disorder form ({n_par} parameters).")
    t_mean = float(t.mean())
    w = 1.0 / s
    t_lo, t_hi = float(t.min()), float(t.max())

    def linear(tc, b_exp):
        """Best A, B (, C) for fixed Tc and β, and the weighted residuals."""
        cols = [np.clip(1.0 - t / tc, 0.0, None) ** (2.0 * b_exp), np.ones_like(t)]
        if sloping_background:
            cols.append(t - t_mean)
        m = np.column_stack(cols) * w[:, None]
        coef, *_ = np.linalg.lstsq(m, y * w, rcond=None)
        return coef, m @ coef - y * w

    # a grid over Tc (inside and just beyond the data) and β gives the start
    tcs = np.linspace(t_lo + 0.02 * (t_hi - t_lo), t_hi + 0.3 * (t_hi - t_lo), 80)
    betas = [beta] if beta is not None else [0.03, 0.06, 0.1, 0.125, 0.16, 0.2, 0.25, 0.33, 0.45, 0.6, 0.8]
    best = None
    for tc in tcs:
        for b_exp in betas:
            coef, r = linear(tc, b_exp)
            if coef[0] <= 0:
                continue
            cost = float(r @ r)
            if best is None or cost < best[0]:
                best = (cost, tc, b_exp, coef)
    if best is None:
        raise FitError("No intensity that falls with temperature: the order–disorder form does not fit.")
    _, tc0, b0, coef0 = best
    x0 = [coef0[0], tc0] + ([b0] if beta is None else []) + [coef0[1]] + ([coef0[2]] if sloping_background else [])
    lo = [0.0, t_lo * 0.5] + ([0.02] if beta is None else []) + [-np.inf] + ([-np.inf] if sloping_background else [])
    hi = [np.inf, t_hi * 2.0] + ([1.0] if beta is None else []) + [np.inf] + ([np.inf] if sloping_background else [])
    x0 = np.clip(x0, np.array(lo) + 1e-9, np.array(hi) - 1e-9)

    def unpack(p):
        a, tc = p[0], p[1]
        k = 2
        b_exp = beta
        if beta is None:
            b_exp, k = p[2], 3
        bg = p[k]
        c = p[k + 1] if sloping_background else 0.0
        return a, tc, b_exp, bg, c

    def resid(p):
        return (_model(t, *unpack(p), t_mean) - y) * w

    scale = np.array([max(abs(x0[0]), 1.0), max(0.01 * tc0, 1e-3)] + ([0.01] if beta is None else [])
                     + [max(abs(coef0[0]) * 0.01, 1.0)] + ([max(abs(coef0[0]) * 1e-3, 1e-3)] if sloping_background
                                                           else []))
    try:
        sol = least_squares(resid, x0, bounds=(lo, hi), x_scale=scale, max_nfev=2000)
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise FitError(f"Order–disorder fit failed ({exc}).") from None
    if not np.all(np.isfinite(sol.x)):
        raise FitError("Order–disorder fit did not converge.")
    dof = max(t.size - len(sol.x), 1)
    chi2 = float(sol.fun @ sol.fun) / dof
    try:
        cov = np.linalg.pinv(sol.jac.T @ sol.jac) * max(chi2, 1.0) if sigma is not None else \
            np.linalg.pinv(sol.jac.T @ sol.jac) * chi2
        err = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    except np.linalg.LinAlgError:  # pragma: no cover
        err = np.full(len(sol.x), np.nan)
    a, tc, b_exp, bg, c = unpack(sol.x)
    tc_spread = 0.0
    if spread:
        alt = [float(tc)]
        below = t[t < tc]
        variants = [({"sloping_background": not sloping_background}, None),
                    ({"t_range": (float(np.median(below)) if below.size >= 4 else t_lo, t_hi)}, None),
                    ({"t_range": (t_lo, float(tc))}, None),  # the ordered side only
                    ({}, np.abs(t - tc) > 0.03 * tc)]  # without the rounded region about Tc
        for kw, keep in variants:
            kw.setdefault("sloping_background", sloping_background)
            tk, yk, sk = (t, y, s) if keep is None else (t[keep], y[keep], s[keep])
            try:
                alt.append(fit_order_disorder(tk, yk, None if sigma is None else sk, beta=beta, spread=False,
                                              **kw).tc)
            except FitError:
                pass
        tc_spread = 0.5 * (max(alt) - min(alt))
    return OrderDisorderFit(tc=float(tc), tc_sigma=float(err[1]), beta=float(b_exp),
                            beta_sigma=float(err[2]) if beta is None else 0.0, amplitude=float(a),
                            background=float(bg), slope=float(c), chi2_red=chi2, n_points=int(t.size),
                            t_mean=t_mean, tc_spread=float(tc_spread))
