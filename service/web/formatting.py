"""Numbers and matcher results as words for the pages (also used as Jinja filters)."""

from __future__ import annotations

import math
from typing import Any


def sig(value: Any, digits: int = 5) -> str:
    """A number for tables: integers as they are, floats to ``digits`` significant digits."""
    if value is None:
        return "–"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return plain(value)
    if isinstance(value, int) or float(value).is_integer():
        return str(int(value))
    return f"{value:.{digits}g}"


def fixed(value: Any, digits: int = 3) -> str:
    """A headline number: integers as they are, floats with ``digits`` decimals."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "–"
    return str(value) if isinstance(value, int) else f"{value:.{digits}f}"


def plain(value: Any) -> str:
    """Nested settings as readable text: ``key: value; ...`` and lists in brackets."""
    if isinstance(value, dict):
        return "; ".join(f"{k}: {plain(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(plain(v) for v in value) + "]"
    if isinstance(value, float):
        return sig(value)
    return "–" if value is None else str(value)


def family_name(match: dict[str, Any] | None) -> str | None:
    """``dla (neighborhood = moore, sticking = 0.3)`` for a match or family; None for none."""
    if not match:
        return None
    params = ", ".join(f"{k} = {sig(v, 3)}" for k, v in (match.get("parameters") or {}).items())
    return f"{match.get('regime')} ({params})" if params else str(match.get("regime"))


def deciding_in_words(explanation: dict[str, Any]) -> list[str]:
    """One sentence per deciding feature: the specimen's value against the two best families."""
    best = family_name(explanation.get("best")) or "the best match"
    runner = family_name(explanation.get("runner_up"))
    sentences = []
    for row in explanation.get("deciding_features") or []:
        b, r = row.get("best") or {}, row.get("runner_up")
        text = (f"{row.get('description') or row.get('feature')}: this specimen {sig(row.get('value'), 3)}; "
                f"{best} expects {sig(b.get('mean'), 3)} ± {sig(b.get('sd'), 2)} ({b.get('z', 0):+.1f} sd)")
        if r and runner:
            text += f", {runner} expects {sig(r.get('mean'), 3)} ± {sig(r.get('sd'), 2)} ({r.get('z', 0):+.1f} sd)"
        if row.get("weight_of_evidence") is not None:
            text += f" - {row['weight_of_evidence']:.1f} nats in favour of the best match"
        sentences.append(text + ".")
    return sentences


#: Below this segmentation confidence the report and the upload queue ask for a look.
UNCERTAIN_BELOW = 0.5


def uncertain(segmentation: dict[str, Any]) -> bool:
    """Whether the automatic reading is too unsure to trust without a look."""
    confidence = segmentation.get("confidence")
    return isinstance(confidence, (int, float)) and not isinstance(confidence, bool) and confidence < UNCERTAIN_BELOW


def field_ellipse(field: Any, width_px: int, height_px: int) -> dict[str, float] | None:
    """The segmentation's field of view (``settings["field_of_view"]``) as ``{cx, cy, rx, ry,
    angle_deg}`` in px, or None for the whole image.

    The field reads ``{"center_rc": [row, col], "radius_px": r}`` for a circle, plus
    ``"ellipse": {"semi_axes_px": [a, b], "angle_deg": t}`` when it is an ellipse (``a``
    along the direction ``t`` degrees from +x towards +y).
    """
    if not isinstance(field, dict) or width_px <= 0 or height_px <= 0:
        return None
    center, radius = field.get("center_rc"), field.get("radius_px")
    if not (isinstance(center, list) and len(center) == 2 and isinstance(radius, (int, float))):
        return None
    rx = ry = radius
    angle = 0.0
    ellipse = field.get("ellipse")
    if isinstance(ellipse, dict) and isinstance(ellipse.get("semi_axes_px"), list) and len(ellipse["semi_axes_px"]) == 2:
        rx, ry = ellipse["semi_axes_px"]
        angle = ellipse.get("angle_deg", 0.0)
    try:
        values = [float(v) for v in (center[1], center[0], rx, ry, angle)]
    except (TypeError, ValueError):
        return None
    if not all(math.isfinite(v) for v in values) or min(values[2:4]) <= 0:
        return None
    return dict(zip(("cx", "cy", "rx", "ry", "angle_deg"), values))


_ASKED_WORDS = {"mode": "mode", "polarity": "specimen", "threshold": "threshold", "roi": "region",
                "exclude": "left out", "paint": "painted out"}


def overrides_in_words(requested: dict[str, Any]) -> str:
    """The overrides of a reading in a few words; "automatic" when there were none."""
    parts = []
    for key, value in requested.items():
        if key == "polarity":
            parts.append("specimen darker" if value == "dark" else "specimen brighter")
        elif key == "threshold":
            parts.append(f"threshold {value:.3f}")
        elif key == "roi" and isinstance(value, list):
            shape = "circle" if len(value) == 3 else "ellipse"
            parts.append(f"{shape} at ({value[0]:.0f}, {value[1]:.0f})")
        elif key == "exclude" and isinstance(value, list):
            parts.append(f"{len(value)} area{'s' if len(value) != 1 else ''} left out")
        elif key == "paint" and isinstance(value, list):
            parts.append(f"{len(value)} brush stroke{'s' if len(value) != 1 else ''} painted out")
        elif key == "mode":
            parts.append(f"{value} mode")
        else:
            parts.append(f"{_ASKED_WORDS.get(key, key)} {plain(value)}")
    return ", ".join(parts) or "automatic"


def reading_in_words(entry: dict[str, Any]) -> dict[str, Any]:
    """A history entry as the report's history table shows it."""
    alternative = entry.get("alternative") or {}
    asked = overrides_in_words(entry.get("requested") or {})
    if alternative.get("label"):
        asked = f"alternative: {alternative['label']}" + ("" if asked == "automatic" else f" ({asked})")
    return {
        "number": entry.get("number"),
        "when": str(entry.get("created_at", ""))[:16].replace("T", " "),
        "origin": "upload" if entry.get("origin") == "upload" else "re-measured",
        "asked": asked,
        "confidence": entry.get("confidence"),
        "box_dimension": entry.get("box_dimension"),
        "best": entry.get("best_regime"),
        "best_probability": entry.get("best_probability"),
    }
