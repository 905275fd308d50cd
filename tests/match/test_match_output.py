"""What match_features returns: stable keys, numbers traceable to the references."""

from __future__ import annotations

import dataclasses
import json
from types import SimpleNamespace

import numpy as np
import pytest

from service.match import FEATURE_NAMES, MatchResult, match, match_features, reference_photo_mask
from service.simulate import grow


@pytest.fixture(scope="module")
def dla_result(reference_set):
    mask = reference_photo_mask(grow("dla", 2500, seed=424_242), seed=8)
    return match_features(SimpleNamespace(mask=mask), reference_set=reference_set)


def test_keys_and_matches_are_stable(reference_set, dla_result):
    assert set(dla_result) == {"matches", "in_library", "parameter_estimates", "explanation", "warnings"}
    json.dumps(dla_result, allow_nan=False)
    matches = dla_result["matches"]
    probabilities = [m["probability"] for m in matches]
    assert probabilities == sorted(probabilities, reverse=True)
    assert sum(probabilities) == pytest.approx(1.0, abs=1e-9)
    listed = {(m["regime"], json.dumps(m["parameters"], sort_keys=True)) for m in matches}
    assert listed == {(e.regime, json.dumps(dict(e.parameters), sort_keys=True)) for e in reference_set.ensembles}
    for m in matches:
        assert {"regime", "parameters", "probability", "distance"} <= set(m)
        assert m["distance"] >= 0
        ids = {e.id for e in reference_set.ensembles}
        assert all(e["id"] in ids for e in m["ensembles"])
        assert sum(e["weight"] for e in m["ensembles"]) == pytest.approx(1.0)


def test_a_fresh_dla_cluster_is_dla_class_and_the_explanation_says_why(dla_result):
    top = dla_result["matches"][0]
    assert top["regime"] == "dla" or (top["regime"] == "dbm" and top["parameters"]["eta"] == 1.0)
    assert dla_result["in_library"]
    explanation = dla_result["explanation"]
    assert "universality class" in explanation["universality_note"]
    assert explanation["best"]["regime"] == top["regime"]
    assert len(explanation["deciding_features"]) >= 1
    for row in explanation["all_features"]:
        assert row["feature"] in FEATURE_NAMES
        for side in ("best", "runner_up"):
            ref = row[side]
            # Exact: z is the value's distance from the reference mean in reference spreads.
            assert ref["z"] == pytest.approx((row["value"] - ref["mean"]) / ref["sd"], rel=1e-9)
        assert row["weight_of_evidence"] == pytest.approx(0.5 * (row["runner_up"]["z"] ** 2 - row["best"]["z"] ** 2))
    weights = [r["weight_of_evidence"] for r in explanation["deciding_features"]]
    assert weights == sorted(weights, reverse=True)
    assert explanation["novelty"]["nearest_distance"] <= explanation["novelty"]["threshold_distance"]
    assert explanation["references"]["calibration"]["temperature"] > 0


def test_continuous_parameters_are_estimated_with_an_interval(dla_result):
    estimates = dla_result["parameter_estimates"]
    for regime, parameters in estimates.items():
        for name, estimate in parameters.items():
            grid = estimate["values_in_library"]
            lo, hi = estimate["ci95"]
            assert min(grid) <= lo <= estimate["value"] <= hi <= max(grid)
            # Never narrower than the grid: the interval holds at least the cell (half-way
            # to the neighbours) of the grid value nearest the estimate.
            assert hi > lo
            assert estimate["std"] >= 0
            assert 0 <= estimate["regime_probability"] <= 1
            assert estimate["spans_library_range"] == (lo <= min(grid) + 1e-6 and hi >= max(grid) - 1e-6)
            assert ("whole library range" in estimate["note"]) == estimate["spans_library_range"]
            assert ("outside every reference" in estimate["note"]) == (not dla_result["in_library"])
    assert "eta" in estimates["dbm"]


def test_the_result_is_a_frozen_match_result(reference_set):
    mask = reference_photo_mask(grow("eden", 1500, seed=424_243), seed=9)
    result = match(None, reference_set=reference_set, mask=mask)
    assert isinstance(result, MatchResult)
    with pytest.raises(dataclasses.FrozenInstanceError):
        result.in_library = False
    assert result.to_dict() == match_features(None, reference_set=reference_set, mask=mask)
    verdict = result.explanation["verdict"]
    assert sum(verdict["probabilities"].values()) == pytest.approx(1.0)
    assert verdict["name"] in (verdict["best"], "no confident verdict")


def test_a_specimen_far_outside_the_library_gets_no_probability_near_one(model):
    # A vector far from every family (every feature 40 spreads from the nearest family's
    # mean): the posterior is tempered by the distance and mixed with equal odds.
    family = model.statistics.families[0]
    mean, variance = family.at(float(family.knots[len(family.knots) // 2]))
    far = mean + 40.0 * np.sqrt(variance)
    posterior = model.posterior(model.evaluate(far, float(family.knots[len(family.knots) // 2])))
    assert posterior.probability.sum() == pytest.approx(1.0)
    assert posterior.probability.max() < 0.9
    assert posterior.outside_weight > 0.5


def test_a_specimen_one_of_several_objects_is_outside_the_library_with_its_ranking_kept(reference_set, dla_result):
    # The same DLA cluster, said to be one of several separate objects in its photograph:
    # every reference grew alone, so it is outside the library and gets no verdict, while
    # the ranking itself (computed from its features alone) is the same.
    mask = reference_photo_mask(grow("dla", 2500, seed=424_242), seed=8)
    alone_in_library = dla_result["in_library"]
    several = match_features(SimpleNamespace(mask=mask), reference_set=reference_set, one_of_several=True)
    assert alone_in_library is True and several["in_library"] is False
    assert several["matches"] == dla_result["matches"]
    assert not several["explanation"]["verdict"]["confident"]
    assert any(w.code == "one_of_several" for w in several["warnings"])


def test_a_specimen_too_small_to_compare_is_reported_not_ranked(reference_set):
    mask = np.zeros((40, 40), dtype=bool)
    mask[10:13, 10:18] = True  # 24 px: fewer than MIN_SITES
    result = match_features(None, reference_set=reference_set, mask=mask)
    assert result["matches"] == [] and result["in_library"] is False
    assert any("at least" in w for w in result["warnings"])


def test_no_mask_is_a_clear_error(reference_set):
    with pytest.raises(ValueError, match="mask"):
        match_features(SimpleNamespace(), reference_set=reference_set)
