"""Numbers and matcher results as words for the pages (also used as Jinja filters)."""

from __future__ import annotations

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
