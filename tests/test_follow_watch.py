"""``recinet watch``: a folder filled file by file while the command runs.

Truth: the frames written (their names carry the dose), rendered with known structure.
The camera program is imitated three ways: a temporary name renamed when complete, a
hidden name renamed, and a file written in two halves with a pause longer than the
settle time between them (a reader that took it at the pause would get half an image).
"""

import csv
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.simulate.parameter_series import ExposureModel, render_parameter_series

PT = parse_substrate("Pt(111)")
GEOM = ScreenGeometry(129.0, 126.0, 115.0, distortion=0.1, rotation_deg=4.0)
ROOT = Path(__file__).resolve().parents[1]


def _frames(n=6):
    dose = np.linspace(2.0, 4.5, n)  # p(2×2) growing (ExposureModel: θ 0.17 → 0.28 ML)
    return [(f"dose_{d:.2f}L.tif", im.image) for d, im in render_parameter_series(
        PT, [[[2, 0], [0, 2]], [[2, 1], [-1, 1]]], dose, model=ExposureModel(), energy_eV=200.0, geometry=GEOM,
        rng=np.random.default_rng(7))]


def _tif_bytes(image) -> bytes:
    import io

    buf = io.BytesIO()
    tifffile.imwrite(buf, image)
    return buf.getvalue()


class _Reader(threading.Thread):
    def __init__(self, stream):
        super().__init__(daemon=True)
        self.stream, self.lines = stream, []

    def run(self):
        for line in self.stream:
            self.lines.append(line.rstrip("\n"))

    def wait_for(self, text, timeout):
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if any(text in ln for ln in self.lines):
                return True
            time.sleep(0.05)
        return False


@pytest.mark.slow
def test_watch_analyses_every_frame_once_and_never_half_written(tmp_path):
    folder = tmp_path / "camera"
    folder.mkdir()
    out_csv, out_json = tmp_path / "series.csv", tmp_path / "series.json"
    env = dict(os.environ, PYTHONPATH=str(ROOT), PYTHONUNBUFFERED="1")
    proc = subprocess.Popen([sys.executable, "-m", "analysis.cli", "watch", str(folder), "--energy", "200",
                             "--substrate", "Pt(111)", "--parameter-name", "exposure", "--unit", "L",
                             "--out", str(out_csv), "--json", str(out_json), "--settle", "0.2"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=ROOT)
    reader = _Reader(proc.stdout)
    reader.start()
    try:
        assert reader.wait_for("watching", 60), proc.stderr.read() if proc.poll() is not None else "no start line"
        frames = _frames()
        (folder / "notes.txt").write_text("not an image")  # ignored
        for i, (name, image) in enumerate(frames):
            raw = _tif_bytes(image)
            if i % 3 == 0:  # temporary name, renamed when complete
                tmp = folder / (name + ".part")
                tmp.write_bytes(raw)
                os.replace(tmp, folder / name)
            elif i % 3 == 1:  # hidden name, renamed
                tmp = folder / ("." + name)
                tmp.write_bytes(raw)
                os.replace(tmp, folder / name)
            else:  # written in place in two halves, a pause longer than --settle between them
                with open(folder / name, "wb") as fh:
                    fh.write(raw[: len(raw) // 2])
                    fh.flush()
                    time.sleep(0.8)
                    fh.write(raw[len(raw) // 2:])
            assert reader.wait_for(name, 90), "\n".join(reader.lines)
        proc.send_signal(signal.SIGINT)
        rc = proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    reader.join(timeout=5)
    lines = reader.lines
    assert rc == 0, proc.stderr.read()
    assert any("stopped after 6 frames" in ln for ln in lines)
    assert not any(ln.startswith("skipped") for ln in lines), lines
    for name, _ in frames:  # every frame exactly once
        assert sum(name in ln for ln in lines) == 1, lines
    frame_lines = [ln for ln in lines if "dose_" in ln and "segment" in ln]
    assert len(frame_lines) == 6
    # the half-written frame was read whole: its integer beams as bright as its neighbours'
    integer = [float(ln.split("integer ")[1].split()[0]) for ln in frame_lines]
    assert max(integer) / min(integer) < 1.15
    # the series file: one row per frame and beam, the doses from the names in order
    with open(out_csv, newline="") as fh:
        rows = list(csv.DictReader(fh))
    doses = sorted({float(r["exposure (L)"]) for r in rows})
    assert doses == pytest.approx([float(n.split("_")[1][:-5]) for n, _ in frames])
    rec = json.loads(out_json.read_text())
    assert rec["frames"] == [n for n, _ in frames]
    assert rec["parameter"]["name"] == "exposure" and rec["segments"]


def test_renamed_or_closed_file_is_taken_without_the_settle_time(tmp_path):
    # A file renamed into place (inotify IN_MOVED_TO) or closed by its writer (IN_CLOSE_WRITE)
    # is complete; one still open for writing is not, and waits the settle time (here 5 s).
    from analysis.follow.watch import CompleteFiles

    raw = _tif_bytes(_frames(1)[0][1])
    files = CompleteFiles(tmp_path, settle_s=5.0)
    try:
        tmp = tmp_path / "a.tif.part"
        tmp.write_bytes(raw)
        t0 = time.monotonic()
        os.replace(tmp, tmp_path / "a.tif")
        got = files.next_ready(3.0)
        assert got is not None and got[0].name == "a.tif" and got[1].data.shape == (256, 256)
        assert time.monotonic() - t0 < 3.0
        with open(tmp_path / "b.tif", "wb") as fh:  # written in place, still open
            fh.write(raw)
            fh.flush()
            assert files.next_ready(1.0) is None
        got = files.next_ready(3.0)  # closed now
        assert got is not None and got[0].name == "b.tif"
    finally:
        files.close()


def test_watch_bad_input_is_one_line(tmp_path):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "analysis.cli", "watch", str(tmp_path / "missing"), "--energy", "200",
                        "--substrate", "Pt(111)"], capture_output=True, text=True, env=env, cwd=ROOT, timeout=60)
    assert r.returncode == 2
    assert r.stderr.strip().count("\n") == 0 and "does not exist" in r.stderr
    r = subprocess.run([sys.executable, "-m", "analysis.cli", "watch", str(tmp_path), "--energy", "200",
                        "--substrate", "Pt(111)", "--parameter-from", str(tmp_path / "none.csv")],
                       capture_output=True, text=True, env=env, cwd=ROOT, timeout=60)
    assert r.returncode == 2 and "none.csv not found" in r.stderr and r.stderr.strip().count("\n") == 0


@pytest.mark.slow
def test_watch_waits_for_a_sidecar_written_after_the_frame(tmp_path):
    from analysis.follow.watch import watch_folder

    folder = tmp_path / "camera"
    folder.mkdir()
    side = tmp_path / "temps.csv"
    side.write_text("frame,temperature_K\nf_a.tif,300\n")
    lines, stop = [], threading.Event()
    th = threading.Thread(target=watch_folder, args=(folder,), kwargs=dict(
        energy_eV=200.0, substrate="Pt(111)", parameter_from=str(side), settle_s=0.1, say=lines.append,
        stop=stop.is_set, wait_parameter_s=4.0), daemon=True)
    th.start()
    frames = _frames(3)
    for (_, image), n in zip(frames, ("f_a.tif", "f_b.tif", "f_c.tif")):
        (folder / n).write_bytes(_tif_bytes(image))
    time.sleep(1.5)
    with open(side, "a") as fh:  # f_b's row comes after its frame; f_c's never
        fh.write("f_b.tif,310\n")
    end = time.monotonic() + 120
    while time.monotonic() < end and not any("skipped f_c.tif" in ln for ln in lines):
        time.sleep(0.1)
    stop.set()
    th.join(timeout=30)
    done = [ln for ln in lines if "segment" in ln]
    assert [ln.split()[1] for ln in done] == ["f_a.tif", "f_b.tif"]
    assert "temperature 300 K" in done[0] and "temperature 310 K" in done[1]
    assert any("skipped f_c.tif" in ln and "not listed" in ln for ln in lines)
