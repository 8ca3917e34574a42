"""End-to-end benchmark of the main job: camera image in, superstructure out.

Renders a fixed, seeded set of synthetic 1024×1024 LEED images (substrates and
superstructures of textbook cases, varied energy, noise, camera distance, centre,
gun direction and bit depth), runs ``analysis.pipeline.analyze_image`` on each and
prints the fraction analysed correctly (Wood notation, kind and domain count all
right) and the median seconds per image end to end. Times are also printed as a
ratio to a baseline measured in the same run: rendering the same image
(``analysis.simulate.render_image``), which scales with the machine in the same way.

Targets (issue): ≥ 95 % correct, ≤ 0.5 s median per 1024×1024 image on 2 cores.

``--dim`` renders the same cases in poor light (beams at 3–30 % of the usual photons on a
20–200 photon background; no target): it shows how the answers degrade when fractional
beams drop below the detection threshold, and prints for each wrong answer how many of the
fractional beams were found.

``--validation [DIR]`` runs the images drawn by a generator written apart from recinet
(``../shared/validation/cases`` by default, or a fresh draw) in-process, each with and without
its reference image, scores each answer with the validation's own scorer (imported from where
it lies) and prints the fraction right, the median seconds per megapixel, and the ratio to the
yardstick measured in the same run: the validation's general-purpose spot finding (scikit-image
``blob_log`` in its ``baseline.py``) on the same image. Targets (issue): ≤ 0.5 s median per
1 MP image without the reference, ≤ 0.8 s with it.

Run: ``python benchmarks/bench_indexing.py [--n 30] [--quick] [--dim] [--validation [DIR]]``.
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from analysis.nets import parse_substrate  # noqa: E402
from analysis.optics import ScreenGeometry  # noqa: E402
from analysis.pipeline import analyze_image  # noqa: E402
from analysis.simulate import GunShadow, forward_pattern, render_image  # noqa: E402
from analysis.superstructure import domains, parse_wood  # noqa: E402

# substrate, structure (Wood or matrix), expected Wood text, expected kind, energy range
CASES = [
    ("Pt(111)", "p(2x2)", "p(2×2)", "commensurate", (80, 140)),
    ("Ru(0001)", "(√3×√3)R30°", "(√3×√3)R30°", "commensurate", (90, 150)),
    ("Cu(100)", "c(2x2)", "c(2×2)", "commensurate", (110, 170)),
    ("Cu(100)", "p(2x1)", "p(2×1)", "commensurate", (110, 170)),
    ("Pt(111)", "(√7×√7)R19.1°", "(√7×√7)R19.1°", "commensurate", (110, 160)),
    ("Cu(100)", "(2√2×√2)R45°", "(2√2×√2)R45°", "commensurate", (100, 150)),
    ("Pt(111)", "c(4x2)", "c(4×2)", "commensurate", (90, 140)),
    ("Cu(110)", "p(2x1)", "p(2×1)", "commensurate", (100, 160)),
    ("W(110)", "p(2x1)", "p(2×1)", "commensurate", (90, 150)),
    ("Pt(111)", None, "(1×1)", "none", (120, 200)),
]


def _intensities(pat, rng):
    s = np.sin(np.radians(pat.theta_deg))
    base = 30000.0 * (0.3 + 0.7 * np.exp(-(s / 0.5) ** 2)) * rng.uniform(0.8, 1.0)
    return np.where(pat.integer, base, 0.35 * base)


def make_case(i: int, dim: bool = False):
    rng = np.random.default_rng(1000 + i)
    spec, structure, wood, kind, (e_lo, e_hi) = CASES[i % len(CASES)]
    sub = parse_substrate(spec)
    mats = [] if structure is None else [d.matrix for d in domains(sub, parse_wood(structure, sub))]
    energy = float(rng.uniform(e_lo, e_hi))
    geom = ScreenGeometry(511.5 + rng.uniform(-15, 15), 511.5 + rng.uniform(-15, 15), rng.uniform(600, 680),
                          distortion=rng.uniform(0.1, 0.3), rotation_deg=rng.uniform(-30, 30))
    pat = forward_pattern(sub, mats, energy_eV=energy, geometry=geom)
    gun = dataclasses.replace(GunShadow.scaled(460.0), arm_angle_deg=float(rng.uniform(0, 360)))
    t0 = time.perf_counter()
    light = rng.uniform(0.3, 1.0)
    extra = {}
    if dim:  # poor light: fewer photons per beam on a brighter diffuse background
        light, extra = rng.uniform(0.03, 0.3), {"background_photons": float(rng.uniform(20.0, 200.0))}
    im = render_image(pat, rng=rng, gun=gun, bit_depth=int(rng.choice([8, 16])),
                      intensities=_intensities(pat, rng) * light, **extra)
    t_render = time.perf_counter() - t0
    n_frac = sum(1 for t in im.truth["spots"] if not t["integer"] and not t["hidden"])
    return im.image, spec, energy, wood, kind, len(mats) or 1, t_render, n_frac


VALIDATION = Path(__file__).resolve().parents[2] / "shared" / "validation"


def run_validation(cases_dir: str) -> int:
    """The validation cases in-process, with and without their reference images (see the module doc)."""
    import json

    from analysis.io import load_image
    from analysis.serialize import result_to_dict

    sys.path.insert(0, str(VALIDATION))
    try:
        import baseline  # the validation's yardstick: scikit-image blob_log
        import check  # the validation's scorer
    except ImportError as exc:
        print(f"the validation set is not at {VALIDATION}: {exc}")
        return 1
    names = check.list_cases(cases_dir)
    rows, res_t = [], {"with reference": [], "without": []}
    right = {k: 0 for k in res_t}
    yard = []
    for name in names:
        case = Path(cases_dir) / name
        truth = json.loads((case / "truth.json").read_text())
        mp = truth["width"] * truth["height"] / 1e6
        img_path = case / truth["image"]
        t0 = time.perf_counter()
        baseline.detect_blob_log(baseline.preprocess(baseline.L.read_image(str(img_path))))
        yard.append((time.perf_counter() - t0) / mp)
        cells = []
        for label, ref in (("with reference", True), ("without", False)):
            kw = dict(reference=load_image(case / truth["reference"]["image"]),
                      reference_energy_eV=truth["reference"]["energy_eV"]) if ref else {}
            t0 = time.perf_counter()
            try:
                res = analyze_image(load_image(img_path), energy_eV=truth["energy_eV"],
                                    substrate=check.substrate_cli(truth), **kw)
                dt = time.perf_counter() - t0
                ok = bool(check.score_case(result_to_dict(res), truth)["pass"])
            except Exception as exc:  # a failure counts as wrong; the benchmark goes on
                dt, ok = time.perf_counter() - t0, False
                print(f"  {name} ({label}): {exc}")
            res_t[label].append(dt / mp)
            right[label] += ok
            cells.append(f"{'ok' if ok else 'WRONG':5s} {dt:6.2f} s")
        rows.append(f"{name:26s} {mp:4.2f} MP  blob_log {yard[-1] * mp:5.2f} s | with ref {cells[0]} | without {cells[1]}")
    print("\n".join(rows))
    y = statistics.median(yard)
    print(f"\nyardstick (blob_log spot finding, same run): median {y:.3f} s per MP")
    for label, target in (("with reference", 0.8), ("without", 0.5)):
        med = statistics.median(res_t[label])
        print(f"{label:15s}: right {right[label]}/{len(names)} = {right[label] / len(names):.1%}; median "
              f"{med:.3f} s per MP (target ≤ {target} s); ratio to the yardstick {med / y:.2f}")
    return 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=30, help="number of images (≥ 30 for the target)")
    ap.add_argument("--quick", action="store_true", help="10 images")
    ap.add_argument("--dim", action="store_true", help="poor light (no target)")
    ap.add_argument("--validation", nargs="?", const=str(VALIDATION / "cases"), default=None, metavar="DIR",
                    help="run the validation cases in DIR instead (default ../shared/validation/cases)")
    args = ap.parse_args(argv)
    if args.validation:
        return run_validation(args.validation)
    n = 10 if args.quick else args.n
    correct, times, renders, rows = 0, [], [], []
    for i in range(n):
        image, spec, energy, wood, kind, ndom, t_render, n_frac = make_case(i, args.dim)
        t0 = time.perf_counter()
        try:
            res = analyze_image(image, energy_eV=energy, substrate=spec)
            best = res.index.best
            ok = best.wood == wood and best.kind == kind and best.n_domains == ndom
            got = f"{best.wood} {best.kind} ×{best.n_domains}"
            if not ok:
                found = int((~res.index.substrate.integer).sum())
                got += f" ({found} fractional spots found, {n_frac} fractional beams visible)"
        except Exception as exc:  # a failure counts as wrong; the benchmark goes on
            ok, got = False, f"error: {exc}"
        dt = time.perf_counter() - t0
        times.append(dt)
        renders.append(t_render)
        correct += ok
        rows.append(f"{i:3d} {spec:9s} {energy:6.1f} eV  want {wood} ×{ndom:<2d} got {got:32s} {dt:6.2f} s {'ok' if ok else 'WRONG'}")
    print("\n".join(rows))
    med, base = statistics.median(times), statistics.median(renders)
    print(f"\ncorrect: {correct}/{n} = {correct / n:.1%}   " + ("(poor light: no target)" if args.dim else
                                                             "(target ≥ 95 %)"))
    print(f"median end-to-end: {med:.3f} s per 1024×1024 image   (target ≤ 0.5 s)")
    print(f"baseline (render one image, same run): {base:.3f} s; ratio analysis/render = {med / base:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
