"""Measuring a stored specimen again over REST: overrides, alternatives, history, pictures, bad input.

The reference for every new reading is the pipeline called directly on the same bytes with
the same overrides (``service.analysis.analyze``): a re-measurement must give exactly what
``ramiform analyze`` gives for that file and those settings, and keep the specimen's identity.
"""

from __future__ import annotations

import hashlib
import io

import numpy as np
import pytest
from PIL import Image

from service.analysis import analyze
from tests.postgres import postgres_schema, url_in_schema
from tests.web.conftest import make_client, specimen_png

#: Sections that depend only on the image and the settings (not on the reference library).
_MEASURED = ("source", "image", "calibration", "segmentation", "features")


@pytest.fixture(scope="module")
def png() -> bytes:
    return specimen_png(4, size_px=300)


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def backend_client(request, tmp_path, tiny_library):
    if request.param == "sqlite":
        with make_client(tmp_path, library_dir=tiny_library) as client:
            yield client
        return
    with postgres_schema("ramiform_reanalyze") as schema, \
            make_client(tmp_path, library_dir=tiny_library, database_url=url_in_schema(schema)) as client:
        yield client


def _upload(client, data: bytes, **fields) -> dict:
    answer = client.post("/api/specimens", files={"image": ("dish.png", data, "image/png")},
                         data={k: str(v) for k, v in fields.items()})
    assert answer.status_code == 201, answer.text
    return answer.json()


def _mask(client, url: str) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(client.get(url).content)).convert("L")) > 0


def _direct(data: bytes, **overrides) -> dict:
    return analyze(data, filename="dish.png", match=False, **overrides).to_dict()


def _snapshot(client, body: dict) -> tuple:
    """Everything a refused re-measurement must leave as it was: record, history, files."""
    record = client.get(f"/api/specimens/{body['id']}").json()
    files = {name: hashlib.sha256(client.get(url).content).hexdigest() for name, url in record["files"].items()}
    return record, files


def test_a_new_reading_is_the_pipelines_answer_for_the_overrides_and_keeps_the_specimen(backend_client, png):
    client = backend_client
    body = _upload(client, png, label="dish 4", kind="electrodeposit", pixel_size_mm=0.02)
    assert [h["number"] for h in body["history"]] == [1] and body["history"][0]["origin"] == "upload"
    width, height = body["image"]["width_px"], body["image"]["height_px"]
    flipped = "bright" if body["segmentation"]["polarity"] == "dark" else "dark"

    # An ellipse a little inside the frame, one corner left out, the other polarity.
    roi = {"cx": width / 2, "cy": height / 2, "rx": 0.46 * width, "ry": 0.40 * height, "angle_deg": 20.0}
    corner = {"x0": 0, "y0": 0, "x1": width // 5, "y1": height // 6}
    answer = client.post(f"/api/specimens/{body['id']}/reanalyze",
                         json={"roi": roi, "exclude": [corner], "polarity": "dark"})
    assert answer.status_code == 200, answer.text
    again = answer.json()
    expected = _direct(png, pixel_size_mm=0.02, polarity="dark", roi=(width / 2, height / 2, 0.46 * width,
                       0.40 * height, 20.0), exclude=((0, 0, width // 5, height // 6),))
    for key in _MEASURED:
        assert again[key] == expected[key], key
    # identity, label, kind and calibration kept; no new specimen
    assert (again["id"], again["label"], again["kind"], again["created_at"]) == \
        (body["id"], "dish 4", "electrodeposit", body["created_at"])
    assert again["calibration"] == {"pixel_size_mm": 0.02, "source": "user", "calibrated": True}
    assert client.get("/api/specimens").json()["total"] == 1
    # pictures replaced under new URLs (the browser keeps files for a year), the original kept
    assert again["files"]["overlay.png"] != body["files"]["overlay.png"]
    assert again["files"]["source.png"] == body["files"]["source.png"]
    assert client.get(again["files"]["source.png"]).content == png
    mask = _mask(client, again["files"]["mask.png"])
    assert np.array_equal(mask, analyze(png, pixel_size_mm=0.02, polarity="dark",
                                        roi=(width / 2, height / 2, 0.46 * width, 0.40 * height, 20.0),
                                        exclude=((0, 0, width // 5, height // 6),), match=False).segmentation.mask)
    assert not mask[: height // 6, : width // 5].any()  # the box left out holds no specimen
    # the history: the upload, then this reading with what was asked and what was used
    assert client.get(f"/api/specimens/{body['id']}").json() == again
    history = client.get(f"/api/specimens/{body['id']}/history").json()
    assert history == again["history"] and [h["number"] for h in history] == [1, 2]
    assert history[1]["origin"] == "re-measured"
    assert history[1]["requested"] == {"polarity": "dark", "roi": [width / 2, height / 2, 0.46 * width,
                                       0.40 * height, 20.0], "exclude": [[0, 0, width // 5, height // 6]]}
    assert history[1]["used"]["polarity"] == again["segmentation"]["polarity"] == "dark"
    assert history[1]["box_dimension"] == again["features"]["box_dimension"]["value"]

    # Fields left out keep what the last reading asked for; null returns one to automatic.
    third = client.post(f"/api/specimens/{body['id']}/reanalyze", json={"polarity": flipped, "roi": None}).json()
    assert third["history"][-1]["requested"] == {"polarity": flipped,
                                                 "exclude": [[0, 0, width // 5, height // 6]]}
    expected = _direct(png, pixel_size_mm=0.02, polarity=flipped, exclude=((0, 0, width // 5, height // 6),))
    assert third["segmentation"] == expected["segmentation"]
    assert [h["number"] for h in third["history"]] == [1, 2, 3]


def test_painting_over_part_of_the_specimen_leaves_it_out_and_the_history_keeps_the_strokes(client, png):
    from service.imaging.segmentation.scene import stroke_mask

    body = _upload(client, png, label="painted", kind="electrodeposit")
    before = _mask(client, body["files"]["mask.png"])
    # Brush over the branch tip farthest from the seed, along the way towards the seed.
    rows, cols = np.nonzero(before)
    seed_r, seed_c = rows.mean(), cols.mean()
    tip = int(np.argmax((rows - seed_r) ** 2 + (cols - seed_c) ** 2))
    tip_x, tip_y = cols[tip] + 0.5, rows[tip] + 0.5
    towards = (0.85 * tip_x + 0.15 * (seed_c + 0.5), 0.85 * tip_y + 0.15 * (seed_r + 0.5))
    stroke = {"points": [[float(tip_x), float(tip_y)], [round(towards[0], 1), round(towards[1], 1)]], "radius_px": 6.0}
    painted = stroke_mask([(stroke["points"], stroke["radius_px"])], before.shape)
    assert before[painted].any()

    answer = client.post(f"/api/specimens/{body['id']}/reanalyze", json={"paint": [stroke]})
    assert answer.status_code == 200, answer.text
    again = answer.json()
    after = _mask(client, again["files"]["mask.png"])
    assert not after[painted].any()  # nothing the brush covered is specimen any more
    assert np.count_nonzero(after) < np.count_nonzero(before)
    strokes = ((tuple(tuple(p) for p in stroke["points"]), stroke["radius_px"]),)
    expected = _direct(png, exclude_strokes=strokes)
    for key in ("segmentation", "features"):
        assert again[key] == expected[key], key
    assert again["segmentation"]["reading"]["exclude_strokes"] == [stroke]
    assert again["history"][-1]["requested"] == {"paint": [stroke]}
    assert "1 brush stroke painted out" in client.get(f"/specimens/{body['id']}").text

    # Left out, the strokes stay; null clears them and the tip comes back.
    kept = client.post(f"/api/specimens/{body['id']}/reanalyze", json={"polarity": "dark"}).json()
    assert kept["history"][-1]["requested"] == {"polarity": "dark", "paint": [stroke]}
    cleared = client.post(f"/api/specimens/{body['id']}/reanalyze", json={"paint": None, "polarity": None}).json()
    assert cleared["history"][-1]["requested"] == {}
    assert np.array_equal(_mask(client, cleared["files"]["mask.png"]), before)


def test_taking_an_alternative_reading_reproduces_it(client, png):
    body = _upload(client, png)
    alternatives = body["segmentation"]["alternatives"]
    assert alternatives, "the segmentation offers no alternative reading of this photograph"
    for i, alternative in enumerate(alternatives):
        assert set(alternative) >= {"label", "overrides", "score"}
        assert set(alternative["overrides"]) <= {"mode", "polarity", "lighting", "threshold", "roi"}
    chosen = alternatives[0]
    again = client.post(f"/api/specimens/{body['id']}/reanalyze", json={"reading": 0})
    assert again.status_code == 200, again.text
    again = again.json()
    overrides = {k: (tuple(v) if k == "roi" else v) for k, v in chosen["overrides"].items()}
    expected = _direct(png, **overrides)
    assert again["segmentation"] == expected["segmentation"] and again["features"] == expected["features"]
    entry = again["history"][-1]
    assert entry["alternative"] == {"index": 0, "label": chosen["label"]}
    for key, value in chosen["overrides"].items():
        if key not in ("mode", "polarity") or value != "auto":
            assert entry["requested"][key] == value


def test_alternative_previews_and_the_threshold_picture_are_served(client, png):
    body = _upload(client, png)
    alternatives = body["segmentation"]["alternatives"]
    previews = sorted(name for name in body["files"] if name.startswith("alternative_"))
    assert previews == sorted(f"alternative_{i}.png" for i in range(len(alternatives)))
    for name in previews:
        reply = client.get(body["files"][name])
        assert reply.status_code == 200 and reply.headers["content-type"] == "image/png"
        assert max(Image.open(io.BytesIO(reply.content)).size) <= 160  # the contract's preview size
    photo = Image.open(io.BytesIO(client.get(body["files"]["photo.png"]).content))
    levels = Image.open(io.BytesIO(client.get(body["files"]["levels.png"]).content))
    assert levels.mode == "L" and levels.size == photo.size
    # The threshold applied to the levels picture gives the mask inside the field of view
    # (the contract of Segmentation.levels); the page's live preview relies on it.
    segmentation = analyze(png, match=False).segmentation
    t = body["segmentation"]["threshold"]
    values = np.asarray(segmentation.levels, dtype=float) / 255
    predicted = values < t if body["segmentation"]["levels_compare"] == "below" else values > t
    specimen = segmentation.mask
    agreement = np.count_nonzero(predicted[specimen]) / np.count_nonzero(specimen)
    assert agreement > 0.8, agreement
    assert client.get(body["files"]["levels.png"].split("?")[0].replace("levels", "nothing")).status_code == 404


BAD = [
    ({"threshold": 3}, "threshold"),
    ({"threshold": 0}, "threshold"),
    ({"threshold": 1.0}, "threshold"),
    ({"polarity": "purple"}, "polarity"),
    ({"mode": "magic"}, "mode"),
    ({"roi": {"cx": -900, "cy": 40, "rx": 60, "ry": 40, "angle_deg": 30}}, "outside"),
    ({"roi": {"cx": 5000, "cy": 5000, "r": 100}}, "outside"),
    ({"roi": {"cx": 50, "cy": 50, "r": -4}}, "roi"),
    ({"roi": {"cx": 50, "cy": 50, "r": 10, "rx": 10, "ry": 5}}, "circle"),
    ({"roi": {"cx": 50, "cy": 50, "rx": 10}}, "ellipse"),
    ({"roi": {"cx": 50, "cy": 50, "rx": 10, "ry": 8, "angle_deg": 1000}}, "angle_deg"),
    ({"exclude": [{"x0": 10, "y0": 10, "x1": 5, "y1": 20}]}, "x1 > x0"),
    ({"exclude": [{"x0": 900, "y0": 900, "x1": 950, "y1": 950}]}, "outside"),
    ({"exclude": [{"x0": 1, "y0": 1, "x1": 2, "y1": 2}] * 65}, "exclude"),
    ({"paint": [{"points": [[900, 900], [950, 960]], "radius_px": 8}]}, "outside"),
    # The box round this stroke overlaps the image's corner, the brush does not: the
    # segmentation's exact check refuses it.
    ({"paint": [{"points": [[-6, -6]], "radius_px": 8}]}, "outside"),
    ({"paint": [{"points": [], "radius_px": 8}]}, "paint"),
    ({"paint": [{"points": [[5, 5]], "radius_px": -1}]}, "radius_px"),
    ({"paint": [{"points": [[5, 5]], "radius_px": 8}] * 65}, "paint"),
    ({"reading": 99}, "alternatives"),
    ({"reading": -1}, "reading"),
    ({"colour": "red"}, "colour"),
    # The box around this thin slanted ellipse overlaps the image's corner, the ellipse does
    # not: only the segmentation's own check can refuse it (in its words).
    ({"roi": {"cx": -20, "cy": -20, "rx": 60, "ry": 3, "angle_deg": -45}}, "field of view"),
]


def test_bad_overrides_answer_422_with_the_reason_and_change_nothing(client, png):
    body = _upload(client, png, label="kept")
    before = _snapshot(client, body)
    folder = sorted(p.relative_to(client.app.state.store.data_dir).as_posix()
                    for p in client.app.state.store.folder(body["id"]).rglob("*"))
    for overrides, reason in BAD:
        answer = client.post(f"/api/specimens/{body['id']}/reanalyze", json=overrides)
        assert answer.status_code == 422, (overrides, answer.status_code, answer.text)
        detail = answer.json()["detail"]
        assert isinstance(detail, str) and reason in detail, (overrides, detail)
    assert _snapshot(client, body) == before
    assert sorted(p.relative_to(client.app.state.store.data_dir).as_posix()
                  for p in client.app.state.store.folder(body["id"]).rglob("*")) == folder
    assert client.post(f"/api/specimens/{body['id']}/reanalyze", content=b"{not json",
                       headers={"Content-Type": "application/json"}).status_code == 422
    missing = client.post("/api/specimens/no-such-specimen/reanalyze", json={"threshold": 0.5})
    assert missing.status_code == 404 and "no-such-specimen" in missing.json()["detail"]
