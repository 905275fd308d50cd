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

from sqlalchemy import Engine, create_engine, event, func, select
from sqlalchemy.exc import IntegrityError, OperationalError, ProgrammingError
from sqlalchemy.orm import Session

from service.store.files import write_folder_durably
from service.store.models import Base, SpecimenRow

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


def _record(row: SpecimenRow) -> SpecimenRecord:
    created = row.created_at if row.created_at.tzinfo else row.created_at.replace(tzinfo=timezone.utc)
    return SpecimenRecord(
        id=row.id,
        owner=row.owner,
        label=row.label,
        kind=row.kind,
        filename=row.filename,
        created_at=created,
        sha256=row.sha256,
        analysis=row.analysis,
        files=tuple(row.files),
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
        try:
            Base.metadata.create_all(self.engine)
        except (IntegrityError, ProgrammingError, OperationalError):
            # Another instance created the same table between our check and our CREATE.
            Base.metadata.create_all(self.engine)

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
    ) -> SpecimenRecord:
        """Store one specimen durably: files (fsync, rename, fsync folder), then the commit.

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
        limit: int | None = 50,
        offset: int = 0,
    ) -> tuple[list[SpecimenRecord], int]:
        """A page of specimens, newest first, and the total number matching the filter."""
        if (limit is not None and limit < 0) or offset < 0:
            raise ValueError(f"limit and offset must not be negative, got limit={limit}, offset={offset}")
        conditions = []
        if owner is not None:
            conditions.append(SpecimenRow.owner == owner)
        if label is not None:
            conditions.append(SpecimenRow.label == label)
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

    def delete(self, specimen_id: str, *, owner: str | None = None) -> bool:
        """Remove the record (commit first), then its files; ``False`` if there was none."""
        with Session(self.engine) as session, session.begin():
            row = session.get(SpecimenRow, specimen_id)
            if row is None or (owner is not None and row.owner != owner):
                return False
            session.delete(row)
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

    def file_path(self, record: SpecimenRecord, name: str) -> Path | None:
        """Path of one of the record's stored files, or ``None`` if it has no such file."""
        if name not in record.files:
            return None
        return self.folder(record.id) / name
