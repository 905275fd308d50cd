"""Studies between labs: another lab's study or specimen answers exactly like a missing one."""

from __future__ import annotations

import secrets

from tests.reliability.test_access import KEY_A, KEY_B, bearer, labs  # noqa: F401 - the keyed service fixture


def test_studies_stay_within_their_lab(labs):  # noqa: F811
    client, ids = labs
    study = client.post("/api/studies", json={"name": "lab A series"}, headers=bearer(KEY_A)).json()
    missing = secrets.token_urlsafe(18)
    for template in ("/api/studies/{}", "/api/studies/{}/export.csv", "/studies/{}",
                     "/api/studies/{}/plots/regimes.svg?condition=voltage"):
        foreign = client.get(template.format(study["id"]), headers=bearer(KEY_B))
        absent = client.get(template.format(missing), headers=bearer(KEY_B))
        assert foreign.status_code == absent.status_code == 404, template
    assert client.get("/api/studies", headers=bearer(KEY_B)).json()["items"] == []
    assert client.post(f"/api/studies/{study['id']}/specimens", json={"specimens": [ids["lab-b"]]},
                       headers=bearer(KEY_B)).status_code == 404
    # lab A cannot pull lab B's specimen into its study, nor read or set its conditions
    refused = client.post(f"/api/studies/{study['id']}/specimens", json={"specimens": [ids["lab-a"], ids["lab-b"]]},
                          headers=bearer(KEY_A))
    assert refused.status_code == 404
    assert client.get(f"/api/studies/{study['id']}", headers=bearer(KEY_A)).json()["table"] == []
    assert client.get(f"/api/specimens/{ids['lab-b']}/conditions", headers=bearer(KEY_A)).status_code == 404
    assert client.put(f"/api/specimens/{ids['lab-b']}/conditions", json={"conditions": {"voltage": "1 V"}},
                      headers=bearer(KEY_A)).status_code == 404
    assert client.get(f"/api/specimens/{ids['lab-b']}/conditions", headers=bearer(KEY_B)).json() == {}
