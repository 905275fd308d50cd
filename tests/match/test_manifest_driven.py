"""Regimes and parameters come from the reference set's manifest: adding or removing one
needs no change in the matcher."""

from __future__ import annotations

import json

import numpy as np
import pytest

from service.library import load_reference_set
from service.match import match_features, reference_photo_mask
from service.simulate import grow
from tests.match.subsets import smallest_of_three_regimes, write_subset


@pytest.fixture(scope="module")
def specimen_mask(reference_set):
    first = smallest_of_three_regimes(reference_set)[0]
    cluster = grow(first.regime, first.n_particles, seed=987_654, **first.parameters)
    return reference_photo_mask(cluster, seed=3)


@pytest.mark.slow
def test_families_follow_the_manifest_when_one_is_removed_or_added(reference_set, specimen_mask, tmp_path):
    chosen = smallest_of_three_regimes(reference_set)
    three = load_reference_set(write_subset(reference_set, chosen, tmp_path / "three"))
    two = load_reference_set(write_subset(reference_set, chosen[:2], tmp_path / "two"))
    four = load_reference_set(write_subset(reference_set, chosen, tmp_path / "four", twin_of=chosen[1]))

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
