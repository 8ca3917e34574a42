"""``recinet watch FOLDER``: analyse each new frame of a parameter series as it is written.

File-system events come from ``watchdog`` (inotify, FSEvents, ReadDirectoryChangesW). A
file is taken once it is *complete*: its name has an image suffix (a camera program
that writes ``frame.tif.part`` or ``.frame.tif`` and renames it is seen at the rename),
it arrived by that rename or its writer closed it (when the platform reports closes),
or else its size has stayed the same for `settle_s`; and it decodes. A file that does
not decode yet is tried again after another settle time until `max_wait_s` has passed,
then reported and skipped. Every file
is analysed once (:class:`analysis.follow.LiveSeries`), its beams appended to the series
CSV, and one line printed. Ctrl+C (SIGINT) stops cleanly: the last frame finishes, the
JSON summary is written, the exit status is 0.
"""

from __future__ import annotations

import argparse
import csv
import math
import os
import queue
import time
from pathlib import Path

from ..errors import ImageError, RecinetError, SeriesError

__all__ = ["CompleteFiles", "add_watch_parser", "watch_folder"]


# Events that say a file is complete: it was renamed to its name, or its writer closed it.
_DONE_EVENTS = ("moved", "closed")
# Events that change nothing (reading a file opens and closes it, our own reads included).
_QUIET_EVENTS = ("opened", "closed_no_write")


def _is_image_name(path: Path) -> bool:
    from ..io import IMAGE_SUFFIXES

    return path.suffix.lower() in IMAGE_SUFFIXES and not path.name.startswith((".", "~"))


class CompleteFiles:
    """Image files that appear in a folder, handed out once each when complete.

    Parameters
    ----------
    folder : path
    settle_s : float, keyword-only
        How long a file's size must stay the same.
    max_wait_s : float, keyword-only
        How long a file that does not decode is tried again.
    existing : bool, keyword-only
        Also hand out the image files already in the folder (in natural name order).
    """

    def __init__(self, folder, *, settle_s: float = 0.25, max_wait_s: float = 30.0, existing: bool = False):
        from watchdog.events import FileSystemEventHandler
        from watchdog.observers import Observer

        if not Path(folder).is_dir():
            raise SeriesError(f"Folder to watch {folder} does not exist or is not a folder.")
        self.folder = Path(folder).resolve()  # events then carry absolute paths
        self.settle_s, self.max_wait_s = float(settle_s), float(max_wait_s)
        self.events: queue.Queue = queue.Queue()
        self.pending: dict[Path, dict] = {}
        self.done: set[Path] = set()
        events = self.events

        class _Handler(FileSystemEventHandler):
            def on_any_event(self, event):  # called on the observer's thread
                if event.is_directory or event.event_type in _QUIET_EVENTS:
                    return
                path = getattr(event, "dest_path", None) or event.src_path
                events.put((event.event_type, Path(os.fsdecode(path))))

        self.observer = Observer()
        self.observer.schedule(_Handler(), str(self.folder), recursive=False)
        self.observer.start()
        if existing:
            from ..io import _natural_key

            for p in sorted(self.folder.iterdir(), key=lambda p: _natural_key(p.name)):
                if p.is_file() and _is_image_name(p):
                    self._note(p)

    def _note(self, path: Path, kind: str = "") -> None:
        if path in self.done or not _is_image_name(path) or path.parent != self.folder:
            return
        try:
            st = path.stat()
        except OSError:
            self.pending.pop(path, None)  # gone again (renamed away, deleted)
            return
        now = time.monotonic()
        got = self.pending.get(path)
        if got is None or (st.st_size, st.st_mtime_ns) != got["stat"]:
            got = self.pending[path] = {"stat": (st.st_size, st.st_mtime_ns), "since": now,
                                        "first": got["first"] if got else now, "closed": False}
        if kind in _DONE_EVENTS:
            got["closed"] = True  # renamed into place, or its writer closed it: no settle time

    def _settled(self, info: dict, now: float) -> bool:
        return info["stat"][0] > 0 and (info["closed"] or now - info["since"] >= self.settle_s)

    def next_ready(self, timeout_s: float = 0.1):
        """The next complete file as ``(path, LoadedImage)``; ``(path, error text)`` for a file
        given up on; None when nothing is ready within `timeout_s`.

        Parameters
        ----------
        timeout_s : float
            Longest wait, seconds.

        Returns
        -------
        tuple or None
            As above.
        """
        from ..io import _natural_key, load_image

        end = time.monotonic() + timeout_s
        while True:
            try:
                while True:
                    self._note(*self.events.get_nowait()[::-1])
            except queue.Empty:
                pass
            now = time.monotonic()
            for path in sorted(self.pending, key=lambda p: (self.pending[p]["first"], _natural_key(p.name))):
                info = self.pending.get(path)
                if info is None or not self._settled(info, now):
                    continue
                self._note(path)  # stat again: still the same file?
                info = self.pending.get(path)
                if info is None or not self._settled(info, now):
                    continue
                try:
                    img = load_image(path)
                    st = path.stat()
                except (ImageError, OSError) as err:
                    if now - info["first"] > self.max_wait_s:
                        self.pending.pop(path, None)
                        self.done.add(path)
                        return path, str(err)
                    info["since"], info["closed"] = now, False  # try again after another settle time
                    continue
                if (st.st_size, st.st_mtime_ns) != info["stat"]:
                    self._note(path)  # changed while it was read: wait again
                    continue
                self.pending.pop(path, None)
                self.done.add(path)
                return path, img
            now = time.monotonic()
            left = end - now
            if left <= 0:
                return None
            # sleep until the next event or the moment the next pending file has settled
            due = [i["since"] + self.settle_s - now for i in self.pending.values() if not self._settled(i, now)]
            try:
                self._note(*self.events.get(timeout=max(min([left, *due]), 0.002))[::-1])
            except queue.Empty:
                pass

    def close(self) -> None:
        """Stop watching the folder."""
        self.observer.stop()
        self.observer.join(timeout=5)


class _Parameter:
    """The parameter of each arriving frame: from its name, its file time or a sidecar."""

    def __init__(self, source: str, *, pattern: str | None, name: str, unit: str):
        from .parameters import DEFAULT_PARAMETER_PATTERN

        self.source = (source or "names").strip()
        self.pattern = pattern or DEFAULT_PARAMETER_PATTERN
        self.name, self.unit = name, unit
        self.t0 = None
        kind = self.source.lower()
        if kind == "times" and name == "parameter":
            self.name, self.unit = "time", unit or "s"
        if kind not in ("names", "times"):
            from .parameters import read_parameter_file

            table = read_parameter_file(self.source)  # bad sidecars stop here, before watching
            self.name, self.unit = table.name, table.unit

    def value(self, i: int, path: Path) -> float:
        from .parameters import parameters_from_names, read_parameter_file

        kind = self.source.lower()
        if kind == "names":
            return float(parameters_from_names([path.name], pattern=self.pattern, name=self.name).value[0])
        if kind == "times":
            t = path.stat().st_mtime
            self.t0 = t if self.t0 is None else self.t0
            return float(t - self.t0)
        table = read_parameter_file(self.source)  # read again: the sidecar may grow with the frames
        return table.value_of(i, path.name)


def _fmt(v: float) -> str:
    return "—" if not math.isfinite(v) else f"{v:.3g}"


def _line(d: dict, unit: str, name: str, latency_s: float) -> str:
    fam = ", ".join(d["families"]) or "none"
    return (f"{d['frame']:4d}  {d['name']}  {name} {d['value']:g}{(' ' + unit) if unit else ''}  "
            f"spots {d['spots']}  beams {d['beams']}  integer {_fmt(d['integer_intensity'])}  "
            f"fractional {_fmt(d['fractional_intensity'])}  families {fam}  segment {d['segment']}  "
            f"{latency_s * 1000:.0f} ms")


def watch_folder(folder, *, energy_eV: float, substrate: str, parameter_from: str = "names",
                 name_pattern: str | None = None, parameter_name: str = "parameter", unit: str = "",
                 out_csv=None, out_json=None, existing: bool = False, settle_s: float = 0.25,
                 max_frames: int | None = None, idle_stop_s: float | None = None, say=print, stop=None,
                 on_frame=None, wait_parameter_s: float = 30.0) -> int:
    """Watch `folder` and analyse each complete new frame once; returns the frames analysed.

    Stops on KeyboardInterrupt (SIGINT), when `stop()` returns True, after `max_frames`
    frames, or after `idle_stop_s` seconds without a new frame; writes `out_json` (the
    whole series) when it stops. `on_frame(live, line)` is called after each frame. A frame
    that a sidecar does not list yet waits up to `wait_parameter_s` for the sidecar to grow.

    Parameters
    ----------
    folder : str or os.PathLike
        The folder the camera program writes into.
    energy_eV : float, keyword-only
        Beam energy of the series, eV.
    substrate : str, keyword-only
        E.g. ``"Pt(111)"`` or ``"hexagonal:2.775"``.
    parameter_from : str, keyword-only
        Where each frame's parameter comes from: ``"names"``, ``"times"`` or a sidecar.
    name_pattern : str, optional, keyword-only
        Regular expression whose first group is the parameter in a file name.
    parameter_name, unit : str, keyword-only
        What the number is and its unit.
    out_csv : str or os.PathLike, optional, keyword-only
        Every frame's beams are appended here.
    out_json : str or os.PathLike, optional, keyword-only
        The whole series is written here on stopping.
    existing : bool, keyword-only
        Analyse the image files already in the folder first.
    settle_s : float, keyword-only
        Seconds a file's size must stay the same before it is read.
    max_frames : int, optional, keyword-only
        Stop after this many frames.
    idle_stop_s : float, optional, keyword-only
        Stop after this many seconds without a new frame.
    say : callable(str), keyword-only
        Where the one-line reports go.
    stop : callable() -> bool, optional, keyword-only
        Polled; True stops the watch.
    on_frame : callable(live, line), optional, keyword-only
        Called after each frame.
    wait_parameter_s : float, keyword-only
        Seconds a frame waits for a sidecar that does not list it yet.

    Returns
    -------
    int
        The frames analysed.
    """
    from .export import CSV_COLUMNS, _cell
    from .run import LiveSeries

    par = _Parameter(parameter_from, pattern=name_pattern, name=parameter_name, unit=unit)
    live = LiveSeries(substrate, energy_eV=energy_eV, name=par.name, unit=par.unit)
    files = CompleteFiles(folder, settle_s=settle_s, existing=existing)
    csv_file = None
    if out_csv is not None:
        new = not Path(out_csv).exists() or Path(out_csv).stat().st_size == 0
        csv_file = open(out_csv, "a", newline="", encoding="utf-8")
        if new:
            heading = par.name + (f" ({par.unit})" if par.unit else "")
            csv.writer(csv_file).writerow([c if c != "parameter" else heading for c in CSV_COLUMNS])
            csv_file.flush()
    n_in = n_done = 0
    held: list[tuple] = []
    last = time.monotonic()
    say(f"watching {Path(folder)} at {energy_eV:g} eV on {substrate}; Ctrl+C stops")
    try:
        while max_frames is None or n_in < max_frames:
            if stop is not None and stop():
                break
            got = files.next_ready(0.05 if held else 0.2)
            if got is not None:
                last = time.monotonic()
                held.append((got[0], got[1], time.monotonic()))  # frames are taken in the order they came
            if not held:
                if idle_stop_s is not None and time.monotonic() - last > idle_stop_s:
                    break
                continue
            path, img, t_ready = held[0]
            if isinstance(img, str):
                held.pop(0)
                say(f"skipped {path.name}: {img}")
                continue
            try:
                value = par.value(n_in, path)
            except SeriesError as err:
                if par.source.lower() not in ("names", "times") and time.monotonic() - t_ready < wait_parameter_s:
                    continue  # the sidecar may be written after the frame: wait for it, keep the order
                held.pop(0)
                say(f"skipped {path.name}: {err}")
                continue
            held.pop(0)
            n_in += 1
            try:
                lines = live.add(img, value=value, name=path.name)
            except RecinetError as err:
                say(f"skipped {path.name}: {err}")
                continue
            if not lines:
                say(f"   …  {path.name}  waiting: not indexed yet ({live.waiting[-1][3]})")
            for d in lines:
                n_done += 1
                say(_line(d, par.unit, par.name, time.monotonic() - t_ready))
                if csv_file is not None:
                    row = live.follower.rows[d["frame"]]
                    fam = {int(j): f.label for f in live.families for j in f.members}
                    b = live.follower.beams
                    w = csv.writer(csv_file)
                    for j in range(len(row["intensity"])):
                        w.writerow([d["frame"], d["name"], _cell(d["value"]), b.labels[j], _cell(b.hk[j, 0]),
                                    _cell(b.hk[j, 1]), "integer" if b.integer[j] else fam.get(j, ""),
                                    _cell(row["intensity"][j]), _cell(row["sigma"][j]),
                                    _cell(row["background"][j]), _cell(row["width_r"][j]), _cell(row["width_t"][j]),
                                    _cell(row["xy"][j, 0]), _cell(row["xy"][j, 1]), int(row["flags"][j])])
                    csv_file.flush()
                if on_frame is not None:
                    on_frame(live, d)
    except KeyboardInterrupt:
        say("stopping (Ctrl+C)")
    finally:
        files.close()
        if csv_file is not None:
            csv_file.close()
    if n_done:
        res = live.result()
        u = f" {par.unit}" if par.unit else ""
        for pk in res.family_peaks():
            say(f"{pk['family']} family brightest at {par.name} {pk['value']:.4g}{u} (frame {pk['frame']})")
        for sw in res.switches():
            say(f"switch at {par.name} {sw['value']:.4g}{u}: {sw['from']} → {sw['to']}")
        fit = res.transition()
        if fit is not None:
            say(f"order–disorder fit of the {next(s.families[0] for s in res.segments if s.families)} family: "
                f"Tc = {fit.tc:.4g}{u} ± {fit.tc_sigma:.2g} (statistics) ± {fit.tc_spread:.2g} (refits), "
                f"2β = {2 * fit.beta:.3g}")
        if out_json is not None:
            from .export import write_json

            write_json(res, out_json, transition=fit)
    say(f"stopped after {n_done} frames" + (f"; {len(live.waiting)} not indexed" if live.waiting else ""))
    return n_done


def _cmd_watch(args) -> int:
    from ..cli import _check_output

    for opt, path in (("--out", args.out), ("--json", args.json)):
        if path:
            _check_output(path, opt)
    if not (math.isfinite(args.energy) and args.energy > 0):
        raise SeriesError(f"--energy must be a positive number of eV, got {args.energy!r}.")
    from ..nets import parse_substrate

    parse_substrate(args.substrate)  # a bad substrate stops here, before watching

    def say(text):
        print(text, flush=True)

    watch_folder(args.folder, energy_eV=args.energy, substrate=args.substrate, parameter_from=args.parameter_from,
                 name_pattern=args.name_pattern, parameter_name=args.parameter_name, unit=args.unit,
                 out_csv=args.out, out_json=args.json, existing=args.existing, settle_s=args.settle,
                 max_frames=args.max_frames, idle_stop_s=args.stop_after_idle, say=say)
    return 0


def add_watch_parser(subparsers) -> argparse.ArgumentParser:
    """The ``recinet watch`` sub-command.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        What ``ArgumentParser.add_subparsers`` returned.

    Returns
    -------
    argparse.ArgumentParser
        The ``watch`` parser.
    """
    w = subparsers.add_parser(
        "watch", help="analyse each new frame in a folder as it is written (temperature, dose or time series)",
        description="Watch FOLDER; each new image file, once complete, is analysed at one energy: the beams' "
                    "intensities, the beam families present and the segment (structure) they belong to. One line "
                    "per frame; Ctrl+C stops.")
    w.add_argument("folder", help="folder the camera program writes into")
    w.add_argument("--energy", type=float, required=True, help="beam energy of the series, eV")
    w.add_argument("--substrate", required=True, help="e.g. 'Pt(111)' or 'hexagonal:2.775'")
    w.add_argument("--parameter-from", default="names",
                   help="'names' (a number in each file name, default), 'times' (file times, s) or a CSV/JSON "
                        "sidecar naming the parameter in its heading, e.g. 'temperature_K'")
    w.add_argument("--name-pattern", help="regular expression whose first group is the parameter in a file name")
    w.add_argument("--parameter-name", default="parameter", help="what the number is, e.g. temperature")
    w.add_argument("--unit", default="", help="its unit, e.g. K, L, s")
    w.add_argument("--out", help="append every frame's beams to this CSV file")
    w.add_argument("--json", help="write the whole series here (JSON) when stopping")
    w.add_argument("--existing", action="store_true", help="analyse the image files already in the folder first")
    w.add_argument("--settle", type=float, default=0.25, help="seconds a file's size must stay the same")
    w.add_argument("--max-frames", type=int, help="stop after this many frames")
    w.add_argument("--stop-after-idle", type=float, help="stop after this many seconds without a new frame")
    w.set_defaults(func=_cmd_watch)
    return w

