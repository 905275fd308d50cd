"""Distances between specimens: the matcher's Mahalanobis metric, and the standardised fallback."""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
from scipy.spatial.distance import mahalanobis

from service.store import SpecimenRecord
from service.web.compare import standardised_distances
from service.web.jobs import matcher_distances


def _record(i: int, features: dict) -> SpecimenRecord:
    return SpecimenRecord(id=f"s{i}", owner=None, label=None, kind=None, filename=None,
                          created_at=datetime.now(timezone.utc), sha256="", files=(),
                          analysis={"features": features})


def test_standardised_distance_is_rms_of_z_differences():
    rng = np.random.default_rng(7)
    table = rng.normal(size=(6, 2)) * [0.1, 20.0] + [1.6, 100.0]
    population = [_record(i, {"box_dimension": {"value": a}, "skeleton": {"tips": b}})
                  for i, (a, b) in enumerate(table)]
    matrix, used, n = standardised_distances(population[:3], population)
    assert used == ["box_dimension.value", "skeleton.tips"] and n == 6
    sd = table.std(axis=0, ddof=1)
    for i in range(3):
        for j in range(3):
            expected = np.sqrt(np.mean(((table[i] - table[j]) / sd) ** 2))
            assert np.isclose(matrix[i][j], expected)
    assert matrix[0][0] == 0 and np.isclose(matrix[0][1], matrix[1][0])
    # fewer than three stored specimens: no spread, so no distance is claimed
    assert standardised_distances(population[:2], population[:2])[1] == []


def test_matcher_distances_are_mahalanobis_under_the_library_covariance(tiny_library):
    from service.library import load_reference_set
    from service.match import FEATURE_NAMES, reference_model

    model = reference_model(load_reference_set(tiny_library))
    rng = np.random.default_rng(11)
    vectors = rng.normal(size=(3, len(FEATURE_NAMES)))
    matrix = np.array(matcher_distances(vectors.tolist(), str(tiny_library)))
    inverse = np.linalg.inv(model.statistics.pooled + np.diag(model.statistics.floor))
    for i in range(3):
        for j in range(3):
            # scipy.spatial.distance.mahalanobis: sqrt((u - v) VI (u - v)^T)
            assert np.isclose(matrix[i, j], mahalanobis(vectors[i], vectors[j], inverse))
