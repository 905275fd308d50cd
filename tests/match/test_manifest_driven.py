"""Regimes and parameters come from the reference set's manifest: adding or removing one
needs no change in the matcher."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from service.library import load_reference_set
from service.match import match_features, reference_photo_mask
from service.simulate import grow


def _smallest_of_three_regimes(reference_set):
    chosen, seen = [], set()
    for e in sorted(reference_set.ensembles, key=lambda e: e.n_particles):
        if e.regime not in seen and len(seen) < 3:
            seen.add(e.regime)
            chosen.append(e)
    return chosen


def _write_subset(reference_set, ensembles, folder: Path, twin_of=None) -> Path:
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
            relative = entry[key]
            (folder / relative).parent.mkdir(parents=True, exist_ok=True)
            if not (folder / relative).exists():
                shutil.copyfile(reference_set.path / relative, folder / relative)
            files[relative] = manifest["files"][relative]
    manifest.update(ensembles=entries, files=files, preset=manifest["preset"] + "-subset")
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return folder


@pytest.fixture(scope="module")
def specimen_mask(reference_set):
    first = _smallest_of_three_regimes(reference_set)[0]
    cluster = grow(first.regime, first.n_particles, seed=987_654, **first.parameters)
    return reference_photo_mask(cluster, seed=3)


@pytest.mark.slow
def test_families_follow_the_manifest_when_one_is_removed_or_added(reference_set, specimen_mask, tmp_path):
    chosen = _smallest_of_three_regimes(reference_set)
    three = load_reference_set(_write_subset(reference_set, chosen, tmp_path / "three"))
    two = load_reference_set(_write_subset(reference_set, chosen[:2], tmp_path / "two"))
    four = load_reference_set(_write_subset(reference_set, chosen, tmp_path / "four", twin_of=chosen[1]))

    ranked = {name: match_features(None, reference_set=s, mask=specimen_mask)
              for name, s in (("three", three), ("two", two), ("four", four))}
    for name, s in (("three", three), ("two", two), ("four", four)):
        listed = {(m["regime"], json.dumps(m["parameters"], sort_keys=True)) for m in ranked[name]["matches"]}
        manifest = {(e.regime, json.dumps(dict(e.parameters), sort_keys=True)) for e in s.ensembles}
        assert listed == manifest
        assert sum(m["probability"] for m in ranked[name]["matches"]) == pytest.approx(1.0, abs=1e-9)

    # Exact: a family added under a new regime name with the very clusters of another has
    # identical statistics, so the two share that family's probability equally.
    by_regime = {m["regime"]: m for m in ranked["four"]["matches"]}
    assert by_regime["twin"]["probability"] == pytest.approx(by_regime[chosen[1].regime]["probability"], rel=1e-9)
    assert by_regime["twin"]["distance"] == pytest.approx(by_regime[chosen[1].regime]["distance"], rel=1e-9)
    assert "twin" not in {m["regime"] for m in ranked["three"]["matches"]}
    assert chosen[2].regime not in {m["regime"] for m in ranked["two"]["matches"]}
    # The specimen was grown by the first family's simulator: it still ranks first.
    for name in ranked:
        assert ranked[name]["matches"][0]["regime"] == chosen[0].regime
    assert np.isfinite([m["distance"] for m in ranked["four"]["matches"]]).all()
