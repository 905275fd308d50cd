"""The film store: one record per analysed growth film, its pictures in the data folder.

Same pattern as specimens (``service.store.store``): files are written durably first into
``<data_dir>/films/<id>/``, then the record is committed; a film exists for readers once its
record is. The table is added by ``create_all`` beside the others, no migration needed.
"""

from __future__ import annotations

import shutil
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from sqlalchemy import JSON, DateTime, Index, String, func, select
from sqlalchemy.orm import Mapped, Session, mapped_column

from service.store.files import write_folder_durably
from service.store.models import Base
from service.store.store import new_specimen_id


class FilmRow(Base):
    """One analysed film: its analysis JSON (the contract of ``ramiform film --json``) and file names."""

    __tablename__ = "films"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    owner: Mapped[str | None] = mapped_column(String(128), index=True)
    label: Mapped[str | None] = mapped_column(String(256), index=True)
    filename: Mapped[str | None] = mapped_column(String(512))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    analysis: Mapped[dict[str, Any]] = mapped_column(JSON)
    files: Mapped[list[str]] = mapped_column(JSON)

    __table_args__ = (Index("ix_films_owner_created", "owner", "created_at"),)


@dataclass(frozen=True)
class FilmRecord:
    id: str
    owner: str | None
    label: str | None
    filename: str | None
    created_at: datetime
    analysis: dict[str, Any]
    files: tuple[str, ...]


def _record(row: FilmRow) -> FilmRecord:
    created = row.created_at if row.created_at.tzinfo else row.created_at.replace(tzinfo=timezone.utc)
    return FilmRecord(row.id, row.owner, row.label, row.filename, created, row.analysis, tuple(row.files))


class FilmStore:
    """Film records beside the specimen store (same engine, ``<data_dir>/films/<id>/``)."""

    def __init__(self, store) -> None:
        self.engine = store.engine
        self.films_dir = Path(store.data_dir) / "films"

    def folder(self, film_id: str) -> Path:
        return self.films_dir / film_id

    def add(self, analysis: Mapping[str, Any], files: Mapping[str, bytes], *, label: str | None = None,
            filename: str | None = None, owner: str | None = None) -> FilmRecord:
        """Store one film durably (files, then the commit); the files go if the commit fails."""
        film_id = new_specimen_id()
        folder = self.folder(film_id)
        write_folder_durably(folder, files)
        row = FilmRow(id=film_id, owner=owner, label=label, filename=filename, created_at=datetime.now(timezone.utc),
                      analysis=dict(analysis), files=sorted(files))
        try:
            with Session(self.engine, expire_on_commit=False) as session, session.begin():
                session.add(row)
        except BaseException:
            shutil.rmtree(folder, ignore_errors=True)
            raise
        return _record(row)

    def get(self, film_id: str, *, owner: str | None = None) -> FilmRecord | None:
        with Session(self.engine) as session:
            row = session.get(FilmRow, film_id)
            if row is None or (owner is not None and row.owner != owner):
                return None
            return _record(row)

    def list(self, *, owner: str | None = None, label: str | None = None, limit: int = 50, offset: int = 0
             ) -> tuple[list[FilmRecord], int]:
        conditions = []
        if owner is not None:
            conditions.append(FilmRow.owner == owner)
        if label is not None:
            conditions.append(FilmRow.label == label)
        with Session(self.engine) as session:
            total = session.scalar(select(func.count()).select_from(FilmRow).where(*conditions))
            rows = session.scalars(select(FilmRow).where(*conditions)
                                   .order_by(FilmRow.created_at.desc(), FilmRow.id.desc()).offset(offset).limit(limit))
            return [_record(r) for r in rows], int(total or 0)

    def delete(self, film_id: str, *, owner: str | None = None) -> bool:
        """Remove the record (commit first), then its files; ``False`` if there was none."""
        with Session(self.engine) as session, session.begin():
            row = session.get(FilmRow, film_id)
            if row is None or (owner is not None and row.owner != owner):
                return False
            session.delete(row)
        shutil.rmtree(self.folder(film_id), ignore_errors=True)
        return True

    def file_path(self, record: FilmRecord, name: str) -> Path | None:
        return self.folder(record.id) / name if name in record.files else None
