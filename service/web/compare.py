"""Distances between stored specimens for the compare page.

In the matcher's own feature space when every specimen was ranked (the matcher stores the
feature vector it compared), else a clearly labelled standardised distance over the scalar
measurements the specimens share.
"""

from __future__ import annotations

import math

from service.store import SpecimenRecord
from service.store.export import flatten
from service.web.jobs import matcher_rows

#: Scalar features left out of comparisons: fit bookkeeping rather than properties of the specimen.
_NOT_COMPARED = ("fit_range", "intercept", "n_fit_points", "ci95", "sizes", "_mm")


def numeric_features(record: SpecimenRecord) -> dict[str, int | float]:
    """The specimen's finite scalar measurements, by dotted name."""
    out = {}
    for key, value in flatten("", record.analysis.get("features", {})):
        if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
            if not any(part in key for part in _NOT_COMPARED):
                out[key] = value
    return out


def matcher_vector(record: SpecimenRecord) -> tuple[tuple, list[float]] | None:
    """((feature schema, *feature names), values) the matcher compared, or None when unranked."""
    rows = matcher_rows(record.analysis)
    if not rows or any(not isinstance(r.get("value"), (int, float)) for r in rows):
        return None
    schema = (record.analysis.get("explanation") or {}).get("references", {}).get("feature_schema")
    return (schema, *(r["feature"] for r in rows)), [float(r["value"]) for r in rows]


def shared_matcher_vectors(records: list[SpecimenRecord]) -> tuple[list[str], list[list[float]]] | None:
    """Feature names and vectors when every specimen was ranked with the same features."""
    vectors = [matcher_vector(r) for r in records]
    if not all(vectors) or len({v[0] for v in vectors}) != 1:
        return None
    return list(vectors[0][0][1:]), [v[1] for v in vectors]


def standardised_distances(
    chosen: list[SpecimenRecord], population: list[SpecimenRecord]
) -> tuple[list[list[float | None]], list[str], int]:
    """RMS difference of the shared scalar features, each in units of its spread.

    The spread of a feature is its standard deviation over ``population`` (the specimens
    stored); features with fewer than three values or no spread are left out. Returns the
    distance matrix, the features used and the population size.
    """
    values = [numeric_features(r) for r in chosen]
    shared = set.intersection(*(set(v) for v in values)) if values else set()
    pool = [numeric_features(r) for r in population]
    scales = {}
    for key in sorted(shared):
        column = [p[key] for p in pool if key in p]
        if len(column) >= 3:
            mean = sum(column) / len(column)
            sd = math.sqrt(sum((x - mean) ** 2 for x in column) / (len(column) - 1))
            if sd > 0:
                scales[key] = sd
    matrix: list[list[float | None]] = [
        [math.sqrt(sum(((a[k] - b[k]) / s) ** 2 for k, s in scales.items()) / len(scales)) if scales else None
         for b in values]
        for a in values
    ]
    return matrix, sorted(scales), len(population)


#: The comparison table: (label, path into features, unit key) in the order a reader expects.
_TABLE = (
    ("Box-counting dimension", "box_dimension", None),
    ("Mass-radius dimension", "mass_radius_dimension", None),
    ("Sandbox dimension", "sandbox_dimension", None),
)


def side_by_side(records: list[SpecimenRecord]) -> list[tuple[str, list[str]]]:
    """``(label, [text for each specimen])`` rows: the dimensions with their 95% intervals
    (withheld ones say so), then every other shared scalar measurement in words and units."""
    from service.web import labels
    from service.web.report_view import check_dimension, num

    rows: list[tuple[str, list[str]]] = []
    for label, key, _ in _TABLE:
        cells = []
        for r in records:
            fit = (r.analysis.get("features") or {}).get(key) or {}
            status, _reason = check_dimension(fit.get("value"), fit.get("ci95"))
            ci = fit.get("ci95")
            if status == "withheld":
                cells.append("withheld")
            elif isinstance(ci, list) and len(ci) == 2 and all(isinstance(c, (int, float)) for c in ci):
                cells.append(f"{fit['value']:.3f} ({ci[0]:.3f}–{ci[1]:.3f})" + (" ⚑" if status == "flagged" else ""))
            else:
                cells.append(num(fit.get("value")))
        rows.append((label, cells))
    values = [numeric_features(r) for r in records]
    skip = tuple(k for _, k, _ in _TABLE)
    keys = dict.fromkeys(k for v in values for k in v if not k.startswith(skip))
    for k in keys:
        unit = labels.unit_of(k)
        rows.append((labels.feature_label(k) + (f" ({unit})" if unit else ""), [num(v.get(k), 4) for v in values]))
    return rows
