"""Shared helpers of the spot package: input checks (image, mask, saturation level),
coarse block grids (block means, cubic interpolation back to pixels, filling empty
blocks) and the second array thread with the row-strip runner.

The thread pool is one module-level object (`_pool`); a forked child forgets the
parent's executor (`os.register_at_fork`) and makes its own on first use.
"""

from __future__ import annotations

import os

import numpy as np
from scipy import ndimage as ndi

from ..errors import ImageError, ParameterError


def _as_float_image(image) -> np.ndarray:
    from ..io import LoadedImage

    if isinstance(image, LoadedImage):
        image = image.data
    a = np.asarray(image)
    if a.ndim != 2 or min(a.shape) < 8:
        raise ImageError(f"`image` must be a 2-D array at least 8×8 px, got shape {a.shape}.")
    if not (np.issubdtype(a.dtype, np.number) or a.dtype == bool):
        raise ImageError(f"`image` must hold numbers, got dtype {a.dtype}.")
    a = np.asarray(a, dtype=np.float64)
    if not np.all(np.isfinite(a)):
        raise ImageError("`image` contains NaN or infinite pixels; load it with analysis.io.load_image.")
    return a


def _saturation_of(image) -> float | None:
    from ..io import LoadedImage

    if isinstance(image, LoadedImage):
        return image.saturation_level
    dt = np.asarray(image).dtype
    if np.issubdtype(dt, np.unsignedinteger):
        return float(np.iinfo(dt).max)
    return None


def _check_mask(mask, shape, name="mask") -> np.ndarray:
    if mask is None:
        return np.ones(shape, dtype=bool)
    m = np.asarray(mask)
    if m.shape != tuple(shape):
        raise ParameterError(f"`{name}` must have the image shape {tuple(shape)}, got {m.shape}.")
    return m.astype(bool, copy=False)


def _nanmedian(a: np.ndarray, axis: int) -> np.ndarray:
    """``np.nanmedian`` along `axis`, NaN where a slice holds no finite value, and no warning
    (``warnings.catch_warnings`` is not thread-safe, and a reference image is measured on a
    second thread while the image is: one thread leaving its block could let the other's
    warning through).

    Examples
    --------
    >>> _nanmedian(np.array([[1.0, np.nan], [3.0, np.nan], [2.0, np.nan]]), 0).tolist()
    [2.0, nan]
    """
    a = np.moveaxis(np.asarray(a), axis, -1)
    out = np.full(a.shape[:-1], np.nan, dtype=np.result_type(a.dtype, np.float32))
    some = np.isfinite(a).any(axis=-1)
    if some.any():
        out[some] = np.nanmedian(a[some], axis=-1)
    return out


def _block_reduce_mean(a: np.ndarray, f: int) -> np.ndarray:
    m, n = (a.shape[0] // f) * f, (a.shape[1] // f) * f
    return a[:m, :n].reshape(m // f, f, n // f, f).mean(axis=(1, 3))


def _interp_matrix(n_out: int, n_blocks: int, block: int) -> np.ndarray:
    """(n_out, n_blocks) cubic (Catmull–Rom) interpolation weights from block centres to
    pixels; linear extrapolation beyond the outer centres is avoided by clamping."""
    centres = (np.arange(n_blocks) + 0.5) * block - 0.5
    x = np.clip(np.arange(n_out, dtype=np.float64), centres[0], centres[-1])
    w = np.zeros((n_out, n_blocks))
    if n_blocks == 1:
        w[:, 0] = 1.0
        return w
    i = np.clip(np.searchsorted(centres, x, side="right") - 1, 0, n_blocks - 2)
    t = (x - centres[i]) / block
    rows = np.arange(n_out)
    coef = [0.5 * (-t ** 3 + 2 * t * t - t), 0.5 * (3 * t ** 3 - 5 * t * t + 2),
            0.5 * (-3 * t ** 3 + 4 * t * t + t), 0.5 * (t ** 3 - t * t)]
    for off, cf in zip((-1, 0, 1, 2), coef):
        np.add.at(w, (rows, np.clip(i + off, 0, n_blocks - 1)), cf)
    return w


def _fill_nan_grid(g: np.ndarray) -> np.ndarray:
    """Fill NaN cells by repeated averaging of valid neighbours."""
    g = g.copy()
    if np.all(np.isnan(g)):
        return g
    kernel = np.ones((3, 3))
    for _ in range(max(g.shape) + 2):
        bad = np.isnan(g)
        if not bad.any():
            break
        v = np.where(bad, 0.0, g)
        s = ndi.convolve(v, kernel, mode="nearest")
        n = ndi.convolve((~bad).astype(float), kernel, mode="nearest")
        fill = bad & (n > 0)
        g[fill] = s[fill] / n[fill]
    return g


_POOL = None
_POOL_PID = None


def _forget_pool() -> None:
    """In a forked child the parent's executor has no threads: drop it (a new one is made on use)."""
    global _POOL, _POOL_PID
    _POOL, _POOL_PID = None, None


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


def _pool():
    """A second thread for array work that releases the GIL (numpy, ndimage).

    Never inherited across a fork (Dash background jobs, gunicorn and Celery workers fork):
    the child forgets the parent's executor and makes its own; the process id is checked too,
    for forks that bypass the `os.register_at_fork` hooks.
    """
    global _POOL, _POOL_PID
    if _POOL is None or _POOL_PID != os.getpid():
        from concurrent.futures import ThreadPoolExecutor

        _POOL = ThreadPoolExecutor(max_workers=2, thread_name_prefix="recinet-arrays")
        _POOL_PID = os.getpid()
    return _POOL


def _by_row_strips(func, a: np.ndarray, halo: int) -> np.ndarray:
    """func(a) computed as two row strips in two threads (ndimage releases the GIL).

    `func` must be a local filter reaching at most `halo` rows; each strip
    carries that many rows of its neighbour, so the result equals func(a)
    exactly. Small images are done in one call.
    """
    m = a.shape[0]
    if m < 256 or a.size < 200_000 or halo >= m // 4:
        return func(a)
    h = m // 2
    top = _pool().submit(func, a[: h + halo])
    bottom = func(a[h - halo:])
    out = np.empty(a.shape, dtype=bottom.dtype)
    out[h:] = bottom[halo:]
    out[:h] = top.result()[:h]
    return out
