"""Spot measurement and superstructure reading on photograph-like frames, effect by effect.

    python benchmarks/bench_realism.py [--seeds 2] [--pair-seeds 1] [--pairs default|all|none]
                                       [--only EFFECT ...] [--no-baseline]

Frames come from ``analysis.simulate.photograph`` (exact truth) with each effect of
``EFFECTS`` alone and in pairs, on a few structures. For each row it prints, pooled over
its frames, for our measurement (``measure_image(img, sigma_px=None)`` inside
``analyze_image``) and for the project's yardstick (scikit-image ``blob_log`` as
``../shared/validation/baseline.py`` runs it, called from where it lies): recall of the
visible spots within 2 px, precision (detections within 2 px of a truth spot), the RMS over
matched spots of error / Cramér–Rao bound (``localization_bound_px``, ML, per coordinate),
seconds per frame of the spot step and the time ratio ours / blob_log; and for ours the
fraction of frames whose superstructure is read right (every rendered domain matrix found,
``same_lattice``, and no other). The default run (two frames per effect, one per pair of a
handful; one 4k and one JPEG frame, the slow ones) takes about three minutes on two cores;
``--pairs all --seeds 3 --pair-seeds 2`` is the long run.
"""

from __future__ import annotations

import argparse
import importlib.util
import itertools
import math
import sys
import time
import types
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from analysis.errors import FitError, TimeLimitError  # noqa: E402
from analysis.io import load_image  # noqa: E402
from analysis.nets import parse_substrate  # noqa: E402
from analysis.optics import ScreenGeometry  # noqa: E402
from analysis.pipeline import analyze_image  # noqa: E402
from analysis.simulate import EFFECTS, forward_pattern, photograph, score_spots  # noqa: E402
from analysis.spots import measure_image  # noqa: E402
from analysis.superstructure import domains, parse_wood, same_lattice  # noqa: E402
from analysis.timelimit import time_limit  # noqa: E402

BASELINE = ROOT.parent / "shared" / "validation" / "baseline.py"

# (substrate, structure, energy eV): one domain, a square net, two domains
SCENES = [("Pt(111)", "p(2x2)", 96.0), ("Cu(100)", "c(2x2)", 130.0), ("Cu(100)", "p(2x1)", 140.0)]

# pairs of the default run: each effect at least once, the heavier ones (jpeg, large_frame) sparingly
DEFAULT_PAIRS = [("keystone", "dust"), ("tailed_spots", "glare"), ("saturated_spots", "cosmic_rays"),
                 ("off_normal", "cut_screen"), ("hot_pixels", "channel_plate"), ("wide_spots", "elongated_spots"),
                 ("keystone", "small_frame")]
SLOW = {"large_frame": 1, "jpeg": 1}  # frames per row of these, whatever --seeds says


def load_baseline():
    """The yardstick module, imported from its file. Its two helper imports (the case
    scorer and the case reader) serve only its command line: stand-ins keep them unrun."""
    stand_ins = [n for n in ("check", "leedsim") if n not in sys.modules]
    for n in stand_ins:
        sys.modules[n] = types.ModuleType(n)
    try:
        spec = importlib.util.spec_from_file_location("recinet_bench_baseline", BASELINE)
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
    finally:
        for n in stand_ins:
            sys.modules.pop(n, None)
        if sys.path and sys.path[0] == str(BASELINE.parent):
            sys.path.pop(0)
    return mod


def scene(i: int, shape=(1024, 1024)):
    spec, wood, energy = SCENES[i % len(SCENES)]
    rows, cols = shape
    geom = ScreenGeometry(cols / 2 - 0.5 + 6.0, rows / 2 - 0.5 - 9.0, 0.62 * min(shape), distortion=0.22,
                          rotation_deg=7.0 + 11.0 * i)
    sub = parse_substrate(spec)
    mats = [d.matrix for d in domains(sub, parse_wood(wood, sub))]
    return spec, energy, forward_pattern(sub, mats, energy_eV=energy, geometry=geom), mats


def read_right(best, mats) -> bool:
    if best is None or len(best.domains) != len(mats):
        return False
    return all(any(same_lattice(np.asarray(f, float), m) for f in best.domains) for m in mats)


class Tally:
    def __init__(self):
        self.vis = self.found = self.det = self.false = 0
        self.ratio2, self.seconds = [], []

    def add(self, s, seconds):
        self.vis += s["n_visible"]
        self.found += s["n_found"]
        self.det += s["n_detected"]
        self.false += s["n_false"]
        self.ratio2 += list((s["error_px"] / s["bound_px"]) ** 2)
        self.seconds.append(seconds)

    def cells(self):
        rec = self.found / self.vis if self.vis else float("nan")
        prec = 1 - self.false / self.det if self.det else float("nan")
        rms = math.sqrt(float(np.mean(self.ratio2))) if self.ratio2 else float("nan")
        return rec, prec, rms, float(np.mean(self.seconds))


def run_row(effects, n_frames, baseline, first_scene=0, limit_s=None):
    ours, blob, right, stopped = Tally(), Tally(), [], 0
    for seed in range(n_frames):
        spec, energy, pat, mats = scene(first_scene + seed)
        ph = photograph(pat, rng=np.random.default_rng(1000 + seed), effects=list(effects))
        img = load_image(ph.analysis_input)
        t0 = time.perf_counter()
        try:
            with time_limit(limit_s, "the analysis"):
                res = analyze_image(img, energy_eV=energy, substrate=spec)
            meas, t_spots, ok = res.measurement, res.timings_s["spots"], read_right(res.index.best, mats)
        except (FitError, TimeLimitError) as err:  # not read; measure the spots alone
            stopped += isinstance(err, TimeLimitError)
            t0 = time.perf_counter()
            meas, ok = measure_image(img, sigma_px=None), False
            t_spots = time.perf_counter() - t0
        ours.add(score_spots(ph.truth, meas.spots.xy), t_spots)
        right.append(ok)
        if baseline is not None:
            t0 = time.perf_counter()
            found = baseline.detect_blob_log(baseline.preprocess(img.data))
            blob.add(score_spots(ph.truth, np.array(found, float).reshape(-1, 2)), time.perf_counter() - t0)
    return ours, blob, right, stopped


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seeds", type=int, default=2, help="frames per effect alone (the structures cycle)")
    ap.add_argument("--pair-seeds", type=int, default=1, help="frames per pair")
    ap.add_argument("--pairs", choices=["default", "all", "none"], default="default")
    ap.add_argument("--only", nargs="*", default=None, help="effects to run (alone and in the chosen pairs)")
    ap.add_argument("--no-baseline", action="store_true")
    ap.add_argument("--limit", type=float, default=30.0,
                    help="seconds allowed for one analysis; beyond it the frame counts as not read (t/o)")
    args = ap.parse_args(argv)
    baseline = None if args.no_baseline else load_baseline()
    chosen = [e for e in EFFECTS if args.only is None or e in args.only]
    rows = [()] + [(e,) for e in chosen]
    if args.pairs == "default":
        rows += [p for p in DEFAULT_PAIRS if set(p) <= set(chosen)]
    elif args.pairs == "all":
        rows += [p for p in itertools.combinations(chosen, 2) if set(p) != {"small_frame", "large_frame"}]
    hdr = (f"{'effects':32s} {'n':>2s} | {'ours rec':>8s} {'prec':>5s} {'rms/b':>5s} {'s':>5s} {'read':>4s} | "
           f"{'blob rec':>8s} {'prec':>5s} {'rms/b':>5s} {'s':>5s} | {'t ours/blob':>11s} | wall")
    print(hdr)
    print("-" * len(hdr))
    t_start = time.perf_counter()
    for effects in rows:
        t_row = time.perf_counter()
        n = min([args.seeds if len(effects) < 2 else args.pair_seeds] + [SLOW[e] for e in effects if e in SLOW])
        first = sum(EFFECTS.index(e) + 1 for e in effects)  # the frames of a row do not depend on the others
        ours, blob, right, stopped = run_row(effects, n, baseline, first_scene=first, limit_s=args.limit)
        r, p, q, s = ours.cells()
        line = f"{'+'.join(effects) or 'none':32s} {n:2d} | {r:8.3f} {p:5.3f} {q:5.2f} {s:5.2f} {np.mean(right):4.2f} |"
        if baseline is not None:
            br, bp, bq, bs = blob.cells()
            line += f" {br:8.3f} {bp:5.3f} {bq:5.2f} {bs:5.2f} | {s / bs:11.2f}"
        note = f"  ({stopped} t/o)" if stopped else ""
        print(f"{line} | {time.perf_counter() - t_row:4.0f}{note}", flush=True)
    print("-" * len(hdr))
    print(f"rms/b: RMS over matched visible spots of error / Cramér–Rao bound (per coordinate); read: fraction of "
          f"frames whose superstructure is read right (t/o: the analysis passed {args.limit:g} s and counts as "
          f"not read); s: seconds per frame of the spot step; wall: seconds per row; "
          f"{time.perf_counter() - t_start:.0f} s in all")
    return 0


if __name__ == "__main__":
    sys.exit(main())
