"""Spot finding on dense, bright synthetic frames, where many spots share fit windows.

    python benchmarks/bench_dense_spots.py [--quick] [--repeat 1]

Large overlayer cells on Pt(111) at high energy and short camera distance put
hundreds of beams within a fit window of each other; bright spots reach far
into their neighbours' windows. One screen nearly fills the frame; one is
wider than the image (no visible edge: the whole frame is searched, and a
second copy of it has a 3000 ADU camera offset, which hides the background's
variance law so the gain is measured from the spots). Two frames are searched
whole through a user circle larger than the screen, so the sharp screen edge
lies inside the searched pixels.

For each frame it prints the wall time of ``measure_image`` and its ratio to
rendering the same frame (``analysis.simulate.render_image``, the baseline
measured in the same run), recall and precision against the renderer's truth
(true peak SNR ≥ 5, matched within 2σ + 1 px, as in ``bench_spots.py``) and the
localisation RMS relative to the maximum-likelihood bound. Target: no frame
over about 1 s on 2 cores (about 5× the render time); accuracy as in
``bench_spots.py`` where the screen is found (recall ≥ 0.97, precision ≥ 0.98,
RMS ≤ 1.3 × bound). Pin the process to the cores you want (``taskset -c 0,1``).
"""

from __future__ import annotations

import argparse
import math
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_spots import score, truth_table  # noqa: E402

from analysis.nets import parse_substrate  # noqa: E402
from analysis.optics import ScreenGeometry  # noqa: E402
from analysis.simulate import forward_pattern, render_image  # noqa: E402
from analysis.spots import measure_image  # noqa: E402
from analysis.superstructure import domains, parse_wood  # noqa: E402

PT111 = "Pt(111)"
WHOLE = {"circle_xyr": (511.5, 511.5, 2000.0)}  # a user circle wider than the frame: every pixel searched

# name, seed, matrices (or Wood text for all domains), energy eV, camera radius px, σ px,
# bit depth, screen radius (None: the acceptance angle), screen argument of measure_image
CASES = [
    ("(7×7) 250 eV", 5, [[[7, 0], [0, 7]]], 250.0, 500.0, 2.0, 16, None, None),
    ("(7×7) 150 eV, edge near frame", 2, [[[7, 0], [0, 7]]], 150.0, 680.0, 2.0, 16, None, None),
    ("(12×12) 150 eV", 12, [[[12, 0], [0, 12]]], 150.0, 600.0, 2.0, 16, None, None),
    ("(10×10) 200 eV σ 2.5", 13, [[[10, 0], [0, 10]]], 200.0, 560.0, 2.5, 16, None, None),
    ("(10×10) 200 eV, no edge", 14, [[[10, 0], [0, 10]]], 200.0, 560.0, 2.5, 16, 1100.0, None),
    ("(10×10) no edge, offset", 14, [[[10, 0], [0, 10]]], 200.0, 560.0, 2.5, 16, 1100.0, None),
    ("(9×9) 180 eV 8-bit", 16, [[[9, 0], [0, 9]]], 180.0, 520.0, 2.0, 8, None, None),
    ("(7×7) 100 eV, whole frame", 1, [[[7, 0], [0, 7]]], 100.0, 640.0, 2.0, 16, None, WHOLE),
    ("(√7×√7)R19.1° whole frame", 7, "(√7×√7)R19.1°", 200.0, 560.0, 2.0, 16, None, WHOLE),
]
QUICK = (0, 1, 2, 7)
OFFSET_ADU = {"(10×10) no edge, offset": 3000.0}  # added to the rendered frame


def make_frame(seed, mats, energy_eV, radius_px, sigma_px, bit_depth, screen_radius_px,
               snr=(20.0, 400.0), background=40.0, read=3.0):
    """A bright frame: peak SNR per beam log-uniform in `snr`. Returns (SyntheticImage, render seconds)."""
    rng = np.random.default_rng(seed)
    sub = parse_substrate(PT111)
    if isinstance(mats, str):
        mats = [d.matrix for d in domains(sub, parse_wood(mats, sub))]
    geom = ScreenGeometry(511.5 + rng.uniform(-15, 15), 511.5 + rng.uniform(-15, 15), radius_px,
                          distortion=0.2, rotation_deg=rng.uniform(0, 60))
    pat = forward_pattern(sub, [np.asarray(m) for m in mats], energy_eV=energy_eV, geometry=geom)
    target = np.exp(rng.uniform(np.log(snr[0]), np.log(snr[1]), len(pat)))
    photons = target * 2 * np.pi * (sigma_px**2 + 1 / 12) * math.sqrt(0.6 * background + read**2)
    kw = {} if screen_radius_px is None else {"screen_radius_px": screen_radius_px}
    t0 = time.perf_counter()
    im = render_image(pat, rng=rng, spot_sigma_px=sigma_px, intensities=photons, background_photons=background,
                      read_noise_e=read, bit_depth=bit_depth, **kw)
    return im, time.perf_counter() - t0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help=f"{len(QUICK)} frames")
    ap.add_argument("--repeat", type=int, default=1, help="time each frame this many times (median)")
    args = ap.parse_args(argv)
    cases = [CASES[i] for i in QUICK] if args.quick else CASES
    print(f"{'frame':30s} {'screen':6s} {'beams':>5s} {'nn px':>5s} {'spots':>5s} {'s':>6s} {'÷render':>7s} "
          f"{'recall':>6s} {'precis.':>7s} {'RMS/ML':>6s}")
    times, ratios, rows = [], [], []
    for name, seed, mats, energy, radius, sigma, bits, screen_r, screen in cases:
        im, t_render = make_frame(seed, mats, energy, radius, sigma, bits, screen_r)
        t_render = min(t_render, make_frame(seed, mats, energy, radius, sigma, bits, screen_r)[1])
        dts = []
        for _ in range(max(1, args.repeat)):
            t0 = time.perf_counter()
            m = measure_image(im.image + OFFSET_ADU.get(name, 0.0), screen=screen)
            dts.append(time.perf_counter() - t0)
        dt = statistics.median(dts)
        truth = truth_table(im)
        n_true, n_rec, n_found, n_false, err2, bml, _ = score(m.spots.rc, truth, sigma)
        rms = math.sqrt(np.mean(err2 / bml)) if len(err2) else float("nan")
        seen = truth[truth[:, 7] > 0, :2]
        nn = float(np.median(cKDTree(seen).query(seen, k=2)[0][:, 1])) if len(seen) > 1 else float("nan")
        times.append(dt)
        ratios.append(dt / t_render)
        rows.append((n_true, n_rec, n_found, n_false, m.screen.source))
        print(f"{name:30s} {m.screen.source:6s} {len(truth):5d} {nn:5.1f} {len(m.spots):5d} {dt:6.2f} "
              f"{dt / t_render:7.2f} {n_rec / max(n_true, 1):6.3f} {1 - n_false / max(n_found, 1):7.3f} {rms:6.2f}",
              flush=True)
    found = [r for r in rows if r[4] in ("auto", "frame")]  # the finder's own screen (or none visible)
    tot = np.sum([r[:4] for r in found], axis=0) if found else np.zeros(4)
    print(f"\nslowest frame: {max(times):.2f} s; time ÷ render time: largest {max(ratios):.2f}, median "
          f"{statistics.median(ratios):.2f}  (target: ≤ about 1 s, about 5× the render time)")
    print(f"frames searched on the screen found ('auto'; 'frame' where no edge is visible): recall "
          f"{tot[1] / max(tot[0], 1):.3f}, precision {1 - tot[3] / max(tot[2], 1):.3f}  (targets 0.97 and 0.98)."
          f"\nOn the 'user' frames the whole frame is searched and the screen edge itself gives false spots:"
          f"\ntheir precision is the user circle's, not the fitter's.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
