"""Typed conditions: units parsed from our table, converted exactly, refused when unknown.

The conversions are definitions, so the checks are exact: SI prefixes (milli = 1e-3,
micro = 1e-6; BIPM, The International System of Units, 9th edition, 2019, table 7),
1 M = 1 mol/L and 1 mA/cm2 = 10 A/m2 (IUPAC Green Book, 3rd edition, 2007), and the
Celsius temperature t/degC = T/K - 273.15 (SI brochure, section 2.3.1).
"""

from __future__ import annotations

import math

import pytest

from service.study import (
    ConditionError,
    parse_condition,
    parse_conditions,
    parse_conditions_text,
    parse_header,
    read_conditions_table,
)


@pytest.mark.parametrize(
    ("written", "quantity", "canonical"),
    [
        ("4 V", "voltage", 4.0),
        ("1500 mV", "voltage", 1.5),
        ("0.1 mol/L", "concentration", 0.1),
        ("0.1 M", "concentration", 0.1),
        ("50 mM", "concentration", 0.05),
        ("50 mmol/L", "concentration", 0.05),
        ("20 µM", "concentration", 20e-6),
        ("25 °C", "temperature", 25.0),
        ("298.15 K", "temperature", 25.0),
        ("2 mA/cm2", "current density", 20.0),
        ("90 min", "time", 5400.0),
        ("-0.35 V", "voltage", -0.35),
        ("1e-3 V", "voltage", 1e-3),
    ],
)
def test_numbers_with_units_convert_exactly(written, quantity, canonical):
    condition = parse_condition("x", written)
    assert condition.quantity == quantity
    assert math.isclose(condition.canonical_value, canonical, rel_tol=1e-12, abs_tol=1e-12)


def test_the_three_written_forms_agree():
    as_text = parse_condition("voltage", "4 V")
    as_object = parse_condition("voltage", {"value": 4, "unit": "V"})
    as_number = parse_condition("voltage", 4, unit="V")
    assert as_text == as_object == as_number
    assert as_text.to_dict() == {"value": 4.0, "unit": "V", "quantity": "voltage",
                                 "canonical_value": 4.0, "canonical_unit": "V"}


def test_texts_and_plain_numbers():
    parsed = parse_conditions({"electrolyte": "copper sulfate", "site": "north reef", "replicate": 3, "pH": "2.5"})
    assert parsed["electrolyte"].quantity == "text" and parsed["electrolyte"].value == "copper sulfate"
    assert parsed["replicate"].quantity == "number" and parsed["replicate"].unit is None
    assert parsed["pH"].canonical_value == 2.5


@pytest.mark.parametrize(
    "raw",
    ["4 volts", "4 v", "0.1 molar", {"value": 4, "unit": "Volt"}, "3 MM", {"value": "CuSO4", "unit": "V"},
     {"value": float("nan"), "unit": "V"}, None, True, [4, "V"], "-300 °C"],
)
def test_what_does_not_parse_is_refused_with_its_reason(raw):
    with pytest.raises(ConditionError) as caught:
        parse_condition("voltage", raw)
    assert caught.value.status_code == 422
    assert "voltage" in str(caught.value)


def test_a_bad_name_or_too_many_conditions_is_refused():
    with pytest.raises(ConditionError):
        parse_conditions({"": "4 V"})
    with pytest.raises(ConditionError):
        parse_conditions({f"c{i}": i for i in range(40)})
    with pytest.raises(ConditionError):
        parse_conditions(["voltage", "4 V"])


def test_csv_headers_and_table():
    assert parse_header("voltage [V]") == ("voltage", "V")
    assert parse_header(" concentration [mmol/L] ") == ("concentration", "mmol/L")
    assert parse_header("electrolyte") == ("electrolyte", None)
    with pytest.raises(ConditionError):
        parse_header("voltage [volts]")

    text = "image,voltage [V],concentration [mM],electrolyte\r\na.png,4,50,CuSO4\r\nb.png,2.5,,\r\n"
    table = read_conditions_table(text, ["dish/a.png", "dish/b.png", "dish/c.png"])
    assert table["dish/a.png"]["concentration"].canonical_value == pytest.approx(0.05, rel=1e-12)
    assert table["dish/a.png"]["electrolyte"].value == "CuSO4"
    assert set(table["dish/b.png"]) == {"voltage"} and table["dish/c.png"] == {}

    with pytest.raises(ConditionError, match="not among the images"):
        read_conditions_table("image,voltage [V]\nz.png,4\n", ["a.png"])
    with pytest.raises(ConditionError, match="volts"):
        read_conditions_table("image,voltage [volts]\na.png,4\n", ["a.png"])
    with pytest.raises(ConditionError, match="row 2"):
        read_conditions_table("image,voltage [V]\na.png,four\n", ["a.png"])


def test_conditions_as_a_form_writes_them():
    as_text = parse_conditions_text("voltage = 4 V; concentration = 50 mM\nelectrolyte = copper sulfate")
    as_json = parse_conditions_text('{"voltage": "4 V", "concentration": "50 mM", "electrolyte": "copper sulfate"}')
    assert as_text == as_json and list(as_text) == ["voltage", "concentration", "electrolyte"]
    assert parse_conditions_text("  ") == {}
    for bad in ("voltage 4 V", "voltage = 4 volts", "v = 1 V; v = 2 V", "{broken", "= 4 V"):
        with pytest.raises(ConditionError):
            parse_conditions_text(bad)
