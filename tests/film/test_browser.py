"""The films page in a real browser: upload a film, watch it being read, land on its report.

Debian's chromium through Playwright against ``ramiform serve`` on a free port with a real
analysis process pool (the bundled reference set), as tests/web/test_browser.py does.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from service.film.synthetic import encode_video, render_film
from service.simulate import grow

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run"]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    if not CHROMIUM.exists():
        pytest.skip("no browser: /usr/bin/chromium is missing (scripts/system-deps.sh installs it through apt)")
    port = _free_port()
    data_dir = tmp_path_factory.mktemp("film-browser-data")
    env = {**os.environ, "RAMIFORM_DATA_DIR": str(data_dir), "RAMIFORM_WORKERS": "1"}
    env.pop("RAMIFORM_DATABASE_URL", None)
    env.pop("RAMIFORM_LIBRARY_DIR", None)
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


def test_upload_a_film_through_the_page_and_read_its_report(server, tmp_path):
    from playwright.sync_api import sync_playwright

    film = render_film(grow("dla", 400, seed=8), 8, seed=9, size_px=320, interval_s=30.0)
    path = tmp_path / "cell-7.mp4"
    path.write_bytes(encode_video(film.frames, fps=2.0))
    errors: list[str] = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        page = browser.new_page()
        page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        page.goto(f"{server}/films")
        page.set_input_files("#film-files", str(path))
        page.fill("input[name=label]", "cell 7 through the page")
        page.fill("input[name=frame_interval_s]", "60")
        page.click("#film-form button[type=submit]")
        page.wait_for_url(f"{server}/films/*", timeout=120_000)
        assert page.locator("h1").inner_text() == "cell 7 through the page"
        for alt in ("arrival map", "area, radii"):
            image = page.locator(f"img[alt^='{alt}']")
            image.wait_for()
            assert image.evaluate("img => img.complete && img.naturalWidth > 0")
        assert "Front speed" in page.content()
        browser.close()
    assert not errors, errors
