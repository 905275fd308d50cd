"""Studies through the REST API and the pages: create, attach with conditions, table, plots, CSV.

Bad input (an unknown unit, an unknown id, a clash of quantities) answers 4xx and leaves the
study exactly as it was. The CSV export is read back with Python's csv module.
"""

from __future__ import annotations

import csv
import io
import json

import pytest

from tests.web.conftest import make_client, specimen_png


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    # one app and three uploads for the module (each upload is a full analysis); every test makes its own study
    with make_client(tmp_path_factory.mktemp("studies")) as c:  # the bundled reference set, its fitted model stored
        yield c


def _upload(client, seed: int, conditions: dict | str | None = None):
    data = {} if conditions is None else {"conditions": conditions if isinstance(conditions, str) else json.dumps(conditions)}
    return client.post("/api/specimens", files={"image": (f"dish-{seed}.png", specimen_png(seed, n_particles=400,
                                                                                            size_px=300), "image/png")},
                       data=data)


@pytest.fixture(scope="module")
def three(client):
    ids = []
    for seed, volts in ((1, "2 V"), (2, "3500 mV"), (3, "5 V")):
        answer = _upload(client, seed, {"voltage": volts, "electrolyte": "CuSO4"})
        assert answer.status_code == 201, answer.text
        assert answer.json()["conditions"]["voltage"]["unit"] in ("V", "mV")
        ids.append(answer.json()["id"])
    return ids


def test_a_study_from_creation_to_csv(client, three):
    created = client.post("/api/studies", json={"name": "voltage series", "description": "made-up check"})
    assert created.status_code == 201
    study = created.json()
    assert client.get("/api/studies").json()["items"][0]["id"] == study["id"]

    attached = client.post(f"/api/studies/{study['id']}/specimens",
                           json={"specimens": [three[0], {"id": three[1]},
                                               {"id": three[2], "conditions": {"concentration": "0.1 M"}}]})
    assert attached.status_code == 200, attached.text
    body = client.get(f"/api/studies/{study['id']}").json()
    assert body == attached.json()
    assert [row["specimen_id"] for row in body["table"]] == three
    assert body["conditions"] == {"voltage": "voltage", "electrolyte": "text", "concentration": "concentration"}
    first = body["table"][0]
    assert first["box_dimension"]["ci95"][0] <= first["box_dimension"]["value"] <= first["box_dimension"]["ci95"][1]
    assert first["top_regime"] in first["regime_probabilities"]
    assert isinstance(first["parameter_estimates"], dict)

    for name, url in body["plots"].items():
        answer = client.get(url)
        assert answer.status_code == 200, (name, answer.text)
        assert answer.headers["content-type"].startswith("image/svg+xml") and b"<svg" in answer.content

    # the export reads back with the csv module: one row per specimen, the JSON table's values exactly
    exported = client.get(f"/api/studies/{study['id']}/export.csv")
    assert exported.status_code == 200 and exported.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(exported.text)))
    assert [r["specimen_id"] for r in rows] == three
    for row, entry in zip(rows, body["table"]):
        assert float(row["voltage [V]"]) == entry["conditions"]["voltage"]["canonical_value"]  # mixed mV and V: volts
        assert float(row["box_dimension"]) == entry["box_dimension"]["value"]
        assert float(row["box_dimension_ci95_low"]) == entry["box_dimension"]["ci95"][0]
        assert row["electrolyte"] == "CuSO4" and row["top_regime"] == entry["top_regime"]
    assert rows[2]["concentration [mol/L]"] == "0.1" and rows[0]["concentration [mol/L]"] == ""

    page = client.get(f"/studies/{study['id']}")
    assert page.status_code == 200 and "voltage series" in page.text and "/plots/diagram.svg" in page.text
    assert client.get("/studies").status_code == 200


def test_the_study_page_adds_a_specimen_with_its_conditions(client, three):
    study = client.post("/api/studies", json={"name": "page series"}).json()
    page_url = study["page_url"]
    assert three[0] in client.get(page_url).text  # offered in the list of measured specimens
    refused = client.post(f"{page_url}/specimens", data={"specimen": three[0], "conditions": "voltage = 2 volts"},
                          follow_redirects=False)
    assert refused.status_code == 422 and "volts" in refused.text
    assert client.get(study["url"]).json()["table"] == []
    added = client.post(f"{page_url}/specimens", follow_redirects=False,
                        data={"specimen": f"http://127.0.0.1:8000/specimens/{three[0]}", "conditions": "electrolyte = CuSO4"})
    assert added.status_code == 303 and added.headers["location"] == page_url
    table = client.get(study["url"]).json()["table"]
    assert [row["specimen_id"] for row in table] == [three[0]]
    assert table[0]["conditions"]["electrolyte"]["value"] == "CuSO4"  # the shared specimens keep their conditions
    answer = client.post(f"{page_url}/specimens", data={"specimen": "no-such-id"}, follow_redirects=False)
    assert answer.status_code == 404 and client.get(study["url"]).json()["table"] == table


def test_bad_input_leaves_the_study_untouched(client, three):
    study = client.post("/api/studies", json={"name": "series"}).json()
    url = f"/api/studies/{study['id']}"
    assert client.post(f"{url}/specimens", json={"specimens": three[:2]}).status_code == 200
    before = client.get(url).json()
    conditions_before = client.get(f"/api/specimens/{three[2]}/conditions").json()

    attempts = [
        ({"specimens": [{"id": three[2], "conditions": {"voltage": "4 volts"}}]}, 422),   # unit not in the table
        ({"specimens": [{"id": three[2], "conditions": {"voltage": "0.2 M"}}]}, 422),     # voltage as a concentration
        ({"specimens": [three[2], "no-such-specimen"]}, 404),                              # one id unknown
        ({"specimens": []}, 422),
        ({"ids": three}, 422),
    ]
    for payload, status in attempts:
        answer = client.post(f"{url}/specimens", json=payload)
        assert answer.status_code == status, (payload, answer.text)
        assert answer.json()["detail"]
        assert client.get(url).json() == before
        assert client.get(f"/api/specimens/{three[2]}/conditions").json() == conditions_before

    # an upload whose conditions do not parse is refused before anything is stored
    total = client.get("/api/specimens").json()["total"]
    for bad in ({"voltage": "4 volts"}, "{not json", '["4 V"]', "voltage = 4 volts", "voltage 4 V"):
        answer = _upload(client, 4, bad)
        assert answer.status_code == 422, answer.text
    assert client.get("/api/specimens").json()["total"] == total

    assert client.put(f"/api/specimens/{three[0]}/conditions", json={"conditions": {"voltage": "hot"}}).status_code == 422
    assert client.get(url).json() == before

    # unknown ids: 404 everywhere
    for method, path in [("get", "/api/studies/nope"), ("get", "/api/studies/nope/export.csv"),
                         ("get", "/api/studies/nope/plots/regimes.svg?condition=voltage"), ("get", "/studies/nope"),
                         ("delete", "/api/studies/nope"), ("get", "/api/specimens/nope/conditions")]:
        assert getattr(client, method)(path).status_code == 404, path
    assert client.post("/api/studies/nope/specimens", json={"specimens": three}).status_code == 404
    # a plot over a condition the study lacks says so
    answer = client.get(f"{url}/plots/quantity.svg?quantity=box_dimension&condition=temperature")
    assert answer.status_code == 422 and "temperature" in answer.json()["detail"]
    assert client.post("/api/studies", json={"name": ""}).status_code == 422


def test_conditions_can_be_set_and_replaced(client):
    # a stored record of its own (no analysis needed to carry conditions), so the shared specimens stay as they are
    specimen = client.app.state.store.add({"source": {}}, {"note.txt": b"x"}).id
    assert client.put(f"/api/specimens/{specimen}/conditions", json={"conditions": {"voltage": "3 V"}}).status_code == 200
    answer = client.put(f"/api/specimens/{specimen}/conditions", json={"conditions": {"temperature": "298.15 K"}})
    assert answer.status_code == 200
    assert set(answer.json()) == {"voltage", "temperature"}
    assert answer.json()["temperature"]["canonical_value"] == pytest.approx(25.0, abs=1e-9)  # SI: t/degC = T/K - 273.15
    replaced = client.put(f"/api/specimens/{specimen}/conditions",
                          json={"conditions": {"site": "bench 2"}, "replace": True}).json()
    assert set(replaced) == {"site"}
