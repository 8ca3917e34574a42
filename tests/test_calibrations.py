"""Named calibrations in the store: saved under a unique name, listed, picked, resolved; SQLite and PostgreSQL."""

from __future__ import annotations

import threading

import pytest

from analysis.errors import ParameterError
from analysis.optics import ScreenGeometry
from webapp import calibrations as cals
from webapp.store import Store

PROV = {"source": "reference", "reference_filename": "clean Cu(100) 80 eV.png", "reference_energy_eV": 80.0,
        "substrate": "Cu(100)", "image_filename": "c2x2.png", "energy_eV": 96.0, "residual_px": 0.31}


def _geometry(scale=600.0):
    return ScreenGeometry(512.0, 500.0, scale, distortion=0.2).to_dict()


def test_save_pick_and_resolve_round_trip(store_url):
    s = Store(store_url)
    geom = _geometry()
    cal = cals.save_calibration(s, name="  Camera B   optics ", camera="CCD 2", energy_range_eV=(50, 150),
                                geometry=geom, provenance=PROV)
    assert cal.name == "Camera B optics"  # runs of blanks fold to one
    got = cals.get_calibration(s, cal.value)
    assert got.name == cal.name and got.camera == "CCD 2" and got.provenance == PROV
    assert (got.energy_min_eV, got.energy_max_eV) == (50.0, 150.0)
    assert got.created_at.tzinfo is not None
    # the camera model comes back as it went in: the optics' own reader rebuilds the same scale
    assert ScreenGeometry.from_dict(cals.resolve(s, cal.value)).scale_px == 600.0
    assert cals.get_calibration(s, "cal:nothing-here") is None and cals.resolve(s, "cal:nothing-here") is None
    assert "50–150 eV" in got.label() and got.label().startswith("Camera B optics · CCD 2")


def test_resolve_still_reads_a_saved_analysis_token(store_url):
    s = Store(store_url)
    sha = s.put_image(b"img", filename="a.png", width=4, height=4, thumbnail_png=b"t")
    saved = s.save_analysis(image_sha256=sha, parameters={}, edits={}, result={"geometry": _geometry(700.0)})
    assert ScreenGeometry.from_dict(cals.resolve(s, saved.token)).scale_px == 700.0


def test_list_is_newest_first(store_url):
    s = Store(store_url)
    for i in range(3):
        cals.save_calibration(s, name=f"cal {i}", energy_range_eV=(60, 60), geometry=_geometry(), provenance={})
    assert [c.name for c in cals.list_calibrations(s)] == ["cal 2", "cal 1", "cal 0"]


def test_bad_input_gets_one_line_and_nothing_is_saved(store_url):
    s = Store(store_url)
    bad = [
        (dict(name="", energy_range_eV=(60, 70)), "Give the calibration a name"),
        (dict(name="x" * 81, energy_range_eV=(60, 70)), "at most 80 characters"),
        (dict(name="a", energy_range_eV=(90, 70)), "from low to high"),
        (dict(name="a", energy_range_eV=("lots", 70)), "must be a number of eV"),
        (dict(name="a", energy_range_eV=(float("nan"), 70)), "between 0 and"),
        (dict(name="a", energy_range_eV=(-5, 70)), "between 0 and"),
    ]
    for kw, msg in bad:
        with pytest.raises(ParameterError, match=msg) as e:
            cals.save_calibration(s, geometry=_geometry(), provenance={}, **kw)
        assert "\n" not in str(e.value)
    with pytest.raises(ParameterError, match="no camera model"):
        cals.save_calibration(s, name="a", energy_range_eV=(60, 70), geometry={}, provenance={})
    assert cals.list_calibrations(s) == []


def test_a_name_is_taken_once_even_by_clients_saving_at_once(store_url):
    s = Store(store_url)
    errors, done = [], []

    def save(i):
        other = Store(store_url)  # a client with its own connections
        try:
            done.append(cals.save_calibration(other, name="shared name", energy_range_eV=(60, 60),
                                              geometry=_geometry(500.0 + i), provenance={}))
        except ParameterError as err:
            errors.append(str(err))
        finally:
            other.close()

    threads = [threading.Thread(target=save, args=(i,)) for i in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert len(done) == 1 and len(errors) == 5
    assert all("exists already" in e for e in errors)
    [kept] = cals.list_calibrations(s)
    assert kept.key == done[0].key and kept.geometry == done[0].geometry


def test_the_page_says_when_the_energy_lies_outside_the_range(fresh_store):
    from dash_helpers import text_of
    from webapp.pages.analyse.calibration import on_pick_calibration

    cal = cals.save_calibration(fresh_store, name="B", energy_range_eV=(100, 250), geometry=_geometry(), provenance=PROV)
    inside, outside = text_of(on_pick_calibration(cal.value, 130)), text_of(on_pick_calibration(cal.value, 60))
    assert "clean Cu(100) 80 eV.png" in inside and "meant for" not in inside
    assert "It is meant for 100–250 eV; this image is at 60 eV." in outside
    assert "no longer available" in text_of(on_pick_calibration("cal:gone", 130))


def test_rename_keeps_the_model_and_refuses_empty_or_taken_names(store_url):
    s = Store(store_url)
    a = cals.save_calibration(s, name="A", energy_range_eV=(60, 60), geometry=_geometry(610.0), provenance=PROV)
    b = cals.save_calibration(s, name="B", energy_range_eV=(60, 60), geometry=_geometry(620.0), provenance={})
    got = cals.rename_calibration(s, a.value, "  Chamber   A ")
    assert got.name == "Chamber A" and got.key == a.key and got.geometry == a.geometry and got.provenance == PROV
    assert cals.rename_calibration(s, a.value, "Chamber A").name == "Chamber A"  # its own name: no clash
    for new, msg in (("", "Type the new name"), ("   ", "Type the new name"), ("B", "exists already"),
                     ("x" * 81, "at most 80 characters")):
        with pytest.raises(ParameterError, match=msg) as e:
            cals.rename_calibration(s, a.value, new)
        assert "\n" not in str(e.value)
    with pytest.raises(ParameterError, match="no longer available"):
        cals.rename_calibration(s, "cal:nothing-here", "C")
    # nothing lost: both still there under their names, each with its own model
    by_name = {c.name: c for c in cals.list_calibrations(s)}
    assert set(by_name) == {"Chamber A", "B"}
    assert by_name["B"].geometry == b.geometry and by_name["Chamber A"].geometry == a.geometry


def test_delete_is_recoverable_then_purged_after_30_days(store_url):
    from datetime import datetime, timedelta, timezone

    s = Store(store_url)
    a = cals.save_calibration(s, name="A", energy_range_eV=(60, 60), geometry=_geometry(), provenance={})
    b = cals.save_calibration(s, name="B", energy_range_eV=(60, 60), geometry=_geometry(), provenance={})
    assert cals.delete_calibration(s, a.value) is True
    assert cals.delete_calibration(s, a.value) is False  # deleted once
    assert [c.name for c in cals.list_calibrations(s)] == ["B"]
    assert cals.get_calibration(s, a.value) is None and cals.resolve(s, a.value) is None  # cannot be picked
    [gone] = cals.deleted_calibrations(s)
    assert gone.key == a.key and gone.deleted_at.tzinfo is not None
    # its name stays reserved while it can come back
    with pytest.raises(ParameterError, match="deleted calibration is still named 'A'"):
        cals.save_calibration(s, name="A", energy_range_eV=(60, 60), geometry=_geometry(), provenance={})
    with pytest.raises(ParameterError, match="deleted calibration is still named 'A'"):
        cals.rename_calibration(s, b.value, "A")
    assert cals.restore_calibration(s, a.value) is True and cals.restore_calibration(s, a.value) is False
    assert cals.get_calibration(s, a.value).geometry == a.geometry
    # kept 30 days (KEEP_DELETED_DAYS), then purged
    cals.delete_calibration(s, a.value)
    soon = datetime.now(timezone.utc) + timedelta(days=29)
    assert cals.purge_deleted_calibrations(s, now=soon) == 0 and len(cals.deleted_calibrations(s)) == 1
    assert cals.purge_deleted_calibrations(s, now=soon + timedelta(days=2)) == 1
    assert cals.deleted_calibrations(s) == [] and cals.restore_calibration(s, a.value) is False
    assert [c.name for c in cals.list_calibrations(s)] == ["B"]


def test_an_old_calibrations_table_gains_the_deleted_column(tmp_path):
    import sqlalchemy as sa

    url = f"sqlite:///{tmp_path / 'old.sqlite3'}"
    eng = sa.create_engine(url)
    with eng.begin() as c:  # the table as the first version made it
        c.exec_driver_sql("CREATE TABLE calibrations (id INTEGER PRIMARY KEY, key VARCHAR(64) UNIQUE, "
                          "name VARCHAR(80) UNIQUE, camera VARCHAR(80), energy_min_eV FLOAT, energy_max_eV FLOAT, "
                          "geometry JSON, provenance JSON, created_at DATETIME)")
        c.exec_driver_sql("INSERT INTO calibrations VALUES (1, 'k0123456789abcdef', 'old one', '', 60, 60, "
                          "'{\"scale_px\": 600}', '{}', '2026-01-02 03:04:05')")
    eng.dispose()
    s = Store(url)
    [old] = cals.list_calibrations(s)
    assert old.name == "old one" and old.deleted_at is None
    assert cals.delete_calibration(s, old.value) and cals.deleted_calibrations(s)[0].name == "old one"
