"""The HTML pages through the app: report, list, compare, library, docs, the demo specimen."""

from __future__ import annotations

import io
import re

from PIL import Image

from service.web.demo import DEMO_LABEL, make_demo_jpeg
from tests.web.conftest import specimen_png

_OUTSIDE = re.compile(r"""(?:src|href)\s*=\s*["']?(?:https?:)?//""", re.IGNORECASE)


def _upload(client, data: bytes, **fields) -> dict:
    answer = client.post("/api/specimens", files={"image": ("dish.png", data)}, data=fields)
    assert answer.status_code == 201, answer.text
    return answer.json()


def test_report_page_shows_pictures_numbers_and_cautions(client, dla_png):
    body = _upload(client, dla_png, label="<script>alert(1)</script>", kind="electrodeposit")
    page = client.get(body["report_url"])
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    html = page.text
    assert "<script>alert(1)</script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    for name in ("overlay.png", "box_counting.svg", "lacunarity.svg"):
        assert f'src="{body["files"][name]}"' in html
        assert client.get(body["files"][name]).status_code == 200
    assert f'{body["features"]["box_dimension"]["value"]:.3f}' in html
    # the ranking: regimes, the deciding features in words, the specimen on the reference distributions
    from service.web.labels import family_label

    assert family_label(body["matches"][0], short=True) in html
    if body["in_library"]:
        assert "What told the two nearest families apart" in html and 'id="verdict"' in html
    else:
        assert "Nearest, but outside every reference" in html and "Probability</th>" not in html
    assert f'src="{body["files"]["references.svg"]}"' in html
    assert "/api/references/" in html  # thumbnails of the nearest simulated references
    # an electrodeposit carries the electrodeposition caution only
    assert 'data-caution="electrodeposition"' in html and 'data-caution="biological"' not in html
    vessel = _upload(client, specimen_png(2), kind="vessel")
    html = client.get(vessel["report_url"]).text
    assert 'data-caution="biological"' in html and "not a diagnostic device" in html
    assert 'data-caution="electrodeposition"' not in html
    assert client.get("/specimens/not-an-id").status_code == 404


def test_list_compare_library_and_docs_pages(client, dla_png):
    images = (dla_png, specimen_png(2), specimen_png(3))
    ids = [_upload(client, data, label=f"dish {i}")["id"] for i, data in enumerate(images)]
    listing = client.get("/specimens").text
    assert all(f"/api/specimens/{i}/files/thumbnail.png" in listing for i in ids)
    assert client.get("/specimens", params={"label": "dish 1"}).text.count('name="ids"') == 1

    compare = client.get("/compare", params=[("ids", ids[0]), ("ids", ids[1])]).text
    assert compare.count("data:image/svg+xml;base64,") == 3  # two curves and the distances with their key
    assert 'id="compare-distances"' in compare
    assert "Mahalanobis distance in the matcher" in compare  # every specimen was ranked
    picker = client.get("/compare", params={"ids": ids[0]}).text  # from a report: pick the others
    assert 'id="compare-picker"' in picker and all(f'value="{i}"' in picker for i in ids)
    # the label filter matches a part of a label, in any case
    assert client.get("/specimens", params={"label": "DISH"}).text.count('name="ids"') == 3

    assert client.get("/library").status_code == 200
    docs = client.get("/docs").text
    assert "/api/specimens/{specimen_id}/export.csv" in docs and "pixel_size_mm" in docs
    # nothing on any page is fetched from another host
    for url in ("/", "/specimens", f"/specimens/{ids[0]}", "/compare?ids=" + "&ids=".join(ids), "/library", "/docs"):
        assert not _OUTSIDE.search(client.get(url).text), url
    assert client.get("/static/ramiform.css").headers["content-type"].startswith("text/css")


def test_demo_specimen_gives_a_full_report(client):
    data = client.get("/demo/specimen.jpg").content
    assert data == make_demo_jpeg()  # same recipe, same image (explicit seeds)
    assert Image.open(io.BytesIO(data)).size == (720, 720)
    body = _upload(client, data, label=DEMO_LABEL, kind="electrodeposit")
    html = client.get(body["report_url"]).text
    assert "DEMO" in html and body["features"]["skeleton"]["tips"] > 10


def test_an_unsure_reading_is_a_plain_warning_on_the_report(client, dla_png):
    import json

    body = _upload(client, dla_png, label="unsure")
    store = client.app.state.store
    for confidence, warned in ((0.31, True), (0.93, False)):
        record = store.get(body["id"])
        segmentation = {**record.analysis["segmentation"], "confidence": confidence}
        store.replace(record.id, {**record.analysis, "segmentation": segmentation}, {}, keep=record.files,
                      reading={"origin": "re-measured", "requested": {}})
        html = client.get(body["report_url"]).text
        assert ('id="confidence-warning"' in html) is warned, confidence
        assert ('id="ranking-uncertain"' in html) is warned, confidence
        assert f"{confidence:.2f}" in html
    # The editor's starting state travels as data (a JSON block the CSP does not run), and
    # the history lists the upload and both readings, newest first.
    block = re.search(r'<script type="application/json" id="reading-data">(.*?)</script>', html, re.S).group(1)
    state = json.loads(block)
    assert (state["id"], state["width_px"], state["height_px"]) == \
        (body["id"], body["image"]["width_px"], body["image"]["height_px"])
    assert state["levels_url"] == body["files"].get("levels.png")
    assert state["used"]["polarity"] == body["segmentation"]["polarity"]
    rows = re.findall(r"<tr><td>(\d+)</td>", html.split('id="history"')[1])
    assert rows == ["3", "2", "1"]
    for i in range(len(body["segmentation"].get("alternatives", []))):
        assert f'data-reading="{i}"' in html
