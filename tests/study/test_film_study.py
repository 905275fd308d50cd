"""A growth film in a study: uploaded with its conditions, attached beside a specimen, shown in
the study table and its CSV with its last frame's analysis and its growth figures.

The film is a simulated DLA rendered frame by frame (``service.film.synthetic``, a made-up
scenario of our own); the specimen a rendered DLA photograph (``tests.web.conftest``). The
checks compare the study's rows with each member's own stored answer; the CSV is read back
with Python's csv module; 4000 mV is 4 V by the SI prefix (BIPM SI Brochure, 9th ed.).
"""

from __future__ import annotations

import csv
import io
import json

import pytest

from service.film.synthetic import encode_video, render_film
from service.simulate import grow
from tests.web.conftest import make_client, specimen_png


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    with make_client(tmp_path_factory.mktemp("film-study")) as c:
        yield c


@pytest.fixture(scope="module")
def video():
    film = render_film(grow("dla", 400, seed=8), 5, seed=9, size_px=256, interval_s=30.0)
    return encode_video(film.frames, fps=2.0)


def _post_film(client, video, conditions: str | None):
    data = {"label": "cell 7"} | ({} if conditions is None else {"conditions": conditions})
    return client.post("/api/films", files={"film": ("run-7.mp4", video, "video/mp4")}, data=data)


@pytest.fixture(scope="module")
def film(client, video):
    answer = _post_film(client, video, "voltage = 4000 mV; electrolyte = CuSO4")
    assert answer.status_code == 201, answer.text
    return answer.json()


@pytest.fixture(scope="module")
def specimen(client):
    answer = client.post("/api/specimens", files={"image": ("dish-1.png", specimen_png(1, n_particles=400, size_px=300),
                                                            "image/png")},
                         data={"conditions": json.dumps({"voltage": "2 V", "electrolyte": "CuSO4"})})
    assert answer.status_code == 201, answer.text
    return answer.json()


def test_a_film_carries_its_conditions(client, film):
    assert film["conditions"]["voltage"] == {"value": 4000.0, "unit": "mV", "quantity": "voltage",
                                             "canonical_value": 4.0, "canonical_unit": "V"}
    assert film["conditions"]["electrolyte"]["value"] == "CuSO4"
    assert client.get(f"/api/films/{film['id']}").json()["conditions"] == film["conditions"]
    assert client.get(f"/api/films/{film['id']}/conditions").json() == film["conditions"]
    put = client.put(f"/api/films/{film['id']}/conditions", json={"conditions": {"temperature": "25 °C"}})
    assert put.status_code == 200 and set(put.json()) == {"voltage", "electrolyte", "temperature"}
    assert client.put(f"/api/films/{film['id']}/conditions", json={"conditions": {"voltage": "4 volts"}}).status_code == 422
    assert set(client.get(f"/api/films/{film['id']}").json()["conditions"]) == {"voltage", "electrolyte", "temperature"}
    assert client.get("/api/films/nope/conditions").status_code == 404


def test_a_film_and_a_specimen_in_one_study(client, film, specimen):
    study = client.post("/api/studies", json={"name": "voltage series with a film"}).json()
    attached = client.post(f"{study['url']}/specimens", json={"specimens": [specimen["id"], film["id"]]})
    assert attached.status_code == 200, attached.text
    body = attached.json()
    assert [(row["specimen_id"], row["kind"]) for row in body["table"]] == [(specimen["id"], "specimen"),
                                                                           (film["id"], "film")]
    row = body["table"][1]
    final_box = film["final"]["features"]["box_dimension"]
    assert row["box_dimension"] == {"value": final_box["value"], "ci95": final_box["ci95"]}  # the last frame's
    assert row["report_url"] == f"/films/{film['id']}" and row["conditions"]["voltage"]["canonical_value"] == 4.0
    velocity = film["front_velocity_px_per_s"]
    assert row["front_velocity_px_per_s"] == {"value": velocity["value"], "ci95": velocity["ci95"]}
    assert row["measurements"]["film.tip_growth_share"]["value"] == film["tip_growth_share"]["value"]
    assert "film.front_velocity_px_per_s" in body["quantities"]
    for url in body["plots"].values():
        assert client.get(url).status_code == 200

    rows = list(csv.DictReader(io.StringIO(client.get(study["export_url"]).text)))
    assert [(r["specimen_id"], r["kind"]) for r in rows] == [(specimen["id"], "specimen"), (film["id"], "film")]
    assert [float(r["voltage [V]"]) for r in rows] == [2.0, 4.0]  # mixed mV and V: the column in volts
    assert float(rows[1]["box_dimension"]) == final_box["value"]
    assert float(rows[1]["film.front_velocity_px_per_s"]) == velocity["value"]
    assert float(rows[1]["film.front_velocity_px_per_s_ci95_low"]) == velocity["ci95"][0]
    assert rows[0]["film.front_velocity_px_per_s"] == ""
    assert "growth film (last frame)" in client.get(study["page_url"]).text  # the row says what it is


def test_a_bad_unit_on_a_film_stores_nothing(client, video, film):
    before = client.get("/api/films").json()["total"]
    for bad in ("voltage = 4 volts", '{"voltage": "4 volts"}', "{not json"):
        answer = _post_film(client, video, bad)
        assert answer.status_code == 422, answer.text
        assert answer.json()["detail"]
    assert client.get("/api/films").json()["total"] == before


def test_deleting_a_film_drops_its_study_rows_and_conditions(client, video, specimen):
    extra = _post_film(client, video, "voltage = 3 V").json()
    study = client.post("/api/studies", json={"name": "short-lived"}).json()
    client.post(f"{study['url']}/specimens", json={"specimens": [specimen["id"], extra["id"]]})
    assert client.get(study["url"]).json()["n_specimens"] == 2
    assert client.delete(f"/api/films/{extra['id']}").status_code == 204
    assert [row["specimen_id"] for row in client.get(study["url"]).json()["table"]] == [specimen["id"]]
    assert client.get(f"/api/films/{extra['id']}/conditions").status_code == 404
    from service.store import StudyStore

    assert StudyStore(client.app.state.store.engine).conditions_of(extra["id"]) == {}


def test_a_film_is_not_a_specimen_on_the_specimen_routes(client, film):
    assert client.get(f"/api/specimens/{film['id']}/conditions").status_code == 404
    assert client.put(f"/api/specimens/{film['id']}/conditions",
                      json={"conditions": {"voltage": "1 V"}}).status_code == 404
    assert client.get(f"/api/films/{film['id']}/conditions").json()["voltage"]["canonical_value"] == 4.0
