"""Models the spot positions cannot tell apart are named beside the answer.

Three rotational domains of p(2×1) on a hexagonal substrate put beams at exactly the
places of one p(2×2) domain (the half-order beams of the three (2×1) domains fill the
(½, 0), (0, ½) and (½, ½) families; a textbook LEED ambiguity, e.g. for oxygen on
hexagonal metal surfaces, recalled from memory): only the intensities decide. On a square
net two p(2×1) domains leave the (½, ½) beams out, so p(2×2) is not their twin.
The beam positions are checked with the renderer (analysis.simulate.forward_pattern),
which computes them apart from the indexing code.
"""

from __future__ import annotations

import numpy as np

from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.pipeline import analyze_image
from analysis.serialize import result_to_dict
from analysis.simulate import forward_pattern, render_image
from analysis.superstructure import domains, parse_wood

GEOM = ScreenGeometry(511.5, 507.5, 620.0, distortion=0.2, rotation_deg=9.0)


def _mats(spec, wood):
    sub = parse_substrate(spec)
    return sub, [d.matrix for d in domains(sub, parse_wood(wood, sub))]


def _positions(spec, wood, energy):
    sub, mats = _mats(spec, wood)
    p = forward_pattern(sub, mats, energy_eV=energy, geometry=GEOM)
    return {tuple(v) for v in np.round(p.xy_px[np.all(np.isfinite(p.xy_px), axis=1)], 6)}


def test_the_renderer_agrees_the_two_hexagonal_models_share_every_beam():
    assert _positions("Ru(0001)", "p(2x1)", 120.0) == _positions("Ru(0001)", "p(2x2)", 120.0)
    assert _positions("Cu(100)", "p(2x1)", 120.0) != _positions("Cu(100)", "p(2x2)", 120.0)


def _read(spec, wood, energy, seed):
    sub, mats = _mats(spec, wood)
    p = forward_pattern(sub, mats, energy_eV=energy, geometry=GEOM)
    im = render_image(p, shape=(1024, 1024), rng=np.random.default_rng(seed))
    return result_to_dict(analyze_image(im.image, energy_eV=energy, substrate=spec, calibration=GEOM))["overlayer"]


def test_three_p2x1_domains_on_a_hexagonal_net_are_named_as_the_twin_of_p2x2():
    ov = _read("Ru(0001)", "p(2x1)", 120.0, 3)
    # whichever of the two leads, the other is named as putting its beams at the same places
    pair = {(ov["wood"], ov["n_domains"])} | {(t["name"], t["n_domains"]) for t in ov["same_beams_as"]}
    assert pair == {("p(2×2)", 1), ("p(2×1)", 3)}
    assert any("same places" in n for n in ov["notes"])


def test_no_twin_is_named_where_the_beams_differ():
    ov = _read("Cu(100)", "p(2x1)", 120.0, 4)
    assert (ov["wood"], ov["n_domains"]) == ("p(2×1)", 2)
    assert ov["same_beams_as"] == []
    ov = _read("Cu(100)", "c(2x2)", 120.0, 5)
    assert ov["wood"] == "c(2×2)" and ov["same_beams_as"] == []
