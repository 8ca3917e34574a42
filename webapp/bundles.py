"""An analysis as one self-contained JSON document (the image inside), written and checked on the way back in."""

from __future__ import annotations

import base64
import binascii
import hashlib
import json
from datetime import datetime, timezone

from analysis.errors import ParameterError

__all__ = ["EXPORT_FORMAT", "export_bundle", "read_bundle"]

EXPORT_FORMAT = "recinet-analysis"


def export_bundle(*, image_bytes: bytes, filename: str, parameters: dict, edits: dict, result: dict | None,
                  sample_name: str = "", notes: str = "", token: str | None = None) -> dict:
    """A self-contained, re-importable JSON document of one analysis (the image included).

    Parameters
    ----------
    image_bytes : bytes, keyword-only
        The image file as uploaded.
    filename : str, keyword-only
        Its name.
    parameters : dict, keyword-only
        Energy, substrate and the other analysis parameters.
    edits : dict, keyword-only
        The manual edits.
    result : dict or None, keyword-only
        The result dict.
    sample_name : str, keyword-only
        The sample's name.
    notes : str, keyword-only
        Free notes.
    token : str, optional, keyword-only
        The share token of a saved analysis.

    Returns
    -------
    dict
        JSON-safe; :func:`read_bundle` reads it back.
    """

    return {
        "format": EXPORT_FORMAT, "version": 1,
        "exported_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "token": token, "sample_name": sample_name or "", "notes": notes or "",
        "parameters": parameters or {}, "edits": edits or {}, "result": result,
        "image": {"filename": filename, "sha256": hashlib.sha256(image_bytes).hexdigest(),
                  "data_base64": base64.b64encode(image_bytes).decode("ascii")},
    }


def read_bundle(raw: bytes | str, *, max_bytes: int) -> dict:
    """Check an exported analysis and return it with the image bytes decoded under ``image["data"]``.

    Parameters
    ----------
    raw : bytes or str
        The exported JSON.
    max_bytes : int, keyword-only
        Largest accepted image inside it.

    Returns
    -------
    dict
        The bundle, its image bytes decoded.
    """

    if isinstance(raw, bytes):
        if len(raw) > max_bytes * 4 // 3 + 1_000_000:
            raise ParameterError("The analysis file is larger than the upload limit.")
        try:
            raw = raw.decode("utf-8")
        except UnicodeDecodeError:
            raise ParameterError("The analysis file is not UTF-8 JSON.") from None
    try:
        doc = json.loads(raw)
    except ValueError as err:
        raise ParameterError(f"The analysis file is not valid JSON ({err.msg} at line {err.lineno}).") from None
    if not isinstance(doc, dict) or doc.get("format") != EXPORT_FORMAT:
        raise ParameterError(f"This JSON is not a recinet analysis export (no \"format\": \"{EXPORT_FORMAT}\").")
    if doc.get("version") != 1:
        raise ParameterError(f"Unknown analysis export version {doc.get('version')!r}; this build reads version 1.")
    img = doc.get("image")
    if not isinstance(img, dict) or not isinstance(img.get("data_base64"), str):
        raise ParameterError("The analysis file holds no image.")
    try:
        data = base64.b64decode(img["data_base64"], validate=True)
    except (binascii.Error, ValueError):
        raise ParameterError("The image inside the analysis file is not valid base64.") from None
    if len(data) > max_bytes:
        raise ParameterError(f"The image inside the analysis file is {len(data) / 1e6:.1f} MB; the limit is {max_bytes / 1e6:.1f} MB.")
    if img.get("sha256") and hashlib.sha256(data).hexdigest() != img["sha256"]:
        raise ParameterError("The image inside the analysis file does not match its recorded hash.")
    for key in ("parameters", "edits"):
        if not isinstance(doc.get(key, {}), dict):
            raise ParameterError(f"`{key}` in the analysis file must be an object.")
    if doc.get("result") is not None and not isinstance(doc["result"], dict):
        raise ParameterError("`result` in the analysis file must be an object.")
    out = dict(doc)
    out["image"] = {"filename": str(img.get("filename") or "image")[:255], "data": data}
    out["sample_name"] = str(doc.get("sample_name") or "")
    out["notes"] = str(doc.get("notes") or "")
    return out
