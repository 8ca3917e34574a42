"""The core stays free of the web layer; the command line keeps its contract."""

from __future__ import annotations

import argparse
import json
import math
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile

from analysis.calibration import CALIBRATION_SCHEMA, Calibration
from analysis.cli import main
from analysis.nets import Net2D, parse_substrate
from analysis.optics import ScreenGeometry
from analysis.simulate import forward_pattern, render_image

DEMO = Path(__file__).resolve().parents[1] / "demo_images"


def test_core_imports_no_web_layer():
    code = "import sys, analysis, analysis.pipeline; assert not {'dash','plotly','flask'} & set(sys.modules)"
    subprocess.run([sys.executable, "-c", code], check=True)


def test_help_lists_the_commands(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for cmd in ("analyze", "iv", "serve", "net"):
        assert cmd in out


def test_net_command(capsys):
    assert main(["net", "Pt(111)"]) == 0
    out = capsys.readouterr().out
    # a = 3.924/√2 Å (lattice constant table in analysis/nets.py); |a*| = 2/(a√3) Å⁻¹
    assert "hexagonal" in out and "2.7747" in out and "0.41616" in out


def test_analyze_writes_the_json_contract(tmp_path, capsys):
    out = tmp_path / "a.json"
    rc = main(["analyze", str(DEMO / "ru0001_RX-2_sqrt3.png"), "--energy", "112", "--substrate", "Ru(0001)",
               "--json", str(out)])
    assert rc == 0
    d = json.loads(out.read_text())
    truth = json.loads((DEMO / "ru0001_RX-2_sqrt3.json").read_text())
    assert d["overlayer"]["wood"] == "(√3×√3)R30°"
    # matrix in the 120° substrate basis, worked by hand: b1 = 2a1 + a2, b2 = −a1 + a2 (CHECK_VALUES §4)
    assert d["overlayer"]["matrix"] == [[2, 1], [-1, 1]]
    assert d["overlayer"]["kind"] == "commensurate"
    assert d["overlayer"]["coverage"] == pytest.approx(1 / 3)
    assert d["substrate"]["net"] == "hexagonal"
    assert d["center_px"] == pytest.approx(truth["center_px"], abs=1.0)
    assert "(√3×√3)R30°" in capsys.readouterr().out


@pytest.mark.parametrize("args, message", [
    (["--energy", "-5", "--substrate", "Pt(111)"], "positive number of eV"),
    (["--energy", "100", "--substrate", "Xx(111)"], "Unknown element"),
    (["--energy", "100", "--substrate", "Pt(111)", "--reference-energy", "100"], "go together"),
])
def test_analyze_bad_parameters_exit_nonzero_without_output(tmp_path, capsys, args, message):
    out = tmp_path / "a.json"
    rc = main(["analyze", str(DEMO / "ru0001_RX-2_sqrt3.png"), *args, "--json", str(out)])
    assert rc != 0
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1
    assert not out.exists()


def test_analyze_non_image_file(tmp_path, capsys):
    bad = tmp_path / "notes.txt"
    bad.write_text("not a LEED picture")
    out = tmp_path / "a.json"
    rc = main(["analyze", str(bad), "--energy", "100", "--substrate", "Pt(111)", "--json", str(out)])
    assert rc != 0 and not out.exists()
    assert "error" in capsys.readouterr().err


# --------------------------------------------------------------------------- the command list, --version


def test_module_docstring_lists_exactly_the_commands():
    import re

    import analysis.cli as cli

    listed = re.search(r"``recinet ([a-z |]+)``", cli.__doc__).group(1)
    sub = next(a for a in cli.build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    assert {c.strip() for c in listed.split("|")} == set(sub.choices)


def test_version_comes_from_the_package_metadata(capsys):
    from importlib.metadata import version

    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"recinet {version('recinet')}"


# --------------------------------------------------------------------------- bad input, caught early


def _no_work(*args, **kwargs):
    pytest.fail("the command started work before checking its output folder")


def test_analyze_json_in_a_missing_folder_fails_before_any_work(tmp_path, capsys, monkeypatch):
    import analysis.io

    monkeypatch.setattr(analysis.io, "load_image", _no_work)
    missing = tmp_path / "missing" / "dir"
    rc = main(["analyze", str(DEMO / "ru0001_RX-2_sqrt3.png"), "--energy", "112", "--substrate", "Ru(0001)",
               "--json", str(missing / "o.json")])
    err = capsys.readouterr().err
    assert rc == 2 and len(err.strip().splitlines()) == 1
    assert f"the folder {missing} does not exist" in err and ".part" not in err and not missing.exists()


def test_image_too_small_names_the_smallest_size(tmp_path, capsys):
    from PIL import Image

    Image.fromarray(np.full((1, 1), 7, np.uint8)).save(tmp_path / "dot.png")
    rc = main(["analyze", str(tmp_path / "dot.png"), "--energy", "100", "--substrate", "Cu(100)"])
    err = capsys.readouterr().err
    assert rc == 2 and len(err.strip().splitlines()) == 1
    assert "dot.png: the image is too small (1×1 px); the smallest accepted size is 2×2 px." in err


def test_serve_on_a_taken_port_prints_only_the_failure(capsys):
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        rc = main(["serve", "--host", "127.0.0.1", "--port", str(port)])
    out, err = capsys.readouterr()
    assert rc == 2 and out == "" and len(err.strip().splitlines()) == 1
    assert f"Port {port} on 127.0.0.1 is already in use" in err


# --------------------------------------------------------------------------- recinet calibrate

# One camera for every image (a 512 px frame); Cu(100) at 170 eV shows three rings of beams,
# Pt(111) at 60 eV one ring (the (1,0) family only).
CAMERA = ScreenGeometry(255.3, 249.1, 300.0, distortion=0.25, rotation_deg=12.0)


def _render(net, energy_eV, path, seed, azimuth_deg=0.0):
    p = forward_pattern(net, energy_eV=energy_eV, geometry=CAMERA, azimuth_deg=azimuth_deg)
    tifffile.imwrite(path, render_image(p, shape=(512, 512), rng=np.random.default_rng(seed)).image)
    return path


@pytest.fixture(scope="module")
def frames(tmp_path_factory):
    d = tmp_path_factory.mktemp("frames")
    # Ni a = 3.524 Å (fcc, room temperature; recalled from memory, ASE's reference_states gives 3.52);
    # fcc(100) surface net a/√2
    ni = Net2D(3.524 / math.sqrt(2) * np.eye(2))
    return {"cu": _render(parse_substrate("Cu(100)"), 170.0, d / "cu170.tif", 1),
            "pt": _render(parse_substrate("Pt(111)"), 60.0, d / "pt60.tif", 2),
            "ni": _render(ni, 130.0, d / "ni130.tif", 3, azimuth_deg=7.0)}


def test_calibrate_writes_the_file_analyze_reads(tmp_path, capsys, frames):
    cal = tmp_path / "cal.json"
    rc = main(["calibrate", str(frames["cu"]), "--energy", "170", "--substrate", "Cu(100)", "--out", str(cal)])
    out = capsys.readouterr().out
    assert rc == 0 and len(out.strip().splitlines()) == 1
    for part in ("centre (", "scale ", "distortion ", "rms ", " beams in 3 rings", str(cal)):
        assert part in out
    d = json.loads(cal.read_text())
    assert d["schema"] == CALIBRATION_SCHEMA and d["distortion_measured"] is True and d["n_rings"] == 3
    loaded = Calibration.load_json(cal)
    assert abs(loaded.geometry.scale_px - 300.0) < 0.5 and abs(loaded.geometry.distortion - 0.25) < 0.01
    # Ni(100) named with a constant 3 % too large: the calibration measures the true one
    true = 3.524 / math.sqrt(2)
    res = tmp_path / "ni.json"
    rc = main(["analyze", str(frames["ni"]), "--energy", "130", "--substrate", f"square:{1.03 * true:.4f}",
               "--calibration", str(cal), "--json", str(res), "--quiet"])
    sub = json.loads(res.read_text())["substrate"]
    assert rc == 0 and sub["lattice_source"] == "measured"
    assert abs(sub["a_angstrom"] / true - 1) < 0.005 and sub["sigma"]["a_angstrom"] > 0


def test_calibrate_on_one_ring_says_the_distortion_is_not_measured(tmp_path, capsys, frames):
    cal = tmp_path / "cal.json"
    rc = main(["calibrate", str(frames["pt"]), "--energy", "60", "--substrate", "Pt(111)", "--out", str(cal)])
    out = capsys.readouterr().out
    assert rc == 0 and "not measured (one ring of beams" in out and " in 1 ring " in out
    d = json.loads(cal.read_text())
    assert d["distortion_measured"] is False and d["n_rings"] == 1


def test_analyze_warns_about_a_calibration_without_distortion(tmp_path, capsys, frames):
    # the camera's true geometry, marked as measured on one ring: the analysis works and warns
    cal = Calibration(CAMERA, distortion_measured=False).save_json(tmp_path / "cal.json")
    res = tmp_path / "ni.json"
    rc = main(["analyze", str(frames["ni"]), "--energy", "130", "--substrate", "Ni(100)", "--calibration", str(cal),
               "--json", str(res)])
    out = capsys.readouterr().out
    assert rc == 0
    assert "warning: The calibration cal.json did not measure the distortion" in out
    assert any("did not measure the distortion" in w for w in json.loads(res.read_text())["warnings"])


@pytest.mark.parametrize("args, message", [
    (["--energy", "170", "--substrate", "Si(111)"], "do not index as"),
    (["--energy", "-3", "--substrate", "Cu(100)"], "positive number of eV"),
    (["--energy", "170", "--substrate", "Xx(100)"], "Unknown element"),
])
def test_calibrate_bad_input_one_line_no_file(tmp_path, capsys, frames, args, message):
    cal = tmp_path / "cal.json"
    rc = main(["calibrate", str(frames["cu"]), *args, "--out", str(cal)])
    err = capsys.readouterr().err
    assert rc == 2 and len(err.strip().splitlines()) == 1 and message in err
    assert list(tmp_path.iterdir()) == []


def test_calibrate_checks_the_output_folder_first(tmp_path, capsys, monkeypatch, frames):
    import analysis.io

    monkeypatch.setattr(analysis.io, "load_image", _no_work)
    rc = main(["calibrate", str(frames["cu"]), "--energy", "170", "--substrate", "Cu(100)",
               "--out", str(tmp_path / "nope" / "cal.json")])
    err = capsys.readouterr().err
    assert rc == 2 and len(err.strip().splitlines()) == 1 and f"the folder {tmp_path / 'nope'} does not exist" in err


def test_iv_saves_its_calibration_in_the_calibration_file_format(tmp_path):
    from analysis.cli import _read_geometry, _series_calibration_file
    from analysis.series import SeriesCalibration

    for fitted, measured in ((("center_x_px", "center_y_px", "scale_px", "distortion"), True),
                             (("center_x_px", "center_y_px"), False)):
        sc = SeriesCalibration(CAMERA, {n: 0.01 for n in fitted}, 0.2, 120, 30)
        cal = _series_calibration_file(sc, np.arange(60.0, 150.0, 3.0), (512, 512), parse_substrate("Cu(100)"),
                                       "stack.tif")
        path = cal.save_json(tmp_path / "iv-cal.json")
        back = Calibration.load_json(path)  # what `recinet analyze --calibration` reads
        assert back.geometry == CAMERA and back.distortion_measured is measured and back.n_spots == 120
        assert back.energies_eV[0] == 60.0 and len(back.energies_eV) == 30 and back.substrate == "Cu(100)"
        assert _read_geometry(path) == CAMERA  # what `recinet iv --geometry` reads
