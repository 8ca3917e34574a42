"""The newer store features as the pages use them, on SQLite and on PostgreSQL (when
RECINET_TEST_PG_URL is set; `.ci/run` starts a throwaway server and sets it): the saved-list
search, delete and restore; named calibrations saved, renamed, deleted and restored; and the
comparison of two saved analyses. Each page callback is called as a plain function with the
app pointed at a fresh database of the kind under test.

Wood notation: E. A. Wood, J. Appl. Phys. 35, 1306 (1964); the matrices below are worked by
hand on the Pt(111) basis a1 = a(1, 0), a2 = a(-1/2, √3/2): (√3×√3)R30° = (2 1 / -1 1), and
(2 2 / 0 2) spans the same lattice as p(2×2) = (2 0 / 0 2) (its rows are b1 + b2 and b2).
"""

from __future__ import annotations

import dataclasses
import io
import json
from contextvars import copy_context

import numpy as np
import pytest
from dash_helpers import text_of

from analysis.optics import ScreenGeometry

SQRT3 = "(√3×√3)R30°"


@pytest.fixture
def app_store(store_url, webapp_env, tmp_path):
    """The running app's store on a fresh database of the kind `store_url` names."""
    from webapp import runtime

    base = runtime.get_settings()
    runtime.reset(dataclasses.replace(base, data_dir=tmp_path, database_url=store_url))
    yield runtime.get_store()
    runtime.reset(base)


def _page(name):
    """A page module as Dash loaded it (``pages.<name>``); importing ``webapp.pages.<name>`` would register
    the page a second time."""
    import sys

    return sys.modules[f"pages.{name}"]


def _fired(fn, id_, prop, *args, value=1):
    """Run `fn` with Dash's callback context saying (id_, prop) fired with `value`."""
    from dash._callback_context import context_value
    from dash._utils import AttributeDict

    key = json.dumps(id_, separators=(",", ":"), sort_keys=True) if isinstance(id_, dict) else id_

    def run():
        context_value.set(AttributeDict(triggered_inputs=[{"prop_id": f"{key}.{prop}", "value": value}]))
        return fn(*args)

    return copy_context().run(run)


def _png(seed: int) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray((np.random.default_rng(seed).random((90, 100)) * 255).astype(np.uint8)).save(buf, format="PNG")
    return buf.getvalue()


def _save(store, name, notes, wood, matrix, seed, a=2.775):
    sha = store.put_image(_png(seed), filename=f"{name}.png", width=100, height=90, thumbnail_png=b"png")
    result = {"center_px": [50.0, 45.0], "spots": [],
              "substrate": {"net": "hexagonal", "a_angstrom": a, "b_angstrom": a, "gamma_deg": 120.0,
                            "a_star_px": [[20.0, 0.0], [-10.0, 17.3]]},
              "overlayer": {"kind": "commensurate", "wood": wood, "matrix": matrix, "domains": [matrix]}}
    return store.save_analysis(image_sha256=sha, parameters={"energy_eV": 70.0, "substrate": "Pt(111)"}, edits={},
                               result=result, sample_name=name, notes=notes, summary=wood).token


def test_saved_list_search_delete_and_restore_through_the_page(app_store, webapp_env):
    from webapp import ids

    recent = _page("recent")

    ox = _save(app_store, "Pt(111) oxygen", "dose 3 L at 300 K", "p(2×2)", [[2, 0], [0, 2]], 1)
    ru = _save(app_store, "Ru(0001) run", "after anneal at 900 K", SQRT3, [[2, 1], [-1, 1]], 2)

    def hrefs(cards):
        return sorted(c.children[0].href.rsplit("/", 1)[1] for c in cards)

    cards, count, _, _ = recent.list_view("sqrt3xsqrt3", None, 0)  # Wood notation as typed on a keyboard
    assert hrefs(cards) == [ru] and count.startswith("1 saved analysis matches")
    assert hrefs(recent.list_view("ANNEAL", None, 0)[0]) == [ru]  # notes, any case
    assert hrefs(recent.list_view("pt(111) 2x2", None, 0)[0]) == [ox]
    assert hrefs(recent.list_view("100%_", None, 0)[0]) == []  # LIKE wildcards are searched as text

    changed, msg = recent.confirm_delete(1, ru, 0)
    assert changed == 1 and text_of(msg).startswith("Deleted 'Ru(0001) run'")
    assert hrefs(recent.list_view("", None, 0)[0]) == [ox]
    assert webapp_env.server.test_client().get(f"/api/analyses/{ru}").status_code == 404
    deleted = text_of(recent.list_view("", changed, 0)[3])
    assert "Ru(0001) run" in deleted and "kept until" in deleted
    assert "already deleted" in text_of(recent.confirm_delete(1, ru, changed)[1])

    _, msg = _fired(recent.restore, {"type": ids.RECENT_RESTORE, "token": ru}, "n_clicks", [1], changed)
    assert text_of(msg).startswith("Restored")
    assert hrefs(recent.list_view("", None, 0)[0]) == sorted([ox, ru])
    assert webapp_env.server.test_client().get(f"/api/analyses/{ru}").status_code == 200


def test_named_calibrations_through_the_page(app_store):
    from webapp import calibrations, ids
    from webapp.pages.analyse import calibration as page

    geom = ScreenGeometry(50.0, 45.0, 600.0, distortion=0.2).to_dict()
    image = {"sha": "f" * 64, "filename": "clean.png"}
    record = {"sha": image["sha"], "parameters": {"energy_eV": 80.0, "substrate": "Cu(100)"},
              "result": {"geometry": geom, "substrate": {"residual_px": 0.3}}}
    msg, opts, value = page.on_save_calibration(1, "Chamber A", "CCD 1", 60, 200, record, image, {})
    assert "Saved the calibration 'Chamber A'" in text_of(msg) and value in {o["value"] for o in opts}
    assert "exists already" in text_of(page.on_save_calibration(1, "Chamber A", "", 60, 200, record, image, {})[0])

    msg, opts, info = page.on_rename_calibration(1, "Chamber A (MCP 2)", value, 100, {})
    assert "Renamed 'Chamber A' to 'Chamber A (MCP 2)'" in text_of(msg) and "Chamber A (MCP 2)" in text_of(info)
    assert "Type the new name" in text_of(page.on_rename_calibration(1, " ", value, 100, {})[0])
    assert "read-only" in text_of(page.on_rename_calibration(1, "B", value, 100, {"readonly": True})[0])

    shown, question, _ = page.on_ask_delete_calibration(1, value, {})
    assert shown is True and "Chamber A (MCP 2)" in question
    msg, opts, picked, rows = page.on_confirm_delete_calibration(1, value, {})
    assert "Deleted the calibration" in text_of(msg) and picked is None and value not in {o["value"] for o in opts}
    assert "Chamber A (MCP 2)" in text_of(rows) and "kept until" in text_of(rows)
    assert "no longer available" in text_of(page.on_pick_calibration(value, 100))
    assert calibrations.resolve(app_store, value) is None

    key = value[len(calibrations.PREFIX):]
    msg, opts, rows = _fired(page.on_restore_calibration, {"type": ids.CAL_RESTORE, "key": key}, "n_clicks", [1], {})
    assert text_of(msg).startswith("Restored") and value in {o["value"] for o in opts}
    assert ScreenGeometry.from_dict(calibrations.resolve(app_store, value)).scale_px == 600.0  # nothing lost
    assert "No calibration deleted" in text_of(rows)


def test_compare_two_saved_analyses_through_the_page(app_store):
    compare = _page("compare")

    a = _save(app_store, "oxygen", "", "p(2×2)", [[2, 0], [0, 2]], 3)
    b = _save(app_store, "oxygen again", "", "p(2×2)", [[2, 2], [0, 2]], 4)  # same lattice, another basis
    c = _save(app_store, "ozone", "", SQRT3, [[2, 1], [-1, 1]], 5, a=2.80)

    def rows(t1, t2):
        body, href = compare.comparison_body(t1, t2)
        assert href == f"/compare?a={t1}&b={t2}"
        table = body.children[1].children[2]
        return {tr.children[0].children: (tr.children[1].children, tr.children[2].children, tr.className)
                for tr in table.children[1].children}

    same = rows(a, b)
    assert same["Matrix"][2] == "same" and same["Wood notation"][2] == "same"
    other = rows(a, c)
    assert other["Wood notation"][:2] == ("p(2×2)", SQRT3) and other["Wood notation"][2] == "differs"
    assert other["Matrix"][2] == "differs"
    assert "No saved analysis has the link given for B" in text_of(compare.comparison_body(a, "x" * 22)[0])
