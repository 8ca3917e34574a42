"""Per-beam photons for layers with glide lines: the beams a glide extinguishes are
scaled down (to 0 at normal incidence, to a small `residual` when the extinction is
partly lifted off normal), for :func:`analysis.simulate.render_image` and
:func:`analysis.simulate.photograph.photograph` (``intensities=``).

A glide line along the cell axis b_i (translation b_i / 2) extinguishes the beams
n·b_i* with n odd (the other index 0); the domain matrices given to the renderer
must have their rows along those axes.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..errors import ParameterError
from .pattern import Pattern
from .render import default_intensities

__all__ = ["glide_factors", "glide_intensities"]


def glide_factors(pattern: Pattern, glide_axes: Sequence, *, residual: float = 0.0) -> np.ndarray:
    """Factor on each beam's photons: `residual` where every domain producing it extinguishes it.

    Parameters
    ----------
    pattern : Pattern
        The beams and the domains' matrices.
    glide_axes : sequence of sequence of int
        For each domain of `pattern` (its ``overlayers`` order), the rows of its matrix
        along which a glide line runs (``[]``, ``[0]``, ``[1]`` or ``[0, 1]``).
    residual : float, keyword-only
        What is left of an extinguished beam, 0 ≤ residual ≤ 1.

    Returns
    -------
    (K,) ndarray of float64
        1 for integer beams and allowed beams; a beam shared by domains gets the mean of
        their factors (a domain that does not extinguish it fills it).

    Examples
    --------
    >>> from analysis.nets import parse_substrate
    >>> from analysis.optics import ScreenGeometry
    >>> from analysis.simulate import forward_pattern
    >>> p = forward_pattern(parse_substrate("Cu(100)"), [[[2, 0], [0, 2]]], energy_eV=100.0,
    ...                     geometry=ScreenGeometry(512.0, 512.0, 600.0))
    >>> f = glide_factors(p, [[0, 1]])
    >>> half = np.isclose(np.abs(p.hk), 0.5)
    >>> print(sorted({tuple(h) for h in p.hk[f == 0].tolist()})[:2], bool(np.all(f[half.all(axis=1)] == 1)))
    [(-1.5, 0.0), (-0.5, 0.0)] True
    """
    if not isinstance(pattern, Pattern):
        raise ParameterError(f"`pattern` must be a Pattern, got {type(pattern).__name__}.")
    if len(glide_axes) != len(pattern.overlayers):
        raise ParameterError(f"`glide_axes` needs one entry per domain ({len(pattern.overlayers)}), "
                             f"got {len(glide_axes)}.")
    if not (0.0 <= float(residual) <= 1.0):
        raise ParameterError(f"`residual` must lie in [0, 1], got {residual!r}.")
    fac = np.zeros((len(pattern), len(pattern.overlayers)))
    for d, (m, axes) in enumerate(zip(pattern.overlayers, glide_axes)):
        n = pattern.hk @ np.asarray(m, float).T
        r = np.rint(n)
        ext = np.zeros(len(pattern), bool)
        for i in axes:
            if int(i) not in (0, 1):
                raise ParameterError(f"Glide axes are matrix rows 0 or 1, got {i!r}.")
            ext |= (np.abs(n - r).max(axis=1) < 1e-6) & (r[:, 1 - int(i)] == 0) & (np.abs(r[:, int(i)]) % 2 == 1)
        fac[:, d] = np.where(ext, float(residual), 1.0)
    dom = pattern.domains
    count = dom.sum(axis=1)
    out = np.ones(len(pattern))
    frac = ~pattern.integer & (count > 0)
    out[frac] = (fac * dom).sum(axis=1)[frac] / count[frac]
    return out


def glide_intensities(glide_axes: Sequence, *, rng: np.random.Generator, residual: float = 0.0, **kw):
    """A callable ``pattern -> photons``: :func:`analysis.simulate.default_intensities` times
    :func:`glide_factors` (for ``photograph(..., intensities=...)``, which asks it for the final
    pattern, after ``off_normal``). Keywords go to ``default_intensities``.

    Parameters
    ----------
    glide_axes : sequence of sequence of int
        As for :func:`glide_factors`.
    rng : numpy.random.Generator, keyword-only
        Source of the random factors of ``default_intensities``.
    residual : float, keyword-only
        What is left of an extinguished beam, 0 ≤ residual ≤ 1.
    **kw
        Passed to ``default_intensities``.

    Returns
    -------
    callable
        ``f(pattern) -> (K,) ndarray of float64``, photons per beam.
    """
    def photons(pattern: Pattern) -> np.ndarray:
        return default_intensities(pattern, rng, **kw) * glide_factors(pattern, glide_axes, residual=residual)

    return photons
