"""The analyse page's browser-side state and the small reads every concern shares.

Browser-side state (dcc.Store):
  ``IMAGE``  {"sha", "filename", "width", "height"} of the image on screen
  ``RESULT`` {"sha", "parameters", "edits", "result"}: the last answer and what produced it
  ``EDITS``  {"sha", "rev", "added": [[x, y]], "removed": [[x, y]], "center": [x, y] or None}
  ``MODEL``  the model being tried (predicted spots, counts)
  ``SOURCE`` {"readonly": bool, "token": share token shown or copied from}
"""

from __future__ import annotations

__all__ = ["empty_edits", "result_of", "candidate"]


def empty_edits(sha=None) -> dict:
    """No edits by hand on the image `sha`.

    Parameters
    ----------
    sha : str, optional
        The image's SHA-256.

    Returns
    -------
    dict
        ``{"sha", "rev": 0, "added": [], "removed": [], "center": None}``.
    """
    return {"sha": sha, "rev": 0, "added": [], "removed": [], "center": None}


def result_of(record, image):
    """The result of `record` when it belongs to `image`, else None.

    Parameters
    ----------
    record : dict or None
        The analysis store.
    image : dict or None
        The image store.

    Returns
    -------
    dict or None
        The result dict.
    """
    if not record or not image or record.get("sha") != image.get("sha"):
        return None
    return record.get("result")


def candidate(result, pick):
    """The ranked candidate `pick` of a result, or None.

    Parameters
    ----------
    result : dict or None
        A result dict.
    pick : int or None
        Rank of the candidate.

    Returns
    -------
    dict or None
        The candidate.
    """
    if pick is None or not result:
        return None
    cands = result.get("candidates") or []
    if isinstance(pick, int) and 0 <= pick < len(cands) and isinstance(cands[pick], dict):
        return cands[pick]
    return None


