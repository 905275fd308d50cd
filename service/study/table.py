"""The study table and the data behind its plots, as plain functions of stored analyses.

A study groups specimens; each member brings its analysis JSON (``service.analysis``) and
its conditions (:mod:`service.study.conditions`). From them come one table row per
member, the series of any measured quantity against a chosen condition (with its 95%
interval where the analysis gives one), each regime's probability against a condition,
and the points of a morphology diagram over two conditions. Nothing here draws or stores.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from service.study.conditions import CANONICAL_UNITS, Condition, ConditionError, check_consistent


@dataclass(frozen=True)
class Member:
    """One specimen (or growth film) of a study as the store hands it over.

    For a film (``kind="film"``) ``analysis`` is its ``final`` analysis (the last frame, ranked
    like a photograph) and ``growth`` the film's whole JSON, from which the growth figures
    worth plotting against conditions join the row (:func:`growth_measurements_of`).
    """

    specimen_id: str
    label: str | None
    filename: str | None
    analysis: Mapping[str, Any]
    conditions: Mapping[str, Condition]
    kind: str = "specimen"
    growth: Mapping[str, Any] | None = None

    @property
    def name(self) -> str:
        return self.label or self.filename or self.specimen_id[:8]

    @classmethod
    def of_film(cls, film_id: str, label: str | None, filename: str | None, film: Mapping[str, Any],
                conditions: Mapping[str, Condition]) -> "Member":
        """A film as a study member: its last frame's analysis plus its growth figures."""
        final = film.get("final")
        return cls(film_id, label, filename, final if isinstance(final, Mapping) else {}, conditions,
                   kind="film", growth=film)


@dataclass(frozen=True)
class Measurement:
    """One measured quantity of one specimen: its value and its 95% interval, if known."""

    value: float
    ci95: tuple[float, float] | None = None


@dataclass(frozen=True)
class Row:
    """One line of the study table."""

    specimen_id: str
    name: str
    conditions: Mapping[str, Condition]
    measurements: Mapping[str, Measurement]
    top_regime: str | None
    top_probability: float | None
    confident: bool | None
    regime_probabilities: Mapping[str, float] = field(default_factory=dict)
    kind: str = "specimen"

    @property
    def uncertain(self) -> bool:
        """The matcher gave no confident verdict (or none at all) for this specimen."""
        return self.confident is not True

    def to_dict(self) -> dict[str, Any]:
        return {
            "specimen_id": self.specimen_id,
            "kind": self.kind,
            "name": self.name,
            "conditions": {n: c.to_dict() for n, c in self.conditions.items()},
            "measurements": {k: {"value": m.value, "ci95": list(m.ci95) if m.ci95 else None}
                             for k, m in self.measurements.items()},
            "top_regime": self.top_regime,
            "top_probability": self.top_probability,
            "confident": self.confident,
            "regime_probabilities": dict(self.regime_probabilities),
        }


#: Quantities offered first (in this order) when a study is plotted; others follow by name.
KEY_QUANTITIES = ("box_dimension", "mass_radius_dimension", "sandbox_dimension", "skeleton.tips",
                  "skeleton.junctions", "skeleton.branches")


def _finite(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


def _interval(value: Any) -> tuple[float, float] | None:
    if isinstance(value, (list, tuple)) and len(value) == 2:
        low, high = _finite(value[0]), _finite(value[1])
        if low is not None and high is not None:
            return (low, high)
    return None


def measurements_of(analysis: Mapping[str, Any]) -> dict[str, Measurement]:
    """Every scalar the analysis measured, by key: ``box_dimension`` (value and ci95), the
    other dimensions, ``skeleton.*`` counts, and ``estimate.<regime>.<parameter>`` for the
    matcher's parameter estimates (value and ci95)."""
    out: dict[str, Measurement] = {}
    features = analysis.get("features") or {}
    for key, entry in features.items():
        if isinstance(entry, Mapping):
            value = _finite(entry.get("value"))
            if value is not None:
                out[key] = Measurement(value, _interval(entry.get("ci95")))
            elif key == "skeleton":
                for name, inner in entry.items():
                    number = _finite(inner)
                    if number is not None:
                        out[f"skeleton.{name}"] = Measurement(number)
        elif key == "branch_width_px" and _finite(entry) is not None:
            out[key] = Measurement(float(entry))
    estimates = analysis.get("parameter_estimates") or {}
    if isinstance(estimates, Mapping):
        for regime, parameters in estimates.items():
            if not isinstance(parameters, Mapping):
                continue
            for name, estimate in parameters.items():
                value = _finite(estimate.get("value")) if isinstance(estimate, Mapping) else None
                if value is not None:
                    out[f"estimate.{regime}.{name}"] = Measurement(value, _interval(estimate.get("ci95")))
    return out


#: A film's growth figures in the study table: measurement key -> key of the film's JSON.
GROWTH_QUANTITIES = {"film.front_velocity_px_per_s": "front_velocity_px_per_s",
                     "film.tip_growth_share": "tip_growth_share"}


def growth_measurements_of(film: Mapping[str, Any]) -> dict[str, Measurement]:
    """A film's growth figures worth plotting against conditions: the front velocity (px/s,
    with its 95% interval) and the tip growth share (the share of new deposit near the tips)."""
    out: dict[str, Measurement] = {}
    for key, name in GROWTH_QUANTITIES.items():
        entry = film.get(name)
        value = _finite(entry.get("value")) if isinstance(entry, Mapping) else None
        if value is not None:
            out[key] = Measurement(value, _interval(entry.get("ci95")))
    return out


def verdict_of(analysis: Mapping[str, Any]) -> tuple[str | None, float | None, bool | None, dict[str, float]]:
    """(top regime, its probability, whether the verdict is confident, every regime's probability).

    The probabilities are the matcher's per-regime sums (``explanation.regime_probabilities``);
    a specimen measured without ranking has none of these.
    """
    explanation = analysis.get("explanation")
    if not isinstance(explanation, Mapping):
        return None, None, None, {}
    raw = explanation.get("regime_probabilities") or {}
    probabilities = {str(k): float(v) for k, v in raw.items() if _finite(v) is not None}
    verdict = explanation.get("verdict") if isinstance(explanation.get("verdict"), Mapping) else {}
    confident = verdict.get("confident") if isinstance(verdict.get("confident"), bool) else None
    if analysis.get("in_library") is False:
        confident = False
    if not probabilities:
        return None, None, confident, {}
    top = max(sorted(probabilities), key=probabilities.__getitem__)
    return top, probabilities[top], confident, probabilities


def study_rows(members: Iterable[Member]) -> list[Row]:
    """One row per member, in the order given."""
    rows = []
    for member in members:
        top, probability, confident, probabilities = verdict_of(member.analysis)
        measured = measurements_of(member.analysis)
        if member.growth is not None:
            measured.update(growth_measurements_of(member.growth))
        rows.append(Row(member.specimen_id, member.name, dict(member.conditions), measured,
                        top, probability, confident, probabilities, kind=member.kind))
    return rows


def quantities(rows: Sequence[Row]) -> list[str]:
    """The quantities some row measured: the key ones first, then the rest by name."""
    present = {key for row in rows for key in row.measurements}
    return [k for k in KEY_QUANTITIES if k in present] + sorted(present - set(KEY_QUANTITIES))


def condition_names(rows: Sequence[Row]) -> dict[str, str]:
    """Condition name -> its quantity (``voltage``, ``text``...), over the rows, in first-seen order."""
    return check_consistent(row.conditions for row in rows)


@dataclass(frozen=True)
class Axis:
    """How one condition lies along a plot axis: numbers in the canonical unit, or texts
    as categories at 0, 1, 2... in order of first appearance."""

    name: str
    quantity: str
    unit: str | None
    categories: tuple[str, ...] = ()

    @property
    def is_number(self) -> bool:
        return self.quantity != "text"

    @property
    def title(self) -> str:
        return f"{self.name} ({self.unit})" if self.unit else self.name

    def position(self, condition: Condition | None) -> float | None:
        if condition is None:
            return None
        if self.is_number:
            return condition.canonical_value
        return float(self.categories.index(str(condition.value)))


def axis_for(rows: Sequence[Row], name: str) -> Axis:
    """The axis of condition ``name`` over the rows; ConditionError when no row carries it."""
    kinds = condition_names(rows)
    if name not in kinds:
        known = ", ".join(kinds) or "none yet"
        raise ConditionError(f"no specimen of this study carries condition {name!r} (conditions: {known})")
    quantity = kinds[name]
    if quantity == "text":
        categories = tuple(dict.fromkeys(str(r.conditions[name].value) for r in rows if name in r.conditions))
        return Axis(name, quantity, None, categories)
    return Axis(name, quantity, CANONICAL_UNITS.get(quantity) or None)


@dataclass(frozen=True)
class Point:
    """One specimen on a plot: position, value, 95% interval (or None), who it is."""

    x: float
    y: float
    ci95: tuple[float, float] | None
    specimen_id: str
    name: str


@dataclass(frozen=True)
class Series:
    """A measured quantity against a condition; ``left_out`` names the members lacking either."""

    axis: Axis
    quantity: str
    points: tuple[Point, ...]
    left_out: tuple[str, ...]

    def xs(self) -> list[float]:
        return [p.x for p in self.points]

    def ys(self) -> list[float]:
        return [p.y for p in self.points]


def series(rows: Sequence[Row], quantity: str, condition: str) -> Series:
    """``quantity`` of each member against its ``condition``, sorted along the condition."""
    axis = axis_for(rows, condition)
    if quantity not in quantities(rows):
        raise ConditionError(f"no specimen of this study measured {quantity!r}")
    points, left_out = [], []
    for row in rows:
        x = axis.position(row.conditions.get(condition))
        measured = row.measurements.get(quantity)
        if x is None or measured is None:
            left_out.append(row.name)
            continue
        points.append(Point(x, measured.value, measured.ci95, row.specimen_id, row.name))
    points.sort(key=lambda p: (p.x, p.name))
    return Series(axis, quantity, tuple(points), tuple(left_out))


def regime_series(rows: Sequence[Row], condition: str) -> tuple[Axis, dict[str, list[tuple[float, float]]]]:
    """Each regime's probability against ``condition``: ``{regime: [(x, p), ...]}`` sorted by x.

    Members without a ranking (measured only) or without the condition are left out.
    """
    axis = axis_for(rows, condition)
    regimes = sorted({regime for row in rows for regime in row.regime_probabilities})
    curves: dict[str, list[tuple[float, float]]] = {regime: [] for regime in regimes}
    for row in rows:
        x = axis.position(row.conditions.get(condition))
        if x is None or not row.regime_probabilities:
            continue
        for regime in regimes:
            curves[regime].append((x, row.regime_probabilities.get(regime, 0.0)))
    return axis, {regime: sorted(points) for regime, points in curves.items()}


@dataclass(frozen=True)
class DiagramPoint:
    """One specimen of the morphology diagram: where it lies, its top regime, how sure."""

    x: float
    y: float
    regime: str | None
    probability: float | None
    uncertain: bool
    specimen_id: str
    name: str


def diagram(rows: Sequence[Row], x_condition: str, y_condition: str) -> tuple[Axis, Axis, tuple[DiagramPoint, ...]]:
    """The morphology diagram over two conditions: every member carrying both, as a point."""
    if x_condition == y_condition:
        raise ConditionError("the morphology diagram needs two different conditions")
    x_axis, y_axis = axis_for(rows, x_condition), axis_for(rows, y_condition)
    points = []
    for row in rows:
        x = x_axis.position(row.conditions.get(x_condition))
        y = y_axis.position(row.conditions.get(y_condition))
        if x is None or y is None:
            continue
        points.append(DiagramPoint(x, y, row.top_regime, row.top_probability, row.uncertain, row.specimen_id, row.name))
    return x_axis, y_axis, tuple(points)


def regime_groups(points: Iterable[DiagramPoint]) -> dict[str | None, list[DiagramPoint]]:
    """The diagram's points grouped by top regime (``None``: not ranked)."""
    groups: dict[str | None, list[DiagramPoint]] = {}
    for point in points:
        groups.setdefault(point.regime, []).append(point)
    return groups


def _cell(value: Any) -> Any:
    # A text cell starting with = + - @ would run as a formula in a spreadsheet.
    if isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


def study_csv(rows: Sequence[Row]) -> str:
    """The study table as CSV: identity (id, ``specimen`` or ``film``, name), one column per condition (``name [unit]``, values
    as written), the top regime, then every measurement with ``_ci95_low``/``_high``."""
    kinds = condition_names(rows)
    condition_columns: list[tuple[str, str]] = []
    for name, quantity in kinds.items():
        units = list(dict.fromkeys(r.conditions[name].unit for r in rows if name in r.conditions))
        if quantity != "text" and len(units) > 1:  # mixed spellings (mV and V): write the canonical value
            condition_columns.append((name, f"{name} [{CANONICAL_UNITS[quantity]}]"))
        else:
            unit = units[0] if units and units[0] else None
            condition_columns.append((name, f"{name} [{unit}]" if unit else name))
    measured = quantities(rows)
    with_interval = {key for row in rows for key, m in row.measurements.items() if m.ci95 is not None}
    header = ["specimen_id", "kind", "name", *(title for _, title in condition_columns),
              "top_regime", "top_probability", "confident_verdict"]
    for key in measured:
        header += [key, f"{key}_ci95_low", f"{key}_ci95_high"] if key in with_interval else [key]
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow([_cell(title) for title in header])
    for row in rows:
        cells: list[Any] = [row.specimen_id, row.kind, _cell(row.name)]
        for name, title in condition_columns:
            condition = row.conditions.get(name)
            if condition is None:
                cells.append("")
            elif not condition.is_number:
                cells.append(_cell(condition.value))
            elif title.endswith(f"[{condition.unit}]"):
                cells.append(repr(condition.value))
            else:
                cells.append(repr(condition.canonical_value))
        cells += [row.top_regime or "", "" if row.top_probability is None else repr(row.top_probability),
                  "" if row.confident is None else str(row.confident).lower()]
        for key in measured:
            m = row.measurements.get(key)
            cells.append("" if m is None else repr(m.value))
            if key in with_interval:
                cells += ["", ""] if m is None or m.ci95 is None else [repr(m.ci95[0]), repr(m.ci95[1])]
        writer.writerow(cells)
    return out.getvalue()
