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


def test_film_conditions_join_the_json(film_path, capsys):
    assert main(["film", str(film_path), "--frame-interval", "30", "--json",
                 "--conditions", "voltage=4000 mV; electrolyte=CuSO4"]) == 0
    body = json.loads(capsys.readouterr().out)
    # 4000 mV is 4 V by the SI prefix (BIPM SI Brochure, 9th ed.)
    assert body["conditions"]["voltage"]["canonical_value"] == 4.0 and body["conditions"]["voltage"]["unit"] == "mV"
    assert body["conditions"]["electrolyte"] == {"value": "CuSO4", "unit": None, "quantity": "text"}


def test_film_conditions_with_a_bad_unit_stop_before_any_work(film_path, capsys):
    assert main(["film", str(film_path), "--json", "--conditions", "voltage = 4 volts"]) == 2
    out, err = capsys.readouterr()
    error = json.loads(out)["error"]
    assert error["status"] == 422 and "volts" in error["detail"]
    assert "frame" not in err  # no frame was read
