"""Conditions read from a CSV table beside the images (``ramiform analyze --conditions``).

The first column names the image file; every other column is one condition, its header
``name [unit]`` (``voltage [V]``, ``concentration [mmol/L]``) or a bare ``name`` for a text
or a plain number. An empty cell leaves that condition out for that image.
"""

from __future__ import annotations

import csv
import io
import os
import re
from collections.abc import Iterable, Mapping

from service.study.conditions import Condition, ConditionError, parse_condition, parse_unit

_HEADER = re.compile(r"^\s*(?P<name>[^\[\]]*?)\s*(?:\[(?P<unit>[^\[\]]*)\])?\s*$")


def parse_header(header: str) -> tuple[str, str | None]:
    """``"voltage [V]"`` -> ``("voltage", "V")``; ``"electrolyte"`` -> ``("electrolyte", None)``."""
    match = _HEADER.match(header or "")
    if match is None or not match.group("name"):
        raise ConditionError(f"column header {header!r} should read 'name [unit]' or 'name'")
    unit = match.group("unit")
    if unit is not None:
        try:
            parse_unit(unit)
        except ConditionError as exc:
            raise ConditionError(f"column {header!r}: {exc}") from None
    return match.group("name"), unit


def read_conditions_table(text: str, images: Iterable[str]) -> dict[str, dict[str, Condition]]:
    """Conditions of each given image (keyed as given), from the CSV ``text``.

    Rows are matched to images by file name (the base name; a row may also give the path
    as written). Raises :class:`ConditionError` for a header or cell that does not parse,
    a row naming no given image, or an image named twice. Images without a row get none.
    """
    images = list(images)
    by_name: dict[str, str] = {}
    for image in images:
        by_name.setdefault(image, image)
        by_name.setdefault(os.path.basename(image), image)
    rows = [row for row in csv.reader(io.StringIO(text.lstrip("\ufeff"))) if any(cell.strip() for cell in row)]
    if not rows:
        raise ConditionError("the conditions table is empty; its first row names the columns")
    header, *body = rows
    if len(header) < 2:
        raise ConditionError("the conditions table needs the image file name first and at least one condition column")
    columns = [parse_header(cell) for cell in header[1:]]
    names = [name for name, _ in columns]
    if len(set(names)) != len(names):
        raise ConditionError(f"a condition column appears twice in the header: {header[1:]}")
    found: dict[str, dict[str, Condition]] = {image: {} for image in images}
    seen: set[str] = set()
    for line, row in enumerate(body, start=2):
        key = row[0].strip()
        image = by_name.get(key) or by_name.get(os.path.basename(key))
        if image is None:
            raise ConditionError(f"row {line} of the conditions table names {key!r}, which is not among the images given")
        if image in seen:
            raise ConditionError(f"row {line} of the conditions table names {key!r} a second time")
        seen.add(image)
        if len(row) > len(header):
            raise ConditionError(f"row {line} of the conditions table has more cells than the header has columns")
        conditions: dict[str, Condition] = {}
        for (name, unit), cell in zip(columns, row[1:]):
            if not cell.strip():
                continue
            try:
                conditions[name] = parse_condition(name, cell.strip(), unit=unit)
            except ConditionError as exc:
                raise ConditionError(f"row {line} of the conditions table: {exc}") from None
        found[image] = conditions
    return found


def conditions_json(conditions: Mapping[str, Condition]) -> dict[str, dict]:
    return {name: condition.to_dict() for name, condition in conditions.items()}
