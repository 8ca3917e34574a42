"""Turn numpy-laden results into plain JSON values (one helper for every writer)."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["json_safe"]


def json_safe(x):
    """Plain JSON value: Python floats (None for NaN and ±inf), ints, bools, lists, str-keyed dicts.

    Parameters
    ----------
    x : object
        A value made of numbers (numpy scalars and arrays included), str, bool, None,
        lists, tuples and dicts.

    Returns
    -------
    object
        The same value in plain JSON types.

    Examples
    --------
    >>> json_safe({"a": np.array([1.5, np.nan]), 2: (np.int64(3), np.bool_(True))})
    {'a': [1.5, None], '2': [3, True]}
    """
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        return float(x) if math.isfinite(x) else None
    if isinstance(x, np.ndarray):
        return json_safe(x.tolist())
    if isinstance(x, (list, tuple)):
        return [json_safe(v) for v in x]
    if isinstance(x, dict):
        return {str(k): json_safe(v) for k, v in x.items()}
    return x
