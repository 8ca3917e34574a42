"""The store: images once by hash, analyses with tokens, on SQLite and PostgreSQL."""

from __future__ import annotations

import hashlib
import multiprocessing as mp
import secrets

import pytest

from analysis.errors import ParameterError
from webapp.store import MAX_SAMPLE_CHARS, TOKEN_RE, Store


def _image(store, data=b"\x89PNG fake bytes", name="a.png"):
    return store.put_image(data, filename=name, width=640, height=480, thumbnail_png=b"thumb")


def test_image_stored_once_by_content_hash(store_url):
    s = Store(store_url)
    sha = _image(s)
    # SHA-256 from hashlib (FIPS 180-4), independent of the store
    assert sha == hashlib.sha256(b"\x89PNG fake bytes").hexdigest()
    assert _image(s, name="again.png") == sha
    assert s.image_bytes(sha) == b"\x89PNG fake bytes"
    assert s.image_info(sha).filename == "a.png"  # the first upload's name is kept
    assert s.image_bytes("0" * 64) is None
    assert s.image_bytes("../../etc/passwd") is None


def test_save_and_get_round_trip(store_url):
    s = Store(store_url)
    sha = _image(s)
    params = {"energy_eV": 72.5, "substrate": "Pt(111)"}
    edits = {"added": [[10.5, 20.0]], "removed": [3], "center": [320.0, 240.0]}
    result = {"overlayer": {"wood": "p(2×2)", "matrix": [[2, 0], [0, 2]]}, "spots": [{"x": 1.0, "y": 2.0}]}
    saved = s.save_analysis(image_sha256=sha, parameters=params, edits=edits, result=result,
                            sample_name="<b>Sample A</b>", notes="line 1\nline 2", summary="p(2×2)")
    assert TOKEN_RE.fullmatch(saved.token)
    got = s.get_analysis(saved.token)
    assert got.parameters == params and got.edits == edits and got.result == result
    assert got.sample_name == "<b>Sample A</b>" and got.notes == "line 1\nline 2"
    assert got.width == 640 and got.image_filename == "a.png"
    assert got.created_at.tzinfo is not None


def test_tokens_are_unguessable_and_distinct(store_url):
    s = Store(store_url)
    sha = _image(s)
    tokens = {s.save_analysis(image_sha256=sha, parameters={}, edits={}, result=None).token for _ in range(20)}
    assert len(tokens) == 20
    # secrets.token_urlsafe(16): 16 random bytes -> 22 URL-safe characters (Python docs)
    assert all(len(t) == 22 for t in tokens)
    assert s.get_analysis(secrets.token_urlsafe(16)) is None
    assert s.get_analysis("short") is None


def test_recent_lists_newest_first(store_url):
    s = Store(store_url)
    sha = _image(s)
    made = [s.save_analysis(image_sha256=sha, parameters={"i": i}, edits={}, result=None, sample_name=f"S{i}")
            for i in range(5)]
    listed = s.recent(3)
    assert [a.token for a in listed] == [a.token for a in made[::-1][:3]]
    assert s.count_analyses() == 5


def test_bad_input_is_refused(store_url):
    s = Store(store_url)
    sha = _image(s)
    with pytest.raises(ParameterError, match="No stored image"):
        s.save_analysis(image_sha256="f" * 64, parameters={}, edits={}, result=None)
    with pytest.raises(ParameterError, match="Sample name is 201 characters"):
        s.save_analysis(image_sha256=sha, parameters={}, edits={}, result=None, sample_name="x" * (MAX_SAMPLE_CHARS + 1))
    with pytest.raises(ParameterError, match="`edits` must be a dict"):
        s.save_analysis(image_sha256=sha, parameters={}, edits=[1], result=None)
    with pytest.raises(ParameterError, match="non-empty bytes"):
        s.put_image(b"", filename="e", width=1, height=1, thumbnail_png=b"")
    assert s.count_analyses() == 0


def _writer(url, sha, worker, n, queue):
    s = Store(url)
    out = []
    for i in range(n):
        out.append((s.save_analysis(image_sha256=sha, parameters={"worker": worker, "i": i}, edits={},
                                    result={"n": worker * 1000 + i}).token, worker, i))
        # the same image bytes from every process at once: still one row
        s.put_image(b"shared image", filename="s.png", width=1, height=1, thumbnail_png=b"t")
    queue.put(out)


def test_processes_writing_at_once_lose_nothing(store_url):
    s = Store(store_url)
    sha = _image(s)
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    procs = [ctx.Process(target=_writer, args=(store_url, sha, w, 15, q)) for w in range(4)]
    for p in procs:
        p.start()
    results = [q.get(timeout=120) for _ in procs]
    for p in procs:
        p.join(timeout=60)
    written = [t for r in results for t in r]
    assert s.count_analyses() == 60
    for token, worker, i in written:
        a = s.get_analysis(token)
        assert a.parameters == {"worker": worker, "i": i} and a.result == {"n": worker * 1000 + i}
    assert s.image_info(hashlib.sha256(b"shared image").hexdigest()) is not None


def _saved(s, sha, name, notes="", summary=""):
    return s.save_analysis(image_sha256=sha, parameters={}, edits={}, result=None, sample_name=name, notes=notes,
                           summary=summary)


def test_search_by_sample_name_notes_and_wood_notation(store_url):
    s = Store(store_url)
    sha = _image(s)
    pt = _saved(s, sha, "Pt(111) run 7", notes="oxygen dose 3 L at 300 K", summary="p(2×2)")
    ru = _saved(s, sha, "Ru(0001) B", notes="after anneal", summary="(√3×√3)R30°")
    cu = _saved(s, sha, "Cu(100) 50%", notes="CO exposure", summary="c(2×2)")
    found = lambda q: {a.token for a in s.recent(50, query=q)}  # noqa: E731
    assert found("pt(111)") == {pt.token}  # any case
    assert found("OXYGEN") == {pt.token}  # in the notes
    assert found("anneal ru") == {ru.token}  # every word must match
    assert found("anneal pt") == set()
    # Wood notation (E. A. Wood, J. Appl. Phys. 35, 1306 (1964)) as typed on a keyboard
    assert found("sqrt3xsqrt3") == {ru.token} and found("(√3×√3)R30°") == {ru.token} and found("r30") == {ru.token}
    assert found("p(2x2)") == {pt.token} and found("2x2") == {pt.token, cu.token}
    assert found("%") == {cu.token}  # a LIKE wildcard is searched as a character
    assert found("") == {pt.token, ru.token, cu.token}
    assert s.count_analyses(query="2x2") == 2


def test_delete_is_recoverable_then_purged_after_30_days(store_url):
    from datetime import datetime, timedelta, timezone

    s = Store(store_url)
    sha = _image(s)
    keep, gone = _saved(s, sha, "kept"), _saved(s, sha, "deleted one", summary="p(2×1)")
    assert s.delete_analysis(gone.token) is True
    assert s.delete_analysis(gone.token) is False  # already deleted
    assert s.delete_analysis("not a token!") is False
    assert [a.token for a in s.recent(10)] == [keep.token] and s.count_analyses() == 1
    assert s.get_analysis(gone.token) is None  # its link stops working
    assert s.recent(10, query="2x1") == []
    (d,) = s.deleted()
    assert d.token == gone.token and d.deleted_at is not None and d.sample_name == "deleted one"
    assert s.restore_analysis(gone.token) is True and s.restore_analysis(gone.token) is False
    assert s.get_analysis(gone.token).sample_name == "deleted one" and s.deleted() == []
    s.delete_analysis(gone.token)
    now = datetime.now(timezone.utc)
    assert s.purge_deleted(now=now + timedelta(days=29)) == 0  # still inside the 30 days
    assert s.purge_deleted(now=now + timedelta(days=31)) == 1
    assert s.deleted() == [] and s.restore_analysis(gone.token) is False
    assert [a.token for a in s.recent(10)] == [keep.token]


def test_old_database_gains_the_deleted_column(tmp_path):
    import sqlite3

    url = f"sqlite:///{tmp_path / 'old.sqlite3'}"
    s = Store(url)
    old = _saved(s, _image(s), "from before")
    s.close()
    con = sqlite3.connect(tmp_path / "old.sqlite3")  # the table as it was before deletion existed
    con.execute("DROP INDEX ix_analyses_deleted_at")
    con.execute("ALTER TABLE analyses DROP COLUMN deleted_at")
    con.commit()
    con.close()
    s = Store(url)
    assert [a.token for a in s.recent(5)] == [old.token]
    assert s.delete_analysis(old.token) and s.deleted()[0].token == old.token
