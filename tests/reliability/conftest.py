"""Shared pieces of the reliability checks: small specimen images, apps and real servers.

Every image is a rendering of a grown DLA cluster (``service.simulate.grow`` and
``service.imaging.render_photo``) at a few hundred pixels, so a whole analysis stays short.
Servers listen on loopback only and are always killed when their test ends.
"""

from __future__ import annotations

import contextlib
import io
import os
import signal
import socket
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest
from fastapi.testclient import TestClient
from PIL import Image

from service.web.app import create_app
from service.web.settings import Settings
from tests.postgres import postgres_schema, url_in_schema

ROOT = Path(__file__).resolve().parents[2]
RAMIFORM = ROOT / ".venv" / "bin" / "ramiform"
LOOPBACK = "127.0.0.1"


def encode(rgb: np.ndarray, fmt: str = "PNG", **options) -> bytes:
    out = io.BytesIO()
    Image.fromarray(rgb).save(out, format=fmt, **options)
    return out.getvalue()


def specimen_rgb(seed: int = 3, n_particles: int = 800, size_px: int = 320) -> np.ndarray:
    """A photo-like rendering of a DLA cluster grown with ``seed``."""
    from service.imaging import render_photo
    from service.simulate import grow

    cluster = grow("dla", n_particles, seed=seed)
    return render_photo(cluster > 0, seed=seed, size_px=size_px)


@pytest.fixture(scope="session")
def specimen_png() -> bytes:
    return encode(specimen_rgb())


def make_settings(tmp_path: Path, **overrides) -> Settings:
    """Test settings: a 1 MiB upload limit, analyses in threads, no keys unless given."""
    values = {"data_dir": tmp_path / "data", "database_url": None, "max_upload_mb": 1.0, "workers": 0,
              "api_keys": "", "secret_key": None, "library_dir": None}
    values.update(overrides)
    return Settings(**values)


#: Backends every in-process check runs on; PostgreSQL only when a server is given.
BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]


@contextlib.contextmanager
def database_url(backend: str) -> Iterator[str | None]:
    """``None`` (the default SQLite file) or a PostgreSQL URL in a fresh schema, dropped afterwards."""
    if backend == "sqlite":
        yield None
        return
    with postgres_schema("ramiform_reliability") as schema:
        yield url_in_schema(schema)


@contextlib.contextmanager
def app_client(tmp_path: Path, **overrides) -> Iterator[TestClient]:
    """A TestClient on a fresh app; server errors come back as 500 answers, not exceptions."""
    app = create_app(make_settings(tmp_path, **overrides))
    with TestClient(app, raise_server_exceptions=False) as client:
        yield client


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


class Server:
    """``ramiform serve`` in a subprocess on a loopback port, on a given data folder."""

    def __init__(self, data_dir: Path, log_path: Path, env: dict[str, str] | None = None) -> None:
        self.data_dir = data_dir
        self.log_path = log_path
        self.env = {**os.environ, "RAMIFORM_DATA_DIR": str(data_dir), "RAMIFORM_API_KEYS": "",
                    "RAMIFORM_DATABASE_URL": "", "RAMIFORM_MAX_UPLOAD_MB": "1", **(env or {})}
        self.port = free_port()
        self.url = f"http://{LOOPBACK}:{self.port}"
        self.process: subprocess.Popen | None = None

    def start(self, timeout_s: float = 60.0) -> Server:
        with open(self.log_path, "ab") as log:
            self.process = subprocess.Popen(
                [str(RAMIFORM), "serve", "--host", LOOPBACK, "--port", str(self.port)],
                env=self.env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"server exited with {self.process.returncode}: {self.log()}")
            with contextlib.suppress(httpx.HTTPError):
                if httpx.get(f"{self.url}/api/health", timeout=2).status_code == 200:
                    return self
            time.sleep(0.2)
        raise RuntimeError(f"server did not answer within {timeout_s} s: {self.log()}")

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")[-4000:]

    def kill(self) -> None:
        """SIGKILL the server and its analysis processes (its own process group)."""
        if self.process is None:
            return
        with contextlib.suppress(ProcessLookupError):
            os.killpg(self.process.pid, signal.SIGKILL)
        self.process.wait(timeout=30)
        self.process = None


@pytest.fixture
def server_factory(tmp_path: Path):
    """Start servers with ``server_factory(data_dir, **env)``; all are killed at the end."""
    started: list[Server] = []

    def start(data_dir: Path, **env: str) -> Server:
        server = Server(data_dir, tmp_path / f"server-{len(started)}.log", env)
        started.append(server)
        return server.start()

    try:
        yield start
    finally:
        for server in started:
            server.kill()


