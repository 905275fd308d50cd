"""The specimen store: records in a database, files in a shared data folder.

Nothing lives only in one process, so several service instances pointed at one database
and one data folder serve the same specimens. A specimen is written files first (durably),
record second; it exists for readers once its record is committed.
"""

from __future__ import annotations

import secrets
import shutil
import time
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, delete, event, func, select
from sqlalchemy.exc import IntegrityError, OperationalError, ProgrammingError
from sqlalchemy.orm import Session

from service.errors import ConflictError
from service.store.files import write_folder_durably
from service.store.models import Base, ReadingRow, SpecimenRow

#: Bytes of randomness in a specimen id (144 bits; 24 URL-safe characters).
ID_BYTES = 18


def new_specimen_id() -> str:
    """A random, URL-safe specimen id that cannot be guessed (at least 128 bits)."""
    return secrets.token_urlsafe(ID_BYTES)


@dataclass(frozen=True)
class SpecimenRecord:
    """A stored specimen as read back from the store."""

    id: str
    owner: str | None
    label: str | None
    kind: str | None
    filename: str | None
    created_at: datetime
    sha256: str
    analysis: dict[str, Any]
    files: tuple[str, ...]
    #: Where each of ``files`` lies under the specimen's folder (same order): the plain name
    #: for files written with the upload, ``<reading folder>/<name>`` for later readings.
    stored_paths: tuple[str, ...] = ()

    def stored_path(self, name: str) -> str | None:
        """The stored path of file ``name`` under the specimen's folder, or None."""
        for public, stored in zip(self.files, self.stored_paths or self.files):
            if public == name:
                return stored
        return None

    def to_dict(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "label": self.label,
            "kind": self.kind,
            "filename": self.filename,
            "created_at": self.created_at.isoformat(),
            "sha256": self.sha256,
            "files": list(self.files),
        }


@dataclass(frozen=True)
class Reading:
    """One entry of a specimen's history: its number (1 = the upload), when, and the details
    the web layer recorded (settings asked for, settings used, key results)."""

    number: int
    created_at: datetime
    details: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        return {**self.details, "number": self.number, "created_at": self.created_at.isoformat()}


def _utc(moment: datetime) -> datetime:
    # SQLite hands back naive datetimes; every moment stored is UTC.
    return moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)


def _record(row: SpecimenRow) -> SpecimenRecord:
    created = _utc(row.created_at)
    stored = tuple(row.files)
    return SpecimenRecord(
        id=row.id,
        owner=row.owner,
        label=row.label,
        kind=row.kind,
        filename=row.filename,
        created_at=created,
        sha256=row.sha256,
        analysis=row.analysis,
        files=tuple(path.rsplit("/", 1)[-1] for path in stored),
        stored_paths=stored,
    )


def _sqlite_pragmas(dbapi_connection, _record) -> None:
    # WAL lets readers and one writer work at once (several instances on one file);
    # synchronous=FULL makes every commit durable across power loss, not only crashes.
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA synchronous=FULL")
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.close()


def make_engine(url: str, **kwargs: Any) -> Engine:
    """An engine for ``url``; SQLite files get WAL mode, full sync and a busy timeout."""
    if url.startswith("sqlite"):
        kwargs.setdefault("connect_args", {}).setdefault("check_same_thread", False)
        engine = create_engine(url, **kwargs)
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    kwargs.setdefault("pool_pre_ping", True)
    return create_engine(url, **kwargs)


class Store:
    """Specimen records (database) and their files (``<data_dir>/specimens/<id>/``).

    ``owner`` arguments scope every read and write to one lab; ``None`` means no scoping
    (the open single-user service).
    """

    def __init__(self, engine: Engine, data_dir: Path) -> None:
        self.engine = engine
        self.data_dir = Path(data_dir)
        self.specimens_dir = self.data_dir / "specimens"

    @classmethod
    def open(cls, database_url: str, data_dir: Path, **engine_kwargs: Any) -> Store:
        """Connect, create the data folder and the schema (idempotent), return the store."""
        data_dir = Path(data_dir)
        data_dir.mkdir(parents=True, exist_ok=True)
        store = cls(make_engine(database_url, **engine_kwargs), data_dir)
        store.create_schema()
        return store

    def create_schema(self) -> None:
        """Create missing tables; safe when several instances start at the same moment."""
        self.specimens_dir.mkdir(parents=True, exist_ok=True)
        # Another instance may create a table between our check and our CREATE; with several
        # tables that can happen once per table, so try again as many times as there are.
        for attempt in range(len(Base.metadata.tables) + 1):
            try:
                Base.metadata.create_all(self.engine)
                return
            except (IntegrityError, ProgrammingError, OperationalError):
                if attempt == len(Base.metadata.tables):
                    raise

    def close(self) -> None:
        self.engine.dispose()

    def folder(self, specimen_id: str) -> Path:
        return self.specimens_dir / specimen_id

    def add(
        self,
        analysis: Mapping[str, Any],
        files: Mapping[str, bytes],
        *,
        label: str | None = None,
        kind: str | None = None,
        filename: str | None = None,
        owner: str | None = None,
        specimen_id: str | None = None,
        reading: Mapping[str, Any] | None = None,
    ) -> SpecimenRecord:
        """Store one specimen durably: files (fsync, rename, fsync folder), then the commit.

        ``reading`` becomes entry 1 of the specimen's history (see :meth:`history`).
        Returns only once both are on disk; if the commit fails the files are removed.
        """
        specimen_id = specimen_id or new_specimen_id()
        folder = self.folder(specimen_id)
        write_folder_durably(folder, files)  # refuses an existing folder: ids never collide silently
        row = SpecimenRow(
            id=specimen_id,
            owner=owner,
            label=label,
            kind=kind,
            filename=filename,
            created_at=datetime.now(timezone.utc),
            sha256=str(analysis.get("source", {}).get("sha256", "")),
            analysis=dict(analysis),
            files=sorted(files),
        )
        try:
            with Session(self.engine, expire_on_commit=False) as session, session.begin():
                session.add(row)
                session.add(ReadingRow(specimen_id=specimen_id, number=1, created_at=row.created_at,
                                       details=dict(reading or {})))
        except BaseException:  # nothing acknowledged: leave no orphan files behind
            shutil.rmtree(folder, ignore_errors=True)
            raise
        return _record(row)

    def get(self, specimen_id: str, *, owner: str | None = None) -> SpecimenRecord | None:
        """The specimen, or ``None`` when it does not exist or belongs to another owner."""
        with Session(self.engine) as session:
            row = session.get(SpecimenRow, specimen_id)
            if row is None or (owner is not None and row.owner != owner):
                return None
            return _record(row)

    def get_many(self, specimen_ids: list[str], *, owner: str | None = None) -> list[SpecimenRecord]:
        """The specimens among ``specimen_ids`` that exist (and are the owner's), in the given order."""
        with Session(self.engine) as session:
            query = select(SpecimenRow).where(SpecimenRow.id.in_(specimen_ids))
            if owner is not None:
                query = query.where(SpecimenRow.owner == owner)
            found = {row.id: _record(row) for row in session.scalars(query)}
        return [found[i] for i in dict.fromkeys(specimen_ids) if i in found]

    def list(
        self,
        *,
        owner: str | None = None,
        label: str | None = None,
        label_contains: str | None = None,
        limit: int | None = 50,
        offset: int = 0,
    ) -> tuple[list[SpecimenRecord], int]:
        """A page of specimens, newest first, and the total number matching the filter.

        ``label`` matches whole labels; ``label_contains`` any label holding that text, in any case
        (``%`` and ``_`` in it are matched literally).
        """
        if (limit is not None and limit < 0) or offset < 0:
            raise ValueError(f"limit and offset must not be negative, got limit={limit}, offset={offset}")
        conditions = []
        if owner is not None:
            conditions.append(SpecimenRow.owner == owner)
        if label is not None:
            conditions.append(SpecimenRow.label == label)
        if label_contains:
            escaped = label_contains.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
            conditions.append(SpecimenRow.label.ilike(f"%{escaped}%", escape="\\"))
        with Session(self.engine) as session:
            total = session.scalar(select(func.count()).select_from(SpecimenRow).where(*conditions))
            query = (
                select(SpecimenRow)
                .where(*conditions)
                .order_by(SpecimenRow.created_at.desc(), SpecimenRow.id.desc())
                .offset(offset)
                .limit(limit)
            )
            records = [_record(row) for row in session.scalars(query)]
        return records, int(total or 0)

    def history(self, specimen_id: str, *, owner: str | None = None) -> list[Reading] | None:
        """The specimen's readings, oldest first; ``None`` when the specimen is not the owner's.

        A specimen stored before readings were kept has none until it is measured again.
        """
        with Session(self.engine) as session:
            row = session.get(SpecimenRow, specimen_id)
            if row is None or (owner is not None and row.owner != owner):
                return None
            query = select(ReadingRow).where(ReadingRow.specimen_id == specimen_id).order_by(ReadingRow.number)
            return [Reading(r.number, _utc(r.created_at), dict(r.details)) for r in session.scalars(query)]

    def replace(
        self,
        specimen_id: str,
        analysis: Mapping[str, Any],
        files: Mapping[str, bytes],
        *,
        keep: tuple[str, ...] = (),
        reading: Mapping[str, Any],
        owner: str | None = None,
        first_reading: Mapping[str, Any] | None = None,
    ) -> SpecimenRecord | None:
        """A new reading of a stored specimen: new analysis and pictures, same id, label, kind.

        Strategy: the new ``files`` are written durably into a fresh folder of their own
        inside the specimen's folder; one transaction then points the record at them (plus
        the current files named in ``keep``, e.g. the uploaded original) and appends
        ``reading`` to the history; only after the commit are the replaced files removed.
        A crash before the commit leaves the record and its files as they were. Two
        re-measurements racing for the same reading number cannot both commit: the second
        raises ``ConflictError`` and leaves nothing behind. ``first_reading`` is recorded
        as reading 1 of a specimen stored before readings were kept.

        Returns the updated record, or ``None`` when the specimen is not the owner's.
        """
        current = self.get(specimen_id, owner=owner)
        if current is None:
            return None
        missing = [name for name in keep if name not in current.files]
        if missing:
            raise ValueError(f"cannot keep files the specimen does not have: {missing}")
        overlap = sorted(set(keep) & set(files))
        if overlap:
            raise ValueError(f"files both kept and replaced: {overlap}")
        history = self.history(specimen_id, owner=owner) or []
        number = (history[-1].number if history else 1) + 1
        subfolder = f"reading-{number}-{secrets.token_hex(4)}"
        folder = self.folder(specimen_id) / subfolder
        write_folder_durably(folder, files)
        stored = sorted([current.stored_path(name) for name in keep] + [f"{subfolder}/{name}" for name in files],
                        key=lambda path: path.rsplit("/", 1)[-1])
        now = datetime.now(timezone.utc)
        try:
            with Session(self.engine, expire_on_commit=False) as session, session.begin():
                row = session.get(SpecimenRow, specimen_id)
                if row is None or (owner is not None and row.owner != owner):
                    raise ConflictError(f"specimen {specimen_id!r} was deleted while it was being measured again")
                if list(row.files) != list(current.stored_paths):
                    raise ConflictError(f"specimen {specimen_id!r} was measured again by another request meanwhile; "
                                        "reload it and try again")
                if not history:
                    session.add(ReadingRow(specimen_id=specimen_id, number=1, created_at=row.created_at,
                                           details=dict(first_reading or {})))
                session.add(ReadingRow(specimen_id=specimen_id, number=number, created_at=now, details=dict(reading)))
                row.analysis = dict(analysis)
                row.files = stored
                row.sha256 = str(analysis.get("source", {}).get("sha256", row.sha256))
        except IntegrityError as exc:  # the unique reading number: another request committed it first
            shutil.rmtree(folder, ignore_errors=True)
            raise ConflictError(f"specimen {specimen_id!r} was measured again by another request meanwhile; "
                                "reload it and try again") from exc
        except BaseException:
            shutil.rmtree(folder, ignore_errors=True)
            raise
        updated = _record(row)
        self._remove_replaced(current, set(stored))
        return updated

    def _remove_replaced(self, previous: SpecimenRecord, still_used: set[str]) -> None:
        """Remove the files of ``previous`` the record no longer names (after the commit)."""
        base = self.folder(previous.id)
        for path in previous.stored_paths:
            if path in still_used:
                continue
            (base / path).unlink(missing_ok=True)
            parent = (base / path).parent
            if parent != base and not any(parent.iterdir()):
                parent.rmdir()

    def delete(self, specimen_id: str, *, owner: str | None = None) -> bool:
        """Remove the record and its history (commit first), then its files; ``False`` if there was none."""
        with Session(self.engine) as session, session.begin():
            row = session.get(SpecimenRow, specimen_id)
            if row is None or (owner is not None and row.owner != owner):
                return False
            session.delete(row)
            session.execute(delete(ReadingRow).where(ReadingRow.specimen_id == specimen_id))
        shutil.rmtree(self.folder(specimen_id), ignore_errors=True)
        return True

    def sweep_orphans(self, *, older_than_s: float = 3600.0) -> list[str]:
        """Remove specimen folders that no record names, once they are ``older_than_s`` old.

        A server killed between writing a specimen's files and committing its record leaves
        such a folder; it was never acknowledged, so nothing is lost by removing it. The age
        guard spares the folders of uploads another instance is committing right now.
        Returns the ids removed.
        """
        if not self.specimens_dir.is_dir():
            return []
        cutoff = time.time() - older_than_s
        candidates = [p for p in self.specimens_dir.iterdir() if p.is_dir() and p.stat().st_mtime < cutoff]
        if not candidates:
            return []
        with Session(self.engine) as session:
            known = set(session.scalars(select(SpecimenRow.id).where(SpecimenRow.id.in_([p.name for p in candidates]))))
        removed = [p.name for p in candidates if p.name not in known]
        for specimen_id in removed:
            shutil.rmtree(self.folder(specimen_id), ignore_errors=True)
        return removed

    def sweep_unused_readings(self, *, older_than_s: float = 3600.0) -> list[str]:
        """Remove reading folders (``<id>/reading-*``) their record does not name, once old.

        A re-measurement killed between writing its pictures and its commit leaves one; it
        was never acknowledged. Returns the removed folders as ``<id>/<folder>``.
        """
        if not self.specimens_dir.is_dir():
            return []
        cutoff = time.time() - older_than_s
        old = [p for p in self.specimens_dir.glob("*/reading-*") if p.is_dir() and p.stat().st_mtime < cutoff]
        if not old:
            return []
        with Session(self.engine) as session:
            query = select(SpecimenRow.id, SpecimenRow.files).where(SpecimenRow.id.in_({p.parent.name for p in old}))
            used = {f"{specimen_id}/{path.rsplit('/', 1)[0]}"
                    for specimen_id, files in session.execute(query) for path in files if "/" in path}
        removed = [f"{p.parent.name}/{p.name}" for p in old if f"{p.parent.name}/{p.name}" not in used]
        for relative in removed:
            shutil.rmtree(self.specimens_dir / relative, ignore_errors=True)
        return removed

    def file_path(self, record: SpecimenRecord, name: str) -> Path | None:
        """Path of one of the record's stored files, or ``None`` if it has no such file."""
        stored = record.stored_path(name)
        if stored is None:
            return None
        return self.folder(record.id) / stored
