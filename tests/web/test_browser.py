"""The pages in a real browser: upload through the page, find the report with its pictures.

Drives Debian's chromium through Playwright against ``ramiform serve`` started on a free
port, with a real analysis process pool. Screenshots land in ``test-artifacts/``.
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

from tests.web.conftest import specimen_png

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run"]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server(tmp_path_factory, tiny_library):
    if not CHROMIUM.exists():
        pytest.skip("no browser: /usr/bin/chromium is missing (scripts/system-deps.sh installs it through apt)")
    port = _free_port()
    data_dir = tmp_path_factory.mktemp("browser-data")
    env = {**os.environ, "RAMIFORM_DATA_DIR": str(data_dir), "RAMIFORM_WORKERS": "1",
           "RAMIFORM_LIBRARY_DIR": str(tiny_library)}
    env.pop("RAMIFORM_DATABASE_URL", None)
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


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        yield b
        b.close()


def _loaded(page, selector: str) -> bool:
    return page.eval_on_selector(selector, "img => img.complete && img.naturalWidth > 0")


def test_upload_through_the_page_and_read_the_report(server, browser, tmp_path):
    ARTIFACTS.mkdir(exist_ok=True)
    image = tmp_path / "dish-1.png"
    image.write_bytes(specimen_png(1, size_px=480))
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    outside = []
    page.on("request", lambda r: outside.append(r.url) if not r.url.startswith((server, "data:")) else None)

    page.goto(server + "/")
    page.fill("input[name=label]", "Dish <1>")
    page.screenshot(path=ARTIFACTS / "upload-page.png", full_page=True)
    page.set_input_files("#files", str(image))
    page.wait_for_url(f"{server}/specimens/*", timeout=120_000)
    page.wait_for_load_state("networkidle")

    assert page.inner_text("h1") == "Dish <1>"  # shown as text, not markup
    for picture in ("#specimen-overlay", "#plot-box-counting", "#plot-lacunarity", "#plot-references"):
        assert _loaded(page, picture), picture
    assert page.locator("[data-caution]").count() == 2  # kind not given: both cautions apply
    page.screenshot(path=ARTIFACTS / "report-page.png", full_page=True)

    page.goto(server + "/specimens")
    assert _loaded(page, "img.thumb")
    page.screenshot(path=ARTIFACTS / "specimens-page.png", full_page=True)
    assert outside == []  # nothing fetched from anywhere but the service


def test_several_images_dropped_at_once_show_progress_and_links(server, browser, tmp_path):
    paths = []
    for seed in (2, 3):
        path = tmp_path / f"dish-{seed}.png"
        path.write_bytes(specimen_png(seed))
        paths.append(str(path))
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    page.goto(server + "/")
    page.set_input_files("#files", paths)
    # A locator wait, not wait_for_function: the pages' CSP forbids evaluating strings as script.
    finished = "#queue li.done, #queue li.needs-look, #queue li.failed"
    page.locator(finished).nth(1).wait_for(timeout=120_000)
    page.screenshot(path=ARTIFACTS / "upload-queue.png", full_page=True)
    # measured: "done", or "needs a look" when the segmentation doubts its own reading
    assert page.locator("#queue li.done a.report-link, #queue li.needs-look a.report-link").count() == 2
    ids = [href.rsplit("/", 1)[-1] for href in
           page.eval_on_selector_all("#queue a.report-link", "links => links.map(a => a.getAttribute('href'))")]
    page.goto(server + "/compare?" + "&".join(f"ids={i}" for i in ids))
    assert _loaded(page, "#compare-box-counting") and _loaded(page, "#compare-lacunarity")
    page.screenshot(path=ARTIFACTS / "compare-page.png", full_page=True)


def test_one_click_on_the_demo_specimen_opens_a_full_report(server, browser):
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    page.goto(server + "/")
    page.click("#demo-button")
    page.wait_for_url(f"{server}/specimens/*", timeout=180_000)
    page.wait_for_load_state("networkidle")
    assert "DEMO" in page.inner_text("h1")
    assert _loaded(page, "#specimen-overlay") and _loaded(page, "#plot-box-counting")
    page.screenshot(path=ARTIFACTS / "demo-report.png", full_page=True)


def test_library_page_shows_every_reference_thumbnail(server, browser, tiny_library):
    from service.library import load_reference_set

    page = browser.new_page(viewport={"width": 1280, "height": 900})
    page.goto(server + "/library")
    page.wait_for_load_state("networkidle")
    loaded = page.eval_on_selector_all(".library img", "imgs => imgs.map(i => i.complete && i.naturalWidth > 0)")
    assert loaded == [True] * len(load_reference_set(tiny_library).ensembles)
    page.screenshot(path=ARTIFACTS / "library-page.png", full_page=True)
