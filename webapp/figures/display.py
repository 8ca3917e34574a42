"""Camera images to screen grey levels and PNG bytes (the pattern, the frames, the thumbnails)."""

from __future__ import annotations

import base64
import io
import math

import numpy as np
from PIL import Image

__all__ = ["SCALES", "downsample", "display_levels", "png_bytes", "png_data_url", "thumbnail_png"]

SCALES = [("linear", "Linear"), ("log", "Log"), ("gamma", "Gamma")]
_LOG_SPAN = 1000.0  # log scale maps [0, 1] to log1p(1000 x) / log1p(1000): three decades

def downsample(data: np.ndarray, max_side: int = 1024) -> tuple[np.ndarray, int]:
    """Block-mean `data` (M, N) so that its longer side is at most `max_side`; return it and the factor.

    Parameters
    ----------
    data : (M, N) ndarray
        The image.
    max_side : int
        Longest side of the result, pixels.

    Returns
    -------
    small : ndarray of float64
        The block means.
    factor : int
        The block size (1: unchanged).
    """
    h, w = data.shape
    f = max(1, math.ceil(max(h, w) / max_side))
    if f == 1:
        return np.asarray(data, dtype=np.float64), 1
    hh, ww = (h // f) * f, (w // f) * f
    a = np.asarray(data[:hh, :ww], dtype=np.float64).reshape(hh // f, f, ww // f, f).mean(axis=(1, 3))
    return a, f


def display_levels(data: np.ndarray, *, scale: str = "linear", clip_pct=(0.5, 99.95),
                   gamma: float = 0.5) -> np.ndarray:
    """Grey levels for the screen.

    Parameters
    ----------
    data : (M, N) ndarray of real
        Camera values (any units).
    scale : {"linear", "log", "gamma"}
    clip_pct : (2,) sequence of float
        Percentiles of `data` mapped to black and white, 0 ≤ low < high ≤ 100.
    gamma : float
        Exponent for ``scale="gamma"`` (0 < gamma ≤ 5); below 1 lifts faint spots.

    Returns
    -------
    (M, N) ndarray of uint8
        Grey levels for the display.

    Examples
    --------
    >>> d = np.linspace(0.0, 1.0, 11).reshape(1, 11)
    >>> display_levels(d, clip_pct=(0, 100)).tolist()[0][:3], int(display_levels(d, scale="gamma", gamma=1.0, clip_pct=(0, 100))[0, 10])
    ([0, 26, 51], 255)
    """
    lo_pct, hi_pct = float(clip_pct[0]), float(clip_pct[1])
    if not (0.0 <= lo_pct < hi_pct <= 100.0):
        lo_pct, hi_pct = 0.0, 100.0
    d = np.asarray(data, dtype=np.float64)
    finite = d[np.isfinite(d)]
    sample = finite[:: max(1, finite.size // 250_000)] if finite.size else np.zeros(1)
    lo, hi = np.percentile(sample, [lo_pct, hi_pct])
    if not hi > lo:
        lo, hi = float(sample.min()), float(sample.max())
    x = np.clip((np.nan_to_num(d, nan=lo) - lo) / (hi - lo if hi > lo else 1.0), 0.0, 1.0)
    if scale == "log":
        x = np.log1p(_LOG_SPAN * x) / np.log1p(_LOG_SPAN)
    elif scale == "gamma":
        g = float(gamma) if gamma and 0 < float(gamma) <= 5 else 0.5
        x = x**g
    return np.round(x * 255.0).astype(np.uint8)


def png_bytes(levels: np.ndarray) -> bytes:
    """Display levels as a PNG file.

    Parameters
    ----------
    levels : (M, N) ndarray of uint8
        Grey levels.

    Returns
    -------
    bytes
        The PNG file.
    """
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(levels)).save(buf, format="PNG", compress_level=3)
    return buf.getvalue()


def png_data_url(levels: np.ndarray) -> str:
    """Display levels as a PNG data URL for the browser.

    Parameters
    ----------
    levels : (M, N) ndarray of uint8
        Grey levels.

    Returns
    -------
    str
        ``data:image/png;base64,...``.
    """
    return "data:image/png;base64," + base64.b64encode(png_bytes(levels)).decode("ascii")


def thumbnail_png(data: np.ndarray, *, side: int = 160) -> bytes:
    """A small PNG of the pattern for the list of saved analyses: the median (the screen's
    background) is black and the spots bright, with a gamma of 0.5 lifting the faint ones.

    Parameters
    ----------
    data : (M, N) ndarray
        The image.
    side : int, keyword-only
        Longest side of the thumbnail, pixels.

    Returns
    -------
    bytes
        The PNG file.
    """
    small, _ = downsample(data, side)
    im = Image.fromarray(display_levels(small, scale="gamma", gamma=0.5, clip_pct=(50.0, 99.95)))
    im.thumbnail((side, side))
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()
