"""Database tables of the specimen store (SQLAlchemy, the same schema on SQLite and PostgreSQL)."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import JSON, DateTime, Index, Integer, String, UniqueConstraint
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column


class Base(DeclarativeBase):
    pass


class SpecimenRow(Base):
    """One analysed specimen: its analysis JSON and the names of its stored files.

    The files themselves live in the data folder under ``specimens/<id>/``; a row is only
    committed after they are durably written, so every row's files exist. An entry of
    ``files`` is a plain name (written with the upload) or ``<reading folder>/<name>``
    (written when the specimen was measured again).
    """

    __tablename__ = "specimens"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    #: The lab that uploaded it when access control is on; ``None`` on an open service.
    owner: Mapped[str | None] = mapped_column(String(128), index=True)
    label: Mapped[str | None] = mapped_column(String(256), index=True)
    #: What the specimen is (electrodeposit, vessel, coral, root, other), if the uploader said.
    kind: Mapped[str | None] = mapped_column(String(32))
    filename: Mapped[str | None] = mapped_column(String(512))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    sha256: Mapped[str] = mapped_column(String(64))
    analysis: Mapped[dict[str, Any]] = mapped_column(JSON)
    files: Mapped[list[str]] = mapped_column(JSON)

    __table_args__ = (Index("ix_specimens_owner_created", "owner", "created_at"),)


class ReadingRow(Base):
    """One reading of a specimen's image: the settings asked for and what came of them.

    Reading 1 is the upload; each re-measurement appends the next number. The pair
    (specimen, number) is unique, so two re-measurements racing for the same number cannot
    both commit. A table of its own (not a column) so that databases made by earlier
    versions gain it through ``create_all`` without a migration.
    """

    __tablename__ = "specimen_readings"

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    specimen_id: Mapped[str] = mapped_column(String(64), index=True)
    number: Mapped[int] = mapped_column(Integer)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    details: Mapped[dict[str, Any]] = mapped_column(JSON)

    __table_args__ = (UniqueConstraint("specimen_id", "number", name="uq_specimen_readings_number"),)
