"""Durable file writes: a file that was written is on disk, whole, under its final name.

Strategy: write to a temporary name in the same folder, fsync the file, rename it over the
final name (atomic on POSIX), then fsync the folder so the rename itself survives a power
cut. A reader therefore sees either no file or the complete file, never a partial one.
"""

from __future__ import annotations

import os
import secrets
from collections.abc import Mapping
from pathlib import Path


def fsync_dir(folder: Path) -> None:
    """Flush a folder's entries (new names, renames) to disk."""
    fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_synced(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.{secrets.token_hex(8)}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view):]
        os.fsync(fd)
    except BaseException:
        os.close(fd)
        tmp.unlink(missing_ok=True)
        raise
    os.close(fd)
    os.replace(tmp, path)


def write_durably(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` (temporary name, fsync, rename, fsync of the folder)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    _write_synced(path, data)
    fsync_dir(path.parent)


def write_folder_durably(folder: Path, files: Mapping[str, bytes]) -> None:
    """Create the new ``folder`` and write every ``{name: bytes}`` into it durably.

    The folder must not exist yet (``FileExistsError`` otherwise), so a failed write can be
    undone by removing it. Its entry in the parent is flushed, and the folder once after all
    renames, so on return every file is on disk under its final name.
    """
    folder = Path(folder)
    for name in files:
        if not name or Path(name).name != name or name.startswith("."):
            raise ValueError(f"stored file names must be plain names, got {name!r}")
    folder.parent.mkdir(parents=True, exist_ok=True)
    folder.mkdir()
    fsync_dir(folder.parent)
    for name, data in files.items():
        _write_synced(folder / name, data)
    fsync_dir(folder)
