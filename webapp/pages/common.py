"""What every page's callbacks share: the one-line error, the note, what fired, a file stem.

A plain module (Dash imports only the files that register a page), imported by
the page packages; nothing here touches the store or the analysis.
"""

from __future__ import annotations

import logging
import re

from dash import ctx, html

from analysis.errors import RecinetError

__all__ = ["fail", "note", "triggered", "triggered_id", "safe_stem"]

_log = logging.getLogger("recinet.webapp")


def fail(err: Exception) -> str:
    """The one line a page shows for an error; unexpected ones are logged, never shown as a traceback.

    Parameters
    ----------
    err : Exception
        The error.

    Returns
    -------
    str
        The line.
    """
    if isinstance(err, RecinetError):
        return str(err)
    _log.exception("unexpected error in a callback")
    return f"Something went wrong ({type(err).__name__}); the server logged it. Nothing was saved."


def note(text: str | None, kind: str = "error"):
    """A note under a control: ``kind`` is "error" (read out at once), "ok", "warn" or "wait".

    Parameters
    ----------
    text : str or None
        The message; None or empty for no note.
    kind : str
        Its kind (sets its style, and for errors the alert role).

    Returns
    -------
    dash.html.Div or None
        The note.
    """
    if not text:
        return None
    return html.Div(text, className=f"note note-{kind}", role="alert" if kind == "error" else None)


def triggered() -> tuple[str | None, str]:
    """(component id, "id.prop") of what fired the running callback; (None, "") outside one.

    Returns
    -------
    tuple of (str or None, str)
        The id and the property.
    """
    try:
        t = ctx.triggered
    except Exception:  # noqa: BLE001 - called as a plain function, outside a callback
        return None, ""
    if not t or t[0].get("prop_id") in (None, "."):
        return None, ""
    prop = t[0]["prop_id"]
    return prop.rsplit(".", 1)[0], prop


def triggered_id() -> str | None:
    """Component id of what fired the running callback (None outside one).

    Returns
    -------
    str or None
        The id.
    """
    return triggered()[0]


def safe_stem(name, default: str = "analysis") -> str:
    """A file-name stem from a user's name: the extension dropped, then only letters, digits, - and _.

    >>> safe_stem("Pt(111) O 2x2.v2.png"), safe_stem("../..", "series")
    ('Pt_111_O_2x2_v2', 'series')

    Parameters
    ----------
    name : str or None
        The name (e.g. the uploaded file's).
    default : str
        The stem when nothing is left.

    Returns
    -------
    str
        The stem.
    """
    text = str(name or "")
    base = text.rsplit(".", 1)[0] if re.search(r"\.[A-Za-z0-9]{1,5}$", text) else text
    stem = re.sub(r"[^A-Za-z0-9_-]+", "_", base)[:60].strip("_-")
    return stem or default
