"""The pages in a real browser: upload through the page, find the report with its pictures.

Drives Debian's chromium through Playwright against ``ramiform serve`` started on a free
port, with a real analysis process pool. Screenshots land in ``test-artifacts/``.
"""

from __future__ import annotations

from pathlib import Path

import httpx
import numpy as np
import pytest

from tests.live_server import CHROMIUM, CHROMIUM_ARGS, live_server
from tests.web.conftest import specimen_png

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"


@pytest.fixture(scope="module")
def server(tmp_path_factory, tiny_library):
    with live_server(tmp_path_factory.mktemp("browser-data"), library_dir=tiny_library) as base:
        yield base


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        yield b
        b.close()


def _loaded(page, selector: str) -> bool:
    return page.eval_on_selector(selector, "img => img.complete && img.naturalWidth > 0")


def _wait_loaded(page, selector: str) -> None:
    """Wait until the picture ``selector`` names has loaded (a new ``src`` loads after it is set);
    times out, and fails, when it never does (a picture that does not decode never loads)."""
    page.wait_for_function(
        "s => { const i = document.querySelector(s); return i && i.complete && i.naturalWidth > 0; }",
        arg=selector, timeout=60_000)


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


def _tinted(page) -> int:
    return int(page.get_attribute("#threshold-preview", "data-tinted") or 0)


def _ellipse(page) -> dict[str, float]:
    attrs = page.eval_on_selector(".roi ellipse", "e => [e.getAttribute('cx'), e.getAttribute('cy'), "
                                                  "e.getAttribute('rx'), e.getAttribute('ry'), e.getAttribute('transform')]")
    angle = float(attrs[4].split("(")[1].split()[0])
    return dict(zip(("cx", "cy", "rx", "ry"), map(float, attrs[:4]))) | {"angle": angle}


def _drag(page, selector: str, dx: float, dy: float) -> None:
    box = page.locator(selector).bounding_box()
    x, y = box["x"] + box["width"] / 2, box["y"] + box["height"] / 2
    page.mouse.move(x, y)
    page.mouse.down()
    page.mouse.move(x + dx, y + dy, steps=8)
    page.mouse.up()


def _expected_tint(levels: np.ndarray, threshold: float, dark: bool, ellipse: dict, width_px: int,
                   height_px: int, boxes: list) -> int:
    """The preview computed here from levels.png: pixels past the threshold inside the ellipse, outside boxes."""
    lh, lw = levels.shape
    sx, sy = width_px / lw, height_px / lh
    jj, ii = np.meshgrid((np.arange(lw) + 0.5) * sx, (np.arange(lh) + 0.5) * sy)
    a = np.radians(ellipse["angle"])
    dx, dy = jj - ellipse["cx"], ii - ellipse["cy"]
    u = (dx * np.cos(a) + dy * np.sin(a)) / ellipse["rx"]
    v = (-dx * np.sin(a) + dy * np.cos(a)) / ellipse["ry"]
    inside = u * u + v * v <= 1
    for x0, y0, x1, y1 in boxes:
        cols, rows = np.arange(lw)[None, :], np.arange(lh)[:, None]
        inside &= ~((cols >= x0 / sx) & (cols < x1 / sx) & (rows >= y0 / sy) & (rows < y1 / sy))
    past = levels < threshold * 255 if dark else levels > threshold * 255
    return int(np.count_nonzero(inside & past))


def test_fix_the_reading_on_the_report_without_uploading_again(server, browser, tmp_path_factory, capsys):
    import io as _io

    from PIL import Image

    shots = tmp_path_factory.mktemp("reading-screenshots")
    with capsys.disabled():
        print(f"\nscreenshots of the reading editor: {shots}")
    upload = httpx.post(f"{server}/api/specimens", files={"image": ("dish-5.png", specimen_png(5, size_px=420))},
                        data={"label": "dish 5", "kind": "electrodeposit"}, timeout=180)
    assert upload.status_code == 201, upload.text
    body = upload.json()
    width, height = body["image"]["width_px"], body["image"]["height_px"]
    total = httpx.get(f"{server}/api/specimens").json()["total"]
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    sent = []
    page.on("request", lambda r: sent.append((r.method, r.url)) if r.method != "GET" else None)
    page.goto(server + body["report_url"])
    page.wait_for_load_state("networkidle")
    page.locator("#reading").scroll_into_view_if_needed()

    # The dish: move the ellipse by its centre, then stretch and turn it by its long handle.
    before = _ellipse(page)
    _drag(page, ".handle.centre", 30, 18)
    moved = _ellipse(page)
    scale = width / page.locator("#stage-marks").bounding_box()["width"]  # image px per screen px
    assert moved["cx"] - before["cx"] == pytest.approx(30 * scale, abs=2 * scale)
    assert moved["cy"] - before["cy"] == pytest.approx(18 * scale, abs=2 * scale)
    _drag(page, ".handle[data-handle=rx]", -25, 20)
    stretched = _ellipse(page)
    assert stretched["rx"] != pytest.approx(moved["rx"], abs=1) and stretched["angle"] != pytest.approx(0, abs=1)
    assert "set by hand" in page.inner_text("#region-state")

    # A box to leave out, drawn with the box tool in the photo's top-left corner.
    page.check("input[name=tool][value=exclude]")
    stage = page.locator("#stage-marks").bounding_box()
    page.mouse.move(stage["x"] + 4, stage["y"] + 4)
    page.mouse.down()
    page.mouse.move(stage["x"] + 70, stage["y"] + 50, steps=6)
    page.mouse.up()
    assert page.locator("rect.exclude").count() == 1
    boxes = [[float(v) for v in page.eval_on_selector(
        "rect.exclude", "r => [r.getAttribute('x'), r.getAttribute('y'), r.getAttribute('width'), r.getAttribute('height')]")]]
    boxes = [[b[0], b[1], b[0] + b[2], b[1] + b[3]] for b in boxes]

    # The threshold: moved with the keyboard, previewed over the photo before anything is measured.
    page.locator("#threshold-preview[data-ready='1']").wait_for()
    page.focus("#threshold")
    for _ in range(6):
        page.keyboard.press("ArrowLeft")
    threshold = float(page.input_value("#threshold"))
    # the preview is drawn on the next animation frame: wait for it (a long report takes a while to paint)
    page.locator("#threshold-preview:not([data-tinted='0'])").wait_for()
    first = _tinted(page)
    levels = np.asarray(Image.open(_io.BytesIO(httpx.get(server + body["files"]["levels.png"]).content)))
    dark = body["segmentation"]["levels_compare"] == "below"  # the threshold takes pixels below it
    expected = _expected_tint(levels, threshold, dark, _ellipse(page), width, height, boxes)
    assert first == pytest.approx(expected, rel=0.02, abs=20)  # edge pixels of the ellipse may differ
    for _ in range(20):
        page.keyboard.press("ArrowRight")
    page.locator(f"#threshold-preview:not([data-tinted='{first}'])").wait_for()
    # a higher threshold takes more pixels when it takes those below it, fewer otherwise
    assert (_tinted(page) > first) is dark and _tinted(page) != first
    # Paint over the middle of the dish with the brush: a translucent path, taken back and painted
    # again; the preview leaves the painted pixels out, so it tints fewer.
    page.check("input[name=tool][value=paint]")
    page.eval_on_selector("#brush-radius", "b => { b.value = '12'; b.dispatchEvent(new Event('input')); }")
    before_paint = _tinted(page)
    stage = page.locator("#stage-marks").bounding_box()
    for attempt in range(2):
        page.mouse.move(stage["x"] + 0.35 * stage["width"], stage["y"] + 0.5 * stage["height"])
        page.mouse.down()
        page.mouse.move(stage["x"] + 0.65 * stage["width"], stage["y"] + 0.5 * stage["height"], steps=12)
        page.mouse.up()
        assert page.locator("path.paint").count() == 1
        assert page.get_attribute("path.paint", "stroke-width") == "24"
        if attempt == 0:
            page.click("#paint-undo")
            assert page.locator("path.paint").count() == 0
    assert "1 brush stroke painted out" in page.inner_text("#region-state")
    page.locator(f"#threshold-preview:not([data-tinted='{before_paint}'])").wait_for()
    assert _tinted(page) < before_paint
    page.screenshot(path=shots / "reading-editor.png", full_page=True)
    assert not [s for s in sent if "/reanalyze" in s[1]], "the preview must not measure anything"

    # Measure again with the dish, the box and the threshold: the report updates in place.
    overlay_before = page.get_attribute("#specimen-overlay", "src")
    page.click("#remeasure")
    page.locator("#history tbody tr").nth(1).wait_for(timeout=180_000)
    assert page.url == server + body["report_url"]
    assert page.get_attribute("#specimen-overlay", "src") != overlay_before
    _wait_loaded(page, "#specimen-overlay")
    assert _loaded(page, "#specimen-overlay")
    record = httpx.get(f"{server}/api/specimens/{body['id']}").json()
    asked = record["history"][-1]["requested"]
    assert len(asked["roi"]) == 5 and asked["exclude"] and asked["threshold"] == pytest.approx(
        float(page.input_value("#threshold")), abs=1e-9)
    assert len(asked["paint"]) == 1 and asked["paint"][0]["radius_px"] == 12.0
    assert len(asked["paint"][0]["points"]) > 2

    # One click on another reading: measured again, the report shows it, the history says so.
    alternatives = record["segmentation"].get("alternatives") or []
    assert alternatives, "the segmentation offered no alternative reading"
    page.locator("button.alternative").first.click()
    page.locator("#history tbody tr").nth(2).wait_for(timeout=180_000)
    record = httpx.get(f"{server}/api/specimens/{body['id']}").json()
    assert record["history"][-1]["alternative"]["label"] == alternatives[0]["label"]
    assert alternatives[0]["label"] in page.inner_text("#history")
    assert page.inner_text("h1") == "dish 5"
    assert "reading 3" in page.inner_text("#reading-status")
    page.screenshot(path=shots / "after-alternative.png", full_page=True)

    # No upload happened: the page sent only re-measurements, and there is still one specimen.
    assert [m for m, url in sent if not url.endswith("/reanalyze")] == []
    assert [url.rsplit("/", 2)[-2] for _, url in sent] == [body["id"], body["id"]]
    assert httpx.get(f"{server}/api/specimens").json()["total"] == total
    assert httpx.get(f"{server}/api/specimens/{body['id']}").json()["label"] == "dish 5"

    # The same page on a phone: nothing wider than the screen.
    phone = browser.new_page(viewport={"width": 375, "height": 812})
    phone.goto(server + body["report_url"])
    phone.wait_for_load_state("networkidle")
    assert phone.evaluate("document.documentElement.scrollWidth") <= 375
    phone.screenshot(path=shots / "report-375px.png", full_page=True)
    for name in ("reading-editor.png", "after-alternative.png", "report-375px.png"):
        assert (shots / name).stat().st_size > 0


def test_the_upload_queue_marks_an_unsure_reading_needs_a_look(server, browser, tmp_path):
    import json

    paths = []
    for seed in (6, 7):
        path = tmp_path / f"dish-{seed}.png"
        path.write_bytes(specimen_png(seed, size_px=300))
        paths.append(str(path))
    # The service's own answer for the first image, with its confidence lowered as an unsure
    # reading would have it (a route cannot pass a page's file upload on and edit the answer).
    answer = httpx.post(f"{server}/api/specimens", files={"image": ("dish-6.png", Path(paths[0]).read_bytes())},
                        timeout=180)
    assert answer.status_code == 201, answer.text
    doubtful = answer.json()
    doubtful["segmentation"]["confidence"] = 0.21
    page = browser.new_page(viewport={"width": 375, "height": 812})
    answered = []

    def doubt_the_first(route):
        if answered:
            route.continue_()
            return
        answered.append(True)
        route.fulfill(status=201, content_type="application/json", body=json.dumps(doubtful))

    page.route(f"{server}/api/specimens", doubt_the_first)
    page.goto(server + "/")
    page.set_input_files("#files", paths)
    page.locator("#queue li.done, #queue li.needs-look, #queue li.failed").nth(1).wait_for(timeout=180_000)
    unsure = page.locator("#queue li.needs-look")
    assert unsure.count() == 1 and "needs a look" in unsure.inner_text() and "0.21" in unsure.inner_text()
    assert unsure.locator("a.report-link").get_attribute("href") == doubtful["report_url"]
    assert page.locator("#queue li.done a.report-link").count() == 1
    assert page.evaluate("document.documentElement.scrollWidth") <= 375
    page.screenshot(path=ARTIFACTS / "upload-queue-needs-a-look.png", full_page=True)


#: A code identifier with a dot or an underscore (``box_dimension.value``, ``center_rc``): never visible text.
CODE_KEY = r"\b[a-z]+(?:[._][a-z0-9]+)+\b"


def _visible_text(page) -> str:
    return page.evaluate("document.body.innerText")


@pytest.mark.parametrize("width", [1400, 375])
def test_the_report_leads_with_verdict_measurements_and_branches(server, browser, width):
    import re

    if not hasattr(test_the_report_leads_with_verdict_measurements_and_branches, "url"):
        answer = httpx.post(f"{server}/api/specimens", files={"image": ("dish-8.png", specimen_png(8, size_px=360))},
                            data={"label": "calibrated dish 8", "kind": "electrodeposit", "pixel_size_mm": "0.04"},
                            timeout=180)
        assert answer.status_code == 201, answer.text
        test_the_report_leads_with_verdict_measurements_and_branches.url = answer.json()["report_url"]
    url = test_the_report_leads_with_verdict_measurements_and_branches.url
    page = browser.new_page(viewport={"width": width, "height": 900})
    page.goto(server + url)
    page.wait_for_load_state("networkidle")
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=ARTIFACTS / f"report-{width}px.png", full_page=True)

    assert page.locator("#verdict h2").is_visible() and page.inner_text("#verdict h2").strip()
    assert page.locator("#verdict-doubt").is_visible()
    box = page.locator("#measurements tr[data-key=box_dimension]")
    assert box.is_visible()
    shown = box.inner_text()
    # the value with its interval, or the reason it is withheld; and the range in mm (calibrated)
    assert re.search(r"\d\.\d{3}.*\d\.\d{3} – \d\.\d{3}", shown, re.S) or "withheld" in shown
    assert "mm" in page.inner_text("#measurements")
    assert page.locator("#dimension-advice").is_visible()
    page.locator("#branches").scroll_into_view_if_needed()
    assert _loaded(page, "#plot-branches") and _loaded(page, "#plot-horton")
    assert page.locator("#branches table.distributions tbody tr").count() >= 3
    assert page.evaluate("document.documentElement.scrollWidth") <= page.evaluate("innerWidth")
    text = _visible_text(page).replace("dish-8.png", "")
    assert re.findall(CODE_KEY, text) == []
    for internal in ("field_of_view", "center_rc", "otsu_separability", "nats", "calibrated False"):
        assert internal not in text
    # the internals are there, folded
    assert page.locator("details#how-measured").count() == 1
    assert page.locator("details#how-measured[open]").count() == 0


def test_compare_from_a_report_and_the_list_filter(server, browser):
    page = browser.new_page(viewport={"width": 375, "height": 812})
    records = httpx.get(f"{server}/api/specimens").json()["items"]
    for seed in range(10, 12 - len(records)):
        answer = httpx.post(f"{server}/api/specimens", data={"label": f"Dish {seed}"}, timeout=180,
                            files={"image": (f"dish-{seed}.png", specimen_png(seed, size_px=300))})
        assert answer.status_code == 201, answer.text
    records = httpx.get(f"{server}/api/specimens").json()["items"]
    page.goto(server + records[0]["report_url"])
    page.wait_for_load_state("networkidle")
    page.click("#compare-picker button[type=submit]")
    page.wait_for_url(f"{server}/compare?*")
    page.wait_for_load_state("networkidle")
    assert _loaded(page, "#compare-box-counting")
    assert "(" in page.inner_text("table.side")  # dimensions with their interval in brackets
    assert page.evaluate("document.documentElement.scrollWidth") <= 375
    page.screenshot(path=ARTIFACTS / "compare-375px.png", full_page=True)
    # a part of a label finds it, in any case
    label = next(r["label"] for r in records if r["label"])
    page.goto(server + "/specimens?label=" + label[1:4].upper())
    assert label in page.inner_text("table.specimens")
    assert page.evaluate("document.documentElement.scrollWidth") <= 375


def test_the_api_page_sends_a_request_from_the_browser(server, browser):
    page = browser.new_page(viewport={"width": 1400, "height": 900})
    outside = []
    page.on("request", lambda r: outside.append(r.url) if not r.url.startswith((server, "data:")) else None)
    page.goto(server + "/docs")
    assert "overlay.png" in page.inner_text("#stored-files") and "horton.svg" in page.inner_text("#stored-files")
    op = page.locator("section.op", has=page.locator("code.path", has_text="/api/health")).first
    op.locator("summary").click()
    op.locator("button[type=submit]").click()
    op.locator(".try-status").wait_for()
    assert op.locator(".try-status").inner_text().startswith("200")
    assert '"status"' in op.locator(".try-answer pre").inner_text()
    page.screenshot(path=ARTIFACTS / "api-page.png", full_page=False)
    assert outside == []


def test_a_second_demo_click_opens_the_same_specimen(server, browser):
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    urls = []
    for _ in range(2):
        page.goto(server + "/")
        page.click("#demo-button")
        page.wait_for_url(f"{server}/specimens/*", timeout=180_000)
        urls.append(page.url)
    assert urls[0] == urls[1]
    demos = [r for r in httpx.get(f"{server}/api/specimens").json()["items"] if r["label"] and "DEMO" in r["label"]]
    assert len(demos) == 1


def test_the_upload_queue_marks_out_of_library_and_undecided_results(server, browser, tmp_path):
    import copy
    import json

    paths = []
    for seed in (12, 13):
        path = tmp_path / f"dish-{seed}.png"
        path.write_bytes(specimen_png(seed, size_px=300))
        paths.append(str(path))
    answer = httpx.post(f"{server}/api/specimens", files={"image": ("dish-12.png", Path(paths[0]).read_bytes())},
                        timeout=180)
    assert answer.status_code == 201, answer.text
    # The service's own answer, edited as an out-of-library and an undecided result would read.
    outside, undecided = copy.deepcopy(answer.json()), copy.deepcopy(answer.json())
    outside["in_library"] = False
    undecided["in_library"] = True
    undecided.setdefault("explanation", {})["verdict"] = {"name": "no confident verdict", "confident": False}
    for body in (outside, undecided):
        body["segmentation"]["confidence"] = 0.9
    answers = [outside, undecided]
    page = browser.new_page(viewport={"width": 375, "height": 812})
    page.route(f"{server}/api/specimens", lambda route: route.fulfill(
        status=201, content_type="application/json", body=json.dumps(answers.pop(0))))
    page.goto(server + "/")
    page.set_input_files("#files", paths)
    page.locator("#queue li.done, #queue li.needs-look, #queue li.failed").nth(1).wait_for(timeout=60_000)
    marked = page.locator("#queue li.needs-look")
    assert marked.count() == 2 and page.locator("#queue li.done").count() == 0
    text = page.inner_text("#queue")
    assert "outside every reference" in text and "no confident verdict" in text
