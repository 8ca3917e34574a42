"""Whole parameter series rendered with known truth: an order–disorder transition and an
exposure series in which p(2×2) gives way to (√3×√3)R30° on a hexagonal substrate.

The truth is what the renderer was given (analysis.simulate.parameter_series): Tc, the
camera drift, and the coverage window in which one phase's beams vanish and the
other's appear. The intensities are drawn from models other than the fitted form
(finite-size rounding, short-range order, Debye–Waller damping, a rising background).
"""

import json
import math

import numpy as np
import pytest

from analysis.errors import SeriesError
from analysis.follow import analyse_parameter_series, csv_text
from analysis.nets import parse_substrate
from analysis.optics import ScreenGeometry
from analysis.simulate.parameter_series import ExposureModel, OrderDisorderModel, render_parameter_series
from analysis.superstructure import parse_wood

PT = parse_substrate("Pt(111)")
R3 = parse_wood("(√3×√3)R30°", PT)
GEOM = ScreenGeometry(129.0, 126.0, 115.0, distortion=0.1, rotation_deg=4.0)
E = 200.0  # eV: two rings of integer beams on the 256² screen (one ring leaves the camera open)


@pytest.fixture(scope="module")
def temperature_run():
    model = OrderDisorderModel(tc=400.0)
    t = np.linspace(250.0, 480.0, 32)
    frames = [im.image for _, im in render_parameter_series(
        PT, [[[2, 0], [0, 2]]], t, model=model, energy_eV=E, geometry=GEOM, rng=np.random.default_rng(1),
        drift_px_per_frame=(0.03, -0.02))]
    return t, analyse_parameter_series(frames, substrate="Pt(111)", energy_eV=E, parameters=t, name="temperature",
                                       unit="K", n_probe=6)  # n_index=2: frames indexed jointly


@pytest.mark.slow
def test_order_disorder_tc_within_two_percent(temperature_run):
    t, res = temperature_run
    fit = res.order_disorder()
    # truth given to the renderer: Tc = 400 K (the target: within 2 %)
    assert abs(fit.tc - 400.0) <= 0.02 * 400.0
    assert fit.tc_sigma > 0 and math.isfinite(fit.tc_spread)
    auto = res.transition()  # the parameter is a temperature (K): fitted without being asked
    assert auto is not None and auto.tc == pytest.approx(fit.tc)
    assert json.loads(json.dumps(res.to_dict(transition=auto)))["order_disorder"]["tc"] == pytest.approx(fit.tc)
    # the ordered phase is read as p(2×2) and ends near Tc; the (1×1) above it
    assert "p(2×2)" in res.segments[0].label
    # camera and segment read from two frames at once (analysis.series.joint)
    assert res.reference.joint is not None and res.segments[0].indexing.joint is not None
    assert res.segments[-1].families == () and 390.0 < res.segments[-1].value_range[0] < 450.0


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore:All-NaN slice")  # no width above Tc, where the beams are gone
def test_drift_and_widths_followed(temperature_run):
    t, res = temperature_run
    # truth: the pattern centre moved (0.03, −0.02) px per frame
    assert res.trace.drift["rate_px_per_frame"] == pytest.approx([0.03, -0.02], abs=0.006)
    fam = res.families[0].members
    w = np.nanmedian(res.trace.width_radial_px[:, fam], axis=1)
    # truth: fractional spots σ 1.6 px far below Tc, widened towards 1.6·(1 + 0.5 e^{-|T−Tc|/20 K}) near it
    assert w[0] == pytest.approx(1.6, rel=0.1)
    near = np.flatnonzero((t > 370) & (t < 400) & np.isfinite(w))
    assert np.max(w[near]) > 1.25 * w[0]


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore:All-NaN slice")
def test_order_parameter_and_family_widths_against_the_render(temperature_run):
    from analysis.optics import wavelength_A

    t, res = temperature_run
    fam = res.families[0]
    v, eta = res.order_parameter(fam.label)
    # truth given to the renderer: a family's photons go as ⟨m²⟩(T) (+ short-range order) times the
    # Debye–Waller factor exp(−c T q²) of its |g|, so η = √(I / I_max) of that curve
    model = OrderDisorderModel(tc=400.0)
    g2 = float(np.sum(res.trace.beams.g_par[fam.members[0]] ** 2))
    k = 1.0 / wavelength_A(E)
    q2 = g2 + (k + math.sqrt(k * k - g2)) ** 2
    share = np.array([model.fractional_share(x) * math.exp(-model.debye_waller * x * q2) for x in t])
    truth = np.sqrt(share / share.max())
    below = t < 370.0  # clearly ordered: the beams stand well out of the noise
    assert np.all(v == t) and np.nanmax(eta) == pytest.approx(1.0)
    assert np.max(np.abs(eta[below] - truth[below])) < 0.05  # ~5 %: counting noise of the weakest frames
    assert np.nanmax(eta[t > 430.0]) < 0.35  # disordered: at most the short-range tail and noise
    _, radial, tangential = res.family_widths(fam.label)
    # truth: σ = 1.6 px far below Tc (both directions: round spots)
    assert radial[0] == pytest.approx(1.6, rel=0.1) and tangential[0] == pytest.approx(1.6, rel=0.1)
    with pytest.raises(SeriesError, match="No beam family"):
        res.family_widths("(1/3,0)")


@pytest.mark.slow
def test_exposure_series_p2x2_then_sqrt3():
    model = ExposureModel()
    dose = np.linspace(0.0, 12.0, 25)
    frames = [(f"dose_{d:.1f}L.png", im.image) for d, im in render_parameter_series(
        PT, [[[2, 0], [0, 2]], R3], dose, model=model, energy_eV=E, geometry=GEOM, rng=np.random.default_rng(2))]
    res = analyse_parameter_series(frames, substrate="Pt(111)", energy_eV=E, name="exposure", unit="L",
                                   n_probe=8, n_index=1)
    # the parameter came from the file names (the default)
    assert res.trace.value.tolist() == pytest.approx(dose.tolist())
    labels = [s.label for s in res.segments]
    i22 = next(i for i, lab in enumerate(labels) if lab.startswith("p(2×2)"))
    i3 = next(i for i, lab in enumerate(labels) if lab.startswith("(√3×√3)R30°"))
    assert i22 < i3
    # truth: the p(2×2) beams fade and the √3 beams grow between θ = 0.28 and 0.30 ML,
    # i.e. between these doses (θ = θsat (1 − e^{−L/L0}) inverted), ± one dose step
    lo, hi = (-model.dose_scale * math.log(1 - th / model.theta_sat) for th in model.theta_switch)
    step = dose[1] - dose[0]
    sw = [s for s in res.switches() if s["from"].startswith("p(2×2)") and s["to"].startswith("(√3")]
    assert len(sw) == 1 and lo - step <= sw[0]["value"] <= hi + step
    # the p(2×2) beams are brightest where the first phase is complete: truth θ from 0.25 ML
    # (its ideal coverage) to 0.28 ML (where it starts to give way), ± one dose step
    top = next(p for p in res.family_peaks() if p["family"] == res.segments[i22].families[0])
    a, b = (-model.dose_scale * math.log(1 - th / model.theta_sat) for th in (model.theta_first,
                                                                             model.theta_switch[0]))
    assert a - step <= top["value"] <= b + step
    # presence per frame against the truth where the truth is clear
    share = np.array([model.shares(d) for d in dose])
    col = {f.label: n for n, f in enumerate(res.families)}
    half = col[res.segments[i22].families[0]]
    third = col[res.segments[i3].families[0]]
    clear22 = share[:, 0] > 0.3
    assert np.all(res.present[clear22, half]) and not np.any(res.present[share[:, 0] == 0, half])
    assert np.all(res.present[share[:, 1] > 0.3, third]) and not np.any(res.present[share[:, 1] == 0, third][1:])
    # exports: one CSV row per frame and beam; the JSON names both segments
    rows = csv_text(res).splitlines()
    assert rows[0].startswith("frame,name,exposure (L),beam") and len(rows) == 1 + 25 * len(res.trace.beams)
    rec = json.loads(json.dumps(res.to_dict()))
    assert [s["structure"] for s in rec["segments"]] == labels
    assert res.transition() is None  # an exposure: no order–disorder fit


def test_mismatched_parameters_say_so():
    frames = [np.ones((32, 32)) * i for i in range(3)]
    with pytest.raises(SeriesError, match="lists only 2"):
        analyse_parameter_series(frames, substrate="Pt(111)", energy_eV=E, parameters=[1.0, 2.0])


@pytest.mark.slow
def test_a_folder_with_file_times_and_a_sidecar(tmp_path):
    import os

    import tifffile

    from analysis.follow import read_parameter_file

    t = [300.0, 320.0, 340.0, 360.0]
    for i, (_, im) in enumerate(render_parameter_series(PT, [[[2, 0], [0, 2]]], t, model=OrderDisorderModel(tc=400.0),
                                                        energy_eV=E, geometry=GEOM, rng=np.random.default_rng(3))):
        p = tmp_path / f"shot{i + 1}.tif"  # natural order: shot2 before shot10
        tifffile.imwrite(p, im.image)
        os.utime(p, (1000.0 + 7.5 * i, 1000.0 + 7.5 * i))
    (tmp_path / "notes.txt").write_text("not a frame")
    res = analyse_parameter_series(tmp_path, substrate="Pt(111)", energy_eV=E, parameters="times", n_probe=2,
                                   n_index=1)
    # truth: the files' modification times, 7.5 s apart
    assert res.trace.value.tolist() == [0.0, 7.5, 15.0, 22.5] and res.trace.name == "time"
    assert res.trace.frame_names == ("shot1.tif", "shot2.tif", "shot3.tif", "shot4.tif")
    side = tmp_path / "T.json"
    side.write_text(json.dumps({"frame": [f"shot{i}.tif" for i in (4, 3, 2, 1)], "temperature_K": t[::-1]}))
    res = analyse_parameter_series(tmp_path, substrate="Pt(111)", energy_eV=E, parameters=read_parameter_file(side),
                                   n_probe=2, n_index=1)
    assert res.trace.value.tolist() == t and res.trace.unit == "K"
    assert res.segments[0].label.startswith("p(2×2)")
