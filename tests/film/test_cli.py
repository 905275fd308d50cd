"""``ramiform film``: one JSON object on stdout, progress on stderr, errors as an object and status 1."""

from __future__ import annotations

import json

import pytest

from service.cli import main
from service.film.synthetic import encode_video, render_film
from service.simulate import grow


@pytest.fixture(scope="module")
def film_path(tmp_path_factory):
    film = render_film(grow("dla", 400, seed=8), 5, seed=9, size_px=256, interval_s=30.0)
    path = tmp_path_factory.mktemp("cli") / "run.mp4"
    path.write_bytes(encode_video(film.frames))
    return path


def test_film_json_is_one_object_with_the_contract_keys(film_path, capsys):
    status = main(["film", str(film_path), "--frame-interval", "120", "--rim-radius-mm", "25",
                   "--pixel-size", "0.25", "--json"])
    out, err = capsys.readouterr()
    assert status == 0
    lines = out.strip().splitlines()
    assert len(lines) == 1
    body = json.loads(lines[0])
    assert {"frames", "growth", "front_velocity_px_per_s", "time_to_rim_s", "tip_growth_share", "final",
            "warnings"} <= set(body)
    assert body["frames"] == 5
    assert body["growth"]["times_s"] == [120.0 * k for k in body["growth"]["frame_index"]]
    assert body["time_to_rim_s"]["rim_radius_px"] == pytest.approx(100.0)
    assert "frame 5/5" in err  # progress goes to stderr


def test_film_error_is_an_object_and_status_1(tmp_path, capsys):
    bad = tmp_path / "notes.mp4"
    bad.write_bytes(b"not a film")
    assert main(["film", str(bad), "--json"]) == 1
    error = json.loads(capsys.readouterr().out)["error"]
    assert error["status"] == 415


def test_a_malformed_interval_is_an_argparse_error(film_path):
    with pytest.raises(SystemExit) as info:
        main(["film", str(film_path), "--frame-interval", "-3"])
    assert info.value.code == 2
