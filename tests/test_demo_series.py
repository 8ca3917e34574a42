"""The README's `recinet iv` line runs as written on the demo series, and its curves are the
demo's truth (``demo_images/series_cu100_CX-3_c2x2/truth.json``: the photons the renderer
was given, after the gun shadow).

The line is read from README.md (a shell line, with its backslash continuation) and run in
a fresh folder that sees ``demo_images`` where the README expects it, so the outputs land
there. A CSV column is tied to a truth beam by position (the JSON's per-frame x, y within
1.5 px in most frames), so the check does not depend on the basis the indexing chose.
Pendry R-factor: J. B. Pendry, J. Phys. C 13, 937 (1980), V0i = 4 eV; targets as for the
validation series (median ≤ 0.01, worst ≤ 0.2; ../shared/validation/README.md).
"""

from __future__ import annotations

import json
import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from analysis.rfactor import pendry_r

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_images" / "series_cu100_CX-3_c2x2"


def readme_iv_line() -> list[str]:
    """The README's `recinet iv` command on the demo series, as argv (comments dropped)."""
    text = (ROOT / "README.md").read_text(encoding="utf-8").replace("\\\n", " ")
    lines = [ln for ln in text.splitlines() if re.match(r"\s*recinet iv demo_images/", ln)]
    assert len(lines) == 1, lines
    return shlex.split(lines[0], comments=True)


def test_readme_names_the_demo_files():
    argv = readme_iv_line()
    assert argv[:2] == ["recinet", "iv"]
    assert (ROOT / argv[2]).is_file()
    assert (ROOT / argv[argv.index("--energies") + 1]).is_file()
    # the demo stays small (issue: ≤ 10 MB)
    assert sum(p.stat().st_size for p in DEMO.iterdir()) < 10e6


@pytest.mark.slow
def test_readme_iv_line_runs_on_the_demo_and_recovers_its_curves(tmp_path):
    argv = readme_iv_line()
    (tmp_path / "demo_images").symlink_to(ROOT / "demo_images")
    cmd = [sys.executable, "-c", "import sys; from analysis.cli import main; sys.exit(main())"] + argv[1:]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    run = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr
    assert run.stderr == ""  # nothing but the result: no warnings reach the user
    assert "c(2×2), commensurate" in run.stdout
    csv_path = tmp_path / argv[argv.index("--csv") + 1]
    js = json.loads((tmp_path / argv[argv.index("--json") + 1]).read_text())
    assert csv_path.is_file() and oct(csv_path.stat().st_mode & 0o777) == "0o644"
    truth = json.loads((DEMO / "truth.json").read_text())
    e = np.array(truth["energies_eV"])
    assert np.allclose(js["energy_eV"], e)
    tb = truth["beams"]
    n_f = e.size
    wanted = {lab for lab, b in tb.items() if sum(not h for h in b["hidden"]) >= 0.6 * n_f}
    rps, matched = [], set()
    for b in js["beams"]:
        votes = []
        for f in range(n_f):
            x, y = b["x_px"][f], b["y_px"][f]
            if x is None or b["intensity"][f] is None:
                continue
            near = [lab for lab, t in tb.items() if t["x"][f] is not None
                    and np.hypot(t["x"][f] - x, t["y"][f] - y) <= 1.5]
            votes.append(near[0] if len(near) == 1 else None)
        if not votes:
            continue
        lab = max(set(votes), key=votes.count)
        if lab is None or lab not in wanted or votes.count(lab) < 0.9 * len(votes):
            continue
        got = np.array([np.nan if v is None else v for v in b["intensity"]])
        true = np.array([np.nan if (p is None or h) else p for p, h in zip(tb[lab]["photons"], tb[lab]["hidden"])])
        ok = np.isfinite(got) & np.isfinite(true)
        if ok.sum() < 0.5 * n_f:
            continue
        matched.add(lab)
        rps.append(pendry_r(e, np.where(ok, got, np.nan), np.where(ok, true, np.nan), v0i_eV=4.0))
    assert len(matched) >= 0.95 * len(wanted), sorted(wanted - matched)
    assert np.median(rps) <= 0.01 and max(rps) <= 0.2, rps
