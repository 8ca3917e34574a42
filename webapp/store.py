"""Saved analyses and their images, through SQLAlchemy 2.

Images are kept once, keyed by the SHA-256 of the uploaded bytes. An analysis
row holds the parameters, the manual edits, the result dict, the sample name,
the notes, the creation time and an unguessable share token
(``secrets.token_urlsafe``). Saved analyses are never changed: editing a
shared analysis saves a new one that remembers where it was copied from.

SQLite (the default) runs in WAL mode and every transaction starts with
``BEGIN IMMEDIATE``, so two processes writing at once wait for each other
instead of losing an update; PostgreSQL is used as it comes.
"""

from __future__ import annotations

import hashlib
import os
import re
import secrets
import threading
import time
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

from analysis.errors import ParameterError

__all__ = ["Store", "SavedAnalysis", "StoredImage", "TOKEN_RE", "SHA_RE", "MAX_SAMPLE_CHARS", "MAX_NOTES_CHARS",
           "KEEP_DELETED_DAYS", "search_terms"]

TOKEN_RE = re.compile(r"[A-Za-z0-9_-]{16,64}")
SHA_RE = re.compile(r"[0-9a-f]{64}")
MAX_SAMPLE_CHARS = 200
MAX_NOTES_CHARS = 20_000
KEEP_DELETED_DAYS = 30  # a deleted analysis can be restored this long, then it is purged
MAX_QUERY_CHARS = 200


class _Base(DeclarativeBase):
    pass


class _ImageRow(_Base):
    __tablename__ = "images"
    sha256: Mapped[str] = mapped_column(sa.String(64), primary_key=True)
    data: Mapped[bytes] = mapped_column(sa.LargeBinary)
    filename: Mapped[str] = mapped_column(sa.String(255), default="")
    width: Mapped[int] = mapped_column(sa.Integer)
    height: Mapped[int] = mapped_column(sa.Integer)
    thumbnail_png: Mapped[bytes] = mapped_column(sa.LargeBinary)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True))


class _AnalysisRow(_Base):
    __tablename__ = "analyses"
    id: Mapped[int] = mapped_column(sa.Integer, primary_key=True, autoincrement=True)
    token: Mapped[str] = mapped_column(sa.String(64), unique=True, index=True)
    image_sha256: Mapped[str] = mapped_column(sa.ForeignKey("images.sha256"), index=True)
    parameters: Mapped[dict] = mapped_column(sa.JSON)
    edits: Mapped[dict] = mapped_column(sa.JSON)
    result: Mapped[dict | None] = mapped_column(sa.JSON, nullable=True)
    summary: Mapped[str] = mapped_column(sa.String(200), default="")
    sample_name: Mapped[str] = mapped_column(sa.String(MAX_SAMPLE_CHARS), default="")
    notes: Mapped[str] = mapped_column(sa.Text, default="")
    copied_from: Mapped[str | None] = mapped_column(sa.String(64), nullable=True)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), index=True)
    deleted_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True), nullable=True, index=True)


@dataclass(frozen=True)
class StoredImage:
    sha256: str
    filename: str
    width: int
    height: int
    created_at: datetime


@dataclass(frozen=True, eq=False)
class SavedAnalysis:
    token: str
    image_sha256: str
    image_filename: str
    width: int
    height: int
    parameters: dict
    edits: dict
    result: dict | None
    summary: str
    sample_name: str
    notes: str
    copied_from: str | None
    created_at: datetime
    deleted_at: datetime | None = None


def _utc(dt: datetime) -> datetime:
    return dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)


_TIMES = re.compile(r"(?<=[0-9)\]])\s*[xX*]\s*(?=[0-9(√s])")


def search_terms(query: str) -> list[tuple[str, ...]]:
    """The words of a search, each with the spellings it also matches (lower case).

    A Wood notation may be typed with ``x`` for ``×`` and ``sqrt`` for ``√``; both forms
    are searched.

    Parameters
    ----------
    query : str
        What was typed (at most 200 characters are used).

    Returns
    -------
    list of tuple of str
        One tuple of spellings per word; a saved analysis matches when every word matches.

    Examples
    --------
    >>> search_terms("Pt oxygen (sqrt3xsqrt3)R30")
    [('pt',), ('oxygen',), ('(sqrt3xsqrt3)r30', '(√3×√3)r30')]
    >>> search_terms("2x2")
    [('2x2', '2×2')]
    """
    out = []
    for word in str(query or "")[:MAX_QUERY_CHARS].split():
        w = word.lower()
        wood = _TIMES.sub("×", w.replace("sqrt", "√")).replace("°", "")
        out.append((w,) if wood == w else (w, wood))
    return out


def _add_missing_columns(eng: sa.Engine) -> None:
    """Columns added after a database was made (``create_all`` leaves existing tables alone)."""
    have = {c["name"] for c in sa.inspect(eng).get_columns("analyses")}
    if "deleted_at" not in have:
        kind = "TIMESTAMP WITH TIME ZONE" if eng.dialect.name == "postgresql" else "DATETIME"
        try:
            with eng.begin() as conn:
                conn.exec_driver_sql(f"ALTER TABLE analyses ADD COLUMN deleted_at {kind}")
        except (sa.exc.OperationalError, sa.exc.ProgrammingError):  # another process added it first
            if "deleted_at" not in {c["name"] for c in sa.inspect(eng).get_columns("analyses")}:
                raise


# SQLite keeps its lock bookkeeping per process, shared by every connection to a file. A job process
# forked while another thread of the server was inside a transaction inherits that bookkeeping with
# the write lock marked as held by a connection that will never let go: its own transactions then
# wait out the busy timeout and fail with "database is locked" (seen with eight clients analysing at
# once, tests/test_webapp_concurrency.py). So a fork waits until no thread is in a transaction.
_FORK_GUARD = threading.RLock()


def _release_guard(conn) -> None:
    if conn.info.pop("fork_guard", False):
        _FORK_GUARD.release()


def _fresh_guard_in_child() -> None:
    global _FORK_GUARD
    _FORK_GUARD = threading.RLock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(before=lambda: _FORK_GUARD.acquire(), after_in_parent=lambda: _FORK_GUARD.release(),
                        after_in_child=_fresh_guard_in_child)


def _make_engine(url: str) -> sa.Engine:
    if url.startswith("sqlite"):
        eng = sa.create_engine(url, connect_args={"timeout": 30})

        @event.listens_for(eng, "connect")
        def _on_connect(dbapi, _record):
            dbapi.isolation_level = None  # no implicit BEGIN from pysqlite
            for p in ("journal_mode=WAL", "busy_timeout=30000", "synchronous=NORMAL", "foreign_keys=ON"):
                dbapi.execute(f"PRAGMA {p}")

        @event.listens_for(eng, "begin")
        def _on_begin(conn):
            _FORK_GUARD.acquire()  # no fork while this process is inside a transaction (see _FORK_GUARD)
            conn.info["fork_guard"] = True
            try:
                conn.exec_driver_sql("BEGIN IMMEDIATE")
            except BaseException:
                _release_guard(conn)
                raise

        @event.listens_for(eng, "commit")
        @event.listens_for(eng, "rollback")
        def _on_end(conn):
            _release_guard(conn)

        return eng
    return sa.create_engine(url, pool_pre_ping=True)


def _insert_ignore(dialect: str, table):
    if dialect == "postgresql":  # each dialect's INSERT ... ON CONFLICT, loaded for the database in use
        from sqlalchemy.dialects.postgresql import insert
    elif dialect == "sqlite":
        from sqlalchemy.dialects.sqlite import insert
    else:  # pragma: no cover - other databases are not set up for
        return None
    return insert(table)


class Store:
    """Persistence of images and analyses.

    Parameters
    ----------
    url : str
        SQLAlchemy URL: ``sqlite:///path/recinet.sqlite3`` or
        ``postgresql+psycopg://user@host:port/db``. Tables are created if missing.

    Examples
    --------
    >>> s = Store("sqlite://")
    >>> sha = s.put_image(b"raw", filename="a.png", width=2, height=1, thumbnail_png=b"png")
    >>> saved = s.save_analysis(image_sha256=sha, parameters={"energy_eV": 60.0}, edits={}, result=None)
    >>> s.get_analysis(saved.token).parameters["energy_eV"]
    60.0
    """

    def __init__(self, url: str):
        self.url = url
        self._pid = os.getpid()
        self.engine = _make_engine(url)
        for attempt in range(5):  # servers starting together may race to create the tables
            try:
                _Base.metadata.create_all(self.engine)
                break
            except (sa.exc.IntegrityError, sa.exc.ProgrammingError, sa.exc.OperationalError):
                if attempt == 4:
                    raise
                time.sleep(0.2 * (attempt + 1))
        _add_missing_columns(self.engine)

    def _eng(self) -> sa.Engine:
        if os.getpid() != self._pid:  # forked job process: never share the parent's connections
            # ... and never close them either: closing an inherited SQLite connection in the child
            # would drop the child's own file locks (POSIX locks go with any close of the file).
            # The old pool is kept, unused.
            self._inherited_pools = [*getattr(self, "_inherited_pools", ()), self.engine.pool]
            self.engine.dispose(close=False)
            self._pid = os.getpid()
        return self.engine

    def close(self) -> None:
        """Close the database connections."""
        self.engine.dispose()

    # ---- images -------------------------------------------------------------------
    def put_image(self, data: bytes, *, filename: str, width: int, height: int,
                  thumbnail_png: bytes) -> str:
        """Keep `data` once; return its SHA-256 (hex). A second put of the same bytes is a no-op.

        Parameters
        ----------
        data : bytes
            The image file as uploaded.
        filename : str, keyword-only
            Its name.
        width, height : int, keyword-only
            Its size, pixels.
        thumbnail_png : bytes, keyword-only
            A small PNG for the list of saved analyses.

        Returns
        -------
        str
            The SHA-256.
        """
        if not isinstance(data, (bytes, bytearray)) or not data:
            raise ParameterError("`data` must be non-empty bytes.")
        sha = hashlib.sha256(data).hexdigest()
        row = dict(sha256=sha, data=bytes(data), filename=str(filename)[:255], width=int(width),
                   height=int(height), thumbnail_png=bytes(thumbnail_png), created_at=datetime.now(timezone.utc))
        eng = self._eng()
        with eng.begin() as conn:
            ins = _insert_ignore(eng.dialect.name, _ImageRow.__table__)
            if ins is not None:
                conn.execute(ins.values(**row).on_conflict_do_nothing(index_elements=["sha256"]))
            elif conn.execute(sa.select(_ImageRow.sha256).where(_ImageRow.sha256 == sha)).first() is None:
                conn.execute(sa.insert(_ImageRow).values(**row))
        return sha

    def image_info(self, sha256: str) -> StoredImage | None:
        """Name, size and upload time of a stored image, or None for an unknown hash.

        Parameters
        ----------
        sha256 : str
            The image's SHA-256 (hex).

        Returns
        -------
        StoredImage or None
            The image's facts.
        """
        if not isinstance(sha256, str) or not SHA_RE.fullmatch(sha256):
            return None
        t = _ImageRow
        with self._eng().connect() as conn:
            r = conn.execute(sa.select(t.sha256, t.filename, t.width, t.height, t.created_at)
                             .where(t.sha256 == sha256)).first()
        return None if r is None else StoredImage(r.sha256, r.filename, r.width, r.height, _utc(r.created_at))

    def image_bytes(self, sha256: str) -> bytes | None:
        """The uploaded bytes, or None for an unknown (or malformed) hash.

        Parameters
        ----------
        sha256 : str
            The image's SHA-256 (hex).

        Returns
        -------
        bytes or None
            The file.
        """
        return self._image_column(sha256, _ImageRow.data)

    def thumbnail(self, sha256: str) -> bytes | None:
        """The thumbnail PNG of a stored image, or None for an unknown hash.

        Parameters
        ----------
        sha256 : str
            The image's SHA-256 (hex).

        Returns
        -------
        bytes or None
            The PNG file.
        """
        return self._image_column(sha256, _ImageRow.thumbnail_png)

    def _image_column(self, sha256, column):
        if not isinstance(sha256, str) or not SHA_RE.fullmatch(sha256):
            return None
        with self._eng().connect() as conn:
            return conn.execute(sa.select(column).where(_ImageRow.sha256 == sha256)).scalar()

    # ---- analyses -----------------------------------------------------------------
    def save_analysis(self, *, image_sha256: str, parameters: dict, edits: dict, result: dict | None,
                      sample_name: str = "", notes: str = "", summary: str = "",
                      copied_from: str | None = None) -> SavedAnalysis:
        """Save a new analysis of a stored image and return it with its fresh share token.

        Parameters
        ----------
        image_sha256 : str, keyword-only
            The stored image's SHA-256.
        parameters : dict, keyword-only
            Energy, substrate and the other analysis parameters.
        edits : dict, keyword-only
            The manual edits.
        result : dict or None, keyword-only
            The result dict.
        sample_name : str, keyword-only
            The sample's name.
        notes : str, keyword-only
            Free notes.
        summary : str, keyword-only
            One line for the list of saved analyses.
        copied_from : str, optional, keyword-only
            Share token of the analysis it was copied from.

        Returns
        -------
        SavedAnalysis
            The new row.
        """
        sample_name = "" if sample_name is None else str(sample_name).strip()
        notes = "" if notes is None else str(notes)
        if len(sample_name) > MAX_SAMPLE_CHARS:
            raise ParameterError(f"Sample name is {len(sample_name)} characters; at most {MAX_SAMPLE_CHARS} are kept.")
        if len(notes) > MAX_NOTES_CHARS:
            raise ParameterError(f"Notes are {len(notes)} characters; at most {MAX_NOTES_CHARS} are kept.")
        for name, value in (("parameters", parameters), ("edits", edits)):
            if not isinstance(value, dict):
                raise ParameterError(f"`{name}` must be a dict, got {type(value).__name__}.")
        if result is not None and not isinstance(result, dict):
            raise ParameterError(f"`result` must be a dict or None, got {type(result).__name__}.")
        if copied_from is not None and not TOKEN_RE.fullmatch(str(copied_from)):
            copied_from = None
        info = self.image_info(image_sha256)
        if info is None:
            raise ParameterError(f"No stored image with hash {str(image_sha256)[:80]!r}; upload it first.")
        now = datetime.now(timezone.utc)
        for _attempt in range(5):
            token = secrets.token_urlsafe(16)
            try:
                with self._eng().begin() as conn:
                    conn.execute(sa.insert(_AnalysisRow).values(
                        token=token, image_sha256=image_sha256, parameters=parameters, edits=edits,
                        result=result, summary=str(summary)[:200], sample_name=sample_name, notes=notes,
                        copied_from=copied_from, created_at=now))
                break
            except sa.exc.IntegrityError:  # pragma: no cover - a 128-bit token collided
                continue
        else:  # pragma: no cover
            raise RuntimeError("could not draw a unique share token")
        return SavedAnalysis(token, image_sha256, info.filename, info.width, info.height, parameters, edits,
                             result, str(summary)[:200], sample_name, notes, copied_from, now)

    def get_analysis(self, token: str) -> SavedAnalysis | None:
        """The analysis saved under `token`, or None (also for a malformed token or a deleted analysis).

        Parameters
        ----------
        token : str
            The share token.

        Returns
        -------
        SavedAnalysis or None
            The analysis.
        """
        if not isinstance(token, str) or not TOKEN_RE.fullmatch(token):
            return None
        rows = self._select(_AnalysisRow.token == token, limit=1)
        return rows[0] if rows else None

    def recent(self, limit: int = 50, *, offset: int = 0, query: str = "") -> list[SavedAnalysis]:
        """The newest saved analyses first (deleted ones left out).

        Parameters
        ----------
        limit : int
            Most analyses returned.
        offset : int, keyword-only
            Analyses skipped (for pages of the list).
        query : str, keyword-only
            Words that must each appear in the sample name, the notes or the one-line result
            (Wood notation or matrix), ignoring case; see :func:`search_terms`.

        Returns
        -------
        list of SavedAnalysis
            Newest first.
        """
        return self._select(self._matching(query), limit=max(1, min(int(limit), 500)), offset=max(0, int(offset)))

    def count_analyses(self, *, query: str = "") -> int:
        """The number of saved analyses (not deleted), or of those matching `query`.

        Parameters
        ----------
        query : str, keyword-only
            As for :meth:`recent`.

        Returns
        -------
        int
            The count.
        """
        q = sa.select(sa.func.count()).select_from(_AnalysisRow).where(self._matching(query))
        with self._eng().connect() as conn:
            return int(conn.execute(q).scalar())

    @staticmethod
    def _matching(query: str):
        a = _AnalysisRow
        cond = [a.deleted_at.is_(None)]
        for spellings in search_terms(query):
            cond.append(sa.or_(*[sa.func.lower(col).contains(w, autoescape=True)
                                 for w in spellings for col in (a.sample_name, a.notes, a.summary)]))
        return sa.and_(*cond)

    def delete_analysis(self, token: str) -> bool:
        """Mark a saved analysis deleted: it leaves the list and its link, and can be restored
        for :data:`KEEP_DELETED_DAYS` days.

        Parameters
        ----------
        token : str
            The share token.

        Returns
        -------
        bool
            True when an analysis was deleted now.
        """
        return self._set_deleted(token, datetime.now(timezone.utc))

    def restore_analysis(self, token: str) -> bool:
        """Bring a deleted analysis back (before it is purged).

        Parameters
        ----------
        token : str
            The share token.

        Returns
        -------
        bool
            True when an analysis was restored now.
        """
        return self._set_deleted(token, None)

    def _set_deleted(self, token, when) -> bool:
        if not isinstance(token, str) or not TOKEN_RE.fullmatch(token):
            return False
        a = _AnalysisRow
        was = a.deleted_at.is_(None) if when is not None else a.deleted_at.is_not(None)
        with self._eng().begin() as conn:
            n = conn.execute(sa.update(a).where(a.token == token, was).values(deleted_at=when)).rowcount
        return bool(n)

    def deleted(self, limit: int = 100) -> list[SavedAnalysis]:
        """The deleted analyses still kept, most recently deleted first.

        Parameters
        ----------
        limit : int
            Most analyses returned.

        Returns
        -------
        list of SavedAnalysis
            With `deleted_at` set.
        """
        return self._select(_AnalysisRow.deleted_at.is_not(None), limit=max(1, min(int(limit), 500)),
                            by_deletion=True)

    def purge_deleted(self, *, days: float = KEEP_DELETED_DAYS, now: datetime | None = None) -> int:
        """Remove for good the analyses deleted more than `days` ago (the images stay).

        Parameters
        ----------
        days : float, keyword-only
            How long a deleted analysis is kept.
        now : datetime, optional, keyword-only
            The time to count from (default: now, UTC).

        Returns
        -------
        int
            The number removed.
        """
        cut = (_utc(now) if now is not None else datetime.now(timezone.utc)) - timedelta(days=float(days))
        a = _AnalysisRow
        with self._eng().begin() as conn:
            return int(conn.execute(sa.delete(a).where(a.deleted_at.is_not(None), a.deleted_at < cut)).rowcount)

    def _select(self, where, *, limit: int, offset: int = 0, by_deletion: bool = False) -> list[SavedAnalysis]:
        a, i = _AnalysisRow, _ImageRow
        order = (a.deleted_at.desc(),) if by_deletion else ()
        q = (sa.select(a.token, a.image_sha256, i.filename, i.width, i.height, a.parameters, a.edits, a.result,
                       a.summary, a.sample_name, a.notes, a.copied_from, a.created_at, a.deleted_at)
             .join(i, i.sha256 == a.image_sha256)
             .order_by(*order, a.created_at.desc(), a.id.desc()).limit(limit).offset(offset))
        if where is not None:
            q = q.where(where)
        if not by_deletion:
            q = q.where(a.deleted_at.is_(None))
        with self._eng().connect() as conn:
            rows = conn.execute(q).all()
        return [SavedAnalysis(r.token, r.image_sha256, r.filename, r.width, r.height, r.parameters or {},
                              r.edits or {}, r.result, r.summary, r.sample_name, r.notes, r.copied_from,
                              _utc(r.created_at), None if r.deleted_at is None else _utc(r.deleted_at))
                for r in rows]
