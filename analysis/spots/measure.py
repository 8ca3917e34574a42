"""Measured spots and whole frames: :func:`find_spots` (detect, fit, subtract, detect
again on the residual, refit neighbours jointly, split close pairs) with its
:class:`SpotTable`, :func:`measure_image` (screen → gun shadow → background → spots)
with its :class:`Measurement`, and :func:`localization_bound_px`.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import ImageError, ParameterError
from ._common import _as_float_image, _check_mask, _saturation_of
from .background import BackgroundEstimate, estimate_background
from .crowded import _fit_pass1, _refit_cut, _refit_neighbours, _refit_weighted
from .detect import _dark_patches, _detect, _gauss_kernel_norm, _matched, _maxima, _residual_snr, _spot_scale_noise
from .fit import (
    _FLAG_BLEND,
    _PROFILE,
    FLAG_FIT_FAILED,
    FLAG_NAMES,
    FLAG_SATURATED,
    FLAG_SPLIT,
    _concat,
    _dedupe,
    _FixedAxis,
    _Fitter,
    _fit_candidates,
    _gain_from_spots,
    _render,
    _split_pairs,
    _take,
    _unit_radial,
)
from .accept import MIN_LOCAL_SNR, REJECT_FLAT, judge_spots, local_snr, split_table
from .gun_shadow import ShadowMask, find_gun_shadow
from .psf import _psf_from_bright
from .saturated import _clipped, _merge_saturated
from .screen import ScreenMask, disk_mask, find_screen
from .wings import _wing_image, _wing_profile


@dataclass(frozen=True, eq=False)
class SpotTable:
    """Measured spots, one row each.

    Attributes
    ----------
    rc : (K, 2) ndarray of float64
        Sub-pixel centres (row, col), pixels.
    sigma_rc : (K, 2) ndarray of float64
        1-σ uncertainty of `rc` from the fit (row, col), pixels.
    intensity : (K,) ndarray of float64
        Integrated, background-subtracted intensity 2π A σ_r σ_t (ADU).
    amplitude : (K,) ndarray of float64
        Fitted peak height above the local background (ADU).
    peak_snr : (K,) ndarray of float64
        `amplitude` over the local background noise per pixel.
    snr : (K,) ndarray of float64
        Detection significance: matched-filter response in units of its local noise.
    fwhm_radial_px, fwhm_tangential_px : (K,) ndarray of float64
        Full widths at half maximum along and across the direction to `center_rc`.
    background : (K,) ndarray of float64
        Local background level under the spot (ADU).
    flags : (K,) ndarray of uint8
        Bit set of FLAG_SATURATED, FLAG_NEAR_EDGE, FLAG_FIT_FAILED, FLAG_SPLIT.
    center_rc : (2,) ndarray of float64
        Reference point for radial/tangential.
    """

    rc: np.ndarray
    sigma_rc: np.ndarray
    intensity: np.ndarray
    amplitude: np.ndarray
    peak_snr: np.ndarray
    snr: np.ndarray
    fwhm_radial_px: np.ndarray
    fwhm_tangential_px: np.ndarray
    background: np.ndarray
    flags: np.ndarray
    center_rc: np.ndarray = field(default_factory=lambda: np.zeros(2))

    def __post_init__(self):
        for name in ("rc", "sigma_rc", "intensity", "amplitude", "peak_snr", "snr", "fwhm_radial_px",
                     "fwhm_tangential_px", "background", "flags", "center_rc"):
            a = np.array(getattr(self, name))
            a.flags.writeable = False
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return int(self.rc.shape[0])

    @property
    def xy(self) -> np.ndarray:
        """(K, 2) (x, y) pixel positions."""
        return self.rc[:, ::-1].copy()

    def select(self, keep) -> "SpotTable":
        """Rows where `keep` (bool or index array)."""
        k = np.asarray(keep)
        return SpotTable(**{n: getattr(self, n)[k] for n in _ROW_FIELDS}, center_rc=self.center_rc)

    def to_records(self) -> list[dict]:
        """One JSON-safe dict per spot with ``x``, ``y``, ``sigma_x``, ``sigma_y``..."""
        out = []
        for i in range(len(self)):
            fl = int(self.flags[i])
            out.append({
                "x": float(self.rc[i, 1]), "y": float(self.rc[i, 0]),
                "sigma_x": float(self.sigma_rc[i, 1]), "sigma_y": float(self.sigma_rc[i, 0]),
                "intensity": float(self.intensity[i]), "amplitude": float(self.amplitude[i]),
                "peak_snr": float(self.peak_snr[i]), "snr": float(self.snr[i]),
                "fwhm_radial_px": float(self.fwhm_radial_px[i]),
                "fwhm_tangential_px": float(self.fwhm_tangential_px[i]),
                "background": float(self.background[i]),
                "flags": [name for bit, name in FLAG_NAMES.items() if fl & bit],
            })
        return out


_ROW_FIELDS = ("rc", "sigma_rc", "intensity", "amplitude", "peak_snr", "snr", "fwhm_radial_px",
               "fwhm_tangential_px", "background", "flags")


def _empty_table(center_rc) -> SpotTable:
    z = np.zeros(0)
    return SpotTable(np.zeros((0, 2)), np.zeros((0, 2)), z, z, z, z, z, z, z, np.zeros(0, np.uint8),
                     np.asarray(center_rc, float))


def find_spots(image, *, sigma_px: float = 2.0, min_snr: float = 5.0, mask=None, background=None,
               center_rc=None, saturation_level=None, split_pairs: bool = True,
               second_pass: bool = True, psf_axis_deg: float | None = None,
               psf_elongation: float = 1.0, fit_mask=None) -> SpotTable:
    """Detect spots and measure them with sub-pixel Gaussian fits.

    Detection: the background-subtracted image is correlated with a Gaussian of
    the spot size (matched filter); local maxima whose response exceeds
    `min_snr` times its local noise are candidates. Each is fitted with an
    elliptical Gaussian (axes radial/tangential to `center_rc`) plus a local
    offset, weighted by the pixel variance (background noise plus shot noise of
    the spot). The fitted spots are subtracted and the residual searched again,
    so faint spots beside bright ones are found; neighbours are refitted with
    each other's models removed, and wide spots are tested for a close pair.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
        Camera frame, any real dtype (converted to float64 counts).
    sigma_px : float, keyword-only
        Expected Gaussian σ of a spot, pixels (sets the filter and fit window).
    min_snr : float, keyword-only
        Detection threshold in units of the local noise of the matched-filter
        response (the detection significance, reported as ``snr``).
    mask : (M, N) array_like of bool, optional, keyword-only
        Valid pixels; masked pixels are never reported and never fitted.
    background : BackgroundEstimate, optional, keyword-only
        Default: :func:`estimate_background` of the image on `mask`.
    center_rc : (row, col), optional, keyword-only
        Reference for radial/tangential widths; default the image centre.
    saturation_level : float, optional, keyword-only
        Full-scale value; default from an unsigned-integer dtype or a LoadedImage.
    split_pairs : bool, keyword-only
        Test wide spots for a close pair and split them with a two-spot fit.
    second_pass : bool, keyword-only
        Look again, with the found spots' models removed, for faint spots beside bright ones.
    psf_axis_deg : float or None, keyword-only
        Image angle (counter-clockwise from +x, y up) of the long axis shared by every
        spot when the point-spread function is elongated along one image direction; the
        fits then hold their axes along it instead of radial. None: radial axes.
    psf_elongation : float, keyword-only
        That spread's width along `psf_axis_deg` over its width across (≥ 1); `sigma_px`
        is then the geometric mean of the two.
    fit_mask : (M, N) array_like of bool, optional, keyword-only
        Pixels the fits may use, default `mask`: a wider one (a safety margin of `mask`
        that still holds good light) lets a spot cut by `mask` be fitted on the light
        beyond it. Spots are still searched and reported on `mask` only.

    Returns
    -------
    SpotTable
        One row per spot: centre (row, col) px, amplitude and integrated intensity
        (counts above background), SNR, widths (px), flags.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> r, c = np.mgrid[:96, :96]
    >>> img = 50 + 400 * np.exp(-((r - 40.3) ** 2 + (c - 55.7) ** 2) / 8.0)
    >>> t = find_spots(rng.poisson(img).astype(float), sigma_px=2.0)
    >>> print(len(t), bool(np.abs(t.rc - [40.3, 55.7]).max() < 0.15))   # bound 0.028 px
    1 True
    """
    sat = _saturation_of(image) if saturation_level is None else float(saturation_level)
    img = _as_float_image(image)
    shape = img.shape
    if not (0.3 <= sigma_px <= 30 and math.isfinite(sigma_px)):
        raise ParameterError(f"`sigma_px` must be between 0.3 and 30 px, got {sigma_px}.")
    if not (min_snr > 0 and math.isfinite(min_snr)):
        raise ParameterError(f"`min_snr` must be positive, got {min_snr}.")
    if not (1.0 <= psf_elongation <= 10.0):
        raise ParameterError(f"`psf_elongation` must be between 1 and 10, got {psf_elongation}.")
    valid = _check_mask(mask, shape)
    centre = np.array([(shape[0] - 1) / 2, (shape[1] - 1) / 2]) if center_rc is None else \
        np.asarray(center_rc, dtype=np.float64).reshape(2)
    orient = _orientation(centre, psf_axis_deg, psf_elongation)
    bg = estimate_background(img, valid) if background is None else background
    if not isinstance(bg, BackgroundEstimate):
        raise ParameterError(f"`background` must be a BackgroundEstimate, got {type(bg).__name__}.")
    if not valid.any():
        return _empty_table(centre)
    usable = valid if fit_mask is None else _check_mask(fit_mask, shape, "fit_mask") | valid
    return _find_spots(img, sat, sigma_px, min_snr, valid, usable, centre, orient, bg, split_pairs, second_pass,
                       psf_axis_deg, psf_elongation)


def _orientation(centre, psf_axis_deg, psf_elongation):
    """Each fit's axes: radial from `centre`, or fixed along the spread's long axis."""
    if psf_axis_deg is None:
        return centre
    a = math.radians(float(psf_axis_deg))
    return _FixedAxis((-math.sin(a), math.cos(a)), psf_elongation)


def _find_spots(img, sat, sigma_px, min_snr, valid, usable, centre, orient, bg, split_pairs, second_pass,
                psf_axis_deg, psf_elongation, *, res=None, f1=None, spot_noise="measure") -> SpotTable:
    """:func:`find_spots` on checked inputs. `res` and `f1` (the residual on `usable` and its
    matched filter) may be given when already computed; `spot_noise` is "measure" (test the
    pixels for correlated noise), None (independent pixels) or the pixel noise at the spot
    scale ((M, N), from :func:`_spot_scale_noise` over √Σg²)."""
    shape = img.shape
    noise = np.maximum(bg.noise, 1e-6)
    gain = bg.gain_adu
    if res is None:
        res = np.where(usable, img - bg.background, 0.0).astype(np.float32)
    clipped = _clipped(img, usable, sat)  # full-scale pixels and their neighbours: never fitted
    ok_fit = usable if clipped is None else usable & ~clipped
    knorm = _gauss_kernel_norm(sigma_px)
    s_long = sigma_px * math.sqrt(psf_elongation if psf_axis_deg is not None else 1.0)
    half = max(3, int(math.ceil(3.0 * s_long)))
    fitter = _Fitter(half)
    noise_f = (noise * knorm).astype(np.float32)

    # pass 1
    if f1 is None:
        f1 = _matched(res, sigma_px)
    if isinstance(spot_noise, str):
        s1 = f1 / noise_f
        nf = _spot_scale_noise(f1, s1, valid, sigma_px)  # correlated pixel noise (demosaicing, JPEG)
    else:
        s1, nf = None, None if spot_noise is None else (spot_noise * knorm).astype(np.float32)
    if nf is not None:
        noise_f, s1 = nf, f1 / nf
        noise = nf.astype(np.float64) / knorm
        bg = dataclasses.replace(bg, noise=noise)
    elif s1 is None:
        s1 = f1 / noise_f
    cand = _maxima(s1, min_snr, valid)
    spots = _fit_pass1(fitter, res, noise, ok_fit, valid, cand, s1, f1, orient, gain, sigma_px, shape, half)
    if gain is None and len(spots["rc"]):
        # no variance law from the background: measure it on the first fits, then refit those
        # with the new weights (detection does not use it; the residual search below does)
        g = _gain_from_spots(fitter, res, noise, ok_fit, spots, half, min_spots=3)  # a blend or two is outvoted
        if g is not None:
            gain, bg = g, dataclasses.replace(bg, gain_adu=g)
            spots = _refit_weighted(fitter, res, noise, ok_fit, valid, spots, orient, gain, sigma_px, shape,
                                    half, crowded_too=not second_pass)
    hints = np.full((len(spots["rc"]), 3), np.nan)  # (row, col, amplitude) of a possible companion
    if second_pass and len(spots["rc"]):
        # pass 2: the matched-filter residual after removing every fitted spot
        good = (spots["flags"] & FLAG_FIT_FAILED) == 0
        sub = _take(spots, good)
        # the spots' wings, where the frame has them: drawn under every spot, as seen through
        # the filter, with a quarter of their light as its uncertainty
        f2, wing, wing_var = f1, 0.0, None
        prof = _wing_profile(res, noise, valid, spots)
        if prof is not None:
            wing = _wing_image(shape, sub, prof)
            fw = _matched(wing, sigma_px)
            f2, wing_var = f1 - fw, (0.25 * fw) ** 2
        s2, fm = _residual_snr(f2, sub, noise, gain, knorm, sigma_px, half, model_var_f=wing_var)
        cand2 = _maxima(s2, min_snr, valid)
        if len(cand2):
            from scipy.spatial import cKDTree

            d, near = cKDTree(spots["rc"]).query(cand2, k=1)
            # residual peaks right beside a spot mean that spot may be a blend: test it as a pair,
            # starting the second member at the residual peak
            blend = d <= 3.0 * sigma_px
            spots["flags"][near[blend]] |= _FLAG_BLEND
            pairs_b = sorted(zip(cand2[blend].tolist(), near[blend].tolist()), key=lambda t: s2[t[0][0], t[0][1]])
            for (r, c), i in pairs_b:  # the strongest residual peak of a spot is written last
                hints[i] = (r, c, 2.0 * max(float(f2[r, c] - fm[r, c]), 0.0))
            cand2 = cand2[~blend]
        if len(cand2):
            mdl = _render(shape, sub["rc"], sub["amp"], sub["sr"], sub["st"], sub["u"], half)
            new = _fit_candidates(fitter, res - mdl - wing, noise, ok_fit, valid, cand2, s2, orient, gain, sigma_px,
                                  mdl)
            spots = _concat(spots, new)
            hints = np.vstack([hints, np.full((len(new["rc"]), 3), np.nan)])
        spots = _refit_neighbours(fitter, res, noise, ok_fit, valid, spots, orient, gain, sigma_px, shape, half,
                                  sweeps=60)
    if split_pairs and len(spots["rc"]):
        spots = _split_pairs(fitter, res, noise, ok_fit, valid, spots, orient, gain, sigma_px, shape, half,
                             min_snr, hints)
    if len(spots["rc"]):
        spots = _refit_cut(fitter, res, noise, ok_fit, valid, spots, orient, gain, sigma_px, shape, half)
    if clipped is not None:
        spots = _merge_saturated(res, noise, ok_fit, valid, clipped, spots, s1, orient, gain, sigma_px, s_long)
    spots = _dedupe(spots, 0.75 * sigma_px)
    if gain is None and len(spots["rc"]):
        # too few clean first fits: measure it on the final (unsplit) spots and measure again
        g = _gain_from_spots(fitter, res, noise, ok_fit, _take(spots, (spots["flags"] & FLAG_SPLIT) == 0), half)
        if g is not None:
            return _find_spots(img, sat, sigma_px, min_snr, valid, usable, centre, orient,
                               dataclasses.replace(bg, gain_adu=g), split_pairs, second_pass, psf_axis_deg,
                               psf_elongation, res=res, f1=f1, spot_noise=None if nf is None else noise)
    return _table(spots, img, bg, sat, valid, centre, sigma_px)


def _table(spots, img, bg, sat, valid, centre, sigma_px) -> SpotTable:
    rc = spots["rc"]
    shape = img.shape
    inside = (rc[:, 0] >= -0.5) & (rc[:, 0] <= shape[0] - 0.5) & (rc[:, 1] >= -0.5) & (rc[:, 1] <= shape[1] - 0.5)
    ri = np.clip(np.rint(rc[:, 0]).astype(int), 0, shape[0] - 1)
    ci = np.clip(np.rint(rc[:, 1]).astype(int), 0, shape[1] - 1)
    keep = inside & valid[ri, ci] & (spots["amp"] > 0)
    spots = _take(spots, keep)
    rc, ri, ci = spots["rc"], ri[keep], ci[keep]
    flags = spots["flags"] & np.uint8(0x7F)
    if sat is not None and len(rc):
        h = max(1, int(round(1.5 * sigma_px)))
        o = np.arange(-h, h + 1)
        rr = np.clip(ri[:, None, None] + o[None, :, None], 0, shape[0] - 1)
        cc = np.clip(ci[:, None, None] + o[None, None, :], 0, shape[1] - 1)
        flags[np.max(img[rr, cc], axis=(1, 2)) >= sat - 0.5] |= FLAG_SATURATED
    nz = bg.noise[ri, ci]
    amp, sr, st = spots["amp"], spots["sr"], spots["st"]
    sig = spots["sig"]
    # split spots get their uncertainty from the refit; fall back to a shot/background estimate
    miss = ~np.all(np.isfinite(sig), axis=1)
    if miss.any():
        sig[miss] = (np.sqrt(sr * st) / np.maximum(amp / nz, 1e-3))[miss, None] * np.ones((1, 2))
    # widths along and across each fit's axis → along and across the direction from the centre
    # (the same when the axes were radial): the marginal σ² = σ_a² cos² + σ_b² sin²
    ur = _unit_radial(rc, np.asarray(centre, float))
    cos2 = np.clip(np.sum(spots["u"] * ur, axis=1) ** 2, 0.0, 1.0) if len(rc) else np.zeros(0)
    s_rad = np.sqrt(sr**2 * cos2 + st**2 * (1 - cos2))
    s_tan = np.sqrt(sr**2 * (1 - cos2) + st**2 * cos2)
    return SpotTable(rc=rc, sigma_rc=sig, intensity=_PROFILE.volume(amp, sr, st), amplitude=amp,
                     peak_snr=amp / np.maximum(nz, 1e-12), snr=spots["snr"], fwhm_radial_px=_PROFILE.fwhm(s_rad),
                     fwhm_tangential_px=_PROFILE.fwhm(s_tan), background=bg.background[ri, ci] + spots["off"],
                     flags=flags, center_rc=np.asarray(centre, float))


@dataclass(frozen=True, eq=False)
class Measurement:
    """Everything measured on one frame by :func:`measure_image`.

    Attributes
    ----------
    spots : SpotTable
    screen : ScreenMask
    gun : ShadowMask
    background : BackgroundEstimate
    valid : (M, N) ndarray of bool
        Pixels searched (screen without the shadow).
    sigma_px : float
        Spot σ used by the filter (given, or measured from the first pass); for an
        elongated spread the geometric mean of its two axes.
    rejected : SpotTable or None
        Detections that are no diffraction spots; `rejected_reasons` says why, row by row.
    psf_axis_deg : float or None
        Image angle of the long axis every spot shares (counter-clockwise from +x), when the
        point-spread is elongated along one image direction; None when it is round or radial.
    psf_elongation : float
        Width along that axis over the width across it (1.0 when None).
    """

    spots: SpotTable
    screen: ScreenMask
    gun: ShadowMask
    background: BackgroundEstimate
    valid: np.ndarray
    sigma_px: float
    rejected: SpotTable | None = None
    rejected_reasons: tuple = ()
    psf_axis_deg: float | None = None
    psf_elongation: float = 1.0

    def set_aside(self, rows, reason: str) -> "Measurement":
        """This measurement with the spots `rows` (bool mask or indices into `spots`) moved to
        the rejected detections, each with `reason`."""
        drop = np.zeros(len(self.spots), bool)
        drop[np.asarray(rows)] = True
        if not drop.any():
            return self
        moved = self.spots.select(drop)
        before = self.rejected if self.rejected is not None else self.spots.select(np.zeros(len(drop), bool))
        rejected = SpotTable(**{n: np.concatenate([getattr(before, n), getattr(moved, n)]) for n in _ROW_FIELDS},
                             center_rc=self.spots.center_rc)
        reasons = tuple(self.rejected_reasons) + (reason,) * len(moved)
        return dataclasses.replace(self, spots=self.spots.select(~drop), rejected=rejected, rejected_reasons=reasons)

    def rejected_records(self) -> list[dict]:
        """The detections that are no spots, each with its `reason`."""
        if self.rejected is None:
            return []
        return [dict(r, reason=str(why)) for r, why in zip(self.rejected.to_records(), self.rejected_reasons)]

    def to_dict(self) -> dict:
        return {"spots": self.spots.to_records(), "rejected_spots": self.rejected_records(),
                "screen": self.screen.to_dict(), "gun": self.gun.to_dict(),
                "sigma_px": float(self.sigma_px), "psf_axis_deg": self.psf_axis_deg,
                "psf_elongation": float(self.psf_elongation),
                "gain_adu": self.background.gain_adu, "dark_level": self.background.dark_level}


def measure_image(image, *, sigma_px: float | None = 2.0, min_snr: float = 5.0, screen=None, gun=None,
                  center_rc=None, saturation_level=None, block_px: int | None = None, accept: bool = True,
                  **spot_kw) -> Measurement:
    """Screen → gun shadow → background → spots, in one call.

    Parameters
    ----------
    image : (M, N) array_like or LoadedImage
        Camera frame, any real dtype (converted to float64 counts).
    sigma_px : float or None, keyword-only
        Spot Gaussian σ in pixels; None measures it from a first detection pass.
    min_snr : float, keyword-only
        Detection threshold in units of the local noise of the matched-filter response.
    screen : ScreenMask, dict or None, keyword-only
        A ScreenMask, or keyword arguments for :func:`find_screen` (e.g.
        ``{"circle_xyr": (x, y, r)}``); None finds it.
    gun : ShadowMask, dict or None, keyword-only
        Likewise for :func:`find_gun_shadow` (``{"disk_xyr": ..., "arm_angle_deg": ...}``).
    center_rc : (row, col), optional
        Reference for radial/tangential widths; default the gun-disk centre
        when found, else the screen centre.
    saturation_level : float, optional, keyword-only
        Full-scale value (counts); default from an unsigned-integer dtype or a LoadedImage.
        Saturated pixels do not enter the measurement of the spot σ.
    block_px : int, optional, keyword-only
        Background block size; default one 16th of the shorter side, 16–32 px (a
        small frame's diffuse background varies on a shorter scale in pixels).
    accept : bool, keyword-only
        Keep only detections that can be diffraction spots (default): as wide as the
        spots, spot-shaped, standing out of their own surroundings (`spots.accept`).
        The others go to ``Measurement.rejected`` with their reasons.
    **spot_kw
        Passed on to :func:`find_spots` (``split_pairs``, ``second_pass``).

    Returns
    -------
    Measurement
        The screen and gun-shadow masks, the background estimate, the spot σ (px),
        the accepted spots (``.spots``, a :class:`SpotTable`) and the rejected ones.

    Examples
    --------
    >>> rng = np.random.default_rng(2)
    >>> r, c = np.mgrid[:160, :160]
    >>> screen = (r - 80) ** 2 + (c - 80) ** 2 < 70**2
    >>> lam = 5 + (40 + 300 * np.exp(-((r - 60.2) ** 2 + (c - 90.6) ** 2) / 8)) * screen
    >>> m = measure_image(rng.poisson(lam).astype(float))
    >>> print(m.screen.source, len(m.spots), np.round(m.spots.xy, 1).tolist())
    auto 1 [[90.6, 60.2]]
    """
    sat = _saturation_of(image) if saturation_level is None else float(saturation_level)
    img = _as_float_image(image)
    if isinstance(screen, ScreenMask):
        scr = screen
    else:
        scr = find_screen(img, **(screen or {}))
    if isinstance(gun, ShadowMask):
        gsh = gun
    else:
        gsh = find_gun_shadow(img, scr, **(gun or {}))
    valid = scr.mask & ~gsh.mask
    if valid.sum() < 64:
        raise ImageError("The screen minus the gun shadow leaves fewer than 64 pixels to search.")
    dark = None
    if scr.source != "frame":
        a, b = scr.semi_axes_px
        dark = ~disk_mask(img.shape, scr.center_rc, 0, axes_px=(a + 3 + scr.margin_px, b + 3 + scr.margin_px),
                          angle_deg=scr.angle_deg) & ~gsh.mask
        if dark.sum() < 200:
            dark = None
    if center_rc is None:
        center_rc = gsh.center_rc if gsh.center_rc is not None else scr.center_rc
    if block_px is None:
        block_px = int(min(max(min(img.shape) // 16, 16), 32))
    bg = estimate_background(img, valid, block_px=block_px, dark_mask=dark)
    s = 2.0 if sigma_px is None else float(sigma_px)
    # detection only: where the spots are and roughly how bright
    res = np.where(valid, img - bg.background, 0.0).astype(np.float32)
    rc1, amp1, snr1, smap, noise1 = _detect(res, bg, valid, s, min_snr)
    if noise1 is not None:  # correlated pixels: the noise measured at the spot scale
        bg = dataclasses.replace(bg, noise=noise1)
    axis_deg, elong = spot_kw.pop("psf_axis_deg", None), spot_kw.pop("psf_elongation", 1.0)
    if sigma_px is None:  # the spot size (and shape) from the brightest isolated spots
        clipped = _clipped(img, valid, sat)
        psf = _psf_from_bright(res, bg, valid, None if clipped is None else ~clipped, rc1, snr1, s,
                               np.asarray(center_rc, float))
        if psf is not None:
            s, axis_deg, elong = psf
            if abs(math.log(s / 2.0)) > math.log(1.3):  # a filter matched to the real spot size
                rc1, amp1, snr1, smap, noise1 = _detect(res, bg, valid, s, min_snr)
    # second background pass with the spots masked out, out to where a spot falls below ½ σ of noise
    excl = np.zeros(img.shape, bool)
    if len(rc1):
        nz = bg.noise[rc1[:, 0].astype(int), rc1[:, 1].astype(int)]
        rad = _PROFILE.reach_px(s, 2.0 * amp1 / np.maximum(nz, 1e-9)) + 1.0
        excl = _disks(img.shape, rc1, np.clip(rad, 2.5 * s, 12 * s))
    bg2 = estimate_background(img, valid, block_px=block_px, exclude=excl, dark_mask=dark, reuse=bg) \
        if (valid & ~excl).sum() > 64 else bg
    # the fits may use the screen's light out to 1 px inside its rim (the mask keeps 3 px off it)
    usable = valid
    if scr.source != "frame" and scr.margin_px > 1.0:
        a, b = scr.semi_axes_px
        usable = valid | disk_mask(img.shape, scr.center_rc, 0, axes_px=(a - 1.0, b - 1.0),
                                   angle_deg=scr.angle_deg) & ~gsh.mask
    res2 = np.where(usable, img - bg2.background, 0.0).astype(np.float32)
    f2 = _matched(res2, s)
    # and dark patches (dust on the screen, a scratch), found against that background: they
    # pull the block levels down, and the clear screen between them then reads as spots
    patches = _dark_patches(res2, f2, valid, s, min_snr, bg2.noise if noise1 is None else noise1)
    if patches is not None and (valid & ~excl & ~patches).sum() > 64:
        bg2 = estimate_background(img, valid, block_px=block_px, exclude=excl | patches, dark_mask=dark, reuse=bg)
        res2 = f2 = None
    split, second = spot_kw.pop("split_pairs", True), spot_kw.pop("second_pass", True)
    if spot_kw:
        raise TypeError(f"measure_image() got unexpected keyword arguments {sorted(spot_kw)}")
    centre = np.asarray(center_rc, dtype=np.float64).reshape(2)
    spots = _find_spots(img, sat, s, min_snr, valid, usable, centre, _orientation(centre, axis_deg, elong), bg2,
                        split, second, axis_deg, elong, res=res2, f1=f2, spot_noise=noise1)
    shape_kw = {"psf_axis_deg": axis_deg, "psf_elongation": elong}
    if not accept or not len(spots):
        return Measurement(spots, scr, gsh, bg2, valid, s, **shape_kw)
    # keep what can be a diffraction spot: the spots' own width and shape, standing out of its ring
    reasons = judge_spots(spots, s)
    s_long = s * math.sqrt(elong) if axis_deg is not None else s
    contrast = local_snr(img, valid, bg2.noise if noise1 is None else noise1, spots.rc, s, ring_sigma_px=s_long)
    reasons[(reasons == "") & (contrast < MIN_LOCAL_SNR)] = REJECT_FLAT  # NaN (too little valid): kept
    keep = reasons == ""
    kept, rejected = split_table(spots, keep)
    return Measurement(kept, scr, gsh, bg2, valid, s, rejected, tuple(reasons[~keep]), **shape_kw)


def _disks(shape, rc, rad) -> np.ndarray:
    out = np.zeros(shape, bool)
    for (r, c), q in zip(rc, rad):
        h = int(math.ceil(q))
        r0, r1 = max(0, int(r) - h), min(shape[0], int(r) + h + 2)
        c0, c1 = max(0, int(c) - h), min(shape[1], int(c) + h + 2)
        if r0 >= r1 or c0 >= c1:
            continue
        yy, xx = np.ogrid[r0:r1, c0:c1]
        out[r0:r1, c0:c1] |= (yy - r) ** 2 + (xx - c) ** 2 <= q * q
    return out


def localization_bound_px(photons, sigma_px, background_per_px, *, pixel_px: float = 1.0,
                          kind: str = "ml") -> np.ndarray:
    """Best attainable 1-D localisation error of a Gaussian spot on a pixel grid.

    s = spot σ, a = pixel size, N = photons, b² = background photons per pixel,
    s_a² = s² + a²/12.

    * ``"thompson"`` — Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002):
      ⟨Δx²⟩ = s_a²/N + 8π s⁴ b² / (a² N²).
    * ``"ls"`` — Mortensen et al., Nat. Methods 7, 377 (2010), least squares:
      Var = (s_a²/N) (16/9 + 8π s_a² b² / (N a²)).
    * ``"ml"`` — same paper, maximum likelihood (the Cramér–Rao bound):
      Var = (s_a²/N) / (−∫₀¹ t ln t / (t + τ) dt), τ = 2π s_a² b² / (N a²).

    Parameters
    ----------
    photons, sigma_px, background_per_px : float or ndarray (broadcast)
        N, s (pixels) and b² in photons per pixel (add the read-noise variance in
        photons² for a camera).
    pixel_px : float, keyword-only
        Pixel size a, in the units of `sigma_px`.
    kind : {"ml", "ls", "thompson"}, keyword-only
        Which bound (see above).

    Returns
    -------
    ndarray of float64
        Standard deviation per coordinate, pixels.

    Examples
    --------
    >>> print(np.round([localization_bound_px(2000, 2.0, 10.0, kind=k) for k in ("thompson", "ls", "ml")], 5))
    [0.0552  0.06839 0.06181]
    """
    n = np.asarray(photons, dtype=np.float64)
    s = np.asarray(sigma_px, dtype=np.float64)
    b2 = np.asarray(background_per_px, dtype=np.float64)
    n, s, b2 = np.broadcast_arrays(n, s, b2)
    a = float(pixel_px)
    if np.any(n <= 0) or np.any(s <= 0) or np.any(b2 < 0) or a <= 0:
        raise ParameterError("Bound needs photons > 0, sigma_px > 0, background ≥ 0 and pixel_px > 0.")
    sa2 = s * s + a * a / 12.0
    if kind == "thompson":
        var = sa2 / n + 8 * np.pi * s**4 * b2 / (a * a * n * n)
    elif kind == "ls":
        var = sa2 / n * (16.0 / 9.0 + 8 * np.pi * sa2 * b2 / (n * a * a))
    elif kind == "ml":
        tau = 2 * np.pi * sa2 * b2 / (n * a * a)
        # −∫₀¹ t ln t /(t + τ) dt, t = e^(−u), is ∫₀^∞ e^(−u) u / (1 + τ e^u) du: Gauss–Laguerre
        x, w = np.polynomial.laguerre.laggauss(100)
        t = tau.reshape(-1, 1)
        with np.errstate(over="ignore"):
            integral = (w[None, :] * x[None, :] / (1.0 + t * np.exp(x[None, :]))).sum(axis=1).reshape(tau.shape)
        var = sa2 / n / integral
    else:
        raise ParameterError(f"`kind` must be 'thompson', 'ls' or 'ml', got {kind!r}.")
    return np.sqrt(var)
