"""Studies in the store: a study groups specimens and growth films; each carries its conditions.

Three tables beside the specimens (created by ``Store.create_schema`` like every table of
``Base``): ``studies``, ``study_members`` (study, specimen) and ``specimen_conditions``
(one row per condition of a specimen, so the same specimen shows the same conditions in
every study it belongs to). A growth film (table ``films``) is a member the same way: its
``specimen_id`` columns hold the film's id (ids of both tables come from one random
generator, see ``new_specimen_id``), and every id is resolved in both tables. Each change is one transaction: a request that fails (an
unknown specimen, a condition clashing with the study's) changes nothing.
"""

from __future__ import annotations

import secrets
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any

from sqlalchemy import DateTime, Engine, Float, Integer, String, UniqueConstraint, delete, func, or_, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Mapped, Session, mapped_column

from service.errors import ConflictError, RamiformError
from service.store.films import FilmRecord, FilmRow
from service.store.films import _record as _film_record
from service.store.models import Base, SpecimenRow
from service.store.store import SpecimenRecord, _record, _utc
from service.study.conditions import Condition, check_consistent, parse_condition


class UnknownSpecimenError(RamiformError):
    """A specimen or film named in a request does not exist (or is another lab's); nothing was changed."""

    status_code = 404


class StudyRow(Base):
    """One study: a named group of specimens (a voltage series, a survey of sites...)."""

    __tablename__ = "studies"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    owner: Mapped[str | None] = mapped_column(String(128), index=True)
    name: Mapped[str] = mapped_column(String(200))
    description: Mapped[str] = mapped_column(String(4000), default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class StudyMemberRow(Base):
    """A specimen's membership of a study; ``position`` keeps the order they were added in."""

    __tablename__ = "study_members"

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    study_id: Mapped[str] = mapped_column(String(64), index=True)
    specimen_id: Mapped[str] = mapped_column(String(64), index=True)
    position: Mapped[int] = mapped_column(Integer)
    added_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))

    __table_args__ = (UniqueConstraint("study_id", "specimen_id", name="uq_study_members_specimen"),)


class SpecimenConditionRow(Base):
    """One condition of a specimen: a number with its unit as written, or a text."""

    __tablename__ = "specimen_conditions"

    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=True)
    specimen_id: Mapped[str] = mapped_column(String(64), index=True)
    name: Mapped[str] = mapped_column(String(64))
    quantity: Mapped[str] = mapped_column(String(32))
    number: Mapped[float | None] = mapped_column(Float)
    unit: Mapped[str | None] = mapped_column(String(32))
    text: Mapped[str | None] = mapped_column(String(200))

    __table_args__ = (UniqueConstraint("specimen_id", "name", name="uq_specimen_conditions_name"),)


@dataclass(frozen=True)
class StudyRecord:
    id: str
    owner: str | None
    name: str
    description: str
    created_at: datetime
    n_specimens: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "name": self.name, "description": self.description,
                "created_at": self.created_at.isoformat(), "n_specimens": self.n_specimens}


def new_study_id() -> str:
    """A random, URL-safe study id that cannot be guessed (144 bits)."""
    return secrets.token_urlsafe(18)


def _condition(row: SpecimenConditionRow) -> Condition:
    if row.quantity == "text":
        return parse_condition(row.name, row.text or "")
    return parse_condition(row.name, {"value": row.number, "unit": row.unit})


def _condition_row(specimen_id: str, condition: Condition) -> SpecimenConditionRow:
    return SpecimenConditionRow(
        specimen_id=specimen_id, name=condition.name, quantity=condition.quantity,
        number=condition.value if condition.is_number else None,
        unit=condition.unit, text=None if condition.is_number else str(condition.value))


class StudyStore:
    """Studies, memberships and conditions over the specimen store's engine.

    ``owner`` scopes every read and write to one lab (``None``: no scoping), as in ``Store``.
    """

    def __init__(self, engine: Engine) -> None:
        self.engine = engine

    # -- studies ---------------------------------------------------------------------------
    def create(self, name: str, description: str = "", *, owner: str | None = None) -> StudyRecord:
        row = StudyRow(id=new_study_id(), owner=owner, name=name, description=description or "",
                       created_at=datetime.now(timezone.utc))
        with Session(self.engine, expire_on_commit=False) as session, session.begin():
            session.add(row)
        return StudyRecord(row.id, row.owner, row.name, row.description, _utc(row.created_at), 0)

    def _counts(self, session: Session, ids: Sequence[str]) -> dict[str, int]:
        query = (select(StudyMemberRow.study_id, func.count())
                 .where(StudyMemberRow.study_id.in_(ids),
                        or_(StudyMemberRow.specimen_id.in_(select(SpecimenRow.id)),
                            StudyMemberRow.specimen_id.in_(select(FilmRow.id))))
                 .group_by(StudyMemberRow.study_id))
        return {study_id: int(n) for study_id, n in session.execute(query)}

    def list(self, *, owner: str | None = None, name: str | None = None) -> list[StudyRecord]:
        """Studies, newest first (``name``: only those of exactly that name)."""
        with Session(self.engine) as session:
            query = select(StudyRow).order_by(StudyRow.created_at.desc(), StudyRow.id)
            if owner is not None:
                query = query.where(StudyRow.owner == owner)
            if name is not None:
                query = query.where(StudyRow.name == name)
            rows = list(session.scalars(query))
            counts = self._counts(session, [r.id for r in rows]) if rows else {}
        return [StudyRecord(r.id, r.owner, r.name, r.description, _utc(r.created_at), counts.get(r.id, 0))
                for r in rows]

    def get(self, study_id: str, *, owner: str | None = None) -> StudyRecord | None:
        with Session(self.engine) as session:
            row = session.get(StudyRow, study_id)
            if row is None or (owner is not None and row.owner != owner):
                return None
            count = self._counts(session, [row.id]).get(row.id, 0)
            return StudyRecord(row.id, row.owner, row.name, row.description, _utc(row.created_at), count)

    def delete(self, study_id: str, *, owner: str | None = None) -> bool:
        """Remove the study and its memberships (the specimens and their conditions stay)."""
        with Session(self.engine) as session, session.begin():
            row = session.get(StudyRow, study_id)
            if row is None or (owner is not None and row.owner != owner):
                return False
            session.delete(row)
            session.execute(delete(StudyMemberRow).where(StudyMemberRow.study_id == study_id))
        return True

    # -- members and conditions --------------------------------------------------------------
    def _conditions(self, session: Session, specimen_ids: Sequence[str]) -> dict[str, dict[str, Condition]]:
        found: dict[str, dict[str, Condition]] = {i: {} for i in specimen_ids}
        if not specimen_ids:
            return found
        query = (select(SpecimenConditionRow).where(SpecimenConditionRow.specimen_id.in_(specimen_ids))
                 .order_by(SpecimenConditionRow.id))
        for row in session.scalars(query):
            found[row.specimen_id][row.name] = _condition(row)
        return found

    def _member_ids(self, session: Session, study_id: str) -> list[str]:
        query = (select(StudyMemberRow.specimen_id).where(StudyMemberRow.study_id == study_id)
                 .order_by(StudyMemberRow.position, StudyMemberRow.id))
        return list(session.scalars(query))

    def members(self, study_id: str, *, owner: str | None = None
                ) -> list[tuple[SpecimenRecord | FilmRecord, dict[str, Condition]]] | None:
        """The study's specimens and films in the order added, each with its conditions; ``None``
        when the study is not the owner's. A specimen or film deleted since is left out."""
        with Session(self.engine) as session:
            study = session.get(StudyRow, study_id)
            if study is None or (owner is not None and study.owner != owner):
                return None
            ids = self._member_ids(session, study_id)
            specimens: dict[str, SpecimenRecord | FilmRecord] = {
                row.id: _record(row) for row in session.scalars(select(SpecimenRow).where(SpecimenRow.id.in_(ids)))}
            specimens.update({row.id: _film_record(row)
                              for row in session.scalars(select(FilmRow).where(FilmRow.id.in_(ids)))
                              if row.id not in specimens})
            conditions = self._conditions(session, list(specimens))
        return [(specimens[i], conditions[i]) for i in ids if i in specimens]

    def conditions_of(self, specimen_id: str) -> dict[str, Condition]:
        with Session(self.engine) as session:
            return self._conditions(session, [specimen_id])[specimen_id]

    @staticmethod
    def _known(session: Session, ids: Sequence[str], owner: str | None) -> set[str]:
        """The ids among ``ids`` naming a specimen or a film of the owner's."""
        known: set[str] = set()
        for row_type in (SpecimenRow, FilmRow):
            query = select(row_type.id).where(row_type.id.in_(ids))
            if owner is not None:
                query = query.where(row_type.owner == owner)
            known.update(session.scalars(query))
        return known

    def _check_specimens(self, session: Session, ids: Sequence[str], owner: str | None) -> None:
        known = self._known(session, ids, owner)
        missing = [i for i in ids if i not in known]
        if missing:
            raise UnknownSpecimenError(f"no specimen or film {missing[0]!r}" + (f" (and {len(missing) - 1} more)"
                                                                        if len(missing) > 1 else "")
                                       + "; nothing was attached")

    def _write_conditions(self, session: Session, specimen_id: str, conditions: Mapping[str, Condition]) -> None:
        if not conditions:
            return
        session.execute(delete(SpecimenConditionRow).where(SpecimenConditionRow.specimen_id == specimen_id,
                                                           SpecimenConditionRow.name.in_(list(conditions))))
        session.flush()
        for condition in conditions.values():
            session.add(_condition_row(specimen_id, condition))

    def _check_studies_of(self, session: Session, specimen_ids: Sequence[str],
                          proposed: Mapping[str, dict[str, Condition]], extra_study: str | None = None) -> None:
        """Raise ConditionError if the proposed conditions clash with a study the specimens are (or will be) in."""
        studies = set(session.scalars(select(StudyMemberRow.study_id).where(StudyMemberRow.specimen_id.in_(specimen_ids))))
        if extra_study is not None:
            studies.add(extra_study)
        for study_id in sorted(studies):
            ids = list(dict.fromkeys(self._member_ids(session, study_id)
                                     + ([*specimen_ids] if study_id == extra_study else [])))
            current = self._conditions(session, ids)
            check_consistent({**current[i], **proposed.get(i, {})} for i in ids)

    def attach(self, study_id: str, entries: Sequence[tuple[str, Mapping[str, Condition] | None]], *,
               owner: str | None = None) -> bool:
        """Add specimens or films by id (each optionally with conditions, merged into its own) to the study.

        All or nothing: an unknown specimen raises ``UnknownSpecimenError`` (404), a
        condition whose quantity clashes with the same name elsewhere in one of its studies
        ``ConditionError`` (422), and the study and every specimen stay as they were.
        Specimens already in the study keep their place (their conditions are updated).
        Returns False when the study is not the owner's.
        """
        ids = list(dict.fromkeys(specimen_id for specimen_id, _ in entries))
        proposed: dict[str, dict[str, Condition]] = {}
        for specimen_id, conditions in entries:
            proposed.setdefault(specimen_id, {}).update(conditions or {})
        try:
            with Session(self.engine) as session, session.begin():
                study = session.get(StudyRow, study_id)
                if study is None or (owner is not None and study.owner != owner):
                    return False
                self._check_specimens(session, ids, owner)
                self._check_studies_of(session, ids, proposed, extra_study=study_id)
                present = set(self._member_ids(session, study_id))
                position = session.scalar(select(func.max(StudyMemberRow.position))
                                          .where(StudyMemberRow.study_id == study_id))
                position = -1 if position is None else int(position)
                now = datetime.now(timezone.utc)
                for specimen_id in ids:
                    self._write_conditions(session, specimen_id, proposed[specimen_id])
                    if specimen_id not in present:
                        position += 1
                        session.add(StudyMemberRow(study_id=study_id, specimen_id=specimen_id,
                                                   position=position, added_at=now))
        except IntegrityError as exc:  # a racing request added the same specimen first
            raise ConflictError("another request changed this study meanwhile; nothing was attached, "
                                "try again") from exc
        return True

    def detach(self, study_id: str, specimen_id: str, *, owner: str | None = None) -> bool:
        """Take a specimen out of the study (it and its conditions stay); False if it was not in it."""
        with Session(self.engine) as session, session.begin():
            study = session.get(StudyRow, study_id)
            if study is None or (owner is not None and study.owner != owner):
                return False
            result = session.execute(delete(StudyMemberRow).where(StudyMemberRow.study_id == study_id,
                                                                  StudyMemberRow.specimen_id == specimen_id))
            return bool(result.rowcount)

    def forget_specimen(self, specimen_id: str) -> None:
        """Drop a deleted specimen's (or film's) memberships and conditions (reads already skip them)."""
        with Session(self.engine) as session, session.begin():
            session.execute(delete(StudyMemberRow).where(StudyMemberRow.specimen_id == specimen_id))
            session.execute(delete(SpecimenConditionRow).where(SpecimenConditionRow.specimen_id == specimen_id))

    def set_conditions(self, specimen_id: str, conditions: Mapping[str, Condition], *, owner: str | None = None,
                       replace: bool = False) -> dict[str, Condition] | None:
        """Merge (or with ``replace`` set) the conditions of a specimen or film; ``None`` when it is
        not the owner's. A clash with one of its studies raises ConditionError and changes nothing."""
        with Session(self.engine) as session, session.begin():
            if specimen_id not in self._known(session, [specimen_id], owner):
                return None
            current = self._conditions(session, [specimen_id])[specimen_id]
            merged = dict(conditions) if replace else {**current, **conditions}
            self._check_studies_of(session, [specimen_id], {specimen_id: merged})
            if replace:
                session.execute(delete(SpecimenConditionRow).where(SpecimenConditionRow.specimen_id == specimen_id))
                session.flush()
                for condition in merged.values():
                    session.add(_condition_row(specimen_id, condition))
            else:
                self._write_conditions(session, specimen_id, conditions)
        return merged
