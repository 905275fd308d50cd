"""Small reference sets cut from a larger one, for tests of what follows the manifest."""

from __future__ import annotations

import json
import shutil
from pathlib import Path


def smallest_of_three_regimes(reference_set):
    chosen, seen = [], set()
    for e in sorted(reference_set.ensembles, key=lambda e: e.n_particles):
        if e.regime not in seen and len(seen) < 3:
            seen.add(e.regime)
            chosen.append(e)
    return chosen


def write_subset(reference_set, ensembles, folder: Path, twin_of=None) -> Path:
    """A reference set holding ``ensembles`` of ``reference_set`` (and, if asked, a copy of
    one of them under a new regime name, pointing at the same clusters)."""
    manifest = json.loads((reference_set.path / "manifest.json").read_text())
    entries = [entry for entry in manifest["ensembles"] if entry["id"] in {e.id for e in ensembles}]
    if twin_of is not None:
        twin = dict(next(entry for entry in entries if entry["id"] == twin_of.id))
        twin["regime"] = "twin"
        twin["id"] = "twin_" + twin["id"]
        entries.append(twin)
    files = {}
    for entry in entries:
        for key in ("clusters", "thumbnail"):
            if key not in entry:  # an ensemble regrown from its seeds has no cluster file
                continue
            relative = entry[key]
            (folder / relative).parent.mkdir(parents=True, exist_ok=True)
            if not (folder / relative).exists():
                shutil.copyfile(reference_set.path / relative, folder / relative)
            files[relative] = manifest["files"][relative]
    manifest.update(ensembles=entries, files=files, preset=manifest["preset"] + "-subset")
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return folder
