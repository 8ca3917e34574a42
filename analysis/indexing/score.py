"""The overlayer score (stated, used for ranking)::

    score = E − U − 0.5·A − 1.0·(D − 1) − 0.5·|log2 det M|  (+ intensity term)

E: fractional spots explained, U: fractional spots unexplained, A: predicted
fractional spots absent inside the region where spots could be seen, D: domains
used. When two models predict the same spots (e.g. p(2×2) and three (2×1)
domains on a hexagonal net), only intensities can tell them apart: a multi-
domain model gains when letting each domain have its own population makes
the intensities of symmetry-equivalent beams agree clearly better (variance
ratio test); otherwise the simpler model wins and both are listed.
"""

from __future__ import annotations


def _irrational_handicap(explained: int, n_domains: int) -> float:
    """Score handicap of an irrational (incommensurate) model: four free parameters can absorb
    a small camera error, so it must explain clearly more than a rational cell, and each
    further irrational domain is a new free orientation."""
    return 1.5 + 0.05 * explained + 2.0 * (n_domains - 1)
