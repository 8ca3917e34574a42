"""Docstrings of the public API, checked by numpydoc's own validator (``numpydoc.validate``).

The public API is the ``__all__`` of every module and package under ``analysis/`` and
``webapp/`` (modules whose name starts with ``_`` are private and skipped). Every function
listed there, and every public method of a class listed in the module that defines it, is
validated with the checks in :data:`CHECKS`; the other numpydoc checks
(extended summary, See Also, one-line summary, verb mood, section punctuation) are not
enforced here because they are matters of taste our docstrings do not follow.

Functions not documented yet are named in :data:`NOT_YET`, a list that may only shrink:
a function missing from it must pass, and a function on it that now passes must leave it.
The core functions in :data:`CORE_EXAMPLES` must also carry an ``Examples`` doctest
(the doctests themselves run with ``pytest --doctest-modules``).
"""

from __future__ import annotations

import importlib
import inspect
import pkgutil
import sys
import textwrap

import pytest

numpydoc_validate = pytest.importorskip("numpydoc.validate", reason="numpydoc is in the test extra")

#: The numpydoc checks enforced, each with what it asks for.
CHECKS = {
    "GL08": "the function has a docstring",
    "SS01": "a summary line",
    "SS02": "the summary starts with a capital letter or a number",
    "SS03": "the summary ends with a full stop",
    "PR01": "every parameter of the signature is documented",
    "PR02": "no documented parameter is missing from the signature",
    "PR03": "parameters documented in the signature's order",
    "PR04": "every documented parameter has a type (shapes, dtypes and units go there)",
    "PR07": "every documented parameter has a description",
    "RT01": "a Returns section when the function returns a value",
    "RT03": "every returned value has a description",
    "YD01": "a Yields section for a generator",
}

#: Core functions that carry an Examples doctest.
CORE_EXAMPLES = (
    "analysis.optics.wavelength_A",
    "analysis.nets.reciprocal",
    "analysis.superstructure.superstructure_matrix",
    "analysis.wood.wood_notation",
    "analysis.wood.parse_wood",
    "analysis.spots.measure.measure_image",
    "analysis.indexing.pattern.index_pattern",
    "analysis.pipeline.analyze_image",
    "analysis.series.pipeline.run_iv",
)

PACKAGES = ("analysis", "webapp")

#: Public functions and methods whose docstrings do not pass :data:`CHECKS` yet (module.qualname).
NOT_YET = frozenset()


def _public_functions(package: str) -> dict:
    """``{"module.qualname": function}`` for every function in an ``__all__`` under `package`,
    and the public methods (class and static ones included) of the classes listed there."""
    if package == "webapp":  # pages register themselves with the app, which must exist first
        importlib.import_module("webapp.app")
    pkg = importlib.import_module(package)
    names = [package] + [m.name for m in pkgutil.walk_packages(pkg.__path__, package + ".")
                         if not any(part.startswith("_") for part in m.name.split("."))]
    out = {}
    for name in names:
        # Dash loaded the page modules itself, as "pages.<name>": importing them again under
        # "webapp.pages.<name>" would register every page twice (and break the app's later tests)
        loaded = sys.modules.get("pages." + name[len("webapp.pages."):]) if name.startswith("webapp.pages.") else None
        mod = loaded or importlib.import_module(name)
        name = mod.__name__
        for attr in getattr(mod, "__all__", ()):
            obj = getattr(mod, attr)
            if inspect.isfunction(obj) and obj.__module__.split(".")[0] in (package, "pages"):
                out.setdefault(f"{obj.__module__}.{obj.__qualname__}", obj)
            elif inspect.isclass(obj) and obj.__module__ == name:  # its public methods
                for key, member in vars(obj).items():
                    if isinstance(member, (classmethod, staticmethod)):
                        member = member.__func__
                    if not key.startswith("_") and inspect.isfunction(member):
                        out.setdefault(f"{obj.__module__}.{obj.__qualname__}.{key}", member)
    return out


def _offences(path: str) -> list[str]:
    """The enforced numpydoc errors of one function, as ``"CODE message"``."""
    return [f"{code} {msg}" for code, msg in numpydoc_validate.validate(path)["errors"] if code in CHECKS]


@pytest.fixture(scope="module")
def public():
    return {p: _public_functions(p) for p in PACKAGES}


@pytest.mark.parametrize("package", PACKAGES)
def test_public_functions_pass_numpydoc_checks(public, package):
    funcs = public[package]
    assert len(funcs) > 20  # the walk found the API (a broken walk would check nothing)
    bad = {p: _offences(p) for p in sorted(funcs) if p not in NOT_YET}
    bad = {p: e for p, e in bad.items() if e}
    assert not bad, "numpydoc checks failed:\n" + "\n".join(f"{p}: {'; '.join(e)}" for p, e in bad.items())


@pytest.mark.parametrize("package", PACKAGES)
def test_not_yet_list_only_shrinks(public, package):
    done = sorted(p for p in public[package] if p in NOT_YET and not _offences(p))
    assert not done, "now documented, remove from NOT_YET: " + ", ".join(done)


@pytest.mark.parametrize("path", CORE_EXAMPLES)
def test_core_functions_have_examples(public, path):
    assert path in public[path.split(".")[0]], f"{path} is not in the public API"
    errors = dict(numpydoc_validate.validate(path)["errors"])
    assert "EX01" not in errors and not _offences(path), (path, errors)
    assert ">>>" in inspect.getdoc(public[path.split(".")[0]][path])


def test_the_check_reports_a_bad_docstring(tmp_path, monkeypatch):
    # the checker itself: a function missing a parameter and its Returns is reported
    (tmp_path / "docprobe_mod.py").write_text(textwrap.dedent('''
        def area(width_px, height_px):
            """Area of a box.

            Parameters
            ----------
            width_px : float
                Width in pixels.
            """
            return width_px * height_px
        '''))
    monkeypatch.syspath_prepend(str(tmp_path))
    codes = [e.split()[0] for e in _offences("docprobe_mod.area")]
    assert codes == ["PR01", "RT01"]
