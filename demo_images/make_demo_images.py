"""Write the demo LEED images (16-bit PNG) and their truth (JSON, same stem).

Run from the project root:  python demo_images/make_demo_images.py

The scenario is invented: one instrument ("chamber B", fixed optics and gun) and a few
samples of our own naming. Every image is rendered by analysis.simulate with a fixed seed,
so the files are reproducible; the JSON beside each holds the exact spot positions,
indices, domains, photon counts, the screen geometry and the camera settings.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
from PIL import Image

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from analysis.nets import parse_substrate  # noqa: E402
from analysis.optics import ScreenGeometry  # noqa: E402
from analysis.simulate import GunShadow, default_intensities, forward_pattern, render_image  # noqa: E402
from analysis.superstructure import domains, parse_wood, wood_notation  # noqa: E402

SHAPE = (1024, 1024)  # rows, cols

# Chamber B: a slightly off-centre, slightly elliptical view of the screen through the
# viewport, camera 4.5 screen radii away (d = R/L = 0.22), image turned by 4.5°.
OPTICS = ScreenGeometry(center_x_px=517.4, center_y_px=503.9, scale_px=640.0, distortion=0.22,
                        rotation_deg=4.5, ellipticity=1.015, ellipse_deg=40.0, acceptance_deg=52.0)
GUN = GunShadow(offset_x_px=3.5, offset_y_px=-2.5, radius_px=33.0, arm_angle_deg=232.0, arm_width_px=22.0)

# (file stem, sample text, substrate, Wood notation or None, energy eV, sample azimuth deg)
SCENES = [
    ("pt111_PX-7_oxygen_p2x2", "Pt(111) after an oxygen dose, sample PX-7", "Pt(111)", "p(2x2)", 96.0, 12.0),
    ("ru0001_RX-2_sqrt3", "Ru(0001), sample RX-2, annealed after exposure", "Ru(0001)", "(sqrt3 x sqrt3)R30",
     112.0, -7.0),
    ("cu100_CX-3_c2x2", "Cu(100) after a half-monolayer dose, sample CX-3", "Cu(100)", "c(2x2)", 130.0, 3.0),
    ("si100_SX-1_2x1_two_domains", "Si(100) flashed clean, sample SX-1, two-domain (2x1)", "Si(100)", "(2x1)",
     82.0, 0.0),
    ("pt111_PX-9_sqrt7_two_domains", "Pt(111), sample PX-9, (√7×√7)R19.1° mirror domains", "Pt(111)",
     "(sqrt7 x sqrt7)R19.1", 140.0, 12.0),
    ("cu100_CX-3_clean_reference", "Cu(100) sample CX-3 before the dose: clean (1x1) calibration reference",
     "Cu(100)", None, 175.0, 3.0),
]


def render_scene(stem, sample, substrate_spec, wood, energy_eV, azimuth_deg, seed):
    """One image and its truth for a scene of :data:`SCENES`."""
    sub = parse_substrate(substrate_spec)
    matrix = None if wood is None else parse_wood(wood, sub)
    doms = [] if matrix is None else domains(sub, matrix)
    pattern = forward_pattern(sub, [d.matrix for d in doms], energy_eV=energy_eV, geometry=OPTICS,
                              azimuth_deg=azimuth_deg)
    rng = np.random.default_rng(seed)
    # overlayer spots are a little broader than substrate spots (finite domains)
    sigma = np.where(pattern.integer, 2.3, 2.9)
    photons = default_intensities(pattern, rng, photons=24000.0, overlayer_factor=0.35)
    im = render_image(pattern, shape=SHAPE, rng=rng, spot_sigma_px=sigma, intensities=photons, gun=GUN,
                      background_photons=45.0, background_gradient=(0.10, -0.07), bit_depth=16)
    truth = dict(im.truth)
    truth["scenario"] = {
        "file": f"{stem}.png", "sample": sample, "substrate": substrate_spec, "instrument": "chamber B",
        "wood_notation": None if matrix is None else str(wood_notation(sub, matrix)),
        "matrix": None if matrix is None else np.asarray(matrix).tolist(),
        "domains": [{"matrix": np.asarray(d.matrix).tolist(), "op_name": d.op_name} for d in doms],
        "seed": seed,
    }
    return im.image, truth


def main() -> int:
    total = 0
    for seed, (stem, sample, spec, wood, energy, azimuth) in enumerate(SCENES, start=1):
        image, truth = render_scene(stem, sample, spec, wood, energy, azimuth, seed)
        png, js = HERE / f"{stem}.png", HERE / f"{stem}.json"
        Image.fromarray(image).save(png, optimize=True)  # uint16 → 16-bit greyscale PNG
        js.write_text(json.dumps(truth, indent=1, allow_nan=False) + "\n")
        size = png.stat().st_size + js.stat().st_size
        total += size
        shown = sum(not s["hidden"] for s in truth["spots"])
        print(f"{png.name}: {energy:g} eV, {shown}/{len(truth['spots'])} spots shown, {size / 1e6:.2f} MB")
    print(f"total {total / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
