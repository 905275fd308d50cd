"""The REST API through the app: upload, read, list, export, delete; errors as {"detail": "..."}."""

from __future__ import annotations

import csv
import io
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from PIL import Image

from service.analysis import analyze
from service.simulate import REGIMES

from tests.postgres import postgres_schema, url_in_schema
from tests.web.conftest import make_client, specimen_png


def _upload(client, data: bytes, name: str = "dish.png", **fields):
    return client.post("/api/specimens", files={"image": (name, data, "image/png")},
                       data={k: str(v) for k, v in fields.items()})


def test_upload_read_list_export_delete(client, dla_png):
    answer = _upload(client, dla_png, label="dish <b>A</b>", kind="electrodeposit", pixel_size_mm=0.02)
    assert answer.status_code == 201, answer.text
    body = answer.json()

    # identity: at least 128 random bits, URL-safe (RFC 4648 base64url: 6 bits a character)
    assert len(body["id"]) * 6 >= 128 and body["report_url"] == f"/specimens/{body['id']}"
    # The analysis object is the one `ramiform analyze --json` prints for the same file
    # (same pipeline, same numbers); only the matching section may depend on the library.
    direct = analyze(dla_png, filename="dish.png", pixel_size_mm=0.02, match=False)
    expected = direct.to_dict()
    for key in ("ramiform_version", "source", "image", "calibration", "segmentation", "features"):
        assert body[key] == expected[key], key
    assert body["calibration"] == {"pixel_size_mm": 0.02, "source": "user", "calibrated": True}
    # ranked against the configured library: every family, posterior probabilities summing to 1
    assert {m["regime"] for m in body["matches"]} <= set(REGIMES)
    assert sum(m["probability"] for m in body["matches"]) == pytest.approx(1.0)

    # stored files: the mask is the segmentation bit for bit, pictures decode, plots are SVG
    files = body["files"]
    mask = np.asarray(Image.open(io.BytesIO(client.get(files["mask.png"]).content)).convert("L")) > 0
    assert np.array_equal(mask, direct.segmentation.mask)
    overlay = Image.open(io.BytesIO(client.get(files["overlay.png"]).content))
    assert overlay.size == (body["image"]["width_px"], body["image"]["height_px"]) and overlay.mode == "RGB"
    for plot in ("box_counting.svg", "lacunarity.svg"):
        reply = client.get(files[plot])
        assert reply.headers["content-type"].startswith("image/svg+xml")
        assert ET.fromstring(reply.content).tag == "{http://www.w3.org/2000/svg}svg"
    assert client.get(files["source.png"]).content == dla_png

    # read back: the same object
    assert client.get(f"/api/specimens/{body['id']}").json() == body

    # a second specimen, then the list: newest first, paginated, filtered by label
    second = _upload(client, specimen_png(2), name="second.png", label="B").json()
    listed = client.get("/api/specimens").json()
    assert listed["total"] == 2 and [s["id"] for s in listed["items"]] == [second["id"], body["id"]]
    d = body["features"]["box_dimension"]["value"]
    assert listed["items"][1]["box_dimension"] == d
    page = client.get("/api/specimens", params={"limit": 1, "offset": 1}).json()["items"]
    assert [s["id"] for s in page] == [body["id"]]
    assert [s["id"] for s in client.get("/api/specimens", params={"label": "B"}).json()["items"]] == [second["id"]]
    # a part of a label, any case: "dish <b>A</b>" holds "<B>A"
    part = client.get("/api/specimens", params={"label_contains": "<B>a"}).json()["items"]
    assert [s["id"] for s in part] == [body["id"]]
    some = client.get("/api/specimens/export.csv", params={"label_contains": "dish"})
    assert [r["id"] for r in csv.DictReader(io.StringIO(some.text))] == [body["id"]]

    # CSV: one specimen, and the whole list (the route is not mistaken for an id)
    one = list(csv.DictReader(io.StringIO(client.get(f"/api/specimens/{body['id']}/export.csv").text)))
    assert len(one) == 1 and one[0]["label"] == "dish <b>A</b>"
    assert float(one[0]["features.box_dimension.value"]) == pytest.approx(d)
    every = client.get("/api/specimens/export.csv")
    assert every.headers["content-type"].startswith("text/csv")
    assert [r["id"] for r in csv.DictReader(io.StringIO(every.text))] == [second["id"], body["id"]]

    # delete: gone from reads, the list and the files
    assert client.delete(f"/api/specimens/{body['id']}").status_code == 204
    assert client.get(f"/api/specimens/{body['id']}").status_code == 404
    assert client.get(files["overlay.png"]).status_code == 404
    assert client.delete(f"/api/specimens/{body['id']}").status_code == 404
    assert client.get("/api/specimens").json()["total"] == 1


@pytest.mark.parametrize(
    ("data", "fields", "status"),
    [
        (b"just some text, not an image", {}, 415),
        (b"", {}, 415),
        ("SPECIMEN", {"pixel_size_mm": -1}, 422),
        ("SPECIMEN", {"threshold": 2}, 422),
        ("SPECIMEN", {"mode": "guess"}, 422),
        ("SPECIMEN", {"roi": "1,2"}, 422),
        ("SPECIMEN", {"page": 3}, 422),
    ],
)
def test_bad_requests_answer_a_reason(client, dla_png, data, fields, status):
    answer = _upload(client, dla_png if data == "SPECIMEN" else data, **fields)
    assert answer.status_code == status, answer.text
    assert isinstance(answer.json()["detail"], str) and answer.json()["detail"]
    assert client.get("/api/specimens").json()["total"] == 0


def test_missing_image_field(client):
    answer = client.post("/api/specimens", data={"label": "no file"})
    assert answer.status_code == 422 and "image" in answer.json()["detail"]


def test_oversize_upload_is_refused(tmp_path):
    with make_client(tmp_path, max_upload_mb=0.01) as small:
        answer = _upload(small, np.random.default_rng(0).bytes(20_000))
        assert answer.status_code == 413 and "RAMIFORM_MAX_UPLOAD_MB" in answer.json()["detail"]
        assert small.get("/api/health").json()["status"] == "ok"


def test_unknown_ids_and_files(client, dla_png):
    assert client.get("/api/specimens/nothing-here").json() == {"detail": "no specimen 'nothing-here'"}
    sid = _upload(client, dla_png).json()["id"]
    assert client.get(f"/api/specimens/{sid}/files/..%2Fmanifest.json").status_code == 404
    assert client.get(f"/api/specimens/{sid}/files/passwd").status_code == 404
    assert client.get("/api/specimens", params={"limit": 0}).status_code == 422


def test_health_and_openapi(client):
    health = client.get("/api/health").json()
    assert health["status"] == "ok" and health["database"] == "sqlite"
    schema = client.get("/openapi.json").json()
    for path in ("/api/specimens", "/api/specimens/{specimen_id}", "/api/specimens/export.csv",
                 "/api/specimens/{specimen_id}/export.csv", "/api/references", "/api/health"):
        assert path in schema["paths"]
    assert client.get("/redoc").status_code == 404


def test_references_list_the_library(client, tiny_library):
    from service.library import load_reference_set

    listed = client.get("/api/references").json()
    library = load_reference_set(tiny_library)
    assert [e["id"] for e in listed["ensembles"]] == [e.id for e in library.ensembles]
    assert listed["regimes"] == sorted({e.regime for e in library.ensembles})
    first = listed["ensembles"][0]
    thumbnail = client.get(first["thumbnail_url"])
    assert thumbnail.content == library.thumbnail_bytes(first["id"])
    assert client.get("/api/references/no-such-ensemble/thumbnail.png").status_code == 404


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def shared_database(request, tmp_path):
    """A database URL two instances share: the default SQLite file, or a fresh PostgreSQL schema."""
    if request.param == "sqlite":
        yield None
        return
    with postgres_schema("ramiform_web") as schema:
        yield url_in_schema(schema)


def test_two_instances_share_one_store(tmp_path, dla_png, shared_database):
    # Two apps on one database and one data folder, as behind a proxy: no state in a process.
    with make_client(tmp_path, database_url=shared_database) as one, \
            make_client(tmp_path, database_url=shared_database) as two:
        sid = _upload(one, dla_png, label="shared").json()["id"]
        assert two.get(f"/api/specimens/{sid}").json()["label"] == "shared"
        assert two.get(f"/api/specimens/{sid}/files/mask.png").status_code == 200
        assert two.get("/api/health").json()["database"] == ("postgresql" if shared_database else "sqlite")
        assert two.delete(f"/api/specimens/{sid}").status_code == 204
        assert one.get(f"/api/specimens/{sid}").status_code == 404


def test_api_keys_scope_specimens_to_a_lab(tmp_path, dla_png):
    with make_client(tmp_path, api_keys="lab-a:alpha-key,lab-b:beta-key") as c:
        assert c.get("/api/specimens").status_code == 401
        assert c.get("/api/specimens", headers={"Authorization": "Bearer wrong"}).status_code == 401
        a = {"Authorization": "Bearer alpha-key"}
        b = {"Authorization": "Bearer beta-key"}
        sid = c.post("/api/specimens", files={"image": ("v.png", dla_png)}, headers=a).json()["id"]
        assert c.get(f"/api/specimens/{sid}", headers=a).status_code == 200
        assert c.get(f"/api/specimens/{sid}", headers=b).status_code == 404  # the same as a missing one
        assert c.get("/api/specimens", headers=b).json()["total"] == 0
        assert c.delete(f"/api/specimens/{sid}", headers=b).status_code == 404
        assert c.get("/api/health").status_code == 200


def test_analyses_run_in_worker_processes_while_the_service_answers(tmp_path, tiny_library):
    import concurrent.futures
    import threading
    import time

    big = specimen_png(4, n_particles=3000, size_px=1400)
    with make_client(tmp_path, workers=1, library_dir=tiny_library) as c:
        pool = c.app.state.pool._executor
        assert isinstance(pool, concurrent.futures.ProcessPoolExecutor)
        c.get("/api/health")
        answers: list = []
        worker = threading.Thread(target=lambda: answers.append(_upload(c, big)))
        worker.start()
        latencies = []
        while worker.is_alive():
            start = time.perf_counter()
            assert c.get("/api/health").status_code == 200
            latencies.append(time.perf_counter() - start)
            time.sleep(0.05)
        worker.join()
        assert answers[0].status_code == 201, answers[0].text
        assert len(latencies) >= 3 and max(latencies) < 1.0  # issue 6: health within a second under load
