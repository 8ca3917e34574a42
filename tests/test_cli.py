"""The core stays free of the web layer; the command line keeps its contract."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from analysis.cli import main

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
