"""Round trip through the store: create, read, list, delete, export; and durable file writes."""

from __future__ import annotations

import csv
import io
import os
import unittest.mock as mock
from pathlib import Path

import pytest

from service.store import new_specimen_id, specimens_csv, write_durably, write_folder_durably


def _analysis(i: int) -> dict:
    # The shape of the analysis JSON the store relies on (DEVELOPERS.md); values are data only.
    return {
        "source": {"filename": f"dish-{i}.png", "sha256": f"{i:064x}", "size_bytes": 100 + i},
        "image": {"width_px": 300, "height_px": 200, "format": "PNG"},
        "calibration": {"pixel_size_mm": 0.05 * (i + 1), "source": "user", "calibrated": True},
        "features": {
            "box_dimension": {"value": 1.6 + i / 100, "ci95": [1.5, 1.7], "sizes_px": [2, 4, 8]},
            "skeleton": {"tips": 10 + i, "junctions": 4 + i, "branches": 20 + i},
        },
        "matches": [{"regime": "dla", "parameters": {"sticking": 1.0}, "probability": 0.8, "distance": 1.2}],
        "in_library": True,
        "warnings": ["=formula-looking warning"] if i == 0 else [],
    }


def test_round_trip(store):
    files = {"overlay.png": os.urandom(2000), "mask.png": b"\x89PNG mask"}
    created = [
        store.add(_analysis(i), files, label="cell A" if i % 2 == 0 else "cell B", filename=f"dish-{i}.png")
        for i in range(5)
    ]

    # read: exactly what was written, files on disk byte for byte
    got = store.get(created[2].id)
    assert got == created[2]
    assert got.analysis == _analysis(2)
    assert store.file_path(got, "overlay.png").read_bytes() == files["overlay.png"]
    assert store.file_path(got, "not-stored.png") is None
    assert store.get("no-such-id") is None

    # list: newest first, paginated, filtered by label
    page, total = store.list(limit=2, offset=1)
    assert total == 5
    assert [r.id for r in page] == [created[3].id, created[2].id]
    cell_a, total_a = store.list(label="cell A")
    assert total_a == 3 and [r.id for r in cell_a] == [created[4].id, created[2].id, created[0].id]
    assert store.get_many([created[1].id, "missing", created[0].id]) == [created[1], created[0]]

    # export: one CSV row per specimen, parseable, numbers and the CI as columns
    rows = list(csv.DictReader(io.StringIO(specimens_csv(store.list(limit=None)[0]))))
    assert [r["id"] for r in rows] == [r.id for r in reversed(created)]
    first = rows[-1]
    assert float(first["features.box_dimension.value"]) == pytest.approx(1.6)
    assert float(first["features.box_dimension.ci95_low"]) == 1.5
    assert first["features.skeleton.tips"] == "10"
    assert first["best_match.regime"] == "dla"
    assert "features.box_dimension.sizes_px" not in first
    # a text cell must not be read as a spreadsheet formula (OWASP "CSV injection")
    assert first["warnings"] == "'=formula-looking warning"

    # delete: record and files gone, others untouched
    folder = store.folder(created[2].id)
    assert store.delete(created[2].id) is True
    assert store.get(created[2].id) is None and not folder.exists()
    assert store.delete(created[2].id) is False
    assert store.list()[1] == 4


def test_owner_scoping(store):
    mine = store.add(_analysis(1), {"a.png": b"x"}, owner="lab-a")
    store.add(_analysis(2), {"a.png": b"y"}, owner="lab-b")
    assert store.get(mine.id, owner="lab-b") is None
    assert store.get(mine.id, owner="lab-a") == mine
    assert [r.id for r in store.list(owner="lab-a")[0]] == [mine.id]
    assert store.delete(mine.id, owner="lab-b") is False
    assert store.get(mine.id) is not None


def test_sqlite_runs_in_write_ahead_log_mode(tmp_path):
    # WAL: readers never block the writer and commits survive crashes (sqlite.org/wal.html)
    from sqlalchemy import text

    from service.store import Store

    s = Store.open(f"sqlite:///{tmp_path / 'wal.db'}", tmp_path / "data")
    with s.engine.connect() as conn:
        assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert conn.execute(text("PRAGMA synchronous")).scalar() == 2  # FULL
    s.close()


def test_schema_creation_is_idempotent(store):
    store.add(_analysis(0), {"a.png": b"x"})
    store.create_schema()  # a second instance starting on the same database
    assert store.list()[1] == 1


def test_instances_starting_together_create_the_schema_once(store):
    # Several service instances starting at the same moment on an empty database.
    from concurrent.futures import ThreadPoolExecutor

    from service.store import Store
    from service.store.models import Base

    Base.metadata.drop_all(store.engine)
    with ThreadPoolExecutor(4) as pool:
        list(pool.map(lambda _: Store(store.engine, store.data_dir).create_schema(), range(4)))
    assert store.add(_analysis(0), {"a.png": b"x"}).id in {r.id for r in store.list()[0]}


def test_failed_commit_leaves_no_files(store):
    first = store.add(_analysis(0), {"a.png": b"x"})
    with pytest.raises(FileExistsError):
        store.add(_analysis(1), {"b.png": b"y"}, specimen_id=first.id)  # an id already in use
    assert [p.name for p in store.folder(first.id).iterdir()] == ["a.png"]
    broken = {**_analysis(1), "not_json": object()}  # the commit fails after the files were written
    with pytest.raises(Exception):
        store.add(broken, {"b.png": b"y"}, specimen_id="failing-commit")
    assert not store.folder("failing-commit").exists()
    assert store.list()[1] == 1


def test_specimen_ids_carry_128_bits():
    ids = {new_specimen_id() for _ in range(1000)}
    assert len(ids) == 1000
    for specimen_id in ids:
        # base64url: 6 bits per character (RFC 4648, section 5)
        assert len(specimen_id) * 6 >= 128
        assert set(specimen_id) <= set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-_")


def test_durable_writes_leave_whole_files_only(tmp_path: Path):
    target = tmp_path / "deep" / "file.bin"
    payload = os.urandom(1 << 20)
    write_durably(target, payload)
    write_durably(target, payload[::-1])  # replaced atomically
    assert target.read_bytes() == payload[::-1]
    write_folder_durably(tmp_path / "specimen", {"one.png": b"1", "two.svg": b"<svg/>"})
    assert sorted(p.name for p in (tmp_path / "specimen").iterdir()) == ["one.png", "two.svg"]
    assert not list(tmp_path.rglob("*.tmp"))
    with pytest.raises(FileExistsError):
        write_folder_durably(tmp_path / "specimen", {"three.png": b"3"})
    for bad in ("../escape.png", ".hidden", "a/b.png", ""):
        with pytest.raises(ValueError, match="plain names"):
            write_folder_durably(tmp_path / "other", {bad: b"x"})


def test_sweep_removes_only_old_folders_without_a_record(store):
    kept = store.add({"source": {"sha256": "ab"}}, {"overlay.png": b"x"}, label="kept")
    orphan, fresh = new_specimen_id(), new_specimen_id()
    write_folder_durably(store.folder(orphan), {"overlay.png": b"never committed"})
    write_folder_durably(store.folder(fresh), {"overlay.png": b"being committed elsewhere"})
    two_hours_ago = os.path.getmtime(store.folder(orphan)) - 7200
    for specimen_id in (orphan, kept.id):
        os.utime(store.folder(specimen_id), (two_hours_ago, two_hours_ago))

    assert store.sweep_orphans(older_than_s=3600) == [orphan]
    assert not store.folder(orphan).exists()
    # The acknowledged specimen keeps its files, however old; a young folder may be another
    # instance's upload between its files and its commit, so it is left alone.
    assert store.folder(kept.id).is_dir() and store.get(kept.id) is not None
    assert store.folder(fresh).is_dir()


def test_a_new_reading_replaces_analysis_and_pictures_and_keeps_the_history(store):
    source = b"\x89PNG original bytes"
    first = store.add(_analysis(0), {"source.png": source, "overlay.png": b"overlay 1", "mask.png": b"mask 1"},
                      label="cell A", kind="coral", filename="dish-0.png", reading={"origin": "upload"})
    assert [r.number for r in store.history(first.id)] == [1]

    second = store.replace(first.id, _analysis(1), {"overlay.png": b"overlay 2", "mask.png": b"mask 2"},
                           keep=("source.png",), reading={"origin": "re-measured", "requested": {"threshold": 0.4}})
    # same identity, new analysis, the original kept byte for byte, the pictures replaced
    assert (second.id, second.label, second.kind, second.filename, second.created_at) == \
        (first.id, "cell A", "coral", "dish-0.png", first.created_at)
    assert second.analysis == _analysis(1) and store.get(first.id) == second
    assert second.files == ("mask.png", "overlay.png", "source.png")
    assert store.file_path(second, "source.png").read_bytes() == source
    assert store.file_path(second, "overlay.png").read_bytes() == b"overlay 2"
    # the replaced pictures are gone from disk; only the record's files remain
    on_disk = sorted(p.relative_to(store.folder(first.id)).as_posix()
                     for p in store.folder(first.id).rglob("*") if p.is_file())
    assert on_disk == sorted(second.stored_paths)

    history = store.history(first.id)
    assert [(r.number, r.details.get("origin")) for r in history] == [(1, "upload"), (2, "re-measured")]
    assert history[1].details["requested"] == {"threshold": 0.4}
    assert history[0].created_at == first.created_at and history[1].created_at >= first.created_at

    third = store.replace(first.id, _analysis(2), {"overlay.png": b"overlay 3"}, keep=("source.png",),
                          reading={"origin": "re-measured"})
    assert third.files == ("overlay.png", "source.png") and [r.number for r in store.history(first.id)] == [1, 2, 3]
    assert len(list(store.folder(first.id).glob("reading-*"))) == 1

    # another owner sees neither the specimen nor its history, and cannot replace it
    owned = store.add(_analysis(3), {"source.png": source}, owner="lab-a", reading={})
    assert store.history(owned.id, owner="lab-b") is None
    assert store.replace(owned.id, _analysis(4), {"overlay.png": b"x"}, keep=("source.png",), reading={},
                         owner="lab-b") is None
    assert store.get(owned.id).analysis == _analysis(3)

    # deleting removes the history with the record
    assert store.delete(first.id)
    assert store.history(first.id) is None and not store.folder(first.id).exists()


def test_a_stale_reading_is_refused_and_leaves_nothing_behind(store):
    from service.errors import ConflictError

    record = store.add(_analysis(0), {"source.png": b"src", "overlay.png": b"1"}, reading={"origin": "upload"})
    store.replace(record.id, _analysis(1), {"overlay.png": b"2"}, keep=("source.png",), reading={"n": 2})
    before = sorted(p.as_posix() for p in store.folder(record.id).rglob("*"))
    # A writer that read the record before the reading above and commits after it.
    with mock.patch.object(type(store), "get", return_value=record), pytest.raises(ConflictError, match="meanwhile"):
        store.replace(record.id, _analysis(2), {"overlay.png": b"3"}, keep=("source.png",), reading={"n": 3})
    assert sorted(p.as_posix() for p in store.folder(record.id).rglob("*")) == before
    assert store.get(record.id).analysis == _analysis(1)
    assert [r.number for r in store.history(record.id)] == [1, 2]
    with pytest.raises(ValueError, match="does not have"):
        store.replace(record.id, _analysis(2), {"overlay.png": b"3"}, keep=("source.tif",), reading={})


def test_a_specimen_stored_before_readings_were_kept_gains_its_first_reading(store):
    from sqlalchemy import delete as sql_delete
    from sqlalchemy.orm import Session

    from service.store.models import ReadingRow

    record = store.add(_analysis(0), {"source.png": b"src", "overlay.png": b"1"})
    with Session(store.engine) as session, session.begin():  # as an earlier version left it
        session.execute(sql_delete(ReadingRow))
    assert store.history(record.id) == []
    store.replace(record.id, _analysis(1), {"overlay.png": b"2"}, keep=("source.png",), reading={"origin": "again"},
                  first_reading={"origin": "upload", "recorded": "afterwards"})
    assert [(r.number, r.details["origin"]) for r in store.history(record.id)] == [(1, "upload"), (2, "again")]


def test_sweep_removes_reading_folders_no_record_names(store):
    record = store.add(_analysis(0), {"source.png": b"src", "overlay.png": b"1"}, reading={})
    record = store.replace(record.id, _analysis(1), {"overlay.png": b"2"}, keep=("source.png",), reading={})
    used = record.stored_path("overlay.png").split("/")[0]
    interrupted = store.folder(record.id) / "reading-3-deadbeef"
    write_folder_durably(interrupted, {"overlay.png": b"never committed"})
    two_hours_ago = os.path.getmtime(interrupted) - 7200
    for folder in (interrupted, store.folder(record.id) / used):
        os.utime(folder, (two_hours_ago, two_hours_ago))
    assert store.sweep_unused_readings(older_than_s=3600) == [f"{record.id}/reading-3-deadbeef"]
    assert not interrupted.exists() and store.file_path(record, "overlay.png").read_bytes() == b"2"


def test_label_substring_filter_and_settings_in_the_csv(store):
    for label in ("Cell A_1", "cell ax1", "100% copper", "river"):
        store.add(_analysis(1) | {"segmentation": {"mode": "ridge", "polarity": "dark", "threshold": 0.42,
                                                   "reading": {"mode": "ridge", "lighting": "patchy"}}},
                  {"overlay.png": b"x"}, label=label)
    labels = lambda found: sorted(r.label for r in found[0])  # noqa: E731
    assert labels(store.list(label_contains="CELL A")) == ["Cell A_1", "cell ax1"]  # any case
    # "_" and "%" are the text itself, not SQL LIKE wildcards
    assert labels(store.list(label_contains="a_")) == ["Cell A_1"]
    assert labels(store.list(label_contains="%")) == ["100% copper"]
    assert store.list(label="cell")[1] == 0  # the exact filter is unchanged

    row = next(csv.DictReader(io.StringIO(specimens_csv(store.list(label="river")[0]))))
    assert (row["segmentation.mode"], row["segmentation.polarity"], row["segmentation.threshold"]) == (
        "ridge", "dark", "0.42")
    assert row["segmentation.lighting"] == "patchy"  # from the reading's overrides
    assert '"lighting": "patchy"' in row["segmentation.reading"]
