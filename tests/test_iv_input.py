"""`recinet iv` on bad input: one line on stderr, exit status 2, no output file, and no
indexing or tracking started (the checks run in the first pass over the frames). On good
input: nothing on stderr but the result, outputs readable by the group (0644 under the
usual umask 022, as `recinet analyze` writes them).

The frames are plain noise (nothing needs to be found in them before the input is refused)
or, for the good run, a small render of ours (Cu(100) c(2×2), truth given to the renderer).
"""

from __future__ import annotations

import os
import warnings

import numpy as np
import pytest
import tifffile
from PIL import Image

from analysis.cli import main


def _stack(path, n, shape=(48, 48)):
    frames = np.random.default_rng(0).poisson(100.0, (n, *shape)).astype(np.uint16)
    tifffile.imwrite(path, frames, photometric="minisblack")
    return path


@pytest.fixture
def no_work(monkeypatch):
    """Fail the test if the series is indexed or tracked (the input must be refused before)."""
    import analysis.series.pipeline as pl

    def boom(*a, **k):
        raise AssertionError("work started on bad input")
    monkeypatch.setattr(pl, "index_series_joint", boom)
    monkeypatch.setattr(pl, "index_series_frame", boom)
    monkeypatch.setattr(pl, "track_series", boom)


def _run_bad(tmp_path, capsys, args, match):
    out = tmp_path / "iv.csv"
    assert main(["iv", *args, "--substrate", "Cu(100)", "--csv", str(out), "--json", str(tmp_path / "iv.json")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and match in err, err
    assert not out.exists() and not (tmp_path / "iv.json").exists()


@pytest.mark.parametrize("energies, match", [
    ("80\n82\n84\n", "Frame 3 (s.tif#3) has no energy: e.csv lists only 3 energies."),
    ("80\n82\n84\n86\n88\n90\n92\n", "The stack has 5 frames but 7 energies are listed"),
    ("80\n82\n86\n84\n88\n", "is 84 eV after 86 eV: the energies must increase steadily (not monotonic)."),
    ("80\n82\n82\n84\n86\n", "both have 82 eV: energies must not repeat."),
])
def test_energy_file_that_does_not_fit_the_stack(tmp_path, capsys, no_work, energies, match):
    stack = _stack(tmp_path / "s.tif", 5)
    (tmp_path / "e.csv").write_text("energy_eV\n" + energies)
    _run_bad(tmp_path, capsys, [str(stack), "--energies", str(tmp_path / "e.csv")], match)


def test_frames_of_different_sizes(tmp_path, capsys, no_work):
    folder = tmp_path / "frames"
    folder.mkdir()
    for i, shape in enumerate([(48, 48), (48, 48), (40, 48)]):
        noise = np.random.default_rng(i).poisson(100.0, shape).astype(np.uint16)
        Image.fromarray(noise).save(folder / f"f{i}_{80 + 2 * i}eV.png")
    _run_bad(tmp_path, capsys, [str(folder), "--start-eV", "80", "--step-eV", "2"],
             "is 48×40 px but frame 0 (f0_80eV.png) is 48×48 px: all frames must have one size.")


def test_a_stack_of_one_frame(tmp_path, capsys, no_work):
    stack = _stack(tmp_path / "one.tif", 1)
    _run_bad(tmp_path, capsys, [str(stack), "--start-eV", "80", "--step-eV", "2"],
             "The series holds one frame: an I(V) curve needs at least two energies.")


@pytest.mark.slow
def test_good_run_prints_no_warning_and_writes_readable_files(tmp_path, capsys):
    from analysis.nets import parse_substrate
    from analysis.optics import ScreenGeometry
    from analysis.simulate import render_series

    sub = parse_substrate("Cu(100)")
    geom = ScreenGeometry(130.2, 126.9, 150.0, distortion=0.15, rotation_deg=3.0)
    e = np.arange(90.0, 151.0, 3.0)
    with tifffile.TiffWriter(tmp_path / "s.tif") as tw:
        for _, im in render_series(sub, [[[1, 1], [-1, 1]]], e, geometry=geom, rng=np.random.default_rng(1),
                                   shape=(256, 256)):
            tw.write(im.image, photometric="minisblack", contiguous=True)
    (tmp_path / "e.csv").write_text("energy_eV\n" + "".join(f"{v:g}\n" for v in e))
    old = os.umask(0o022)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # any warning fails the run (numpy RuntimeWarning included)
            rc = main(["iv", str(tmp_path / "s.tif"), "--substrate", "Cu(100)", "--energies", str(tmp_path / "e.csv"),
                       "--csv", str(tmp_path / "iv.csv"), "--json", str(tmp_path / "iv.json")])
    finally:
        os.umask(old)
    cap = capsys.readouterr()
    assert rc == 0 and cap.err == "", cap.err
    assert "c(2×2), commensurate" in cap.out
    for name in ("iv.csv", "iv.json"):
        assert (tmp_path / name).stat().st_mode & 0o777 == 0o644
