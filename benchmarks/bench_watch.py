"""``recinet watch``: latency per frame and memory over many frames, against decoding a frame.

    python benchmarks/bench_watch.py [--size 1024] [--frames 12] [--memory-frames 1000] [--memory-size 256]

Latency: a temperature series (Pt(111)-p(2×2) through an order–disorder transition,
16-bit TIFF) is rendered once; then, while :func:`analysis.follow.watch.watch_folder` watches
a folder on a thread, each frame is written under a temporary name and renamed into the
folder. The latency of a frame is the time from the rename (the file has its final name
and is complete) to its printed line. A renamed (or closed) file is taken at once; the
settle time (--settle, default 0.25 s) is waited only by a file written in place and
left open. The first frame (indexing) is reported apart; so is the time spent in the
frame's analysis (:meth:`LiveSeries.add`, of which the spot search is timed apart). Baseline measured in the same run: decoding one frame
(:func:`analysis.io.load_image`), median.

Memory: :class:`analysis.follow.LiveSeries` takes --memory-frames frames in the process
(no files), each frame searched for spots and its beams followed, as a watch does; the
resident memory (psutil) is sampled every 50 frames. Printed: its growth per frame after
the first 100 frames, in KB and as a fraction of one decoded frame (float64).

Targets (the issue): median latency ≤ 1 s for 1 MP frames; memory flat over 1000 frames.
Run on a quiet machine; the load average before the run is printed.
"""

from __future__ import annotations

import argparse
import io
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from analysis.io import load_image  # noqa: E402
from analysis.nets import parse_substrate  # noqa: E402
from analysis.optics import ScreenGeometry  # noqa: E402
from analysis.simulate.parameter_series import OrderDisorderModel, render_parameter_series  # noqa: E402


def render(n: int, size: int, seed: int = 0) -> list[tuple[str, bytes, np.ndarray]]:
    import tifffile

    s = size / 256.0
    geom = ScreenGeometry(129.0 * s, 126.0 * s, 115.0 * s, distortion=0.1, rotation_deg=4.0)
    t = np.linspace(250.0, 480.0, n)
    out = []
    for v, im in render_parameter_series(parse_substrate("Pt(111)"), [[[2, 0], [0, 2]]], t,
                                         model=OrderDisorderModel(tc=400.0, spot_sigma_px=1.6 * s), energy_eV=200.0,
                                         geometry=geom, rng=np.random.default_rng(seed), shape=(size, size)):
        buf = io.BytesIO()
        tifffile.imwrite(buf, im.image)
        out.append((f"T_{v:07.2f}K.tif", buf.getvalue(), im.image))
    return out


def latency(frames, settle_s: float) -> tuple[list[float], float, list[float], list[float]]:
    import analysis.spots
    from analysis.follow.run import LiveSeries
    from analysis.follow.watch import watch_folder

    # the frame's analysis (LiveSeries.add) and, within it, its spot search (LiveSeries imports
    # analysis.spots.measure_image at each call, so the wrapper below is the one it calls)
    add_s, spots_s, in_spots = [], [], [0.0]
    add, measure = LiveSeries.add, analysis.spots.measure_image

    def timed_measure(*a, **kw):
        t = time.perf_counter()
        try:
            return measure(*a, **kw)
        finally:
            in_spots[0] += time.perf_counter() - t

    def timed_add(self, *a, **kw):
        t, s0 = time.perf_counter(), in_spots[0]
        try:
            return add(self, *a, **kw)
        finally:
            add_s.append(time.perf_counter() - t)
            spots_s.append(in_spots[0] - s0)

    LiveSeries.add, analysis.spots.measure_image = timed_add, timed_measure
    folder = Path(tempfile.mkdtemp(prefix="recinet-watch-bench-"))
    printed: dict[str, float] = {}
    lock = threading.Event()

    def say(text):
        for name, _, _ in frames:
            if name in text and "segment" in text:
                printed[name] = time.monotonic()
                lock.set()

    stop = threading.Event()
    th = threading.Thread(target=watch_folder, args=(folder,), kwargs=dict(
        energy_eV=200.0, substrate="Pt(111)", parameter_name="temperature", unit="K", settle_s=settle_s,
        say=say, stop=stop.is_set), daemon=True)
    th.start()
    time.sleep(1.0)  # the observer is running
    renamed = {}
    for name, raw, _ in frames:
        tmp = folder / (name + ".part")
        tmp.write_bytes(raw)
        lock.clear()
        os.replace(tmp, folder / name)
        renamed[name] = time.monotonic()
        end = time.monotonic() + 120
        while name not in printed and time.monotonic() < end:
            lock.wait(0.05)
    stop.set()
    th.join(timeout=30)
    LiveSeries.add, analysis.spots.measure_image = add, measure
    lat = [printed[n] - renamed[n] for n, _, _ in frames if n in printed]
    return lat[1:], lat[0] if lat else float("nan"), add_s[1:], spots_s[1:]


def memory(frames, n: int) -> list[tuple[int, float]]:
    import psutil

    from analysis.follow import LiveSeries

    proc = psutil.Process()
    live = LiveSeries("Pt(111)", energy_eV=200.0, name="temperature", unit="K")
    samples = []
    for i in range(n):
        _, _, image = frames[i % len(frames)]
        live.add(image, value=float(i), name=f"frame {i}")
        if i % 50 == 0 or i == n - 1:
            samples.append((i + 1, proc.memory_info().rss / 1e6))
    return samples


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--size", type=int, default=1024, help="frame side for the latency, px (1024: 1 MP)")
    ap.add_argument("--frames", type=int, default=12, help="frames written for the latency")
    ap.add_argument("--settle", type=float, default=0.25, help="seconds a file's size must stay the same")
    ap.add_argument("--memory-frames", type=int, default=1000, help="frames fed for the memory (0: skip)")
    ap.add_argument("--memory-size", type=int, default=256, help="frame side for the memory run, px")
    args = ap.parse_args(argv)
    print(f"load average before the run: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    frames = render(args.frames, args.size)
    dec = []
    for _, raw, _ in frames:
        t = time.perf_counter()
        load_image(raw)
        dec.append(time.perf_counter() - t)
    base = float(np.median(dec))
    print(f"baseline: decoding one {args.size}×{args.size} 16-bit TIFF frame: {base * 1e3:.1f} ms (median)")
    lat, first, add_s, spots_s = latency(frames, args.settle)
    if lat:
        med = float(np.median(lat))
        print(f"latency, rename to printed line, {len(lat)} frames after the first: median {med:.3f} s "
              f"(×{med / base:.0f} the decode; target ≤ 1 s), max {max(lat):.3f} s; first frame (indexing) "
              f"{first:.2f} s")
        if add_s and spots_s:
            a, sp = float(np.median(add_s)), float(np.median(spots_s))
            print(f"  of which the frame's analysis (LiveSeries.add): median {a:.3f} s; in its spot search "
                  f"(analysis.spots.measure_image): median {sp:.3f} s = {sp / a:.0%} of the analysis")
    else:
        print("latency: no frame was printed")
    if args.memory_frames:
        mframes = render(min(args.memory_frames, 24), args.memory_size, seed=1)
        samples = memory(mframes, args.memory_frames)
        frame_mb = args.memory_size ** 2 * 8 / 1e6
        after = [(i, r) for i, r in samples if i >= 100] or samples
        if len(after) >= 2:
            slope = np.polyfit([i for i, _ in after], [r for _, r in after], 1)[0]
            print(f"memory over {args.memory_frames} frames of {args.memory_size}²: RSS "
                  f"{samples[0][1]:.0f} → {samples[-1][1]:.0f} MB; growth after frame 100: {slope * 1e3:.1f} KB/frame "
                  f"(×{slope / frame_mb:.4f} one decoded frame per frame)")
        print("RSS samples (frames, MB): " + ", ".join(f"{i}:{r:.0f}" for i, r in samples))
    return 0


if __name__ == "__main__":
    sys.exit(main())
