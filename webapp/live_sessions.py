"""Live parameter series for the ``/live`` page: a folder watched on the server, or frames uploaded.

A session lives in its own folder ``RECINET_DATA_DIR/live/<token>/`` so that every web
worker can read it: ``config.json`` (what the user asked for), ``frames/`` (uploaded
frames, written under a hidden name and renamed when complete), ``state.json`` (a small
summary rewritten after each frame: lines, family intensities against the parameter,
segments, the last frame's beams), ``last.png`` (the last frame for the screen),
``series.csv`` (every frame's beams, appended) and ``series.json`` (the whole record,
written when the session stops). A ``stop`` file asks the watching thread to stop.

A folder on the server is accepted only under ``RECINET_WATCH_ROOT`` (resolved, links
followed); no other path a user types is ever opened. The watching thread runs
:func:`analysis.follow.watch.watch_folder` in the worker that started it and stops after
``IDLE_STOP_S`` without a new frame.
"""

from __future__ import annotations

import json
import math
import re
import secrets
import threading
import time
from pathlib import Path

import numpy as np

from analysis.errors import ParameterError, RecinetError
from analysis.files import write_text_atomic
from analysis.follow.watch import watch_folder
from analysis.io import IMAGE_SUFFIXES
from analysis.jsonsafe import json_safe
from analysis.nets import parse_substrate
from webapp.figures import display_levels, downsample, png_bytes

from . import runtime

__all__ = ["start_session", "stop_session", "read_state", "session_dir", "save_upload", "resolve_watch_folder",
           "IDLE_STOP_S", "MAX_FRAMES"]

IDLE_STOP_S = 1800.0  # a session with no new frame for half an hour stops
MAX_FRAMES = 5000
MAX_RUNNING = 4  # live series watching at once in one web worker (each is a thread of heavy work)
MAX_SESSION_BYTES = 4_000_000_000  # frames uploaded into one session
_BEAT_S = 5.0  # the watching thread touches ``alive`` this often
_GONE_S = 120.0  # no heartbeat for this long (a frame takes seconds): the thread is gone
_TOKEN = re.compile(r"[A-Za-z0-9_-]{16,64}")
_threads: dict[str, threading.Thread] = {}


def _root() -> Path:
    return runtime.get_settings().data_dir / "live"


def session_dir(token: str) -> Path:
    """The folder of session `token` (the token is checked; a bad one raises).

    Parameters
    ----------
    token : str
        The session's token.

    Returns
    -------
    pathlib.Path
        The folder.
    """
    if not isinstance(token, str) or not _TOKEN.fullmatch(token):
        raise ParameterError("This live-series link is not valid.")
    return _root() / token


def resolve_watch_folder(text: str) -> Path:
    """The folder a user named, relative to ``RECINET_WATCH_ROOT``, or a one-line refusal.

    Parameters
    ----------
    text : str
        The folder as typed.

    Returns
    -------
    pathlib.Path
        The folder, inside ``RECINET_WATCH_ROOT``.
    """
    root = runtime.get_settings().watch_root
    if root is None:
        raise ParameterError("Watching a folder on the server is off here (RECINET_WATCH_ROOT is not set); "
                             "upload the frames instead.")
    t = (text or "").strip()
    if len(t) > 300:
        raise ParameterError("The folder name is too long (at most 300 characters).")
    root = Path(root).resolve()
    p = (root / t).resolve()
    if p != root and root not in p.parents:
        raise ParameterError(f"The folder must lie inside the watched root ({root.name}/); got {t!r}.")
    if not p.is_dir():
        raise ParameterError(f"No folder {t or '.'!r} inside the watched root.")
    return p


def _write_json(path: Path, obj) -> None:
    write_text_atomic(path, json.dumps(json_safe(obj)), mode=0o644)


def _check_config(cfg: dict) -> dict:
    try:
        e = float(cfg.get("energy_eV"))
    except (TypeError, ValueError):
        raise ParameterError("Give the beam energy in eV.") from None
    if not (math.isfinite(e) and 0 < e <= 5000):
        raise ParameterError(f"The energy must be a number of eV between 0 and 5000, got {cfg.get('energy_eV')!r}.")
    sub = str(cfg.get("substrate") or "").strip()
    if not sub or len(sub) > 120:
        raise ParameterError("Name the substrate, e.g. Pt(111) or hexagonal:2.775.")
    parse_substrate(sub)
    src = cfg.get("parameter_from") or "names"
    if src not in ("names", "times"):
        raise ParameterError(f"The parameter comes from 'names' or 'times', got {src!r}.")
    name = (str(cfg.get("parameter_name") or "parameter").strip() or "parameter")[:40]
    unit = str(cfg.get("unit") or "").strip()[:12]
    pattern = (cfg.get("name_pattern") or None)
    if pattern is not None:
        pattern = str(pattern)[:200]
        try:
            re.compile(pattern)
        except re.error as err:
            raise ParameterError(f"The file-name pattern is not a regular expression ({err}).") from None
    return {"energy_eV": e, "substrate": sub, "parameter_from": src, "parameter_name": name, "unit": unit,
            "name_pattern": pattern}


def start_session(cfg: dict, *, folder: str | None = None) -> str:
    """Check the settings, create a session and start watching; returns its token.

    `folder` None: the session watches its own upload folder (frames come by upload).

    Parameters
    ----------
    cfg : dict
        ``substrate``, ``energy_eV``, ``parameter_from``, ``name_pattern``, ``parameter_name``, ``unit``.
    folder : str, optional, keyword-only
        A folder under ``RECINET_WATCH_ROOT`` to watch.

    Returns
    -------
    str
        The session's token.
    """
    c = _check_config(cfg)
    watched = resolve_watch_folder(folder) if folder is not None else None
    running = sum(1 for th in list(_threads.values()) if th.is_alive())
    if running >= MAX_RUNNING:
        raise ParameterError(f"{running} live series are running on this server already (at most {MAX_RUNNING}); "
                             "stop one first.")
    token = secrets.token_urlsafe(18)
    d = session_dir(token)
    (d / "frames").mkdir(parents=True)
    c["mode"] = "folder" if watched is not None else "upload"
    c["folder_shown"] = "" if watched is None else str(watched.relative_to(Path(runtime.get_settings().watch_root)
                                                                           .resolve()))
    _write_json(d / "config.json", c)
    _write_json(d / "state.json", {"status": "starting", "lines": [], "message": "starting", "config": c})
    th = threading.Thread(target=_run, args=(token, c, watched or (d / "frames")), name=f"recinet-live-{token[:6]}",
                          daemon=True)
    _threads[token] = th
    th.start()
    return token


def stop_session(token: str) -> None:
    """Ask the session's watcher to stop (a ``stop`` file in its folder).

    Parameters
    ----------
    token : str
        The session's token.
    """
    d = session_dir(token)
    if d.is_dir():
        (d / "stop").write_text("stop")


def read_state(token: str) -> dict:
    """The session's summary, or a one-line refusal for an unknown link.

    Parameters
    ----------
    token : str
        The session's token.

    Returns
    -------
    dict
        The session's state (status, lines, the series so far).
    """
    d = session_dir(token)
    try:
        state = json.loads((d / "state.json").read_text())
    except (OSError, ValueError):
        raise ParameterError("No live series under this link (it may have been removed).") from None
    if state.get("status") in ("starting", "watching"):
        try:
            beat = (d / "alive").stat().st_mtime
        except OSError:
            beat = state.get("updated", time.time())
        if time.time() - beat > _GONE_S:  # the worker that ran it stopped without finishing the session
            state["status"] = "stopped"
            state["message"] = "stopped: the server process that watched for this series has ended"
    return state


def save_upload(token: str, name: str, data: bytes) -> str:
    """Put one uploaded frame into the session's folder (hidden name first, then renamed).

    Parameters
    ----------
    token : str
        The session's token.
    name : str
        The frame's file name.
    data : bytes
        The file.

    Returns
    -------
    str
        The name it was saved under.
    """
    d = session_dir(token) / "frames"
    try:
        mode = json.loads((d.parent / "config.json").read_text()).get("mode")
    except (OSError, ValueError):
        mode = None
    if mode != "upload" or not d.is_dir():
        raise ParameterError("This live series takes no uploads (it watches a folder), or it was removed.")
    used = sum(f.stat().st_size for f in d.iterdir() if f.is_file())
    if used + len(data) > MAX_SESSION_BYTES:
        raise ParameterError(f"This live series holds {used / 1e9:.1f} GB of frames already (at most "
                             f"{MAX_SESSION_BYTES / 1e9:.0f} GB); start a new one.")
    base = Path(str(name)).name
    if Path(base).suffix.lower() not in IMAGE_SUFFIXES or base.startswith(".") or len(base) > 200:
        raise ParameterError(f"{base[:60]!r} is not an image file name ({', '.join(IMAGE_SUFFIXES)}).")
    target = d / base
    if target.exists():
        raise ParameterError(f"A frame named {base} was already added.")
    tmp = d / (".upload-" + secrets.token_hex(4) + "-" + base)
    tmp.write_bytes(data)
    tmp.replace(target)
    return base


def _state(live, lines: list, status: str, message: str, cfg: dict) -> dict:
    """The summary the page draws: family intensities against the parameter, segments, last beams."""
    out = {"status": status, "message": message, "config": cfg, "lines": lines[-40:], "n_frames": len(live.lines)
           if live is not None else 0, "updated": time.time()}
    if live is None or live.follower is None or not len(live.follower):
        return out
    res = live.result()
    tr = res.trace
    out["parameter"] = {"name": tr.name, "unit": tr.unit, "values": tr.value.tolist()}
    out["frames"] = list(tr.frame_names)
    out["families"] = [{"label": f.label, "total": res.family_intensity[:, n].tolist(),
                        "present": res.present[:, n].tolist()} for n, f in enumerate(res.families)]
    out["integer_total"] = np.nansum(np.where(tr.valid[:, tr.beams.integer], tr.intensity[:, tr.beams.integer], 0.0),
                                     axis=1).tolist()
    out["segments"] = [{"first": s.first, "last": s.last, "value_range": list(s.value_range), "label": s.label,
                        "families": list(s.families)} for s in res.segments]
    out["drift"] = tr.drift
    out["switches"] = res.switches()
    out["peaks"] = res.family_peaks()
    fam_of = {int(j): f.label for f in res.families for j in f.members}
    shown = tr.valid & np.isfinite(tr.intensity)
    out["beams"] = [{"label": lab, "family": "integer" if integ else fam_of.get(j, ""),
                     "intensity": np.where(shown[:, j], tr.intensity[:, j], np.nan).tolist()}
                    for j, (lab, integ) in enumerate(zip(tr.beams.labels, tr.beams.integer))]
    for n, f in enumerate(res.families):
        _, eta = res.order_parameter(n)
        _, w_r, w_t = res.family_widths(n)
        out["families"][n].update(order=eta.tolist(), width_radial=w_r.tolist(), width_tangential=w_t.tolist())
    fit = res.transition() if len(tr.value) >= 8 else None
    if fit is not None:
        fam = next(sg.families[0] for sg in res.segments if sg.families)
        out["transition"] = {"family": fam, **fit.to_dict(), "model": fit.model(tr.value).tolist()}
    last = live.follower.rows[-1]
    out["last_beams"] = [{"x": float(x), "y": float(y), "label": lab, "family": "integer" if integ else fam_of.get(j, "")}
                         for j, ((x, y), lab, integ) in enumerate(zip(last["xy"], tr.beams.labels, tr.beams.integer))
                         if np.isfinite(x) and np.isfinite(y)]
    return out


def _run(token: str, cfg: dict, folder: Path) -> None:
    d = session_dir(token)
    lines: list[str] = []
    holder = {"live": None, "t": 0.0}

    shown = (cfg.get("folder_shown") or ".") if cfg.get("mode") == "folder" else "the uploaded frames"

    def say(text):
        text = text.replace(str(folder), shown)  # the server's own paths stay on the server
        lines.append(text)
        # the series is summarised once per frame (on_frame); a line alone only updates the lines
        st = dict(holder.get("state") or _state(None, lines, "watching", text, cfg))
        st.update(lines=lines[-40:], message=text, updated=time.time())
        _write_json(d / "state.json", st)

    def on_frame(live, line):
        holder["live"] = live
        holder["state"] = _state(live, lines, "watching", lines[-1] if lines else "", cfg)
        _write_json(d / "state.json", holder["state"])
        try:

            frame = live.follower.last_frame
            if frame is not None:
                small, f = downsample(frame, 512)
                png = png_bytes(display_levels(small, scale="sqrt"))
                tmp = d / ".last.png"
                tmp.write_bytes(png)
                tmp.replace(d / "last.png")
                _write_json(d / "last.json", {"factor": f, "shape": list(frame.shape)})
        except (OSError, ValueError, RecinetError):
            pass

    beat = {"t": 0.0}

    def should_stop():
        now = time.time()
        if now - beat["t"] > _BEAT_S:  # a heartbeat any worker can read
            beat["t"] = now
            (d / "alive").touch()
        return (d / "stop").exists()

    status, message = "stopped", "stopped"
    try:
        watch_folder(folder, energy_eV=cfg["energy_eV"], substrate=cfg["substrate"],
                     parameter_from=cfg["parameter_from"], name_pattern=cfg["name_pattern"],
                     parameter_name=cfg["parameter_name"], unit=cfg["unit"], out_csv=d / "series.csv",
                     out_json=d / "series.json", existing=True, settle_s=0.25, max_frames=MAX_FRAMES,
                     idle_stop_s=IDLE_STOP_S, say=say, stop=should_stop, on_frame=on_frame)
    except (RecinetError, OSError) as err:
        status, message = "error", str(err)
        lines.append(message)
    except Exception as err:  # noqa: BLE001 - a session must end with a message, never silently
        status, message = "error", f"the live series stopped: {type(err).__name__}"
        lines.append(message)
    finally:
        _write_json(d / "state.json", _state(holder["live"], lines, status, message, cfg))
        _threads.pop(token, None)

