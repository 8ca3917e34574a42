"""The architecture note in DEVELOPERS.md stays true: every module path it names exists.

The note ("Architecture: the data flow and the module of each step") names, for each step
of the three flows (one image, an energy series, a parameter series), the module that does
it, as code spans such as ``analysis/spots/measure.py`` or ``webapp/pages/analyse/``.
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
HEADING = "## Architecture: the data flow and the module of each step"
_PATH = re.compile(r"`((?:analysis|webapp)/[\w/]*?(?:\.py|/))`")


def _section(text: str, heading: str) -> str:
    """The text from `heading` to the next second-level heading."""
    start = text.index(heading)
    end = text.find("\n## ", start + len(heading))
    return text[start:] if end < 0 else text[start:end]


def _missing(section: str, root: Path) -> tuple[list[str], list[str]]:
    """(every module path named in `section`, those that do not exist under `root`)."""
    named = sorted(set(_PATH.findall(section)))
    return named, [p for p in named if not (root / p).exists()]


def test_every_module_named_in_the_architecture_note_exists():
    section = _section((ROOT / "DEVELOPERS.md").read_text(encoding="utf-8"), HEADING)
    named, missing = _missing(section, ROOT)
    # the three flows are all there, each with its driver module
    for flow in ("One image", "An energy series", "A parameter series"):
        assert flow in section
    for driver in ("analysis/pipeline.py", "analysis/series/pipeline.py", "analysis/follow/run.py",
                   "analysis/serialize.py"):
        assert driver in named
    assert len(named) > 40
    assert not missing, f"DEVELOPERS.md names modules that do not exist: {missing}"


def test_the_check_finds_a_module_that_does_not_exist(tmp_path):
    # the same check on a note naming one real and one missing module reports the missing one
    (tmp_path / "analysis").mkdir()
    (tmp_path / "analysis" / "io.py").write_text("")
    note = f"{HEADING}\n1. read: `analysis/io.py`; index: `analysis/gone.py`, `webapp/pages/old/`.\n## Next\n`analysis/x.py`"
    named, missing = _missing(_section(note, HEADING), tmp_path)
    assert named == ["analysis/gone.py", "analysis/io.py", "webapp/pages/old/"]
    assert missing == ["analysis/gone.py", "webapp/pages/old/"]
