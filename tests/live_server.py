"""``ramiform serve`` in a child process on a free port, for the tests that drive a real browser."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextmanager
def live_server(data_dir: Path, library_dir: Path | None = None) -> Iterator[str]:
    """The base URL of a server with one analysis process, its data in ``data_dir`` (SQLite), ranking
    against ``library_dir`` (default: the bundled set). Skips the test when chromium is missing."""
    if not CHROMIUM.exists():
        pytest.skip("no browser: /usr/bin/chromium is missing (scripts/system-deps.sh installs it through apt)")
    env = {**os.environ, "RAMIFORM_DATA_DIR": str(data_dir), "RAMIFORM_WORKERS": "1"}
    env.pop("RAMIFORM_DATABASE_URL", None)
    env.pop("RAMIFORM_LIBRARY_DIR", None)
    if library_dir is not None:
        env["RAMIFORM_LIBRARY_DIR"] = str(library_dir)
    port = free_port()
    log = open(data_dir / "server.log", "wb")
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
                            env=env, stdout=log, stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"
    try:
        for _ in range(300):
            try:
                if httpx.get(f"{base}/api/health", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if proc.poll() is not None:
                pytest.fail(f"the server stopped: {(data_dir / 'server.log').read_text()}")
            time.sleep(0.1)
        yield base
    finally:
        proc.terminate()
        proc.wait(timeout=30)
        log.close()
