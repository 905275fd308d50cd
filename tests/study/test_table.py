"""The study table and plot data from analysis objects (the shapes of the analysis JSON, values as data).

Exact checks: positions on a condition axis are the canonical values (SI prefixes, BIPM SI
brochure 2019), texts lie at 0, 1, 2... in order of first appearance, and the CSV of the
table reads back with Python's csv module to the same numbers (``repr`` of a float
round-trips exactly, Python language reference).
"""

from __future__ import annotations

import csv
import io

import pytest

from service.study import ConditionError, Member, diagram, parse_conditions, regime_series, series, study_csv, study_rows


def _analysis(d: float, probabilities: dict, *, confident: bool, in_library: bool = True) -> dict:
    return {
        "features": {"box_dimension": {"value": d, "ci95": [d - 0.05, d + 0.05]}, "skeleton": {"tips": 12}},
        "parameter_estimates": {"dbm": {"eta": {"value": 2 - d, "ci95": [1.5 - d, 2.5 - d]}}},
        "explanation": {"regime_probabilities": probabilities, "verdict": {"confident": confident}},
        "in_library": in_library,
    }


@pytest.fixture
def rows():
    members = [
        Member("a", "dish A", None, _analysis(1.8, {"eden": 0.9, "dbm": 0.1}, confident=True),
               parse_conditions({"voltage": "1500 mV", "electrolyte": "CuSO4", "=note": "=1+1"})),
        Member("b", None, "b.png", _analysis(1.5, {"eden": 0.2, "dbm": 0.8}, confident=False),
               parse_conditions({"voltage": "3 V", "electrolyte": "ZnSO4"})),
        Member("c", None, None, _analysis(1.3, {"dbm": 0.7, "dla": 0.3}, confident=True, in_library=False),
               parse_conditions({"voltage": "0.5 V", "electrolyte": "CuSO4"})),
        Member("d", "unranked", None, {"features": {"box_dimension": {"value": 1.6}}}, {}),
    ]
    return study_rows(members)


def test_rows_carry_verdicts_and_measurements(rows):
    assert [r.name for r in rows] == ["dish A", "b.png", "c", "unranked"]
    assert [(r.top_regime, r.uncertain) for r in rows] == [("eden", False), ("dbm", True), ("dbm", True), (None, True)]
    assert rows[0].measurements["estimate.dbm.eta"].ci95 == pytest.approx((-0.3, 0.7))
    assert rows[0].measurements["skeleton.tips"].value == 12 and rows[0].measurements["skeleton.tips"].ci95 is None


def test_series_and_axes(rows):
    data = series(rows, "box_dimension", "voltage")
    assert data.xs() == [0.5, 1.5, 3.0] and data.ys() == [1.3, 1.8, 1.5]
    assert data.axis.title == "voltage (V)" and data.left_out == ("unranked",)
    axis, curves = regime_series(rows, "voltage")
    assert curves["dla"] == [(0.5, 0.3), (1.5, 0.0), (3.0, 0.0)]
    x_axis, y_axis, points = diagram(rows, "voltage", "electrolyte")
    assert y_axis.categories == ("CuSO4", "ZnSO4")
    assert [(p.x, p.y, p.regime) for p in points] == [(1.5, 0.0, "eden"), (3.0, 1.0, "dbm"), (0.5, 0.0, "dbm")]
    with pytest.raises(ConditionError):
        series(rows, "box_dimension", "temperature")
    with pytest.raises(ConditionError):
        diagram(rows, "voltage", "voltage")


def test_csv_reads_back(rows):
    table = list(csv.DictReader(io.StringIO(study_csv(rows))))
    assert [r["specimen_id"] for r in table] == ["a", "b", "c", "d"]
    assert [float(r["voltage [V]"]) for r in table[:3]] == [1.5, 3.0, 0.5]  # mixed mV and V: the canonical volts
    assert table[3]["voltage [V]"] == ""
    for row, source in zip(table, rows):
        assert float(row["box_dimension"]) == source.measurements["box_dimension"].value
    assert table[1]["box_dimension_ci95_low"] == repr(1.5 - 0.05)
    assert table[3]["box_dimension_ci95_low"] == "" and table[3]["top_regime"] == ""
    assert table[0]["'=note"] == "'=1+1"  # a formula-looking name or text is not run by a spreadsheet
