"""The reference set as the web process sees it: the manifest, thumbnails, nearest ensembles."""

from __future__ import annotations

from typing import Any

from service.match.library import ReferenceLibrary


def reference_set_or_error(library: ReferenceLibrary):
    """The app's reference set (manifest only; opened once by its library); raises ``LibraryError`` (500)."""
    return library.reference_set


def ensembles_for_matches(references, matches: list[dict[str, Any]], limit: int = 4) -> list[dict[str, Any]]:
    """The reference ensembles nearest the specimen, for thumbnails on the report.

    Each match names the ensembles its family was interpolated between (``ensembles``:
    ``{"id", "weight"}``); the heaviest of each of the best ``limit`` matches is shown.
    """
    known = {e.id: e for e in references.ensembles}
    out = []
    for match in matches[:limit]:
        weighted = sorted(match.get("ensembles") or [], key=lambda e: -float(e.get("weight", 0)))
        ensemble = next((known[e["id"]] for e in weighted if e.get("id") in known), None)
        if ensemble is None:
            continue
        out.append({"id": ensemble.id, "regime": ensemble.regime, "parameters": dict(ensemble.parameters),
                    "n_particles": ensemble.n_particles, "probability": match.get("probability"),
                    "thumbnail_url": f"/api/references/{ensemble.id}/thumbnail.png"})
    return out
