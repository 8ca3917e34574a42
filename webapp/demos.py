"""The demo images beside the app (``demo_images/``): the list, their bytes and the truth JSON beside each."""

from __future__ import annotations

import json
from pathlib import Path

from analysis.errors import ParameterError

__all__ = ["DEMO_DIR", "demo_choices", "demo_bytes", "demo_defaults"]

DEMO_DIR = Path(__file__).resolve().parent.parent / "demo_images"
_DEMO_SUFFIXES = (".png", ".tif", ".tiff")


def demo_choices() -> list[dict]:
    """Demo images beside the package: ``[{"label", "value"}]``, value = file name (no folder).

    Returns
    -------
    list of dict
        One entry per demo image, sorted by name.
    """
    if not DEMO_DIR.is_dir():
        return []
    names = sorted(p.name for p in DEMO_DIR.iterdir() if p.suffix.lower() in _DEMO_SUFFIXES and p.is_file())
    return [{"label": n.rsplit(".", 1)[0].replace("_", " "), "value": n} for n in names]


def demo_bytes(name: str) -> tuple[bytes, dict]:
    """Bytes of a demo image chosen from :func:`demo_choices`, and its truth JSON (or {}).

    The name is looked up in the listing, never joined to a path as given.

    Parameters
    ----------
    name : str
        A ``value`` from :func:`demo_choices`.

    Returns
    -------
    raw : bytes
        The image file.
    truth : dict
        Its truth JSON, or ``{}``.
    """
    known = {c["value"] for c in demo_choices()}
    if name not in known:
        raise ParameterError(f"Unknown demo image {str(name)[:80]!r}.")
    path = DEMO_DIR / name
    truth = {}
    side = path.with_suffix(".json")
    if side.is_file():
        try:
            truth = json.loads(side.read_text())
        except (OSError, ValueError):
            truth = {}
    return path.read_bytes(), truth if isinstance(truth, dict) else {}


def demo_defaults(truth: dict) -> dict:
    """Energy and substrate suggested by a demo's truth file, when it names them.

    Parameters
    ----------
    truth : dict
        A demo's truth JSON.

    Returns
    -------
    dict
        ``energy_eV`` and ``substrate`` when the truth gives them.
    """
    out = {}
    for key in ("energy_eV", "energy", "energy_ev"):
        if isinstance(truth.get(key), (int, float)):
            out["energy_eV"] = float(truth[key])
            break
    scen = truth.get("scenario") if isinstance(truth.get("scenario"), dict) else {}
    if isinstance(scen.get("sample"), str):
        out["sample_name"] = scen["sample"][:200]
    for key in ("substrate_label", "substrate", "substrate_spec", "surface"):
        v = truth.get(key)
        if isinstance(v, str):
            out["substrate"] = v
            break
        if isinstance(v, dict):
            for kk in ("spec", "name", "label", "net"):
                if isinstance(v.get(kk), str):
                    out["substrate"] = v[kk]
                    break
            if "substrate" in out:
                break
    return out
