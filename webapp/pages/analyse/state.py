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
    """No edits by hand on the image `sha`."""
    return {"sha": sha, "rev": 0, "added": [], "removed": [], "center": None}


def result_of(record, image):
    if not record or not image or record.get("sha") != image.get("sha"):
        return None
    return record.get("result")


def candidate(result, pick):
    if pick is None or not result:
        return None
    cands = result.get("candidates") or []
    if isinstance(pick, int) and 0 <= pick < len(cands) and isinstance(cands[pick], dict):
        return cands[pick]
    return None


