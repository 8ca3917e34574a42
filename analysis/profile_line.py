"""Intensity along a line on the pattern: a line profile between two pixel points.

The line is sampled every `step_px` pixels with sub-pixel interpolation
(:func:`scipy.ndimage.map_coordinates`); a width of more than one pixel averages
parallel lines one pixel apart across it. Given the beam energy and the camera model,
each sample also carries its distance from the start in momentum (Å⁻¹, no 2π: the
path length through :func:`analysis.optics.pixels_to_momentum`) and in per cent of the
substrate's |a*| (the size of the first Brillouin zone along a*).

Pixel positions at this module's edges are (x, y), x right, y down, the centre of the
top-left pixel at (0, 0).
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass

import numpy as np

from .errors import ImageError, ParameterError
from .optics import ScreenGeometry, pixels_to_momentum

__all__ = ["LineProfile", "line_profile"]

_MAX_SAMPLES = 200_000  # a line across the largest image, sampled finely, stays far below this


@dataclass(frozen=True, eq=False)
class LineProfile:
    """Intensity along a line.

    Attributes
    ----------
    xy_px : (N, 2) ndarray of float64
        Sample points on the centre line, (x, y) pixels.
    distance_px : (N,) ndarray of float64
        Distance of each sample from the start, pixels.
    intensity : (N,) ndarray of float64
        Mean image value across the width at each sample (image units); NaN where
        no pixel across it is valid.
    width_px : float
        Width averaged across the line, pixels.
    distance_invA : (N,) ndarray of float64 or None
        Path length from the start in parallel momentum, Å⁻¹ (no 2π); None without
        a camera model.
    distance_bz_percent : (N,) ndarray of float64 or None
        `distance_invA` in per cent of |a*| of the substrate; None without |a*|.
    """

    xy_px: np.ndarray
    distance_px: np.ndarray
    intensity: np.ndarray
    width_px: float
    distance_invA: np.ndarray | None = None
    distance_bz_percent: np.ndarray | None = None

    def __post_init__(self):
        for name in ("xy_px", "distance_px", "intensity", "distance_invA", "distance_bz_percent"):
            v = getattr(self, name)
            if v is not None:
                a = np.array(v, dtype=np.float64)
                a.flags.writeable = False
                object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return int(self.distance_px.shape[0])

    def to_dict(self) -> dict:
        """JSON-safe columns (NaN as None).

        Returns
        -------
        dict
            One list per column.
        """

        def col(a):
            return None if a is None else [None if not math.isfinite(v) else float(v) for v in a]

        return {"x": col(self.xy_px[:, 0]), "y": col(self.xy_px[:, 1]), "distance_px": col(self.distance_px),
                "distance_invA": col(self.distance_invA), "distance_bz_percent": col(self.distance_bz_percent),
                "intensity": col(self.intensity), "width_px": self.width_px}

    def to_csv(self) -> str:
        """The profile as CSV text, one row per sample (empty cells where a value is missing).

        Returns
        -------
        str
            CSV text with a header line.
        """
        names = ["x", "y", "distance_px", "distance_invA", "distance_bz_percent", "intensity"]
        d = self.to_dict()
        out = io.StringIO()
        w = csv.writer(out, lineterminator="\n")
        w.writerow(names)
        for i in range(len(self)):
            w.writerow(["" if d[n] is None or d[n][i] is None else f"{d[n][i]:.6g}" for n in names])
        return out.getvalue()


def _point(p, name: str) -> np.ndarray:
    try:
        a = np.asarray(p, dtype=np.float64).reshape(2)
    except (TypeError, ValueError):
        raise ParameterError(f"`{name}` must be an (x, y) pair of pixels, got {p!r}.") from None
    if not np.all(np.isfinite(a)):
        raise ParameterError(f"`{name}` must be finite, got {p!r}.")
    return a


def line_profile(image, start_xy, end_xy, *, width_px: float = 1.0, step_px: float = 0.5, order: int = 1,
                 mask=None, energy_eV: float | None = None, geometry: ScreenGeometry | None = None,
                 a_star_invA: float | None = None) -> LineProfile:
    """Intensity along the line from `start_xy` to `end_xy`.

    Parameters
    ----------
    image : (M, N) array_like of real
        The frame (any real dtype).
    start_xy, end_xy : (x, y)
        Ends of the line, pixels.
    width_px : float, keyword-only
        Width averaged across the line (≥ 1 px): round(`width_px`) parallel lines
        one pixel apart, centred on the line, are averaged.
    step_px : float, keyword-only
        Largest distance between samples along the line (0.05 to 2 px); both ends are sampled.
    order : int, keyword-only
        Spline order of the interpolation (0 nearest, 1 linear, 3 cubic).
    mask : (M, N) array_like of bool, optional, keyword-only
        Valid pixels; samples whose nearest pixel is invalid are left out of the mean.
    energy_eV : float, optional, keyword-only
        Electron energy, eV (with `geometry`).
    geometry : ScreenGeometry, optional, keyword-only
        With `energy_eV`: distances in momentum (Å⁻¹, no 2π).
    a_star_invA : float, optional, keyword-only
        |a*| of the substrate (Å⁻¹, no 2π): distances in per cent of it.

    Returns
    -------
    LineProfile
        Distances along the line (pixels, and Å⁻¹ or % of |a*| when given) and the intensities.

    Raises
    ------
    ImageError
        When `image` is not a 2-D real array.
    ParameterError
        For a line of zero length, a bad width, step or order, a mask of another shape.

    Examples
    --------
    >>> yy, xx = np.mgrid[:40, :60].astype(float)
    >>> p = line_profile(2.0 * xx + 3.0 * yy, (10.0, 5.0), (40.0, 25.0), width_px=3)
    >>> print(len(p), round(float(p.distance_px[-1]), 4), np.round(p.intensity[[0, -1]], 6).tolist())
    74 36.0555 [35.0, 155.0]
    """
    img = np.asarray(image)
    if img.ndim != 2 or img.size == 0 or not (np.issubdtype(img.dtype, np.number) and not np.iscomplexobj(img)):
        raise ImageError(f"`image` must be a 2-D array of real numbers, got shape {img.shape} and dtype {img.dtype}.")
    img = img.astype(np.float64, copy=False)
    a, b = _point(start_xy, "start_xy"), _point(end_xy, "end_xy")
    length = float(np.hypot(*(b - a)))
    if length < 1e-6:
        raise ParameterError(f"The line has no length: it starts and ends at ({a[0]:g}, {a[1]:g}).")
    if not (1.0 <= float(width_px) <= 200.0):
        raise ParameterError(f"`width_px` must be between 1 and 200 pixels, got {width_px!r}.")
    if not (0.05 <= float(step_px) <= 2.0):
        raise ParameterError(f"`step_px` must be between 0.05 and 2 pixels, got {step_px!r}.")
    if order not in (0, 1, 2, 3, 4, 5):
        raise ParameterError(f"`order` must be a spline order 0 to 5, got {order!r}.")
    n = int(math.ceil(length / step_px - 1e-9)) + 1  # both ends sampled, steps ≤ `step_px`
    n_across = max(1, int(round(float(width_px))))
    if n * n_across > _MAX_SAMPLES:
        raise ParameterError(f"The line needs {n * n_across} samples (over {_MAX_SAMPLES}); use a larger step "
                             f"or a smaller width.")
    along = (b - a) / length
    across = np.array([-along[1], along[0]])
    t = np.linspace(0.0, length, n)
    centre = a[None] + t[:, None] * along[None]  # (N, 2) x, y
    off = np.arange(n_across) - 0.5 * (n_across - 1)
    pts = centre[:, None, :] + off[None, :, None] * across[None, None, :]  # (N, n_across, 2)
    rows, cols = pts[..., 1].ravel(), pts[..., 0].ravel()
    vals = _sample(img, rows, cols, order).reshape(n, n_across)
    m, nn = img.shape
    inside = (rows > -0.5) & (rows < m - 0.5) & (cols > -0.5) & (cols < nn - 0.5)
    ok = inside.copy()
    if mask is not None:
        mk = np.asarray(mask, dtype=bool)
        if mk.shape != img.shape:
            raise ParameterError(f"`mask` must have the image's shape {img.shape}, got {mk.shape}.")
        ri = np.clip(np.rint(rows).astype(np.int64), 0, m - 1)
        ci = np.clip(np.rint(cols).astype(np.int64), 0, nn - 1)
        ok &= mk[ri, ci]
    ok = ok.reshape(n, n_across)
    cnt = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        inten = np.where(cnt > 0, np.where(ok, vals, 0.0).sum(axis=1) / cnt, np.nan)
    d_k = d_bz = None
    if (energy_eV is None) != (geometry is None):
        raise ParameterError("Distances in momentum need both `energy_eV` and `geometry`.")
    if geometry is not None:
        if not isinstance(geometry, ScreenGeometry):
            raise ParameterError(f"`geometry` must be a ScreenGeometry, got {type(geometry).__name__}.")
        k = pixels_to_momentum(centre, float(energy_eV), geometry)
        d_k = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(k, axis=0).T))])
        if a_star_invA is not None:
            s = float(a_star_invA)
            if not (s > 0 and math.isfinite(s)):
                raise ParameterError(f"`a_star_invA` must be a positive number of Å⁻¹, got {a_star_invA!r}.")
            d_bz = 100.0 * d_k / s
    elif a_star_invA is not None:
        raise ParameterError("Distances in per cent of |a*| need `energy_eV` and `geometry` as well.")
    return LineProfile(xy_px=centre, distance_px=t, intensity=inten, width_px=float(n_across),
                       distance_invA=d_k, distance_bz_percent=d_bz)


def _sample(img: np.ndarray, rows: np.ndarray, cols: np.ndarray, order: int) -> np.ndarray:
    from scipy.ndimage import map_coordinates

    return map_coordinates(img, np.vstack([rows, cols]), order=order, mode="nearest", prefilter=order > 1)
