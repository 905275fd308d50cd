"""The reference set as the web process sees it: the manifest, thumbnails, nearest ensembles."""

from __future__ import annotations

from functools import lru_cache
from typing import Any

from service.web.settings import Settings


@lru_cache(maxsize=4)
def _open(library_dir: str | None):
    from service.library import load_reference_set

    return load_reference_set(library_dir)


def reference_set_or_error(settings: Settings):
    """The configured reference set (manifest only, cached); raises ``LibraryError`` (500)."""
    return _open(str(settings.library_dir) if settings.library_dir else None)


def ensembles_for_matches(references, matches: list[dict[str, Any]], limit: int = 4) -> list[dict[str, Any]]:
    """The reference ensembles behind the best matches, for thumbnails on the report.

    A match names an ensemble by ``ensemble_id`` when the matcher gives one, else by its
    regime and parameters.
    """
    out = []
    for match in matches[:limit]:
        ensemble = None
        for e in references.ensembles:
            if match.get("ensemble_id") == e.id or (
                e.regime == match.get("regime") and dict(e.parameters) == dict(match.get("parameters") or {})
            ):
                ensemble = e
                break
        if ensemble is not None:
            out.append({"id": ensemble.id, "regime": ensemble.regime, "parameters": dict(ensemble.parameters),
                        "probability": match.get("probability"),
                        "thumbnail_url": f"/api/references/{ensemble.id}/thumbnail.png"})
    return out
