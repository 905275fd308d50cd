"""Persistence: specimen records in SQL (SQLite or PostgreSQL), files in the data folder."""

from service.store.export import specimen_row, specimens_csv
from service.store.files import write_durably, write_folder_durably
from service.store.films import FilmRecord, FilmStore  # registers the films table with the schema
from service.store.store import Reading, SpecimenRecord, Store, make_engine, new_specimen_id
from service.store.studies import StudyRecord, StudyStore, UnknownSpecimenError  # registers the study tables

__all__ = [
    "FilmRecord",
    "FilmStore",
    "Reading",
    "SpecimenRecord",
    "Store",
    "StudyRecord",
    "StudyStore",
    "UnknownSpecimenError",
    "make_engine",
    "new_specimen_id",
    "specimen_row",
    "specimens_csv",
    "write_durably",
    "write_folder_durably",
]
