"""Writing output files whole or not at all: a temporary file beside the target, then one rename."""

from __future__ import annotations

import os
import secrets
from pathlib import Path

__all__ = ["write_text_atomic"]

_OPEN_FLAGS = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)


def write_text_atomic(path, text: str, *, mode: int = 0o666) -> Path:
    """Write `text` (UTF-8, newlines as given) to `path` through a temporary file beside it.

    The temporary file is renamed over `path` once it is complete, so readers see the
    old file or the new one, never a part; on any error it is removed and the error
    raised.

    Parameters
    ----------
    path : str or os.PathLike
        The file to write; its folder must exist.
    text : str
        The content.
    mode : int, keyword-only
        Permission bits of the new file before the umask, as for :func:`os.open`
        (0o600: readable by its owner only).

    Returns
    -------
    pathlib.Path
        `path`.

    Examples
    --------
    >>> import tempfile
    >>> p = write_text_atomic(Path(tempfile.mkdtemp()) / "a.txt", "1,2\\n")
    >>> print(p.read_text() == "1,2\\n", [q.name for q in p.parent.iterdir()])
    True ['a.txt']
    """
    p = Path(path)
    for _ in range(100):
        tmp = p.with_name(f".{p.name}.{secrets.token_hex(4)}.part")
        try:
            fd = os.open(tmp, _OPEN_FLAGS, mode)
            break
        except FileExistsError:
            continue
    else:  # pragma: no cover - a hundred random names taken
        raise FileExistsError(f"No free temporary name for {p} in {p.parent}.")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return p
