"""The parameter of every frame of a series at one energy: temperature, exposure, time, ….

A parameter series is a stack of frames recorded at one electron energy while something
else changes. Each frame carries one number of a named quantity with a unit
(:class:`ParameterTable`): from a CSV or JSON sidecar (:func:`read_parameter_file`), from
a number in each file name with the same pattern option energy series use
(:func:`parameters_from_names`), or from the files' modification times
(:func:`parameters_from_times`, seconds after the first frame). Unlike energies, the
values may repeat or turn back (a sample cooled after annealing); they must be finite.
"""

from __future__ import annotations

import csv
import json
import math
import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import SeriesError
from ..series.energies import _frame_numbers, numbers_in_names

__all__ = [
    "ParameterTable",
    "DEFAULT_PARAMETER_PATTERN",
    "split_heading",
    "read_parameter_file",
    "parameters_from_names",
    "parameters_from_times",
    "check_parameters",
]

# The last number in the file name, optionally followed by a unit (e.g.
# "anneal_0042_315.5K.tif" -> 315.5, "dose_2,5L.png" -> 2.5). The energy series'
# default pattern with any unit in place of "eV".
DEFAULT_PARAMETER_PATTERN = r"(\d+(?:[.,]\d+)?)(?:\s*_?[A-Za-zµ°]+)?(?!.*\d)"

# Columns of a sidecar that are never the parameter.
_NOT_PARAMETER = {"frame", "file", "name", "filename", "current", "energy", "energy_ev"}
_KNOWN_UNITS = {"temperature": "K", "t": "K", "exposure": "L", "dose": "L", "time": "s", "coverage": "ML"}


@dataclass(frozen=True, eq=False)
class ParameterTable:
    """One number per frame of a named quantity.

    Attributes
    ----------
    value : (F,) ndarray of float64
        The parameter of each frame, in frame order, in `unit`.
    name : str
        What it is (``"temperature"``, ``"exposure"``, ``"time"``, …).
    unit : str
        Its unit (``"K"``, ``"L"``, ``"s"``; may be empty).
    frame : tuple of str or None
        The sidecar's `frame` column (file names, or numbers as text), if any.
    source : str
        Where the values came from (file name, ``"file names"``, ``"file times"``).
    """

    value: np.ndarray
    name: str = "parameter"
    unit: str = ""
    frame: tuple | None = None
    source: str = ""

    def __post_init__(self):
        v = np.array(self.value, dtype=np.float64).reshape(-1)
        v.flags.writeable = False
        object.__setattr__(self, "value", v)

    def __len__(self) -> int:
        return int(self.value.size)

    @property
    def heading(self) -> str:
        """Axis heading, e.g. ``"temperature (K)"``."""
        return f"{self.name} ({self.unit})" if self.unit else self.name

    def value_of(self, i: int, frame_name: str) -> float:
        """The value of frame `i` named `frame_name` (by name when the sidecar lists names).

        Parameters
        ----------
        i : int
            Frame index (0-based).
        frame_name : str
            The frame's file name.

        Returns
        -------
        float
            The parameter.
        """
        if self.frame is not None and not all(re.fullmatch(r"[+-]?\d+", f or "") for f in self.frame):
            key = Path(str(frame_name)).name.lower()
            for j, f in enumerate(self.frame):
                if Path(f).name.lower() == key:
                    return float(self.value[j])
            raise SeriesError(f"Frame {i} ({frame_name}) is not listed in the `frame` column of {self.source}.")
        if i >= len(self):
            raise SeriesError(f"Frame {i} ({frame_name}) has no {self.name}: {self.source} lists only "
                              f"{len(self)} values.")
        return float(self.value[i])


def split_heading(text: str) -> tuple[str, str]:
    """Name and unit of a column heading: ``"temperature_K"``, ``"T (K)"``, ``"dose [L]"``.

    Parameters
    ----------
    text : str
        The heading.

    Returns
    -------
    name, unit : str
        The unit is ``""`` when the heading has none.

    Examples
    --------
    >>> split_heading("temperature_K"), split_heading("dose [L]"), split_heading("time")
    (('temperature', 'K'), ('dose', 'L'), ('time', 's'))
    """
    t = str(text).strip()
    m = re.fullmatch(r"(.+?)\s*[\(\[]\s*([^\)\]]*)\s*[\)\]]", t)
    if m:
        return m.group(1).strip(), m.group(2).strip()
    m = re.fullmatch(r"([A-Za-z][A-Za-z ]*?)_([A-Za-zµ°/]+)", t)
    if m:
        return m.group(1).strip(), m.group(2)
    return t, _KNOWN_UNITS.get(t.lower(), "")


def check_parameters(value, names: Sequence[str] | None = None, *, what: str = "parameter") -> np.ndarray:
    """Validate the parameter values of a series: numbers, finite, at least one.

    Parameters
    ----------
    value : (F,) array_like of float
        The values.
    names : sequence of str, optional
        The frames' names, to name a bad value's frame.
    what : str, keyword-only
        What the message calls the values.

    Returns
    -------
    (F,) ndarray of float64
        The values.

    Raises
    ------
    SeriesError
        When a value is not a finite number, or there is none.

    Examples
    --------
    >>> check_parameters([300, 310.5, 305]).tolist()
    [300.0, 310.5, 305.0]
    """
    v = _frame_numbers(value, names, what=what)
    v.flags.writeable = False
    return v


def _number(text, where: str) -> float:
    try:
        v = float(str(text).strip().replace(",", ".")) if isinstance(text, str) else float(text)
    except (TypeError, ValueError):
        raise SeriesError(f"{where}: {text!r} is not a number.") from None
    if not math.isfinite(v):
        raise SeriesError(f"{where}: {text!r} is not a finite number.")
    return v


def _table(cols: dict[str, list], source: str, column: str | None) -> ParameterTable:
    """cols: headings as written -> cells. Pick the parameter column and build the table."""
    low = {h.lower(): h for h in cols}
    if column is not None:
        key = low.get(column.lower())
        if key is None:
            raise SeriesError(f"{source}: no column {column!r} (found {sorted(cols) or 'none'}).")
    else:
        cands = [h for h in cols if h.lower() not in _NOT_PARAMETER and split_heading(h)[0].lower()
                 not in _NOT_PARAMETER]
        if not cands:
            raise SeriesError(f"{source}: no parameter column; add one such as 'temperature_K' "
                              f"(found {sorted(cols) or 'none'}).")
        if len(cands) > 1:
            raise SeriesError(f"{source}: several parameter columns {cands}; name the one to use.")
        key = cands[0]
    cells = cols[key]
    if not cells:
        raise SeriesError(f"{source}: the column {key!r} is empty.")
    frames = None
    fkey = low.get("frame") or low.get("file") or low.get("filename")
    if fkey is not None:
        frames = tuple("" if v is None else str(v).strip() for v in cols[fkey])
    vals = []
    for i, v in enumerate(cells):
        where = f"{source}: row {i + 1}" + (f" (frame {frames[i]})" if frames and frames[i] else "")
        if v is None or (isinstance(v, str) and not v.strip()):
            raise SeriesError(f"{where} has no {key}.")
        vals.append(_number(v, where))
    name, unit = split_heading(key)
    value = np.array(vals)
    if frames is not None and all(re.fullmatch(r"[+-]?\d+", f or "") for f in frames):
        nums = np.array([int(f) for f in frames])
        order = np.argsort(nums, kind="stable")
        s = nums[order]
        if np.any(np.diff(s) == 0) or s[0] not in (0, 1) or np.any(np.diff(s) != 1):
            raise SeriesError(f"{source}: frame numbers must run from 0 or 1 without gaps or repeats.")
        value, frames = value[order], tuple(frames[i] for i in order)
    return ParameterTable(value, name, unit, frames, source)


def read_parameter_file(path, *, column: str | None = None) -> ParameterTable:
    """Read a CSV or JSON sidecar giving the parameter of every frame.

    CSV: a header row, then one row per frame in frame order. The parameter column is
    the one that is not ``frame``, ``file``, ``current`` or ``energy`` (or `column`);
    its heading gives the name and unit: ``temperature_K``, ``dose (L)``, ``time [s]``.
    An optional ``frame`` column holds file names or frame numbers (0- or 1-based).
    JSON: a list of row objects with the same keys, or an object of equal-length lists.

    Parameters
    ----------
    path : str or os.PathLike
        The sidecar file (``.csv`` or ``.json``).
    column : str, optional, keyword-only
        The column to use when there are several.

    Returns
    -------
    ParameterTable
        The values in frame order, with name, unit and the sidecar's frame names.

    Raises
    ------
    SeriesError
        Missing file, no or several parameter columns, a cell that is not a number.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "t.csv")
    >>> _ = open(p, "w").write("frame,temperature_K\\nf1.tif,300\\nf2.tif,310\\n")
    >>> t = read_parameter_file(p)
    >>> print(t.heading, t.value.tolist(), t.value_of(1, "f2.tif"))
    temperature (K) [300.0, 310.0] 310.0
    """
    p = Path(path)
    if not p.is_file():
        raise SeriesError(f"Parameter file {p.name} not found ({p}).")
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise SeriesError(f"Parameter file {p.name} cannot be read as text ({type(exc).__name__}).") from None
    if not text.strip():
        raise SeriesError(f"Parameter file {p.name} is empty.")
    if p.suffix.lower() == ".json" or text.lstrip()[:1] in "[{":
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise SeriesError(f"{p.name}: not valid JSON ({exc.msg} at line {exc.lineno}).") from None
        if isinstance(data, dict) and isinstance(data.get("frames"), list):
            data = data["frames"]
        if isinstance(data, list) and data and all(isinstance(r, dict) for r in data):
            keys = list(dict.fromkeys(k for r in data for k in r))
            cols = {k: [r.get(k) for r in data] for k in keys}
        elif isinstance(data, dict):
            cols = {k: v for k, v in data.items() if isinstance(v, list)}
            if len({len(v) for v in cols.values()}) > 1:
                raise SeriesError(f"{p.name}: the lists have different lengths.")
        else:
            raise SeriesError(f"{p.name}: expected a list of rows or an object of lists.")
        return _table(cols, p.name, column)
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    try:
        dialect = csv.Sniffer().sniff(lines[0], delimiters=",;\t")
    except csv.Error:
        dialect = csv.excel
    rows = list(csv.reader(lines, dialect))
    header = [h.strip() for h in rows[0]]
    if all(re.fullmatch(r"[+-]?\d+(\.\d*)?", h) for h in header if h):
        raise SeriesError(f"{p.name}: the first row must be a header naming the columns "
                          f"(e.g. 'temperature_K'), got {rows[0]}.")
    cols = {h: [] for h in header if h}
    for row in rows[1:]:
        row = row + [""] * (len(header) - len(row))
        for h, v in zip(header, row):
            if h:
                cols[h].append(v)
    return _table(cols, p.name, column)


def parameters_from_names(names: Sequence[str], *, pattern: str = DEFAULT_PARAMETER_PATTERN,
                          name: str = "parameter", unit: str = "") -> ParameterTable:
    """The parameter read from each frame's file name.

    Parameters
    ----------
    names : sequence of str
        File names (folders and a ``#i`` page suffix are stripped).
    pattern : str, keyword-only
        Regular expression whose first group (or whole match) is the value; the last
        match in the name counts. Default: the last number, optionally followed by a unit.
    name, unit : str, keyword-only
        What the number is.

    Returns
    -------
    ParameterTable
        One value per name.

    Examples
    --------
    >>> t = parameters_from_names(["run_0001_300K.tif", "run_0002_312.5K.tif"], name="temperature", unit="K")
    >>> t.value.tolist()
    [300.0, 312.5]
    >>> parameters_from_names(["d=0,5L shot.png"], pattern=r"d=(\\d+(?:,\\d+)?)").value.tolist()
    [0.5]
    """
    texts = numbers_in_names(names, pattern, what=name,
                             instead="give a parameter file or use the file times instead")
    out = [_number(t, f"name of frame {i} ({n})") for i, (t, n) in enumerate(zip(texts, names))]
    return ParameterTable(check_parameters(out, names, what=name), name, unit, None, "file names")


def parameters_from_times(paths: Sequence, *, origin: float | None = None) -> ParameterTable:
    """Seconds since the first frame, from the files' modification times.

    Parameters
    ----------
    paths : sequence of path
        The frames' files.
    origin : float, optional, keyword-only
        Time (seconds since the epoch) counted as 0; default the earliest file's.

    Returns
    -------
    ParameterTable
        Seconds, one per path (name ``time``, unit ``s``).

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp(); ps = [os.path.join(d, n) for n in ("a.png", "b.png")]
    >>> for p, t in zip(ps, (1000.0, 1012.5)):
    ...     _ = open(p, "wb").write(b"x"); os.utime(p, (t, t))
    >>> parameters_from_times(ps).value.tolist()
    [0.0, 12.5]
    """
    t = []
    for i, p in enumerate(paths):
        try:
            t.append(os.stat(p).st_mtime)
        except OSError:
            raise SeriesError(f"Cannot read the time of frame {i} ({Path(str(p)).name}): no such file.") from None
    if not t:
        raise SeriesError("The series has no frames.")
    t0 = min(t) if origin is None else float(origin)
    return ParameterTable(np.array(t) - t0, "time", "s", tuple(Path(str(p)).name for p in paths), "file times")
