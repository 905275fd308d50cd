"""``ramiform analyze --conditions table.csv``: conditions in each JSON object; bad tables exit 2."""

from __future__ import annotations

import json

import pytest

from service.cli import main
from tests.web.conftest import specimen_png


@pytest.fixture
def images(tmp_path):
    paths = []
    for seed in (1, 2):
        path = tmp_path / f"dish-{seed}.png"
        path.write_bytes(specimen_png(seed, n_particles=400, size_px=300))
        paths.append(str(path))
    return paths


def test_conditions_join_each_result(tmp_path, images, capsys):
    table = tmp_path / "conditions.csv"
    table.write_text("file,voltage [V],concentration [mmol/L],electrolyte\n"
                     "dish-2.png,4.5,50,CuSO4\n"
                     "dish-1.png,1.5,100,CuSO4\n", encoding="utf-8")
    status = main(["analyze", "--json", "--workers", "1", "--conditions", str(table), *images])
    assert status == 0
    results = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r["path"] for r in results] == images  # input order, not the table's
    first, second = (r["conditions"] for r in results)
    assert second["voltage"] == {"value": 4.5, "unit": "V", "quantity": "voltage",
                                 "canonical_value": 4.5, "canonical_unit": "V"}
    assert second["concentration"]["canonical_value"] == pytest.approx(0.05, rel=1e-12)  # SI: 1 mmol/L = 1e-3 mol/L
    assert first["electrolyte"]["value"] == "CuSO4"
    assert "features" in results[0] and "box_dimension" in results[0]["features"]


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("file,voltage [volts]\ndish-1.png,4\n", "volts"),
        ("file,voltage [V]\ndish-1.png,4\nother.png,5\n", "other.png"),
        ("file,voltage [V]\ndish-1.png,four\n", "row 2"),
        ("file,voltage [V]\ndish-1.png,1500 mV\n", "'mV'"),  # a cell naming another unit than its column
    ],
)
def test_a_table_that_does_not_read_exits_2_before_any_analysis(tmp_path, images, capsys, text, reason):
    table = tmp_path / "conditions.csv"
    table.write_text(text, encoding="utf-8")
    assert main(["analyze", "--json", "--workers", "1", "--conditions", str(table), *images]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and reason in captured.err and "--conditions" in captured.err


def test_a_bare_table_name_is_found_beside_the_images(tmp_path, images, capsys, monkeypatch):
    (tmp_path / "table.csv").write_text("file,voltage [V]\ndish-1.png,4\n", encoding="utf-8")
    monkeypatch.chdir(tmp_path.parent)  # not where the table is
    assert main(["analyze", "--json", "--workers", "1", "--conditions", "table.csv", images[0]]) == 0
    assert json.loads(capsys.readouterr().out)["conditions"]["voltage"]["value"] == 4.0


def test_a_missing_table_exits_2(tmp_path, images, capsys):
    assert main(["analyze", "--conditions", str(tmp_path / "absent.csv"), *images]) == 2
    assert "absent.csv" in capsys.readouterr().err
