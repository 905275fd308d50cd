"""Studies: specimens grouped under their conditions (voltage, concentration, site...).

Plain functions only (no web, no database): :mod:`.conditions` parses typed conditions with
their units, :mod:`.table_csv` reads them from a CSV table beside the images, and
:mod:`.table` turns stored analyses into the study table, its plot data and its CSV.
"""

from service.study.conditions import (
    CANONICAL_UNITS,
    KNOWN_UNITS,
    Condition,
    ConditionError,
    check_consistent,
    conditions_to_dict,
    parse_condition,
    parse_conditions,
    parse_conditions_text,
    parse_unit,
)
from service.study.table import (
    Axis,
    DiagramPoint,
    Measurement,
    Member,
    Point,
    Row,
    Series,
    axis_for,
    condition_names,
    diagram,
    growth_measurements_of,
    measurements_of,
    quantities,
    regime_groups,
    regime_series,
    series,
    study_csv,
    study_rows,
    verdict_of,
)
from service.study.table_csv import parse_header, read_conditions_table

__all__ = [
    "CANONICAL_UNITS", "KNOWN_UNITS", "Axis", "Condition", "ConditionError", "DiagramPoint", "Measurement",
    "Member", "Point", "Row", "Series", "axis_for", "check_consistent", "condition_names", "conditions_to_dict",
    "diagram", "growth_measurements_of", "measurements_of", "parse_condition", "parse_conditions", "parse_conditions_text", "parse_header", "parse_unit",
    "quantities", "read_conditions_table", "regime_groups", "regime_series", "series", "study_csv",
    "study_rows", "verdict_of",
]
