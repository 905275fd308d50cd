"""The films page in a real browser: upload a film, watch it being read, land on its report.

Debian's chromium through Playwright against ``ramiform serve`` on a free port with a real
analysis process pool (the bundled reference set), as tests/web/test_browser.py does.
"""

from __future__ import annotations

import pytest

from service.film.synthetic import encode_video, render_film
from service.simulate import grow
from tests.live_server import CHROMIUM, CHROMIUM_ARGS, live_server

pytestmark = pytest.mark.browser


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with live_server(tmp_path_factory.mktemp("film-browser-data")) as base:
        yield base


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
