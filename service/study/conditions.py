"""Conditions of a specimen: typed key-value pairs with their units stated and parsed.

A condition is a number with a unit (``voltage = 4 V``, ``concentration = 50 mmol/L``,
``temperature = 298 K``), a plain number (``replicate = 3``), or a text (``electrolyte =
copper sulfate``, ``site = north reef``). Units come from a small table of our own that
covers what an electrochemistry bench (and a field campaign) writes down; each unit maps
to one canonical unit of its quantity, so a series mixing mV and V, or K and degrees
Celsius, lies on one axis. A unit outside the table is refused with :class:`ConditionError`
(HTTP 422), never guessed.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from service.errors import RamiformError

#: Most conditions one specimen may carry, longest name and text value.
MAX_CONDITIONS = 32
MAX_NAME_CHARS = 64
MAX_TEXT_CHARS = 200


class ConditionError(RamiformError):
    """A condition is malformed: a unit outside the table, a bad number, an empty name..."""

    status_code = 422


@dataclass(frozen=True)
class Unit:
    """One spelling of a unit: its quantity and how a value converts to the canonical unit.

    ``canonical = value * factor + offset`` (an offset only for temperatures).
    """

    symbol: str
    quantity: str
    factor: float
    offset: float = 0.0


#: Canonical unit of each quantity (the axis unit of the study plots).
CANONICAL_UNITS = {
    "voltage": "V",
    "current": "A",
    "current density": "A/m2",
    "concentration": "mol/L",
    "temperature": "°C",
    "time": "s",
    "length": "mm",
    "number": "",
}

_KELVIN_OFFSET = -273.15

# symbol -> Unit. Spellings are case-sensitive where case carries meaning (mM against MM).
_TABLE: dict[str, Unit] = {}


def _add(quantity: str, factor: float, *symbols: str, offset: float = 0.0) -> None:
    for symbol in symbols:
        _TABLE[symbol] = Unit(symbols[0], quantity, factor, offset)


_add("voltage", 1.0, "V")
_add("voltage", 1e-3, "mV")
_add("current", 1.0, "A")
_add("current", 1e-3, "mA")
_add("current", 1e-6, "µA", "uA", "μA")
_add("current density", 1.0, "A/m2", "A/m²", "A m-2")
_add("current density", 10.0, "mA/cm2", "mA/cm²", "mA cm-2")
_add("concentration", 1.0, "mol/L", "mol/l", "M", "mol/dm3", "mol dm-3", "mol L-1")
_add("concentration", 1e-3, "mmol/L", "mmol/l", "mM", "mmol L-1")
_add("concentration", 1e-6, "µmol/L", "umol/L", "µM", "uM", "μM")
_add("temperature", 1.0, "°C", "degC", "℃", "C°")
_add("temperature", 1.0, "K", offset=_KELVIN_OFFSET)
_add("time", 1.0, "s")
_add("time", 60.0, "min")
_add("time", 3600.0, "h")
_add("length", 1.0, "mm")
_add("length", 10.0, "cm")
_add("length", 1e-3, "µm", "um", "μm")
_add("number", 1.0, "", "1", "-")
_add("number", 0.01, "%")

#: Every accepted spelling, for error messages and the API reference.
KNOWN_UNITS = tuple(sorted(symbol for symbol in _TABLE if symbol not in ("", "1", "-")))


def parse_unit(text: str | None) -> Unit:
    """The table's unit for ``text`` (``None`` or blank: a plain number); else ConditionError."""
    symbol = " ".join((text or "").split())
    unit = _TABLE.get(symbol)
    if unit is None:
        raise ConditionError(
            f"unit {text!r} is not one Ramiform reads; use one of {', '.join(KNOWN_UNITS)} "
            "(or leave the unit out for a plain number or a text condition)")
    return unit


@dataclass(frozen=True)
class Condition:
    """One condition of a specimen.

    ``value`` is a float for a number (``quantity`` from the unit table, ``unit`` its
    canonical spelling, ``canonical_value`` in :data:`CANONICAL_UNITS`) and a str for a
    text condition (``quantity == "text"``, no unit).
    """

    name: str
    value: float | str
    unit: str | None
    quantity: str
    canonical_value: float | None = None

    @property
    def is_number(self) -> bool:
        return self.quantity != "text"

    @property
    def canonical_unit(self) -> str | None:
        return CANONICAL_UNITS.get(self.quantity)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"value": self.value, "unit": self.unit, "quantity": self.quantity}
        if self.is_number:
            out["canonical_value"] = self.canonical_value
            out["canonical_unit"] = self.canonical_unit
        return out

    def in_words(self) -> str:
        if not self.is_number:
            return str(self.value)
        return f"{self.value:g} {self.unit}".strip()

    @classmethod
    def from_dict(cls, name: str, data: Mapping[str, Any]) -> Condition:
        """Back from :meth:`to_dict` (values as stored; parsed again, so a stored row is checked too)."""
        return parse_condition(name, {"value": data.get("value"), "unit": data.get("unit")})


_NUMBER_WITH_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


def _clean_name(name: Any) -> str:
    if not isinstance(name, str):
        raise ConditionError(f"a condition name must be text, got {name!r}")
    cleaned = " ".join(name.split())
    if not cleaned or len(cleaned) > MAX_NAME_CHARS or not cleaned.isprintable():
        raise ConditionError(f"a condition name must be 1 to {MAX_NAME_CHARS} printable characters, got {name!r}")
    return cleaned


def _number(name: str, value: float, unit_text: str | None) -> Condition:
    if not math.isfinite(value):
        raise ConditionError(f"condition {name!r}: the value must be a finite number, got {value!r}")
    try:
        unit = parse_unit(unit_text)
    except ConditionError as exc:
        raise ConditionError(f"condition {name!r}: {exc}") from None
    canonical = value * unit.factor + unit.offset
    if unit.quantity == "temperature" and canonical < _KELVIN_OFFSET - 1e-9:
        raise ConditionError(f"condition {name!r}: {value:g} {unit.symbol} lies below absolute zero")
    return Condition(name, float(value), unit.symbol or None, unit.quantity, float(canonical))


def _text(name: str, value: str) -> Condition:
    cleaned = " ".join(value.split())
    if not cleaned or len(cleaned) > MAX_TEXT_CHARS or not cleaned.isprintable():
        raise ConditionError(f"condition {name!r}: a text value must be 1 to {MAX_TEXT_CHARS} printable "
                             f"characters, got {value!r}")
    return Condition(name, cleaned, None, "text")


def parse_condition(name: Any, raw: Any, *, unit: str | None = None) -> Condition:
    """One condition from what a client wrote.

    ``raw`` may be a number (``unit`` gives its unit; none: a plain number), a string
    starting with a number (``"4 V"``, ``"50 mM"``; the rest is the unit, or ``unit``),
    another string (a text condition), or ``{"value": ..., "unit": ...}``.
    """
    name = _clean_name(name)
    if isinstance(raw, Mapping):
        extra = set(raw) - {"value", "unit"}
        if extra or "value" not in raw:
            raise ConditionError(f"condition {name!r}: expected {{'value': ..., 'unit': ...}}, got keys {sorted(raw)}")
        unit = raw.get("unit")
        if unit is not None and not isinstance(unit, str):
            raise ConditionError(f"condition {name!r}: the unit must be text, got {unit!r}")
        raw = raw["value"]
    if isinstance(raw, bool) or raw is None:
        raise ConditionError(f"condition {name!r}: expected a number with its unit or a text, got {raw!r}")
    if isinstance(raw, (int, float)):
        try:
            number = float(raw)
        except OverflowError:  # an integer beyond any float
            raise ConditionError(f"condition {name!r}: the value is too large for a number") from None
        return _number(name, number, unit)
    if not isinstance(raw, str):
        raise ConditionError(f"condition {name!r}: expected a number with its unit or a text, got {raw!r}")
    match = _NUMBER_WITH_UNIT.match(raw)
    if match is None:
        if unit not in (None, ""):
            raise ConditionError(f"condition {name!r}: {raw!r} is not a number, but a unit ({unit!r}) was given")
        return _text(name, raw)
    written_unit = match.group(2)
    if written_unit and unit not in (None, "") and " ".join(written_unit.split()) != " ".join(unit.split()):
        raise ConditionError(f"condition {name!r}: {raw!r} names unit {written_unit!r} but {unit!r} was given")
    return _number(name, float(match.group(1)), written_unit or unit)


def parse_conditions(raw: Mapping[str, Any] | None) -> dict[str, Condition]:
    """Every condition of one specimen, by name; the first bad one raises (nothing half-parsed)."""
    if raw is None:
        return {}
    if not isinstance(raw, Mapping):
        raise ConditionError("conditions must be an object of name: value pairs, e.g. "
                             '{"voltage": "4 V", "electrolyte": "copper sulfate"}')
    if len(raw) > MAX_CONDITIONS:
        raise ConditionError(f"at most {MAX_CONDITIONS} conditions per specimen, got {len(raw)}")
    parsed: dict[str, Condition] = {}
    for name, value in raw.items():
        condition = parse_condition(name, value)
        if condition.name in parsed:
            raise ConditionError(f"condition {condition.name!r} is given twice")
        parsed[condition.name] = condition
    return parsed


def parse_conditions_text(text: str | None) -> dict[str, Condition]:
    """Conditions written as a JSON object, or as ``name = value`` pairs separated by ``;`` or
    new lines (``voltage = 4 V; electrolyte = copper sulfate``), as a form field carries them."""
    import json

    text = (text or "").strip()
    if not text:
        return {}
    if text.startswith("{"):
        try:
            raw = json.loads(text)
        except ValueError as exc:
            raise ConditionError(f"conditions in JSON must be an object, e.g. {{\"voltage\": \"4 V\"}}: {exc}") from None
        return parse_conditions(raw)
    pairs: dict[str, str] = {}
    for part in re.split(r"[;\n]", text):
        if not part.strip():
            continue
        name, equals, value = part.partition("=")
        if not equals or not name.strip():
            raise ConditionError(f"write each condition as 'name = value', e.g. 'voltage = 4 V'; got {part.strip()!r}")
        if name.strip() in pairs:
            raise ConditionError(f"condition {name.strip()!r} is given twice")
        pairs[name.strip()] = value.strip()
    return parse_conditions(pairs)


def conditions_to_dict(conditions: Mapping[str, Condition] | Iterable[Condition]) -> dict[str, dict[str, Any]]:
    items = conditions.values() if isinstance(conditions, Mapping) else conditions
    return {c.name: c.to_dict() for c in items}


def check_consistent(members: Iterable[Mapping[str, Condition]]) -> dict[str, str]:
    """The quantity of each condition name across specimens; ConditionError when one name
    is used for two quantities (``voltage`` once in V, once as a concentration or a text)."""
    seen: dict[str, tuple[str, Condition]] = {}
    for conditions in members:
        for condition in conditions.values():
            first = seen.setdefault(condition.name, (condition.quantity, condition))
            if first[0] != condition.quantity:
                raise ConditionError(
                    f"condition {condition.name!r} is {first[1].in_words()!r} ({first[0]}) for one specimen "
                    f"but {condition.in_words()!r} ({condition.quantity}) for another; one name, one quantity")
    return {name: quantity for name, (quantity, _) in seen.items()}
