"""Nothing acknowledged is ever lost: a server killed with SIGKILL mid-upload keeps every 201.

The real server (``ramiform serve``, SQLite in WAL mode, a data folder) takes concurrent
uploads; it is killed without warning while some are in flight, restarted on the same data
folder, and must then serve every upload it had answered 201, with all its files, and list
no record whose files are missing. Two further checks stop a writer at the two critical
moments of a store write: after the files, before the commit; and right after the commit.
A last one kills an analysis process mid-upload: only that upload fails, and says so.
"""

from __future__ import annotations

import hashlib
import os
import signal
import sqlite3
import stat
import subprocess
import sys
import threading
import time
from pathlib import Path

import httpx
import pytest
from sqlalchemy import event

from service.store import Store
from tests.reliability.conftest import ROOT, encode, specimen_rgb

N_THREADS = 6
UPLOADS_PER_THREAD = 6
#: Kill once this many uploads have been acknowledged (others are then still in flight).
KILL_AFTER_ACKNOWLEDGED = 4


def _upload_until_refused(url: str, png: bytes, thread: int, acknowledged: list, failures: list,
                          lock: threading.Lock) -> None:
    with httpx.Client(base_url=url, timeout=120) as http:
        for i in range(UPLOADS_PER_THREAD):
            label = f"thread {thread} upload {i}"
            try:
                response = http.post("/api/specimens", data={"label": label},
                                     files={"image": (f"{thread}-{i}.png", png, "image/png")})
            except httpx.HTTPError as exc:  # the server died under this request: not acknowledged
                with lock:
                    failures.append(type(exc).__name__)
                return
            if response.status_code == 201:
                with lock:
                    acknowledged.append((response.json()["id"], label))
            else:
                with lock:
                    failures.append(f"HTTP {response.status_code}: {response.text[:200]}")
                return


def _assert_served_whole(http: httpx.Client, specimen_id: str, source_sha256: str | None = None) -> dict:
    response = http.get(f"/api/specimens/{specimen_id}")
    assert response.status_code == 200, (specimen_id, response.status_code)
    body = response.json()
    assert body["files"], f"{specimen_id} lists no files"
    for name, url in body["files"].items():
        served = http.get(url)
        assert served.status_code == 200 and served.content, (specimen_id, name, served.status_code)
        if name.startswith("source.") and source_sha256:
            assert hashlib.sha256(served.content).hexdigest() == source_sha256
    return body


@pytest.mark.slow
def test_sigkill_mid_upload_loses_nothing_acknowledged(server_factory, tmp_path):
    data_dir = tmp_path / "data"
    png = encode(specimen_rgb(size_px=256))
    png_sha256 = hashlib.sha256(png).hexdigest()
    server = server_factory(data_dir, RAMIFORM_WORKERS="2")

    acknowledged: list[tuple[str, str]] = []
    failures: list[str] = []
    lock = threading.Lock()
    threads = [threading.Thread(target=_upload_until_refused, args=(server.url, png, t, acknowledged, failures, lock))
               for t in range(N_THREADS)]
    for thread in threads:
        thread.start()
    deadline = time.monotonic() + 240
    while len(acknowledged) < KILL_AFTER_ACKNOWLEDGED and time.monotonic() < deadline and not failures:
        time.sleep(0.05)
    assert not failures, f"uploads failed before the kill: {failures}"
    assert len(acknowledged) >= KILL_AFTER_ACKNOWLEDGED, "the server acknowledged too few uploads in time"
    server.kill()  # SIGKILL to the server and its analysis processes
    with lock:
        acknowledged_at_kill = list(acknowledged)
    for thread in threads:
        thread.join(timeout=60)
    assert not any(t.is_alive() for t in threads)
    # The kill hit uploads in flight (their clients saw the connection drop), or it proves little.
    assert failures and all(not f.startswith("HTTP") for f in failures), failures
    # A response may have been on its way at the kill: whatever a client received counts as acknowledged.
    acknowledged_ids = dict(acknowledged)
    assert set(dict(acknowledged_at_kill)) <= set(acknowledged_ids)

    database = data_dir / "ramiform.db"
    with sqlite3.connect(database) as db:
        assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    restarted = server_factory(data_dir, RAMIFORM_WORKERS="0")
    with httpx.Client(base_url=restarted.url, timeout=60) as http:
        for specimen_id, label in acknowledged_ids.items():
            assert _assert_served_whole(http, specimen_id, png_sha256)["label"] == label
        listing = http.get("/api/specimens", params={"limit": 500}).json()
        listed = [item["id"] for item in listing["items"]]
        assert listing["total"] == len(listed)
        assert set(acknowledged_ids) <= set(listed)
        for specimen_id in listed:  # no half-written record: everything listed is whole
            _assert_served_whole(http, specimen_id, png_sha256)
        assert http.get("/api/health").json()["status"] == "ok"
    with sqlite3.connect(database) as db:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


_KILLED_WRITER = """
import os, signal, sys
from pathlib import Path
import service.store.store as store_module
from service.store import Store

moment = sys.argv[3]
store = Store.open(sys.argv[1], Path(sys.argv[2]))
die = lambda *args, **kwargs: os.kill(os.getpid(), signal.SIGKILL)
if moment == "before-commit":
    store_module.Session = die  # files are durable; the record's transaction never starts
else:
    store_module._record = die  # the commit has returned; the answer is never sent
store.add({"source": {"sha256": "0" * 64}, "features": {}}, {"source.png": b"\\x89PNG" + bytes(4096),
          "thumbnail.png": b"\\x89PNG" + bytes(512)}, label="killed writer", specimen_id=sys.argv[4])
raise SystemExit("the writer was expected to be killed")
"""


@pytest.mark.parametrize("moment", ["before-commit", "after-commit"])
def test_writer_killed_at_the_critical_moments(tmp_path, moment):
    data_dir = tmp_path / "data"
    url = f"sqlite:///{tmp_path / 'store.db'}"
    specimen_id = "killed-writer-0123456789ab"
    result = subprocess.run([sys.executable, "-c", _KILLED_WRITER, url, str(data_dir), moment, specimen_id],
                            cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert result.returncode == -9, result.stderr  # died by SIGKILL, not by an error
    store = Store.open(url, data_dir)
    try:
        records, total = store.list()
        record = store.get(specimen_id)
        if moment == "before-commit":
            # Files without a record are never shown: the upload simply did not happen.
            assert record is None and total == 0 and records == []
        else:
            assert record is not None and total == 1
            for name in record.files:
                path = store.file_path(record, name)
                assert path is not None and path.is_file() and path.stat().st_size > 0
            assert not list(Path(store.folder(specimen_id)).glob(".*.tmp")), "temporary files left behind"
    finally:
        store.close()


def _analysis_workers(server_pid: int) -> list[int]:
    """Pids of the server's analysis processes (spawned children running multiprocessing's entry)."""
    workers = []
    for stat_file in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat_file.read_text().rsplit(")", 1)[1].split()
            cmdline = (stat_file.parent / "cmdline").read_bytes()
        except (OSError, IndexError):
            continue  # the process ended while we looked
        if int(fields[1]) == server_pid and b"spawn_main" in cmdline:
            workers.append(int(stat_file.parent.name))
    return workers


def test_an_analysis_process_killed_mid_upload_costs_one_answer_only(server_factory, tmp_path):
    """The worker dies (as under the out-of-memory killer): that upload gets 503, the next one 201."""
    server = server_factory(tmp_path / "data", RAMIFORM_WORKERS="1", RAMIFORM_MAX_UPLOAD_MB="20")
    small, large = encode(specimen_rgb(size_px=256)), encode(specimen_rgb(n_particles=3000, size_px=1400))
    with httpx.Client(base_url=server.url, timeout=300) as http:
        assert http.post("/api/specimens", files={"image": ("warm.png", small, "image/png")}).status_code == 201
        workers = _analysis_workers(server.process.pid)
        assert len(workers) == 1, workers
        answer: list[httpx.Response] = []
        upload = threading.Thread(target=lambda: answer.append(
            http.post("/api/specimens", files={"image": ("large.png", large, "image/png")})))
        upload.start()
        time.sleep(1.0)  # the large analysis takes several seconds; kill the worker in the middle of it
        os.kill(workers[0], signal.SIGKILL)
        upload.join(timeout=120)
        assert answer and answer[0].status_code == 503, answer and answer[0].text
        assert "worker" in answer[0].json()["detail"]
        assert http.get("/api/health").json()["status"] == "ok"
        again = http.post("/api/specimens", files={"image": ("again.png", small, "image/png")})
        assert again.status_code == 201, again.text
        assert http.get("/api/specimens").json()["total"] == 2  # the lost upload left no record


def test_files_are_synced_and_renamed_before_the_record_commits(tmp_path, monkeypatch):
    """The order a power cut cannot undo: each file fsynced then renamed, the folder fsynced, then commit."""
    events: list[str] = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd: int) -> None:
        events.append("fsync folder" if stat.S_ISDIR(os.fstat(fd).st_mode) else "fsync file")
        real_fsync(fd)

    def replace(src, dst) -> None:
        events.append(f"rename {Path(dst).name}")
        real_replace(src, dst)

    store = Store.open(f"sqlite:///{tmp_path / 'store.db'}", tmp_path / "data")
    try:
        event.listen(store.engine, "commit", lambda conn: events.append("commit"))
        monkeypatch.setattr(os, "fsync", fsync)
        monkeypatch.setattr(os, "replace", replace)
        store.add({"source": {"sha256": "0" * 64}}, {"source.png": b"a" * 100, "thumbnail.png": b"b" * 10})
    finally:
        monkeypatch.undo()
        store.close()
    commit = events.index("commit")
    assert events.count("commit") == 1
    before = events[:commit]
    for name in ("source.png", "thumbnail.png"):
        renamed = before.index(f"rename {name}")
        assert before[renamed - 1] == "fsync file", events  # the data reached the disk before its name did
    assert before[-1] == "fsync folder", events  # and the renames themselves, before the commit
