"""The energy (and beam current) of every frame of a series, read and checked.

A sidecar file (CSV or JSON, :func:`read_energy_file`), a number in each file name
(:func:`energies_from_names`) or a start and a step (:func:`energies_from_start_step`)
give the energies; :func:`check_energies` checks them (finite, positive, strictly
monotonic) and names the first bad frame. While a series streams in, the energy of
each frame is looked up and checked as it arrives.
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

__all__ = [
    "EnergyTable",
    "read_energy_file",
    "energies_from_names",
    "numbers_in_names",
    "energies_from_start_step",
    "check_energies",
    "DEFAULT_NAME_PATTERN",
]


# Default: the last number in the file name, optionally followed by "eV" (e.g.
# "scan_0042_105.5eV.tif" -> 105.5, "frame_120.png" -> 120).
DEFAULT_NAME_PATTERN = r"(\d+(?:[.,]\d+)?)(?:\s*_?eV)?(?!.*\d)"


@dataclass(frozen=True, eq=False)
class EnergyTable:
    """Energies (and optionally beam currents) of the frames of a series.

    Attributes
    ----------
    energy_eV : (F,) ndarray of float64
        Electron energy of each frame, in frame order, eV.
    current : (F,) ndarray of float64 or None
        Beam current of each frame in any unit (intensities are divided by it).
    frame : tuple of str or None
        The sidecar's `frame` column (file names, or frame numbers as text), if any.
    source : str
        Where the energies came from (file name, ``"file names"``, ``"start/step"``).
    """

    energy_eV: np.ndarray
    current: np.ndarray | None = None
    frame: tuple | None = None
    source: str = ""

    def __post_init__(self):
        e = np.array(self.energy_eV, dtype=np.float64).reshape(-1)
        e.flags.writeable = False
        object.__setattr__(self, "energy_eV", e)
        if self.current is not None:
            c = np.array(self.current, dtype=np.float64).reshape(-1)
            c.flags.writeable = False
            object.__setattr__(self, "current", c)

    def __len__(self) -> int:
        return int(self.energy_eV.size)


def _frame_text(i: int, names: Sequence[str] | None) -> str:
    if names is not None and i < len(names) and names[i]:
        return f"frame {i} ({names[i]})"
    return f"frame {i}"


def _frame_numbers(value, names: Sequence[str] | None = None, *, what: str, unit: str = "",
                   positive: bool = False) -> np.ndarray:
    """One number per frame as a (F,) float64 array: numbers, at least one, every one finite
    (and > 0 when `positive`); the first bad one named by its frame (energies of an energy
    series, the parameter of a parameter series)."""
    try:
        v = np.array(value, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise SeriesError(f"The {what} values must be numbers, got {value!r}.") from None
    if v.size == 0:
        raise SeriesError(f"The series has no {what} values.")
    bad = np.flatnonzero(~(np.isfinite(v) & (v > 0)) if positive else ~np.isfinite(v))
    if bad.size:
        i = int(bad[0])
        kind = ("a positive number" + (f" of {unit}" if unit else "")) if positive else "a finite number"
        raise SeriesError(f"The {what} of {_frame_text(i, names)} must be {kind}, got {v[i]!r}.")
    return v


def check_energies(energy_eV, names: Sequence[str] | None = None) -> np.ndarray:
    """Validate the energies of a series: finite, positive, strictly monotonic.

    Parameters
    ----------
    energy_eV : (F,) array_like of float
        Energies in frame order, eV. Increasing or decreasing series are both accepted.
    names : sequence of str, optional
        Frame names for the messages.

    Returns
    -------
    (F,) ndarray of float64
        The energies, eV.

    Raises
    ------
    SeriesError
        Naming the first bad frame.

    Examples
    --------
    >>> check_energies([50, 51, 52]).tolist()
    [50.0, 51.0, 52.0]
    """
    e = _frame_numbers(energy_eV, names, what="energy", unit="eV", positive=True)
    if e.size > 1:
        d = np.diff(e)
        dup = np.flatnonzero(d == 0)
        if dup.size:
            i = int(dup[0])
            raise SeriesError(f"{_frame_text(i, names).capitalize()} and {_frame_text(i + 1, names)} both "
                              f"have {e[i]:g} eV: energies must not repeat.")
        sign = np.sign(d[0])
        bad = np.flatnonzero(np.sign(d) != sign)
        if bad.size:
            i = int(bad[0]) + 1
            way = "increase" if sign > 0 else "decrease"
            raise SeriesError(f"Energy of {_frame_text(i, names)} is {e[i]:g} eV after {e[i - 1]:g} eV: "
                              f"the energies must {way} steadily (not monotonic).")
    e.flags.writeable = False
    return e


def _to_float(text, what: str) -> float:
    try:
        return float(str(text).strip().replace(",", ".") if isinstance(text, str) else text)
    except (TypeError, ValueError):
        raise SeriesError(f"{what}: {text!r} is not a number.") from None


def _table_from_columns(cols: dict, source: str) -> EnergyTable:
    """Build an EnergyTable from lower-cased column lists (strings or numbers)."""
    key = "energy_ev" if "energy_ev" in cols else "energy" if "energy" in cols else None
    if key is None:
        raise SeriesError(f"{source}: no energy column; name it 'energy_eV' or 'energy' "
                          f"(found {sorted(cols) or 'none'}).")
    raw_e = cols[key]
    n = len(raw_e)
    if n == 0:
        raise SeriesError(f"{source}: the energy column is empty.")
    frames = None
    if "frame" in cols:
        frames = tuple("" if v is None else str(v).strip() for v in cols["frame"])
    energies, currents = [], None
    for i, v in enumerate(raw_e):
        label = f"{source}: row {i + 1}" + (f" (frame {frames[i]})" if frames and frames[i] else "")
        if v is None or (isinstance(v, str) and not v.strip()):
            raise SeriesError(f"{label} has no energy.")
        energies.append(_to_float(v, label))
    if "current" in cols:
        currents = []
        for i, v in enumerate(cols["current"]):
            label = f"{source}: row {i + 1}"
            c = _to_float(v, label + " current")
            if not (math.isfinite(c) and c > 0):
                raise SeriesError(f"{label}: beam current must be positive, got {v!r}.")
            currents.append(c)
    table = EnergyTable(np.array(energies), None if currents is None else np.array(currents), frames, source)
    if frames is not None:
        table = _order_by_frame_column(table)
    return table


def _order_by_frame_column(t: EnergyTable) -> EnergyTable:
    """Rows whose `frame` holds numbers are put in frame order (0- or 1-based, consecutive)."""
    fr = t.frame
    if not all(re.fullmatch(r"[+-]?\d+", f or "") for f in fr):
        return t  # file names: matched to the series' names later
    nums = np.array([int(f) for f in fr])
    order = np.argsort(nums, kind="stable")
    s = nums[order]
    if np.any(np.diff(s) == 0):
        k = int(np.flatnonzero(np.diff(s) == 0)[0])
        raise SeriesError(f"{t.source}: frame {s[k]} is listed twice.")
    if s[0] not in (0, 1) or np.any(np.diff(s) != 1):
        missing = sorted(set(range(int(s[0]), int(s[-1]) + 1)) - set(s.tolist()))
        raise SeriesError(f"{t.source}: frame numbers must run from 0 or 1 without gaps; "
                          f"missing {missing[:5] or [0]}.")
    cur = None if t.current is None else t.current[order]
    return EnergyTable(t.energy_eV[order], cur, tuple(fr[i] for i in order), t.source)


def read_energy_file(path) -> EnergyTable:
    """Read a CSV or JSON sidecar listing the energy (and current) of every frame.

    CSV: a header row, then one row per frame in frame order; the energy column is named
    ``energy_eV`` or ``energy`` (case-insensitive); optional ``frame`` (file names, or
    frame numbers from 0 or 1, which set the order) and ``current`` columns. Commas,
    semicolons or tabs separate the columns.

    JSON: either a list of numbers, a list of row objects with the same keys, or an
    object with lists under those keys (``{"energy_eV": [...], "current": [...]}``).

    Parameters
    ----------
    path : str or os.PathLike
        The sidecar file (``.csv`` or ``.json``).

    Returns
    -------
    EnergyTable
        Energies (eV) in frame order, with the sidecar's frame column and beam currents when given.

    Raises
    ------
    SeriesError
        Missing file, no energy column, a cell that is not a number (naming its row).

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp(); p = os.path.join(d, "e.csv")
    >>> _ = open(p, "w").write("frame,energy_eV,current\\n1,50,1.0\\n2,52,1.1\\n")
    >>> t = read_energy_file(p)
    >>> print(t.energy_eV.tolist(), t.current.tolist())
    [50.0, 52.0] [1.0, 1.1]
    """
    p = Path(path)
    if not p.is_file():
        raise SeriesError(f"Energy file {p.name} not found ({p}).")
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise SeriesError(f"Energy file {p.name} cannot be read as text ({type(exc).__name__}).") from None
    if not text.strip():
        raise SeriesError(f"Energy file {p.name} is empty.")
    if p.suffix.lower() == ".json" or text.lstrip()[:1] in "[{":
        return _energy_json(text, p.name)
    return _energy_csv(text, p.name)


def _energy_csv(text: str, source: str) -> EnergyTable:
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    try:
        dialect = csv.Sniffer().sniff(lines[0], delimiters=",;\t")
    except csv.Error:
        dialect = csv.excel
    rows = list(csv.reader(lines, dialect))
    header = [h.strip().lower() for h in rows[0]]
    if all(re.fullmatch(r"[+-]?\d+(\.\d*)?", h) for h in header if h):
        raise SeriesError(f"{source}: the first row must be a header naming the columns "
                          f"(e.g. 'energy_eV'), got {rows[0]}.")
    cols: dict[str, list] = {h: [] for h in header if h}
    for r, row in enumerate(rows[1:], start=2):
        if len(row) < len(header):
            row = row + [""] * (len(header) - len(row))
        for h, v in zip(header, row):
            if h:
                cols[h].append(v)
    return _table_from_columns(cols, source)


def _energy_json(text: str, source: str) -> EnergyTable:
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise SeriesError(f"{source}: not valid JSON ({exc.msg} at line {exc.lineno}).") from None
    if isinstance(data, dict):
        data = {str(k).lower(): v for k, v in data.items()}
        if "frames" in data and isinstance(data["frames"], list):
            data = data["frames"]
    if isinstance(data, list):
        if all(isinstance(v, (int, float, str)) for v in data):
            return _table_from_columns({"energy_ev": data}, source)
        if all(isinstance(v, dict) for v in data):
            keys = set().union(*(set(str(k).lower() for k in v) for v in data)) if data else set()
            cols = {k: [] for k in keys}
            for row in data:
                low = {str(k).lower(): v for k, v in row.items()}
                for k in keys:
                    cols[k].append(low.get(k))
            return _table_from_columns(cols, source)
        raise SeriesError(f"{source}: a JSON list must hold numbers or row objects.")
    if isinstance(data, dict):
        cols = {k: v for k, v in data.items() if isinstance(v, list)}
        lengths = {k: len(v) for k, v in cols.items() if k in ("energy_ev", "energy", "current", "frame")}
        if len(set(lengths.values())) > 1:
            raise SeriesError(f"{source}: the lists have different lengths {lengths}.")
        return _table_from_columns(cols, source)
    raise SeriesError(f"{source}: expected a JSON list or object, got {type(data).__name__}.")


def energies_from_names(names: Sequence[str], *, pattern: str = DEFAULT_NAME_PATTERN) -> np.ndarray:
    """Energies read from the frames' file names.

    Parameters
    ----------
    names : sequence of str
        File names (a ``#i`` page suffix is ignored; folders are stripped).
    pattern : str, keyword-only
        Regular expression whose first group (or whole match) is the energy in eV.
        The default takes the last number in the name, optionally followed by ``eV``;
        a decimal comma is accepted.

    Returns
    -------
    (F,) ndarray of float64
        The energies (eV), checked by :func:`check_energies`.

    Raises
    ------
    SeriesError
        A name without a match, naming the frame.

    Examples
    --------
    >>> energies_from_names(["run3_050.5eV.tif", "run3_051.0eV.tif"]).tolist()
    [50.5, 51.0]
    >>> energies_from_names(["E=60 eV, take 2.png"], pattern=r"E=(\\d+)").tolist()
    [60.0]
    """
    texts = numbers_in_names(names, pattern, what="energy", instead="give an energy file or a start and step instead")
    out = [_to_float(t, f"name of {_frame_text(i, names)}") for i, t in enumerate(texts)]
    return check_energies(out, names)


def numbers_in_names(names: Sequence[str], pattern: str, *, what: str, instead: str) -> list[str]:
    r"""The text of the last match of `pattern` (its first group, or the whole match) in each
    file name, a ``#i`` page suffix, the folders and an image extension left out.

    Parameters
    ----------
    names : sequence of str
        File names.
    pattern : str
        Regular expression.
    what : str
        What the number is, for the message when a name holds none (e.g. ``"energy"``).
    instead : str
        What the user can do instead, for that message.

    Returns
    -------
    list of str
        One text per name (still to be read as a number).

    Raises
    ------
    SeriesError
        An invalid pattern, or a name without a match.

    Examples
    --------
    >>> numbers_in_names(["a_1.5K.png", "dir/a_2K.tif#3"], r"(\d+(?:\.\d+)?)K", what="temperature", instead="")
    ['1.5', '2']
    """
    try:
        rx = re.compile(pattern)
    except re.error as exc:
        raise SeriesError(f"File-name pattern {pattern!r} is not a valid regular expression ({exc}).") from None
    out = []
    for i, n in enumerate(names):
        stem = re.sub(r"#\d+$", "", Path(str(n)).name)
        stem = re.sub(r"\.(tiff?|png|jpe?g|bmp)$", "", stem, flags=re.I)
        m = None
        for m in rx.finditer(stem):
            pass  # the last match
        if m is None:
            raise SeriesError(f"No {what} in the name of {_frame_text(i, names)} with pattern {pattern!r}; "
                              f"{instead}.")
        out.append(m.group(1) if rx.groups else m.group(0))
    return out


def energies_from_start_step(n_frames: int, *, start_eV: float, step_eV: float) -> np.ndarray:
    """Energies ``start_eV + i · step_eV`` for ``i = 0 … n_frames − 1``.

    Parameters
    ----------
    n_frames : int
        Number of frames.
    start_eV : float, keyword-only
        Energy of the first frame, eV.
    step_eV : float, keyword-only
        Energy step between frames, eV (non-zero).

    Returns
    -------
    (n_frames,) ndarray of float64
        The energies, eV.

    Examples
    --------
    >>> energies_from_start_step(3, start_eV=40.0, step_eV=2.0).tolist()
    [40.0, 42.0, 44.0]
    """
    if not (isinstance(n_frames, (int, np.integer)) and n_frames > 0):
        raise SeriesError(f"`n_frames` must be a positive integer, got {n_frames!r}.")
    for name, v in (("start_eV", start_eV), ("step_eV", step_eV)):
        if not (isinstance(v, (int, float, np.floating, np.integer)) and math.isfinite(v)):
            raise SeriesError(f"`{name}` must be a number of eV, got {v!r}.")
    if step_eV == 0:
        raise SeriesError("`step_eV` must not be 0: energies must not repeat.")
    return check_energies(float(start_eV) + float(step_eV) * np.arange(int(n_frames)))


class _StartStep:
    """Energies start + i·step for a series whose length is known only at the end."""

    def __init__(self, start_eV: float, step_eV: float):
        energies_from_start_step(1, start_eV=start_eV, step_eV=step_eV)  # validates
        if step_eV == 0:
            raise SeriesError("`step_eV` must not be 0: energies must not repeat.")
        self.start, self.step = float(start_eV), float(step_eV)


class _Energies:
    """Energy (and current) of frame i, checked as the frames arrive."""

    def __init__(self, energies, name_pattern: str):
        self.table: EnergyTable | None = None
        self.by_name: dict | None = None
        self.pattern = name_pattern
        self.seen_e: list[float] = []
        self.seen_names: list[str] = []
        self.start_step: _StartStep | None = None
        if energies is None:
            return
        if isinstance(energies, dict) and set(energies) == {"start_eV", "step_eV"}:
            energies = _StartStep(energies["start_eV"], energies["step_eV"])
        if isinstance(energies, _StartStep):
            self.start_step = energies
            return
        if isinstance(energies, (str, os.PathLike)):
            energies = read_energy_file(energies)
        if not isinstance(energies, EnergyTable):
            energies = EnergyTable(check_energies(energies), None, None, "energies")
        self.table = energies
        if energies.frame is not None and not all(re.fullmatch(r"[+-]?\d+", f or "") for f in energies.frame):
            self.by_name = {}
            for i, f in enumerate(energies.frame):
                key = _name_key(f)
                if key in self.by_name:
                    raise SeriesError(f"{energies.source}: frame {f!r} is listed twice.")
                self.by_name[key] = i
        else:
            check_energies(energies.energy_eV, energies.frame)

    @property
    def n(self) -> int | None:
        return None if self.table is None else len(self.table)

    def at(self, i: int, name: str) -> tuple[float, float | None]:
        t = self.table
        cur = None
        if self.start_step is not None:
            e = self.start_step.start + i * self.start_step.step
        elif t is None:
            e = float(energies_from_names([name], pattern=self.pattern)[0])
        elif self.by_name is not None:
            key = _name_key(name)
            if key not in self.by_name:
                raise SeriesError(f"Frame {i} ({name}) is not listed in the `frame` column of {t.source}.")
            row = self.by_name[key]
            e = float(t.energy_eV[row])
            cur = None if t.current is None else float(t.current[row])
        else:
            if i >= len(t):
                raise SeriesError(f"Frame {i} ({name}) has no energy: {t.source} lists only {len(t)} "
                                  f"energies.")
            e = float(t.energy_eV[i])
            cur = None if t.current is None else float(t.current[i])
        if not (math.isfinite(e) and e > 0):
            raise SeriesError(f"Energy of frame {i} ({name}) must be a positive number of eV, got {e!r}.")
        if self.seen_e:
            prev = self.seen_e[-1]
            if e == prev:
                raise SeriesError(f"Frame {i - 1} ({self.seen_names[-1]}) and frame {i} ({name}) both have "
                                  f"{e:g} eV: energies must not repeat.")
            if len(self.seen_e) >= 2 and np.sign(e - prev) != np.sign(prev - self.seen_e[-2]):
                way = "increase" if prev > self.seen_e[-2] else "decrease"
                raise SeriesError(f"Energy of frame {i} ({name}) is {e:g} eV after {prev:g} eV: the energies "
                                  f"must {way} steadily (not monotonic).")
        self.seen_e.append(e)
        self.seen_names.append(name)
        return e, cur

    def finish(self, n_frames: int) -> None:
        if self.table is not None and self.by_name is None and n_frames != len(self.table):
            raise SeriesError(f"The series has {n_frames} frames but {self.table.source} lists "
                              f"{len(self.table)} energies.")


def _name_key(name: str) -> str:
    return Path(str(name).strip()).name.lower()
