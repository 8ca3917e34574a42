"""The import contract of the core: no module under `analysis/` loads the web layer.

Every module file of the package (subpackages included) is imported in a fresh
interpreter, which then lists the web modules present in ``sys.modules``. One
interpreter imports them all; one more per subpackage imports only that subpackage,
so a web import reached through it is named with the subpackage that reached it.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CORE = ROOT / "analysis"
WEB = ("dash", "plotly", "flask", "webapp")

_PROBE = (
    "import importlib, json, sys\n"
    "for name in sys.argv[1:]:\n"
    "    importlib.import_module(name)\n"
    f"print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in {set(WEB)!r})))\n"
)


def _core_modules(under: Path = CORE) -> list[str]:
    """Dotted names of every module file below `under` (packages by their __init__)."""
    names = []
    for path in sorted(under.rglob("*.py")):
        if "__pycache__" in path.parts or path.name == "__main__.py":
            continue
        parts = path.relative_to(ROOT).with_suffix("").parts
        names.append(".".join(parts[:-1] if parts[-1] == "__init__" else parts))
    return names


def _web_modules_after_importing(names: list[str]) -> list[str]:
    done = subprocess.run([sys.executable, "-c", _PROBE, *names], cwd=ROOT, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_the_walk_finds_the_core_modules():
    names = _core_modules()
    # a few that must be there, at each depth: the package, a module, a subpackage and its module
    for name in ("analysis", "analysis.superstructure", "analysis.wood", "analysis.series",
                 "analysis.series.integrate", "analysis.spots.fit"):
        assert name in names
    assert not any(n.startswith("webapp") or "__pycache__" in n for n in names)


def test_importing_every_core_module_loads_no_web_module():
    assert _web_modules_after_importing(_core_modules()) == []


@pytest.mark.parametrize("package", sorted(p.name for p in CORE.iterdir() if (p / "__init__.py").is_file()))
def test_each_core_subpackage_loads_no_web_module(package):
    assert _web_modules_after_importing(_core_modules(CORE / package)) == []


def test_the_probe_sees_a_web_module():
    # the check itself must be able to fail: a web package imported beside the core is reported
    pytest.importorskip("flask")
    assert "flask" in _web_modules_after_importing(["analysis.nets", "flask"])
