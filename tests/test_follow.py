"""Parameter series: parameters per frame, beams followed at one energy, drift, families,
segments, and the order–disorder fit.

The references are outside the analysis: exact truth given to our own renderer
(analysis.simulate.parameter_series: beam photons, spot widths, the pattern centre of
every frame), drawn from models that are not the form the analysis fits, and a
textbook form for the transition (named at its test).
"""

import json
import os

import numpy as np
import pytest

from analysis.errors import FitError, ParameterError, SeriesError
from analysis.follow import (
    BeamFollower, Family, beam_families, family_presence, find_segments, fit_drift, fit_order_disorder,
    orbit_hk, parameters_from_names, parameters_from_times, read_parameter_file, split_heading,
)
from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.series import BeamSet, beams_from_nets
from analysis.simulate.parameter_series import ExposureModel, OrderDisorderModel, render_parameter_series
from analysis.superstructure import parse_wood

PT = parse_substrate("Pt(111)")
CU = parse_substrate("Cu(100)")
P2X2 = [[2.0, 0.0], [0.0, 2.0]]
R3 = parse_wood("(√3×√3)R30°", PT)
GEOM = ScreenGeometry(129.0, 126.0, 115.0, distortion=0.1, rotation_deg=4.0)


# ----------------------------------------------------------------------------- parameters

def test_sidecar_csv_by_file_name_and_heading_units(tmp_path):
    p = tmp_path / "temps.csv"
    p.write_text("frame;T (K)\nb.tif;310,5\na.tif;300\n")
    t = read_parameter_file(p)
    assert (t.name, t.unit) == ("T", "K")
    assert t.value_of(0, "a.tif") == 300.0 and t.value_of(1, "B.TIF") == 310.5
    with pytest.raises(SeriesError, match="c.tif.*not listed"):
        t.value_of(2, "c.tif")


def test_sidecar_json_rows_and_frame_numbers(tmp_path):
    p = tmp_path / "dose.json"
    p.write_text(json.dumps([{"frame": 2, "exposure_L": 0.5}, {"frame": 1, "exposure_L": 0.0}]))
    t = read_parameter_file(p)
    assert t.heading == "exposure (L)" and t.value.tolist() == [0.0, 0.5]


@pytest.mark.parametrize("text, message", [
    ("frame,current\n1,2\n", "no parameter column"),
    ("temperature_K,time_s\n1,2\n", "several parameter columns"),
    ("temperature_K\nwarm\n", "row 1.*'warm' is not a number"),
    ("300\n310\n", "first row must be a header"),
])
def test_sidecar_bad_input_says_what_is_wrong(tmp_path, text, message):
    p = tmp_path / "p.csv"
    p.write_text(text)
    with pytest.raises(SeriesError, match=message):
        read_parameter_file(p)


def test_parameters_from_names_same_pattern_option_as_energies():
    t = parameters_from_names(["run_7_300K.tif", "run_8_302.5K.tif", "run_9_299K.tif"], name="temperature",
                              unit="K")
    assert t.value.tolist() == [300.0, 302.5, 299.0]  # may turn back, unlike energies
    assert parameters_from_names(["x_L=1,5_s2.png"], pattern=r"L=(\d+(?:,\d+)?)").value.tolist() == [1.5]
    with pytest.raises(SeriesError, match="No temperature in the name of frame 0"):
        parameters_from_names(["frame.png"], name="temperature")


def test_parameters_from_file_times(tmp_path):
    paths = []
    for n, t in (("a.png", 5000.0), ("b.png", 5003.25)):
        p = tmp_path / n
        p.write_bytes(b"x")
        os.utime(p, (t, t))
        paths.append(p)
    t = parameters_from_times(paths)
    assert t.value.tolist() == [0.0, 3.25] and t.unit == "s"


def test_split_heading():
    assert split_heading("dose [L]") == ("dose", "L")
    assert split_heading("time_s") == ("time", "s")


# ----------------------------------------------------------------------------- families and segments

def test_families_on_a_hexagonal_net():
    # Beams by hand: p(2×2) on a hexagonal net has half-order beams at (1/2, 0), (0, 1/2),
    # (1/2, 1/2) in every unit cell (one family under the 6-fold net, mod the substrate);
    # the (√3×√3)R30° beams nearest (0, 0) (its first-order beams, from the forward pattern)
    # are one more family of thirds.
    from analysis.simulate import forward_pattern

    pat = forward_pattern(PT, [R3], energy_eV=100.0, geometry=GEOM)
    third = pat.hk[~pat.integer][:1]
    hk = np.vstack([[[0, 0], [1, 0]], orbit_hk(PT, [[0.5, 0.0]]), orbit_hk(PT, third)])
    fams = beam_families(BeamSet.from_hk(PT, hk), PT)
    assert [(f.label, f.order) for f in fams] == [("(1/2,0)", 2), (fams[1].label, 3)]
    assert len(fams[0].members) == 6 and len(fams[1].members) == 6  # the six images of each
    assert np.allclose(np.mod(np.asarray(third) * 3, 1.0), 0.0)


def test_presence_needs_signal_over_noise():
    fam = [Family("(1/2,0)", np.array([0, 1, 2]), 2)]
    inten = np.array([[50.0, 60.0, 40.0], [5.0, -4.0, 6.0], [np.nan, np.nan, np.nan]])
    total, present = family_presence(inten, np.full((3, 3), 5.0), fam, z_min=8.0)
    # 150 / (5 √3) = 17 σ present; 7 / 8.7 = 0.8 σ absent; nothing measured: absent
    assert present[:, 0].tolist() == [True, False, False] and np.isnan(total[2, 0])


def test_segments_ignore_short_flicker_and_report_ranges():
    p = np.zeros((12, 2), dtype=bool)
    p[3:8, 0] = True
    p[8:, 1] = True
    p[10, 1] = False  # one frame lost in the noise
    segs = find_segments(p, np.linspace(0.0, 11.0, 12), ["a", "b"], min_frames=2)
    assert [(s.first, s.last, s.families) for s in segs] == [(0, 2, ()), (3, 7, ("a",)), (8, 11, ("b",))]
    assert segs[1].value_range == (3.0, 7.0)
    with pytest.raises(ParameterError, match="min_frames"):
        find_segments(p, np.arange(12.0), ["a", "b"], min_frames=0)


# ----------------------------------------------------------------------------- order–disorder fit

def test_order_disorder_fit_recovers_tc_from_a_rounded_transition():
    # The fitted form I ∝ (1 − T/Tc)^(2β) + background: below a continuous transition the
    # order parameter goes as (1 − T/Tc)^β (H. E. Stanley, Introduction to Phase Transitions
    # and Critical Phenomena, Oxford 1971, ch. 1–3; from memory) and a superstructure beam's
    # kinematic intensity as its square. β = 1/8 is the two-dimensional Ising value
    # (C. N. Yang, Phys. Rev. 85, 808 (1952); from memory). The data are drawn from another
    # model: the power law averaged over a 1 % spread of local Tc, short-range order
    # peaking at Tc, a Debye–Waller factor exp(−c T q²), and 1 % noise.
    m = OrderDisorderModel(tc=400.0, rounding=0.01, short_range=0.04)
    t = np.linspace(250.0, 480.0, 40)
    q2 = 1.7  # Å⁻², a half-order beam at 200 eV
    y = np.array([1e5 * m.fractional_share(x) * np.exp(-m.debye_waller * x * q2) for x in t]) + 2000.0
    rng = np.random.default_rng(3)
    sig = 0.01 * y + 50.0
    fit = fit_order_disorder(t, y + rng.normal(0.0, sig), sig)
    assert abs(fit.tc - 400.0) <= 0.02 * 400.0  # the target: Tc within 2 %
    # the reported uncertainty (statistics and the spread over refits) covers the error
    assert abs(fit.tc - 400.0) <= 3.0 * (fit.tc_sigma + fit.tc_spread) + 0.5
    assert 0.05 < fit.beta < 0.25


@pytest.mark.xfail(strict=True, reason="tc_sigma is statistics only: finite-size rounding and short-range order "
                                       "bias Tc by more than 3 tc_sigma (README, Known limits)")
def test_tc_sigma_alone_covers_a_rounded_transition():
    # the same rounded model as above (truth: Tc = 400 K)
    m = OrderDisorderModel(tc=400.0, rounding=0.01, short_range=0.04)
    t = np.linspace(250.0, 480.0, 40)
    y = np.array([1e5 * m.fractional_share(x) * np.exp(-m.debye_waller * x * 1.7) for x in t]) + 2000.0
    sig = 0.01 * y + 50.0
    fit = fit_order_disorder(t, y + np.random.default_rng(3).normal(0.0, sig), sig, spread=False)
    assert abs(fit.tc - 400.0) <= 3.0 * fit.tc_sigma


def test_order_disorder_fit_refuses_a_flat_curve():
    t = np.linspace(100.0, 200.0, 20)
    with pytest.raises(FitError, match="does not fit|falls with temperature"):
        fit_order_disorder(t, 500.0 + t)  # rising: no order being lost
    with pytest.raises(FitError, match="Too few points"):
        fit_order_disorder(t[:4], t[:4])


# ----------------------------------------------------------------------------- following beams

def test_follower_measures_intensity_width_and_drift_against_truth():
    # Truth from the renderer: a clean Cu(100) pattern whose centre drifts (0.2, −0.1) px per
    # frame; spot σ 1.6 px; 12 frames at one energy.
    geom = ScreenGeometry(96.0, 94.0, 100.0)
    m = OrderDisorderModel(tc=1e6, debye_waller=0.0, background_rise=0.0, broadening=0.0)
    frames = list(render_parameter_series(CU, [], np.arange(12.0), model=m, energy_eV=150.0, geometry=geom,
                                          rng=np.random.default_rng(4), drift_px_per_frame=(0.2, -0.1),
                                          shape=(192, 192)))
    beams = beams_from_nets(CU, energy_max_eV=150.0, geometry=geom)
    f = BeamFollower(beams, geom, energy_eV=150.0)
    for v, im in frames:
        f.add(im.image, value=v)
    tr = f.result(name="time", unit="s")
    assert tr.drift["rate_px_per_frame"] == pytest.approx([0.2, -0.1], abs=0.02)
    j = tr.beams.index("(1,0)")
    truth = [next(s for s in im.truth["spots"] if s["label"] == "(1, 0)") for _, im in frames]
    got = tr.intensity[:, j] / frames[0][1].truth["camera"]["gain_adu_per_e"]
    want = np.array([s["photons"] for s in truth])
    # photons within 3 % (the aperture of 3σ holds 98.9 % of a Gaussian; noise ~0.5 %)
    assert np.allclose(got, want, rtol=0.03)
    assert np.nanmedian(tr.width_radial_px[:, j]) == pytest.approx(1.6, rel=0.1)
    assert np.nanmedian(tr.width_tangential_px[:, j]) == pytest.approx(1.6, rel=0.1)
    pred = np.array([im.truth["center_px"] for _, im in frames])
    got_c = np.array([g.center_px for g in tr.geometry])
    assert np.max(np.abs(got_c[1:] - pred[:-1])) < 0.5  # each frame measured with the centre before it


def test_follower_bad_input_messages():
    beams = beams_from_nets(CU, energy_max_eV=150.0, geometry=GEOM)
    with pytest.raises(ParameterError, match="energy_eV"):
        BeamFollower(beams, GEOM, energy_eV=-5)
    f = BeamFollower(beams, GEOM, energy_eV=150.0)
    with pytest.raises(SeriesError, match="not a 2-D image"):
        f.add(np.zeros((4, 4, 3)), value=1.0)
    with pytest.raises(SeriesError, match="no frames"):
        f.result()


def test_fit_drift_line():
    c = np.column_stack([10 + 0.3 * np.arange(8), 5.0 + np.zeros(8)])
    d = fit_drift(c, np.full(8, 200.0))
    assert d["rate_px_per_frame"] == pytest.approx([0.3, 0.0]) and d["total_px"] == pytest.approx(2.1)
