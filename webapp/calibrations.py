"""Named screen calibrations: a fitted camera model kept under a name, with where it came from.

A calibration is saved from an analysis on the analyse page (usually one made
with a reference image of the clean substrate). It keeps the camera model (a
:class:`~analysis.optics.ScreenGeometry` dict), a name unique in the group, the
camera it belongs to, the energy range it is meant for and its provenance:
the reference image's name and energy, the substrate, the analysed image, the
residual of the substrate fit and the creation date.

The rows live in the same database as the saved analyses (its own table,
created on first use), so SQLite and PostgreSQL both work. A calibration can be
renamed (the name stays unique) and deleted; a deleted one leaves the list and
can be restored for :data:`~webapp.store.KEEP_DELETED_DAYS` days, as a deleted
saved analysis can, then it goes for good.
"""

from __future__ import annotations

import math
import secrets
import time
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import sqlalchemy as sa
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

from analysis.errors import ParameterError
from webapp.store import KEEP_DELETED_DAYS

__all__ = ["NamedCalibration", "save_calibration", "list_calibrations", "get_calibration", "provenance_of",
           "resolve", "rename_calibration", "delete_calibration", "restore_calibration", "deleted_calibrations",
           "purge_deleted_calibrations", "PREFIX", "MAX_NAME_CHARS"]

PREFIX = "cal:"  # a dropdown value naming a saved calibration (an analysis token has no colon)
MAX_NAME_CHARS = 80
_MAX_ENERGY_EV = 10_000.0


class _Base(DeclarativeBase):
    pass


class _CalibrationRow(_Base):
    __tablename__ = "calibrations"
    id: Mapped[int] = mapped_column(sa.Integer, primary_key=True, autoincrement=True)
    key: Mapped[str] = mapped_column(sa.String(64), unique=True, index=True)
    name: Mapped[str] = mapped_column(sa.String(MAX_NAME_CHARS), unique=True)
    camera: Mapped[str] = mapped_column(sa.String(MAX_NAME_CHARS), default="")
    energy_min_eV: Mapped[float] = mapped_column(sa.Float)
    energy_max_eV: Mapped[float] = mapped_column(sa.Float)
    geometry: Mapped[dict] = mapped_column(sa.JSON)
    provenance: Mapped[dict] = mapped_column(sa.JSON)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), index=True)
    deleted_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True), nullable=True)


@dataclass(frozen=True, eq=False)
class NamedCalibration:
    """One saved calibration.

    Attributes
    ----------
    key : str
        Its unguessable id (the dropdown value is ``PREFIX + key``).
    name, camera : str
        As typed.
    energy_min_eV, energy_max_eV : float
        The energy range it is meant for, eV.
    geometry : dict
        The camera model as a ScreenGeometry dict.
    provenance : dict
        ``reference_filename``, ``reference_energy_eV``, ``substrate``, ``image_filename``,
        ``energy_eV``, ``source`` (``"reference"``, ``"image"`` or ``"calibration"``), ``residual_px``.
    created_at : datetime
        UTC.
    deleted_at : datetime or None
        UTC, when it was deleted (None: in the list).
    """

    key: str
    name: str
    camera: str
    energy_min_eV: float
    energy_max_eV: float
    geometry: dict
    provenance: dict
    created_at: datetime
    deleted_at: datetime | None = None

    @property
    def value(self) -> str:
        """The dropdown value that picks it."""
        return PREFIX + self.key

    def label(self) -> str:
        """One line for the dropdown: name, camera, energy range, date.

        Returns
        -------
        str
            The line.
        """
        lo, hi = self.energy_min_eV, self.energy_max_eV
        rng = f"{lo:g} eV" if lo == hi else f"{lo:g}–{hi:g} eV"
        cam = f" · {self.camera}" if self.camera else ""
        return f"{self.name}{cam} · {rng} · {self.created_at:%Y-%m-%d}"


def _ready(store) -> sa.Engine:
    eng = store._eng()  # the store's fork-safe engine
    if getattr(store, "_calibrations_table", None) is not eng:
        for attempt in range(5):  # clients saving together may race to create the table
            try:
                _Base.metadata.create_all(eng)
                _add_deleted_column(eng)
                break
            except (sa.exc.IntegrityError, sa.exc.ProgrammingError, sa.exc.OperationalError):
                if attempt == 4:
                    raise
                time.sleep(0.2 * (attempt + 1))
        store._calibrations_table = eng
        purge_deleted_calibrations(store)  # once per engine: those deleted past their keeping time go
    return eng


def _add_deleted_column(eng: sa.Engine) -> None:
    """``deleted_at`` on a table made before calibrations could be deleted (create_all leaves it alone)."""
    if "deleted_at" in {c["name"] for c in sa.inspect(eng).get_columns("calibrations")}:
        return
    kind = "TIMESTAMP WITH TIME ZONE" if eng.dialect.name == "postgresql" else "DATETIME"
    with eng.begin() as conn:  # a race with another process surfaces as an error _ready retries
        conn.exec_driver_sql(f"ALTER TABLE calibrations ADD COLUMN deleted_at {kind}")


def _clean_name(name, what: str = "name") -> str:
    text = "" if name is None else " ".join(str(name).split())
    if len(text) > MAX_NAME_CHARS:
        raise ParameterError(f"The {what} is {len(text)} characters; at most {MAX_NAME_CHARS} characters are kept.")
    return text


def _key_of(value) -> str | None:
    if not isinstance(value, str):
        return None
    key = value[len(PREFIX):] if value.startswith(PREFIX) else value
    return key if key and len(key) <= 64 else None


def _taken_message(conn, name: str, key: str | None = None) -> str | None:
    """Why `name` cannot be given to the calibration `key` (None: it is free)."""
    t = _CalibrationRow
    q = sa.select(t.key, t.deleted_at).where(t.name == name)
    hit = conn.execute(q).first()
    if hit is None or hit.key == key:
        return None
    if hit.deleted_at is not None:
        return (f"A deleted calibration is still named {name!r} (restorable for {KEEP_DELETED_DAYS} days); "
                "choose another name or restore it.")
    return f"A calibration named {name!r} exists already; choose another name."


def _energy(value, what: str) -> float:
    try:
        e = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"The {what} must be a number of eV, got {str(value)[:40]!r}.") from None
    if not math.isfinite(e) or not 0 < e <= _MAX_ENERGY_EV:
        raise ParameterError(f"The {what} must be between 0 and {_MAX_ENERGY_EV:g} eV, got {e:g}.")
    return e


def _row(r) -> NamedCalibration:
    at = r.created_at if r.created_at.tzinfo else r.created_at.replace(tzinfo=timezone.utc)
    gone = getattr(r, "deleted_at", None)
    if gone is not None and gone.tzinfo is None:
        gone = gone.replace(tzinfo=timezone.utc)
    return NamedCalibration(r.key, r.name, r.camera, float(r.energy_min_eV), float(r.energy_max_eV),
                            dict(r.geometry or {}), dict(r.provenance or {}), at, gone)


def save_calibration(store, *, name: str, camera: str = "", energy_range_eV, geometry: dict,
                     provenance: dict) -> NamedCalibration:
    """Save a camera model under `name` (unique in the store) and return it.

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    name : str, keyword-only
        1 to 80 characters; a name already taken is refused.
    camera : str, keyword-only
        Which camera (at most 80 characters).
    energy_range_eV : (float, float), keyword-only
        Lowest and highest energy it is meant for, eV.
    geometry : dict, keyword-only
        The camera model (a ScreenGeometry dict).
    provenance : dict, keyword-only
        Where it came from (see :class:`NamedCalibration`).

    Returns
    -------
    NamedCalibration
        The saved row.
    """
    name, camera = _clean_name(name), _clean_name(camera, "camera")
    if not name:
        raise ParameterError("Give the calibration a name.")
    lo, hi = (_energy(v, w) for v, w in zip(energy_range_eV, ("lowest energy", "highest energy")))
    if lo > hi:
        raise ParameterError(f"The energy range runs from low to high; got {lo:g} to {hi:g} eV.")
    if not isinstance(geometry, dict) or not geometry:
        raise ParameterError("There is no camera model to save: analyse an image (best with a reference) first.")
    if not isinstance(provenance, dict):
        raise ParameterError("`provenance` must be a dict.")
    now = datetime.now(timezone.utc)
    key = secrets.token_urlsafe(16)
    try:
        with _ready(store).begin() as conn:
            taken = _taken_message(conn, name)
            if taken is None:
                conn.execute(sa.insert(_CalibrationRow).values(
                    key=key, name=name, camera=camera, energy_min_eV=lo, energy_max_eV=hi,
                    geometry=geometry, provenance=provenance, created_at=now))
    except sa.exc.IntegrityError:  # another client took the name between the check and the insert
        taken = f"A calibration named {name!r} exists already; choose another name."
    if taken is not None:
        raise ParameterError(taken)
    return NamedCalibration(key, name, camera, lo, hi, geometry, provenance, now)


def list_calibrations(store, limit: int = 200) -> list[NamedCalibration]:
    """The saved calibrations, newest first.

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    limit : int
        Most returned.

    Returns
    -------
    list of NamedCalibration
        Newest first.
    """
    t = _CalibrationRow
    with _ready(store).connect() as conn:
        rows = conn.execute(sa.select(t.__table__).where(t.deleted_at.is_(None))
                            .order_by(t.created_at.desc(), t.id.desc())
                            .limit(max(1, min(int(limit), 1000)))).all()
    return [_row(r) for r in rows]


def get_calibration(store, value: str) -> NamedCalibration | None:
    """The calibration a dropdown value (``PREFIX + key``) or a bare key names, or None (also when deleted).

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    value : str
        ``"cal:<key>"`` or the key.

    Returns
    -------
    NamedCalibration or None
        The calibration.
    """
    key = _key_of(value)
    if key is None:
        return None
    t = _CalibrationRow
    with _ready(store).connect() as conn:
        r = conn.execute(sa.select(t.__table__).where(t.key == key, t.deleted_at.is_(None))).first()
    return None if r is None else _row(r)


def rename_calibration(store, value: str, new_name: str) -> NamedCalibration:
    """Give a saved calibration another name (unique among all kept, deleted ones included).

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    value : str
        ``"cal:<key>"`` or the key.
    new_name : str
        1 to 80 characters; runs of blanks fold to one.

    Returns
    -------
    NamedCalibration
        The renamed calibration.
    """
    name = _clean_name(new_name)
    if not name:
        raise ParameterError("Type the new name of the calibration.")
    key = _key_of(value)
    t = _CalibrationRow
    try:
        with _ready(store).begin() as conn:
            r = None if key is None else conn.execute(
                sa.select(t.__table__).where(t.key == key, t.deleted_at.is_(None))).first()
            if r is None:
                raise ParameterError("This calibration is no longer available; pick another.")
            taken = _taken_message(conn, name, key)
            if taken is None:
                conn.execute(sa.update(t).where(t.key == key).values(name=name))
    except sa.exc.IntegrityError:  # another client took the name between the check and the update
        taken = f"A calibration named {name!r} exists already; choose another name."
    if taken is not None:
        raise ParameterError(taken)
    return get_calibration(store, key)


def delete_calibration(store, value: str) -> bool:
    """Mark a calibration deleted: it leaves the list and cannot be picked; it can be restored for
    :data:`~webapp.store.KEEP_DELETED_DAYS` days. Analyses that used it keep their result.

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    value : str
        ``"cal:<key>"`` or the key.

    Returns
    -------
    bool
        True when a calibration was deleted now.
    """
    return _set_deleted(store, value, datetime.now(timezone.utc))


def restore_calibration(store, value: str) -> bool:
    """Bring a deleted calibration back into the list (before it is purged).

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    value : str
        ``"cal:<key>"`` or the key.

    Returns
    -------
    bool
        True when a calibration was restored now.
    """
    return _set_deleted(store, value, None)


def _set_deleted(store, value, when) -> bool:
    key = _key_of(value)
    if key is None:
        return False
    t = _CalibrationRow
    was = t.deleted_at.is_(None) if when is not None else t.deleted_at.is_not(None)
    with _ready(store).begin() as conn:
        return bool(conn.execute(sa.update(t).where(t.key == key, was).values(deleted_at=when)).rowcount)


def deleted_calibrations(store, limit: int = 100) -> list[NamedCalibration]:
    """The deleted calibrations still kept, most recently deleted first.

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    limit : int
        Most returned.

    Returns
    -------
    list of NamedCalibration
        With `deleted_at` set.
    """
    t = _CalibrationRow
    with _ready(store).connect() as conn:
        rows = conn.execute(sa.select(t.__table__).where(t.deleted_at.is_not(None))
                            .order_by(t.deleted_at.desc(), t.id.desc()).limit(max(1, min(int(limit), 1000)))).all()
    return [_row(r) for r in rows]


def purge_deleted_calibrations(store, *, days: float = KEEP_DELETED_DAYS, now: datetime | None = None) -> int:
    """Remove for good the calibrations deleted more than `days` ago.

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    days : float, keyword-only
        How long a deleted calibration is kept.
    now : datetime, optional, keyword-only
        The time to count from (default: now, UTC).

    Returns
    -------
    int
        The number removed.
    """
    now = datetime.now(timezone.utc) if now is None else (now if now.tzinfo else now.replace(tzinfo=timezone.utc))
    t = _CalibrationRow
    with _ready(store).begin() as conn:
        return int(conn.execute(sa.delete(t).where(t.deleted_at.is_not(None),
                                                   t.deleted_at < now - timedelta(days=float(days)))).rowcount)


def provenance_of(record: dict | None, image: dict | None = None) -> dict:
    """Where the camera model of an analysis record came from.

    Parameters
    ----------
    record : dict or None
        The analyse page's record: ``parameters`` and ``result``.
    image : dict, optional
        The image store (its ``filename``).

    Returns
    -------
    dict
        See :class:`NamedCalibration`.
    """
    rec = record or {}
    params = rec.get("parameters") or {}
    result = rec.get("result") or {}
    src = result.get("calibration_source") or "none"
    return {
        "source": {"reference": "reference", "calibration": "calibration"}.get(src, "image"),
        "reference_filename": params.get("reference_filename") or None,
        "reference_energy_eV": params.get("reference_energy_eV"),
        "substrate": params.get("substrate") or "",
        "image_filename": (image or {}).get("filename") or None,
        "energy_eV": params.get("energy_eV"),
        "residual_px": (result.get("substrate") or {}).get("residual_px"),
    }


def resolve(store, value: str | None) -> dict | None:
    """The camera model a calibration choice stands for: a named calibration or a saved analysis's.

    Parameters
    ----------
    store : webapp.store.Store
        The group's store.
    value : str or None
        ``"cal:<key>"`` for a named calibration, else a saved analysis's share token.

    Returns
    -------
    dict or None
        The ScreenGeometry dict, or None when nothing (left) stands behind the value.
    """
    from webapp import service  # service imports this module: a top-level import would be circular

    if not value:
        return None
    if str(value).startswith(PREFIX):
        cal = get_calibration(store, value)
        return None if cal is None else cal.geometry
    saved = store.get_analysis(value)
    return service.calibration_of(saved.result if saved else None)
