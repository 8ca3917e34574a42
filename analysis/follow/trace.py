"""Every beam of a parameter series followed frame by frame, with the camera's slow drift.

At one energy the spots do not move with the parameter; only the camera may drift
slowly (the sample or the screen warms, the mount creeps). :class:`BeamFollower` takes
the frames one at a time (a folder being filled, or a stack): it predicts the beams from
the current screen geometry, refines and integrates them with the energy series'
machinery (:mod:`analysis.series.track`, :mod:`analysis.series.integrate`), measures
each beam's radial and tangential width, and moves the geometry by the shift and scale
the refined beams show. :meth:`BeamFollower.result` returns a :class:`ParameterTrace`
with the drift fitted as a straight line in frame order. Positions are (x, y) pixels.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import ParameterError, SeriesError
from ..optics import ScreenGeometry
from ..series.beams import BeamSet
from ..series.integrate import FLAG_OFF_SCREEN, _extract, _mask_map
from ..series.track import _BeamCurves, _bootstrap, _one_frame, _untruncated_sigma

__all__ = ["ParameterTrace", "BeamFollower", "fit_drift"]

_WIDTH_MIN_SNR = 10.0  # widths only where the beam stands clearly out of its noise


@dataclass(frozen=True, eq=False)
class ParameterTrace(_BeamCurves):
    """Every beam measured in every frame of a parameter series.

    Attributes
    ----------
    value : (F,) ndarray of float64
        The parameter of each frame.
    name, unit : str
        What the parameter is.
    frame_names : tuple of str
    energy_eV : float
    beams : BeamSet
        The K beams followed.
    intensity, sigma : (F, K) ndarray of float64
        Integrated intensity above the local background (frame units) and its
        counting-statistics uncertainty; NaN where not integrated.
    background_per_px : (F, K) ndarray of float64
        Local background at each beam, frame units per pixel.
    width_radial_px, width_tangential_px : (F, K) ndarray of float64
        Gaussian-equivalent σ of each spot along and across the direction to the
        pattern centre, px; NaN below a signal-to-noise of 10.
    xy_px : (F, K, 2) ndarray of float64
        Where each beam was integrated.
    flags : (F, K) ndarray of uint8
        As :data:`analysis.series.FLAG_NAMES`.
    geometry : tuple of ScreenGeometry
        The geometry each frame was measured with (after its drift step).
    drift : dict
        :func:`fit_drift` of the frames' centres and scales.
    """

    value: np.ndarray
    name: str
    unit: str
    frame_names: tuple
    energy_eV: float
    beams: BeamSet
    intensity: np.ndarray
    sigma: np.ndarray
    background_per_px: np.ndarray
    width_radial_px: np.ndarray
    width_tangential_px: np.ndarray
    xy_px: np.ndarray
    flags: np.ndarray
    geometry: tuple
    drift: dict = field(default_factory=dict)
    _AXIS = "value"  # curve(beam) is (value, intensity, sigma)


def fit_drift(center_xy_px, scale_px) -> dict:
    """A straight line in frame order through the frames' pattern centres and scales.

    Parameters
    ----------
    center_xy_px : (F, 2) array_like of float
        The pattern centre of each frame, (x, y) pixels.
    scale_px : (F,) array_like of float
        The camera scale of each frame, pixels.

    Returns
    -------
    dict
        ``rate_px_per_frame`` (x, y), ``scale_rate_per_frame`` (relative), ``start_px``,
        ``rms_px`` (scatter of the centres about the line), ``total_px`` (the line's
        displacement from the first to the last frame).

    Examples
    --------
    >>> c = np.column_stack([100 + 0.05 * np.arange(20), 80 - 0.02 * np.arange(20)])
    >>> d = fit_drift(c, np.full(20, 300.0))
    >>> print(np.round(d["rate_px_per_frame"], 3).tolist(), round(d["rms_px"], 6))
    [0.05, -0.02] 0.0
    """
    c = np.asarray(center_xy_px, dtype=np.float64).reshape(-1, 2)
    s = np.asarray(scale_px, dtype=np.float64).reshape(-1)
    n = len(c)
    if n < 2:
        return {"rate_px_per_frame": [0.0, 0.0], "scale_rate_per_frame": 0.0,
                "start_px": c[0].tolist() if n else [float("nan")] * 2, "rms_px": 0.0, "total_px": 0.0}
    i = np.arange(n, dtype=np.float64)
    a = np.column_stack([np.ones(n), i])
    coef, *_ = np.linalg.lstsq(a, c, rcond=None)
    res = c - a @ coef
    sc, *_ = np.linalg.lstsq(a, np.log(s), rcond=None)
    return {"rate_px_per_frame": coef[1].tolist(), "scale_rate_per_frame": float(sc[1]),
            "start_px": coef[0].tolist(), "rms_px": float(np.sqrt(np.mean(np.sum(res**2, axis=1)))),
            "total_px": float(np.hypot(*coef[1]) * (n - 1))}


def _widths(frame, xy, bg, ok, centre, r_ap, mask_map):
    """Radial and tangential σ of the spots at `xy` (K, 2) from background-subtracted moments."""
    k = len(xy)
    wr = np.full(k, np.nan)
    wt = np.full(k, np.nan)
    idx = np.flatnonzero(ok)
    if not idx.size:
        return wr, wt
    rc = xy[idx, ::-1]
    half = int(math.ceil(r_ap)) + 1
    win = _extract(frame, rc, half, mask_map)
    off = np.arange(-half, half + 1, dtype=np.float64)
    base = np.rint(rc)
    dr = (base[:, 0, None] + off[None, :] - rc[:, 0, None])[:, :, None]
    dc = (base[:, 1, None] + off[None, :] - rc[:, 1, None])[:, None, :]
    inside = (dr * dr + dc * dc <= r_ap * r_ap) & win.usable
    w = np.where(inside, np.maximum(win.data - bg[idx, None, None], 0.0), 0.0)
    tot = w.sum(axis=(1, 2))
    u = xy[idx] - np.asarray(centre)[None, :]
    norm = np.hypot(u[:, 0], u[:, 1])
    u = np.where(norm[:, None] > 1.0, u / np.maximum(norm, 1e-9)[:, None], np.array([[1.0, 0.0]]))
    along = dc * u[:, 0, None, None] + dr * u[:, 1, None, None]  # x = column, y = row
    across = -dc * u[:, 1, None, None] + dr * u[:, 0, None, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        m_r = (w * along * along).sum(axis=(1, 2)) / tot
        m_t = (w * across * across).sum(axis=(1, 2)) / tot
    out = []
    for m in (m_r, m_t):  # a Gaussian cut at the aperture has a smaller second moment
        s = _untruncated_sigma(np.sqrt(np.maximum(m, 0.0)), r_ap)
        out.append(np.where(tot > 0, s, np.nan))
    wr[idx], wt[idx] = out
    return wr, wt


class BeamFollower:
    """Follow a fixed set of beams through frames at one energy, one frame at a time.

    Parameters
    ----------
    beams : BeamSet
        The beams to follow (more may be added with :meth:`add_beams`).
    geometry : ScreenGeometry
        Starting camera model, within a few pixels of the truth (e.g. from indexing).
    energy_eV : float, keyword-only
    mask : (M, N) ndarray of bool, optional, keyword-only
        True where pixels may be used.
    radius_px : float, optional, keyword-only
        Aperture radius; default 3 × the spot σ measured in the first frame.
    search_px, min_snr, gain, saturation_level, background, method
        As for :func:`analysis.series.track_series`.
    follow_drift : bool, keyword-only
        Move the centre and scale with the refined beams after every frame.

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.simulate import forward_pattern, render_image
    >>> from analysis.series import beams_from_nets
    >>> sub, geom = parse_substrate("Cu(100)"), ScreenGeometry(128.0, 128.0, 140.0)
    >>> pat = forward_pattern(sub, energy_eV=150.0, geometry=geom)
    >>> f = BeamFollower(beams_from_nets(sub, energy_max_eV=150.0, geometry=geom), geom, energy_eV=150.0)
    >>> for t in (300.0, 320.0):
    ...     _ = f.add(render_image(pat, shape=(256, 256), rng=np.random.default_rng(int(t))).image, value=t)
    >>> tr = f.result(name="temperature", unit="K")
    >>> print(tr.intensity.shape, bool(np.all(np.isfinite(tr.curve("(1,0)")[1]))))
    (2, 13) True
    """

    def __init__(self, beams: BeamSet, geometry: ScreenGeometry, *, energy_eV: float, mask=None,
                 radius_px: float | None = None, search_px: float = 6.0, min_snr: float = 6.0, gain: float = 1.0,
                 saturation_level: float | None = None, background: str = "annulus", method: str = "aperture",
                 follow_drift: bool = True):
        if not isinstance(beams, BeamSet):
            raise ParameterError(f"`beams` must be a BeamSet, got {type(beams).__name__}.")
        if not isinstance(geometry, ScreenGeometry):
            raise ParameterError(f"`geometry` must be a ScreenGeometry, got {type(geometry).__name__}.")
        e = float(energy_eV)
        if not (math.isfinite(e) and e > 0):
            raise ParameterError(f"`energy_eV` must be a positive number of eV, got {energy_eV!r}.")
        self.beams, self.geometry, self.energy_eV = beams, geometry, e
        self.mask = None if mask is None else np.ascontiguousarray(mask, dtype=bool)
        self.r_ap = None if radius_px is None else float(radius_px)
        self.ann = None
        self.sigma = None
        self.opts = dict(search_px=float(search_px), min_snr=float(min_snr), gain=float(gain),
                         background=background, method=method)
        self.saturation_level = saturation_level
        self.follow_drift = bool(follow_drift)
        self.shape = None
        self._mask_map = None
        self.rows: list[dict] = []
        self.last_frame: np.ndarray | None = None  # the frame measured last (for a live view)

    def __len__(self) -> int:
        return len(self.rows)

    def add_beams(self, beams: BeamSet) -> None:
        """Follow `beams` (a larger set holding the current beams first) from the next frame on.

        Parameters
        ----------
        beams : BeamSet
            The beams, the ones followed now first.
        """
        k = len(self.beams)
        if len(beams) < k or not np.allclose(beams.hk[:k], self.beams.hk):
            raise ParameterError("`beams` must begin with the beams already followed, in their order.")
        self.beams = beams

    def add(self, frame, *, value: float, name: str = "") -> dict:
        """Measure one frame; returns its row (intensities, widths, flags, geometry).

        Parameters
        ----------
        frame : (M, N) ndarray or LoadedImage
            The frame.
        value : float, keyword-only
            Its parameter.
        name : str, keyword-only
            Its name (file name).

        Returns
        -------
        dict
            The frame's row.
        """
        sat = self.saturation_level
        if sat is None:
            sat = getattr(frame, "saturation_level", None)  # a LoadedImage knows its full scale
        frame = np.ascontiguousarray(getattr(frame, "data", frame))
        i = len(self.rows)
        name = name or f"frame {i}"
        if frame.ndim != 2:
            raise SeriesError(f"Frame {i} ({name}) is not a 2-D image (shape {frame.shape}).")
        if self.shape is None:
            self.shape = frame.shape
            if self.mask is not None and self.mask.shape != frame.shape:
                raise SeriesError(f"The mask is {self.mask.shape[1]}×{self.mask.shape[0]} px but frame 0 ({name}) "
                                  f"is {frame.shape[1]}×{frame.shape[0]} px.")
            self._mask_map = _mask_map(self.mask)
        elif frame.shape != self.shape:
            raise SeriesError(f"Frame {i} ({name}) is {frame.shape[1]}×{frame.shape[0]} px but frame 0 is "
                              f"{self.shape[1]}×{self.shape[0]} px: all frames must have one size.")
        if sat is None and np.issubdtype(frame.dtype, np.integer):
            sat = float(np.iinfo(frame.dtype).max)
        g, e, o = self.beams.g_par, self.energy_eV, self.opts
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):  # windows of blank pixels
            if self.ann is None:
                self.geometry, self.r_ap, self.ann, self.sigma = _bootstrap(
                    frame, e, g, self.geometry, self._mask_map, sat, self.r_ap, None, None, o["search_px"],
                    o["min_snr"], ("center", "scale"), None)
            geom = self.geometry
            inten, sig, xy, flags, bgpx, okpos, s_est = _one_frame(
                frame, e, g, geom, self._mask_map, sat, self.r_ap, self.ann, o["background"], o["method"],
                o["search_px"], o["min_snr"], o["gain"], self.sigma)
        if np.isfinite(s_est):
            self.sigma = s_est
        with np.errstate(invalid="ignore", divide="ignore"):
            strong = np.isfinite(inten) & (inten > _WIDTH_MIN_SNR * sig)
        centre = np.array(geom.center_px, dtype=np.float64)
        wr, wt = _widths(frame, xy, bgpx, strong, centre, self.r_ap, self._mask_map)
        if self.follow_drift:
            self.geometry = self._drift_step(geom, xy, okpos)
        row = {"value": float(value), "name": str(name), "intensity": inten, "sigma": sig, "background": bgpx,
               "width_r": wr, "width_t": wt, "xy": xy, "flags": flags, "geometry": geom}
        self.rows.append(row)
        self.last_frame = frame
        return row

    def _drift_step(self, geom: ScreenGeometry, xy: np.ndarray, ok: np.ndarray) -> ScreenGeometry:
        """Move the centre by the refined beams' median shift, the scale by their median stretch."""
        from ..series.geometry import _predict

        if ok.sum() < 3:
            return geom
        pred, _ = _predict(self.beams.g_par, self.energy_eV, geom, self.shape)
        d = xy[ok] - pred[ok]
        shift = np.median(d, axis=0)
        c = np.array(geom.center_px)
        r_pred = np.hypot(*(pred[ok] - c).T)
        far = r_pred > 10.0
        scale = geom.scale_px
        if far.sum() >= 3:
            r_new = np.hypot(*(xy[ok][far] - c - shift).T)
            scale *= float(np.median(r_new / r_pred[far]))
        return dataclasses.replace(geom, center_x_px=float(c[0] + shift[0]), center_y_px=float(c[1] + shift[1]),
                                   scale_px=float(scale))

    def result(self, *, name: str = "parameter", unit: str = "") -> ParameterTrace:
        """Everything measured so far as a :class:`ParameterTrace` (beams added late are NaN before).

        Parameters
        ----------
        name : str, keyword-only
            What the parameter is.
        unit : str, keyword-only
            Its unit.

        Returns
        -------
        ParameterTrace
            Every frame and beam so far.
        """
        if not self.rows:
            raise SeriesError("The series holds no frames.")
        k = len(self.beams)

        def stack(key, fill=np.nan, dtype=np.float64, tail=()):
            out = np.full((len(self.rows), k, *tail), fill, dtype=dtype)
            for n, r in enumerate(self.rows):
                out[n, :len(r[key])] = r[key]
            return out

        geoms = tuple(r["geometry"] for r in self.rows)
        drift = fit_drift([g.center_px for g in geoms], [g.scale_px for g in geoms])
        return ParameterTrace(
            value=np.array([r["value"] for r in self.rows]), name=name, unit=unit,
            frame_names=tuple(r["name"] for r in self.rows), energy_eV=self.energy_eV, beams=self.beams,
            intensity=stack("intensity"), sigma=stack("sigma"), background_per_px=stack("background"),
            width_radial_px=stack("width_r"), width_tangential_px=stack("width_t"), xy_px=stack("xy", tail=(2,)),
            flags=stack("flags", FLAG_OFF_SCREEN, np.uint8), geometry=geoms, drift=drift)
