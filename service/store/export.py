"""CSV export of stored specimens: one row per specimen, one column per scalar measurement."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterable, Iterator
from typing import Any

from service.contract import analysis_view
from service.store.store import SpecimenRecord

_FIXED = ("id", "label", "kind", "filename", "created_at", "sha256")


def flatten(prefix: str, value: Any) -> Iterator[tuple[str, Any]]:
    """``(dotted.key, scalar)`` pairs of a nested dict; a ``ci95`` pair becomes two keys."""
    if isinstance(value, dict):
        for key, inner in value.items():
            yield from flatten(f"{prefix}.{key}" if prefix else str(key), inner)
    elif isinstance(value, (list, tuple)):
        # A confidence interval becomes two columns; other arrays (box counts, curves) are
        # not spreadsheet material and stay in the JSON.
        if prefix.endswith("ci95") and len(value) == 2:
            yield f"{prefix}_low", value[0]
            yield f"{prefix}_high", value[1]
    elif value is None or isinstance(value, (str, int, float, bool)):
        yield prefix, value


#: Segmentation settings that tell re-runs of one image apart (what was used, not how it was found).
def specimen_row(record: SpecimenRecord) -> dict[str, Any]:
    """The flat CSV row of one specimen: identity, calibration, segmentation settings used,
    features (each fitted dimension with its ``status`` and ``reason``), best match, warnings.

    The stored analysis is read through the contract (:func:`service.contract.stored_analysis`),
    so a number and its judgement are those of the API and the pages.
    """
    analysis = analysis_view(record.analysis)
    row: dict[str, Any] = {
        "id": record.id,
        "label": record.label,
        "kind": record.kind,
        "filename": record.filename,
        "created_at": record.created_at.isoformat(),
        "sha256": record.sha256,
    }
    for section in ("image", "calibration"):
        row.update(flatten(section, analysis.get(section, {})))
    row.update(segmentation_columns(analysis.get("segmentation") or {}))
    row.update(flatten("features", analysis.get("features", {})))
    matches = analysis.get("matches") or []
    if matches:
        best = matches[0]
        row["best_match.regime"] = best.get("regime")
        row["best_match.parameters"] = json.dumps(best.get("parameters", {}), sort_keys=True)
        row["best_match.probability"] = best.get("probability")
    if "in_library" in analysis:
        row["in_library"] = analysis["in_library"]
    verdict = ((analysis.get("explanation") or {}).get("verdict") or {}).get("name")
    if verdict is not None:
        row["verdict"] = verdict
    warnings = analysis.get("warnings", [])
    row["warnings"] = " | ".join(w["text"] for w in warnings)
    row["warning_codes"] = " ".join(w["code"] for w in warnings)
    return row


#: Segmentation settings written to every row, so re-readings of one image can be told apart.
SEGMENTATION_COLUMNS = ("mode", "polarity", "threshold", "levels_compare", "lighting", "confidence",
                        "branch_width_px", "reduced_resolution_factor")


def segmentation_columns(segmentation: dict[str, Any]) -> dict[str, Any]:
    """``segmentation.*`` cells: the settings used, the field read, and the overrides that
    reproduce the reading (``segmentation.reading``, as JSON)."""
    reading = segmentation.get("reading") if isinstance(segmentation.get("reading"), dict) else {}
    out = {f"segmentation.{key}": segmentation.get(key, reading.get(key)) for key in SEGMENTATION_COLUMNS}
    field = segmentation.get("field_of_view")
    out["segmentation.field"] = field.get("source") if isinstance(field, dict) else None
    out["segmentation.reading"] = json.dumps(reading, sort_keys=True) if reading else None
    return out


#: Columns Ramiform generates itself; every other text cell may carry what a client wrote.
_GENERATED = frozenset({"id", "created_at", "sha256"})


def _cell(column: str, value: Any) -> Any:
    # A text cell starting with = + - @ would run as a formula in a spreadsheet.
    if column not in _GENERATED and isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


def specimens_csv(records: Iterable[SpecimenRecord]) -> str:
    """CSV text of the specimens; columns are the union of all rows' keys, in first-seen order."""
    rows = [specimen_row(record) for record in records]
    columns = list(dict.fromkeys([*_FIXED, *(key for row in rows for key in row)]))
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=columns, lineterminator="\r\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({key: _cell(key, value) for key, value in row.items()})
    return out.getvalue()
