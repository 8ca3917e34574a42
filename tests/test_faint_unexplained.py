"""Faint detections that no fitted net explains are set aside, with their reason.

Input: our renderer's clean Cu(100) (1×1) frame (truth: its beams), plus blobs of the spots'
own width drawn by hand at places off the substrate net: some faint (aimed at a significance of
5.5 on the centre's background, between the detection limit 5 and FAINT_UNEXPLAINED_SNR), one
bright (60).
"""

from __future__ import annotations

import numpy as np
import pytest

from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.pipeline import analyze_image
from analysis.serialize import result_to_dict
from analysis.simulate import forward_pattern, render_image
from analysis.spots.accept import FAINT_UNEXPLAINED_SNR, REJECT_FAINT_UNEXPLAINED

GEOM = ScreenGeometry(512.0, 505.0, 600.0, distortion=0.1, rotation_deg=8.0)
SIGMA = 2.5
BG_PHOTONS = 400.0  # diffuse background at the centre: shot noise 20 photons per pixel


def _blob_amplitude(snr: float) -> float:
    """Peak photons of a Gaussian spot of σ = SIGMA whose matched-filter significance over a
    background of BG_PHOTONS is `snr` (Σ g² = π σ² for a unit-peak Gaussian, so
    snr = A √π σ / √B)."""
    return snr * np.sqrt(BG_PHOTONS) / (np.sqrt(np.pi) * SIGMA)


def _analyse():
    sub = parse_substrate("Cu(100)")
    pat = forward_pattern(sub, [], energy_eV=150.0, geometry=GEOM)
    rng = np.random.default_rng(11)
    img = render_image(pat, shape=(1024, 1024), rng=rng, spot_sigma_px=SIGMA, background_photons=BG_PHOTONS,
                       background_gradient=(0.0, 0.0), gun=None)
    beams = np.array([[s["x"], s["y"]] for s in img.truth["spots"] if not s["hidden"]])
    # places off the net: half way between neighbouring beams along the diagonal, near the centre
    cx, cy = GEOM.center_px
    faint = np.array([[cx + 95.0, cy + 160.0], [cx - 170.0, cy + 85.0], [cx + 150.0, cy - 120.0],
                      [cx - 110.0, cy - 175.0]])
    bright = np.array([[cx - 60.0, cy + 230.0]])
    assert np.min(np.hypot(*(beams[:, None, :] - np.vstack([faint, bright])[None]).transpose(2, 0, 1))) > 25.0
    gain = 4.0  # ADU per photon (the renderer's 16-bit default)
    data = np.asarray(img.image, dtype=np.float64)
    yy, xx = np.indices(data.shape)
    for (x, y), snr in [(p, 5.5) for p in faint] + [(p, 60.0) for p in bright]:
        data += gain * _blob_amplitude(snr) * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * SIGMA**2))
    res = analyze_image(data, energy_eV=150.0, substrate="Cu(100)", calibration=GEOM)
    return result_to_dict(res), faint, bright


@pytest.fixture(scope="module")
def analysed():
    return _analyse()


def _near(items, xy, tol=3.0):
    return [s for s in items if np.hypot(s["x"] - xy[0], s["y"] - xy[1]) <= tol]


def test_faint_spots_off_every_net_are_set_aside_with_their_reason(analysed):
    d, faint, _ = analysed
    set_aside = 0
    for xy in faint:
        assert not _near(d["spots"], xy), "a faint detection off the net is still listed as a spot"
        rej = _near(d["rejected_spots"], xy)
        if rej:  # detected (at significance ~6 most are): then set aside, saying why
            assert rej[0]["reason"] == REJECT_FAINT_UNEXPLAINED
            assert rej[0]["snr"] < FAINT_UNEXPLAINED_SNR
            set_aside += 1
    assert set_aside >= 2


def test_a_bright_spot_off_every_net_stays_and_reads_unexplained(analysed):
    d, _, bright = analysed
    kept = _near(d["spots"], bright[0])
    assert len(kept) == 1 and kept[0]["kind"] == "unexplained" and kept[0]["label"] is None


def test_the_substrate_reading_is_untouched(analysed):
    d, _, _ = analysed
    assert d["overlayer"]["kind"] in ("none", "clean", None) or d["overlayer"]["wood"] in ("(1×1)", "p(1×1)")
    labelled = [s for s in d["spots"] if s["label"] is not None]
    assert len(labelled) >= 8
    assert all(s["kind"] == "integer" for s in labelled)
