"""Write the demo energy series: a multi-page 16-bit TIFF, its energies and its truth.

Run from the project root:  python demo_images/make_demo_series.py

The scenario is invented: sample CX-3 of the demo images (Cu(100) after a half-monolayer
dose, a c(2×2) overlayer) stepped through 60–180 eV in "chamber B" (the demo images'
optics and gun, drawn on a smaller camera frame). Every frame is rendered by
analysis.simulate with a fixed seed, so the files are reproducible. The I(V) curves are
the smooth synthetic ones of :class:`analysis.simulate.LayerIV` (kinematic peaks of a
layered crystal); the truth JSON holds, per beam, its indices and its photons at every
energy (after the gun shadow), so any extraction can be scored against it.

Files (folder ``demo_images/series_cu100_CX-3_c2x2/``):

* ``stack.tif``: one page per energy, 16-bit greyscale, deflate-compressed;
* ``energies.csv``: a heading ``energy_eV`` and one energy per frame, in stack order;
* ``truth.json``: optics, gun, camera, substrate, overlayer and the beams' curves.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from analysis.nets import parse_substrate  # noqa: E402
from analysis.optics import ScreenGeometry  # noqa: E402
from analysis.simulate import GunShadow, render_series  # noqa: E402
from analysis.simulate.series import LayerIV  # noqa: E402
from analysis.superstructure import domains, parse_wood  # noqa: E402

OUT = HERE / "series_cu100_CX-3_c2x2"
SHAPE = (320, 320)  # rows, cols: chamber B's optics on a camera binned to 320 px
F = 320 / 1024  # chamber B (make_demo_images.py) drawn at this size
OPTICS = ScreenGeometry(center_x_px=517.4 * F, center_y_px=503.9 * F, scale_px=640.0 * F, distortion=0.22,
                        rotation_deg=4.5, ellipticity=1.015, ellipse_deg=40.0, acceptance_deg=52.0)
GUN = GunShadow(offset_x_px=3.5 * F, offset_y_px=-2.5 * F, radius_px=33.0 * F, arm_angle_deg=232.0,
                arm_width_px=22.0 * F)
ENERGIES_EV = np.arange(60.0, 180.1, 3.0)
SEED = 2027
CURVES = LayerIV(layer_spacing_A=1.81, inner_potential_eV=9.0, half_width_eV=5.0, photons=400000.0, seed=3)


def main() -> None:
    import tifffile

    sub = parse_substrate("Cu(100)")
    mats = [d.matrix for d in domains(sub, parse_wood("c(2x2)", sub))]
    OUT.mkdir(exist_ok=True)
    beams: dict[str, dict] = {}
    with tifffile.TiffWriter(OUT / "stack.tif") as tw:
        for i, (pat, im) in enumerate(render_series(
                sub, mats, ENERGIES_EV, geometry=OPTICS, rng=np.random.default_rng(SEED), intensity_fn=CURVES,
                pattern_kw={"azimuth_deg": 3.0}, shape=SHAPE, gun=GUN, spot_sigma_px=1.6,
                background_photons=30.0, gain=0.5, offset_adu=100.0)):
            tw.write(im.image, photometric="minisblack", compression="zlib", contiguous=False)
            for s in im.truth["spots"]:
                b = beams.setdefault(s["label"], {"h": s["h"], "k": s["k"], "integer": s["integer"],
                                                  "photons": [None] * len(ENERGIES_EV),
                                                  "x": [None] * len(ENERGIES_EV), "y": [None] * len(ENERGIES_EV),
                                                  "hidden": [True] * len(ENERGIES_EV)})
                b["photons"][i], b["x"][i], b["y"][i] = s["photons"], s["x"], s["y"]
                b["hidden"][i] = bool(s["hidden"] or s["partly_hidden"])
    (OUT / "energies.csv").write_text("energy_eV\n" + "".join(f"{e:g}\n" for e in ENERGIES_EV))
    truth = {"scenario": "sample CX-3 (invented): Cu(100) after a half-monolayer dose, c(2x2), chamber B",
             "substrate": "Cu(100)", "substrate_vectors_A": sub.vectors.tolist(), "overlayer_wood": "c(2x2)",
             "overlayer_matrices": [np.asarray(m).tolist() for m in mats], "azimuth_deg": 3.0,
             "geometry": OPTICS.to_dict(), "shape": list(SHAPE), "seed": SEED,
             "gun": {"offset_px": [GUN.offset_x_px, GUN.offset_y_px], "radius_px": GUN.radius_px,
                     "arm_angle_deg": GUN.arm_angle_deg, "arm_width_px": GUN.arm_width_px},
             "energies_eV": ENERGIES_EV.tolist(),
             "beams": beams}
    (OUT / "truth.json").write_text(json.dumps(truth, indent=1) + "\n")
    size = sum(p.stat().st_size for p in OUT.iterdir())
    print(f"{len(ENERGIES_EV)} frames of {SHAPE[1]}×{SHAPE[0]} px, {len(beams)} beams -> {OUT} ({size / 1e6:.1f} MB)")


if __name__ == "__main__":
    main()
