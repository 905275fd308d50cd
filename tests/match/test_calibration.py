"""The library against itself: leave-one-realisation-out accuracy per regime, a reliability
table on held-out references, and the novelty threshold on references it was not set from."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from service.match import held_out_scores, universality_class
from service.match.model import family_index, fit_temperature, novelty_threshold

#: Every regime must be recognised from a held-out realisation at least this often, and at
#: least ``MIN_LARGE_REGIME_ACCURACY`` of the time from 10,000 sites up. Small compact-ish
#: clusters drawn thick are where regimes meet: a 1,000-site ballistic cluster whose particles
#: stop on impact, drawn three sites wide, is told from Eden and DBM eta 0.5 about half the
#: time (2026-12-03: ballistic 0.71 at 1,000 sites, 0.81 at 3,000, 0.87 at 10,000, 1.00 above;
#: 0.83 over all sizes), which the calibrated probabilities say (the reliability test below).
MIN_REGIME_ACCURACY = 0.8
MIN_LARGE_REGIME_ACCURACY = 0.85
LARGE_SITES = 10000
#: Top-label expected calibration error (10 equal-width bins) must stay below this.
MAX_CALIBRATION_ERROR = 0.08
#: Held-out references called out of library by a threshold set on the others: at most this share.
MAX_FALSE_NOVELTY = 0.03  # the threshold is set near the 99th percentile of the even half


@pytest.fixture(scope="module")
def held_out(reference_set, model, table):
    n_ensembles = len(reference_set.ensembles)
    d2, loglik = held_out_scores(table, model.families, n_ensembles, model.shrinkage)
    truth = family_index(model.families, n_ensembles)[table.ensemble]
    return d2, loglik, truth


def _same_regime(model, truth: int, predicted: int) -> bool:
    a, b = model.families[truth], model.families[predicted]
    if a.regime == b.regime:
        return True
    cls = universality_class(a.regime, a.parameters)
    return cls is not None and cls == universality_class(b.regime, b.parameters)


def test_leave_one_realisation_out_accuracy_per_regime(reference_set, table, model, held_out):
    _, loglik, truth = held_out
    predicted = (loglik / model.temperature).argmax(axis=1)
    large = np.array([reference_set.ensembles[e].n_particles >= LARGE_SITES for e in table.ensemble])
    report = {}
    for regime in dict.fromkeys(f.regime for f in model.families):
        rows = np.flatnonzero([model.families[t].regime == regime for t in truth])
        right = np.array([_same_regime(model, truth[r], predicted[r]) for r in rows])
        exact = np.mean(predicted[rows] == truth[rows])
        report[regime] = (float(np.mean(right)), float(np.mean(right[large[rows]])), float(exact), rows.size)
    print("regime: (regime accuracy, from 10,000 sites, exact family accuracy, held-out drawings)", report)
    for regime, (accuracy, large_accuracy, _, _) in report.items():
        assert accuracy >= MIN_REGIME_ACCURACY, report
        assert large_accuracy >= MIN_LARGE_REGIME_ACCURACY, report


def _reliability(probabilities: np.ndarray, truth: np.ndarray, n_bins: int = 10):
    """Top-label reliability table: per bin of predicted probability, (count, mean
    predicted, observed frequency of being right), and the expected calibration error."""
    confidence = probabilities.max(axis=1)
    right = probabilities.argmax(axis=1) == truth
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    index = np.clip(np.digitize(confidence, edges[1:-1]), 0, n_bins - 1)
    table, error = [], 0.0
    for b in range(n_bins):
        inside = index == b
        if inside.any():
            table.append((f"{edges[b]:.1f}-{edges[b + 1]:.1f}", int(inside.sum()),
                          float(confidence[inside].mean()), float(right[inside].mean())))
            error += inside.mean() * abs(confidence[inside].mean() - right[inside].mean())
    return table, float(error)


def test_held_out_probabilities_are_calibrated(table, held_out):
    # Two-fold cross-fitting: the temperature fitted on the even realisations' held-out
    # scores gives the probabilities of the odd ones and vice versa, so no probability in
    # the table comes from a temperature fitted on it (Guo et al. 2017, ICML, for the
    # expected calibration error over equal-width bins).
    _, loglik, truth = held_out
    even = table.realisation % 2 == 0
    probabilities = np.empty_like(loglik)
    temperatures = []
    for fit_rows in (even, ~even):
        temperature, _ = fit_temperature(loglik[fit_rows], truth[fit_rows])
        probabilities[~fit_rows] = special.softmax(loglik[~fit_rows] / temperature, axis=1)
        temperatures.append(temperature)
    rows, error = _reliability(probabilities, truth)
    print("bin, count, mean predicted, observed:", rows, "ECE", error, "temperatures", temperatures)
    assert error <= MAX_CALIBRATION_ERROR, rows
    # Calibrated probabilities also average to the observed accuracy.
    assert probabilities.max(axis=1).mean() == pytest.approx(
        np.mean(probabilities.argmax(axis=1) == truth), abs=MAX_CALIBRATION_ERROR
    )


def test_novelty_threshold_keeps_held_out_references_in_the_library(model, table, held_out):
    d2, _, truth = held_out
    even = table.realisation % 2 == 0
    own = d2[np.arange(truth.size), truth]
    threshold = novelty_threshold(own[even], table.values.shape[1])
    called_foreign = float(np.mean(d2[~even].min(axis=1) > threshold))
    print("threshold d2", threshold, "share of held-out references called out of library", called_foreign)
    assert called_foreign <= MAX_FALSE_NOVELTY
