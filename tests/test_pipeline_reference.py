"""The reference image of the clean substrate: what it fixes, and that it never stops a run."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from analysis.io import load_image
from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.pipeline import analyze_image
from analysis.serialize import result_to_dict
from analysis.simulate import forward_pattern, render_image
from analysis.superstructure import same_lattice

DEMO = Path(__file__).resolve().parent.parent / "demo_images"


def _demo(name):
    path = DEMO / name
    if not path.exists():
        pytest.skip(f"demo image {name} is missing")
    return load_image(path), json.loads(path.with_suffix(".json").read_text())


def test_a_reference_keeps_the_exact_wood_notation_of_a_measured_net():
    """A net measured through a reference calibration misses exact squareness by its error; the
    Wood notation must still be found (truth: the demo's scenario, drawn by our renderer)."""
    img, truth = _demo("cu100_CX-3_c2x2.png")
    ref, ref_truth = _demo("cu100_CX-3_clean_reference.png")
    res = analyze_image(img, energy_eV=truth["energy_eV"], substrate="Cu(100)", reference=ref,
                        reference_energy_eV=ref_truth["energy_eV"])
    d = result_to_dict(res)
    assert d["calibration_source"] == "reference"
    assert d["overlayer"]["wood"] == truth["scenario"]["wood_notation"] == "c(2×2)"
    assert same_lattice(d["overlayer"]["matrix"], truth["scenario"]["matrix"])
    assert not any("No primitive Wood notation" in n for n in d["overlayer"].get("notes", []))


def _one_ring_pair(hot_pixels: int, seed: int = 5):
    """A Pt(111) (√3×√3)R30° image at 60 eV and its clean reference at 100 eV on one camera.

    At 100 eV Pt(111) shows only its first ring of six integer beams on a 52° screen (by hand:
    |a*| = 2/(√3 · 2.775 Å) = 0.416 Å⁻¹, λ = 1.226 Å, sin θ = 0.51 → 30.7°; the second ring,
    √3 |a*|, would need sin θ = 0.88 → 62°)."""
    rng = np.random.default_rng(seed)
    sub = parse_substrate("Pt(111)")
    geom = ScreenGeometry(500.0, 490.0, 560.0, distortion=0.25, rotation_deg=17.0)
    ref_pat = forward_pattern(sub, [], energy_eV=100.0, geometry=geom)
    img_pat = forward_pattern(sub, [[[2, 1], [-1, 1]]], energy_eV=60.0, geometry=geom)
    ref = render_image(ref_pat, shape=(1000, 1000), rng=rng, spot_sigma_px=4.0)
    img = render_image(img_pat, shape=(1000, 1000), rng=rng, spot_sigma_px=2.5)
    data = np.array(ref.image, dtype=float)
    full = float(np.iinfo(np.asarray(ref.image).dtype).max)
    r, c = rng.integers(0, 1000, hot_pixels), rng.integers(0, 1000, hot_pixels)
    data[r, c] = full  # hot pixels: brighter than any spot, one pixel wide
    n_ring = sum(1 for s in ref.truth["spots"] if s.get("integer") and not s.get("hidden") and
                 abs(s["h"]) + abs(s["k"]) > 0)
    return img, data.astype(np.asarray(ref.image).dtype), n_ring


def test_a_one_ring_reference_with_hot_pixels_calibrates_and_the_answer_holds():
    img, ref, n_ring = _one_ring_pair(hot_pixels=20)
    assert n_ring <= 6  # the premise: one ring of beams in the reference
    res = analyze_image(img.image, energy_eV=60.0, substrate="Pt(111)", reference=ref, reference_energy_eV=100.0)
    d = result_to_dict(res)
    assert not any(w.startswith("The reference image was not used") for w in d["warnings"])
    assert any("one ring" in w for w in d["warnings"])
    assert d["overlayer"]["wood"] == "(√3×√3)R30°"
    # the centre from the reference is the image's (truth given to the renderer: 500, 490)
    assert np.hypot(d["center_px"][0] - 500.0, d["center_px"][1] - 490.0) < 1.0


def test_a_reference_that_cannot_be_used_is_a_warning_not_an_error():
    img, truth = _demo("cu100_CX-3_c2x2.png")
    alone = result_to_dict(analyze_image(img, energy_eV=truth["energy_eV"], substrate="Cu(100)"))
    shape = np.asarray(img.data).shape
    noise = np.random.default_rng(1).poisson(50.0, shape).astype(np.uint16)  # no spots at all
    for bad in (noise, noise[: shape[0] // 2]):  # spot-less; and from another camera (another size)
        d = result_to_dict(analyze_image(img, energy_eV=truth["energy_eV"], substrate="Cu(100)", reference=bad,
                                         reference_energy_eV=175.0))
        assert sum(w.startswith("The reference image was not used") for w in d["warnings"]) == 1
        assert d["calibration_source"] == "none"
        assert d["overlayer"]["wood"] == alone["overlayer"]["wood"] == truth["scenario"]["wood_notation"]
        assert d["center_px"] == alone["center_px"]


def test_sqrt3_with_one_integer_ring_and_no_reference():
    # one ring of integer beams leaves the distortion R/L to the fractional-order beams: the camera
    # refit with the √3 model's spots must find it (once read as (0.809×0.810)R30°)
    img, _, _ = _one_ring_pair(hot_pixels=0)
    d = result_to_dict(analyze_image(img.image, energy_eV=60.0, substrate="Pt(111)"))
    assert (d["overlayer"]["wood"], d["overlayer"]["kind"]) == ("(√3×√3)R30°", "commensurate")


def test_every_candidate_says_why_it_won_or_lost():
    """The JSON carries each candidate's named score terms; their contributions add up to its score."""
    img, truth = _demo("cu100_CX-3_c2x2.png")
    d = result_to_dict(analyze_image(img, energy_eV=truth["energy_eV"], substrate="Cu(100)"))
    assert len(d["candidates"]) >= 2
    for c in d["candidates"]:
        terms = c["score_terms"]["terms"]
        parts = [v["contribution"] for v in terms.values()]
        assert {"explained", "unexplained", "extra_domains"} <= set(terms)
        assert sum(parts) == pytest.approx(c["score"], abs=1e-9)
        assert c["score_terms"]["total"] == pytest.approx(c["score"], abs=1e-9)
    assert d["overlayer"]["score_terms"]["total"] == pytest.approx(d["overlayer"]["score"], abs=1e-9)
