"""The demo study: one click from the home page, made once, reused on the next click."""

from __future__ import annotations

import pytest
from scipy.stats import spearmanr

from tests.web.conftest import make_client


def test_the_home_page_offers_the_demo_study(tmp_path):
    with make_client(tmp_path) as client:
        page = client.get("/").text
        assert 'action="/demo/study"' in page and "made up" in page.lower()


@pytest.mark.slow
def test_the_demo_study_is_made_once_and_shows_the_dbm_trend(tmp_path):
    with make_client(tmp_path) as client:
        first = client.post("/demo/study", follow_redirects=False)
        assert first.status_code == 303
        again = client.post("/demo/study", follow_redirects=False)
        assert again.headers["location"] == first.headers["location"]  # reused, not made again
        assert len(client.get("/api/studies").json()["items"]) == 1

        page = client.get(first.headers["location"])
        assert page.status_code == 200 and "demo data" in page.text and "not real specimens" in page.text
        body = client.get("/api" + first.headers["location"]).json()
        assert body["n_specimens"] == 6
        volts = [row["conditions"]["voltage"]["canonical_value"] for row in body["table"]]
        boxes = [row["box_dimension"]["value"] for row in body["table"]]
        # made-up scenario: eta rises with the voltage, so D falls (Niemeyer, Pietronero & Wiesmann 1984)
        assert spearmanr(volts, boxes).statistic <= -0.9
        for url in body["plots"].values():
            assert client.get(url).status_code == 200
