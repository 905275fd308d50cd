"""The Jinja environment of every page (the route modules render through it; none defines it)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from fastapi.templating import Jinja2Templates

from service.contract import analysis_view
from service.web import formatting

TEMPLATES_DIR = Path(__file__).resolve().parents[2] / "templates"
templates = Jinja2Templates(directory=TEMPLATES_DIR)
templates.env.filters.update(sig=formatting.sig, fixed=formatting.fixed, plain=formatting.plain)


class PageWarning(dict):
    """A warning ``{"code", "text"}`` that prints as its text (``{{ w }}`` in a template)."""

    def __str__(self) -> str:
        return str(self.get("text", ""))

    def __html__(self) -> str:
        from markupsafe import escape

        return str(escape(str(self)))


def analysis_for_page(stored: dict[str, Any]) -> dict[str, Any]:
    """A stored analysis as the pages read it: through the contract (statuses, codes), plain dicts."""
    out = analysis_view(stored)
    out["warnings"] = [PageWarning(w) for w in out.get("warnings", [])]
    return out
