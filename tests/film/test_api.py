"""``POST /api/films`` and friends through the app: the contract's keys, storage by id, the
report page, and bad input answered with a clear 4xx that loses nothing already stored."""

from __future__ import annotations

import io
import warnings

import numpy as np
import pytest
from PIL import Image

from service.film.synthetic import encode_video, render_film
from service.simulate import grow

with warnings.catch_warnings():
    warnings.filterwarnings("ignore", message="Using `httpx` with")
    from fastapi.testclient import TestClient

from service.web.app import create_app
from service.web.settings import Settings

STABLE_KEYS = {"frames", "growth", "front_velocity_px_per_s", "time_to_rim_s", "tip_growth_share", "final",
               "warnings", "id", "report_url"}


@pytest.fixture(scope="module")
def small_film():
    return render_film(grow("dla", 400, seed=8), 6, seed=9, size_px=320, interval_s=30.0)


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    data = tmp_path_factory.mktemp("films") / "data"
    with TestClient(create_app(Settings(data_dir=data, workers=0))) as c:
        yield c


@pytest.fixture(scope="module")
def stored(client, small_film):
    video = encode_video(small_film.frames, fps=2.0)
    response = client.post("/api/films", files={"film": ("run-7.mp4", video, "video/mp4")},
                           data={"label": "cell 7, 4 V", "rim_radius_mm": "30", "pixel_size_mm": "0.2"})
    assert response.status_code == 201, response.text
    return response.json()


def _png(rgb: np.ndarray) -> bytes:
    out = io.BytesIO()
    Image.fromarray(rgb).save(out, format="PNG")
    return out.getvalue()


def test_a_video_answers_201_with_the_contract_keys(stored, small_film):
    assert STABLE_KEYS <= set(stored)
    assert stored["frames"] == 6
    growth = stored["growth"]
    for key in ("times_s", "area_px", "radius_of_gyration_px", "max_radius_px", "tips"):
        assert len(growth[key]) == stored["frames_used"]
    assert len(growth["box_dimension"]["values"]) == len(growth["box_dimension"]["ci95"]) == stored["frames_used"]
    # Check: PyAV wrote two frames a second, so the container's times are k / 2 s.
    assert growth["times_s"] == pytest.approx([k / 2.0 for k in growth["frame_index"]])
    assert {"value", "ci95"} <= set(stored["time_to_rim_s"])
    assert stored["time_to_rim_s"]["rim_radius_px"] == pytest.approx(30 / 0.2)
    assert stored["report_url"] == f"/films/{stored['id']}"
    assert "features" in stored["final"]


def test_the_film_is_kept_and_read_back_by_id(client, stored):
    again = client.get(f"/api/films/{stored['id']}")
    assert again.status_code == 200
    assert again.json()["growth"] == stored["growth"]
    listing = client.get("/api/films").json()
    assert stored["id"] in [item["id"] for item in listing["items"]]
    for name in ("arrival.png", "growth.svg", "overlay.png", "source.mp4"):
        assert client.get(stored["files"][name]).status_code == 200
    arrival = np.load(io.BytesIO(client.get(stored["files"]["arrival_frames.npz"]).content))["arrival_frame"]
    assert arrival.max() == max(stored["growth"]["frame_index"])
    assert client.get("/api/films/nope").status_code == 404


def test_the_report_page_shows_the_arrival_map_curves_and_the_caution(client, stored):
    page = client.get(stored["report_url"])
    assert page.status_code == 200
    for url in (stored["files"]["arrival.png"], stored["files"]["growth.svg"]):
        assert url in page.text
    assert "Front speed" in page.text and "rim electrode" in page.text
    assert 'data-caution="electrodeposition"' in page.text


def test_frames_with_their_times_answer_201(client, small_film):
    frames = [("frames", (f"f{k}.png", _png(small_film.frames[k]), "image/png")) for k in (0, 2, 3, 5)]
    response = client.post("/api/films", files=frames, data={"frame_times_s": "0, 60, 90, 150"})
    assert response.status_code == 201, response.text
    body = response.json()
    assert body["frames"] == 4
    assert body["growth"]["times_s"] == pytest.approx([0.0, 60.0, 90.0, 150.0])


def _count(client) -> int:
    return client.get("/api/films").json()["total"]


def test_bad_films_answer_a_clear_4xx_and_lose_nothing(client, stored, small_film):
    before = _count(client)
    video = encode_video(small_film.frames, container="avi")
    cases = [
        ({"film": ("cut.avi", video[: len(video) // 2], "video/x-msvideo")}, {}, 422, "truncated"),
        ({"film": ("one.mp4", encode_video(small_film.frames[:1]), "video/mp4")}, {}, 422, "two frames"),
        ([("frames", ("a.png", _png(small_film.frames[0]), "image/png")),
          ("frames", ("b.png", _png(small_film.frames[1][:300]), "image/png"))], {"frame_interval_s": "60"}, 422,
         "one size"),
        ({"film": ("notes.txt", b"growth notes, not a film", "text/plain")}, {}, 415, "not a film"),
        ([("frames", ("a.png", _png(small_film.frames[0]), "image/png")),
          ("frames", ("b.png", _png(small_film.frames[1]), "image/png"))], {}, 422, "times"),
    ]
    for files, data, status, words in cases:
        response = client.post("/api/films", files=files, data=data)
        assert response.status_code == status, (words, response.text)
        assert words in response.json()["detail"]
    assert _count(client) == before
    assert client.get(f"/api/films/{stored['id']}").status_code == 200


def test_the_home_page_opens_the_demo_film_in_one_click(client):
    home = client.get("/")
    assert 'action="/films/demo"' in home.text
    opened = client.post("/films/demo", follow_redirects=False)
    assert opened.status_code == 303
    page = client.get(opened.headers["location"])
    assert page.status_code == 200
    assert "DEMO (simulated, not a real film)" in page.text and "made up" in page.text
    # a second click opens the same film
    assert client.post("/films/demo", follow_redirects=False).headers["location"] == opened.headers["location"]


def test_the_films_page_uploads_and_follows_progress(client, stored, small_film, tmp_path):
    from service.web.films import _progress_writer

    page = client.get("/films")
    assert page.status_code == 200
    assert 'id="film-form"' in page.text and "/static/films.js" in page.text
    assert stored["report_url"] in page.text
    # what the worker leaves while it reads frames is what the page's poll gets
    token = "t" * 20
    folder = client.app.state.store.data_dir / "film-progress"
    folder.mkdir(parents=True, exist_ok=True)
    _progress_writer(str(folder / f"{token}.json"))("frames", 3, 10)
    assert client.get(f"/api/films/progress/{token}").json() == {"stage": "frames", "done": 3, "total": 10}
    assert client.get("/api/films/progress/" + "u" * 20).json()["stage"] == "waiting"
    assert client.get("/api/films/progress/bad token").status_code == 422
    # an upload under a token leaves no progress behind once answered
    frames = [("frames", (f"f{k}.png", _png(small_film.frames[k]), "image/png")) for k in (0, 3, 5)]
    other = "v" * 24
    response = client.post("/api/films", files=frames, data={"frame_interval_s": "30", "progress_token": other})
    assert response.status_code == 201, response.text
    assert not (folder / f"{other}.json").exists()


def test_a_film_can_be_deleted_with_its_pictures(client, small_film):
    frames = [("frames", (f"f{k}.png", _png(small_film.frames[k]), "image/png")) for k in (0, 5)]
    body = client.post("/api/films", files=frames, data={"frame_interval_s": "30"}).json()
    folder = client.app.state.store.data_dir / "films" / body["id"]
    assert folder.is_dir()
    assert client.delete(f"/api/films/{body['id']}").status_code == 204
    assert client.get(f"/api/films/{body['id']}").status_code == 404
    assert not folder.exists()
    assert client.delete(f"/api/films/{body['id']}").status_code == 404
