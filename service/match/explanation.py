"""The matcher's explanation: the verdict in words, what decided it, and how far the references are.

Built from numbers the ranking has already computed; nothing here changes a probability.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from service.match.universality import class_note, universality_class
from service.match.vector import FEATURE_SCHEMA, FEATURES

#: Features listed in the explanation as deciding between the best and the runner-up.
N_DECIDING = 4
#: Features of a specimen beyond this many reference spreads are named when it is out of library.
OUTLIER_Z = 3.0

#: What the page and the JSON say when the verdict is withheld or out of the library.
NO_CONFIDENT_VERDICT = "no confident verdict"
OUTSIDE_WORDS = "nearest, but outside every reference"


def _label(match: dict[str, Any]) -> str:
    parameters = ", ".join(f"{k}={v}" for k, v in match["parameters"].items())
    return (f"{match['regime']}{f' ({parameters})' if parameters else ''}: probability "
            f"{match['probability']:.2f}, Mahalanobis distance {match['distance']:.2f}")


def _feature_row(evaluation, values, f: int, n: int) -> dict[str, float]:
    mean, sd = float(evaluation.mean[f, n]), float(evaluation.sd[f, n])
    return {"mean": mean, "sd": sd, "z": float((values[n] - mean) / sd)}


def feature_rows(evaluation, values: np.ndarray, best: int, runner: int | None) -> list[dict[str, Any]]:
    """Each compared feature against the best and the runner-up family, with its weight of evidence."""
    rows = []
    for n, (name, description) in enumerate(FEATURES):
        row = {"feature": name, "description": description, "value": float(values[n]),
               "best": _feature_row(evaluation, values, best, n)}
        if runner is not None:
            row["runner_up"] = _feature_row(evaluation, values, runner, n)
            row["weight_of_evidence"] = 0.5 * (row["runner_up"]["z"] ** 2 - row["best"]["z"] ** 2)
        rows.append(row)
    return rows


def build_explanation(
    *,
    model,
    reference_set,
    matches: list[dict[str, Any]],
    order: np.ndarray,
    evaluation,
    posterior,
    values: np.ndarray,
    log_sites: float,
    normalisation: dict[str, Any],
    connected_fraction: float,
    in_library: bool,
    verdict: dict[str, Any],
) -> dict[str, Any]:
    """The ``explanation`` object of the matching JSON (see :func:`service.match.match_features`)."""
    d2 = evaluation.d2
    nearest = int(np.argmin(d2))
    best = int(order[0])
    runner = int(order[1]) if order.size > 1 else None
    rows = feature_rows(evaluation, values, best, runner)
    deciding = sorted(rows, key=lambda r: -r.get("weight_of_evidence", 0.0))[:N_DECIDING]
    best_family = model.families[best]
    best_class = universality_class(best_family.regime, best_family.parameters)
    outliers = [name for n, (name, _) in enumerate(FEATURES)
                if abs(_feature_row(evaluation, values, nearest, n)["z"]) > OUTLIER_Z]

    summary = f"best match {_label(matches[0])}"
    if runner is not None:
        summary += f"; runner-up {_label(matches[1])}"
        runner_family = model.families[runner]
        if best_class is not None and best_class == universality_class(runner_family.regime, runner_family.parameters):
            summary += f"; both belong to one universality class ({best_class})"
    if not in_library:
        summary = f"{OUTSIDE_WORDS}: " + summary
    if not verdict["confident"]:
        summary = f"{NO_CONFIDENT_VERDICT} ({verdict['reason']}); " + summary
    else:
        summary = f"verdict: {verdict['name']} (probability {verdict['probability']:.2f}); " + summary

    regime_probability: dict[str, float] = {}
    for f, family in enumerate(model.families):
        regime_probability[family.regime] = regime_probability.get(family.regime, 0.0) + float(posterior.probability[f])
    log_p = posterior.log_probability
    return {
        "summary": summary,
        "verdict": verdict,
        "best": matches[0],
        "runner_up": matches[1] if runner is not None else None,
        "log_probability_ratio": float(log_p[best] - log_p[runner]) if runner is not None else None,
        "regime_probabilities": dict(sorted(regime_probability.items(), key=lambda kv: -kv[1])),
        "deciding_features": deciding,
        "weight_of_evidence": (
            "half the runner-up's squared z-score minus the best's: each feature's share of the "
            "log-likelihood ratio if features were uncorrelated (the ratio itself uses the full covariance)"
        ),
        "all_features": rows,
        "universality_note": class_note(best_class),
        "specimen": {**normalisation, "log_sites": log_sites},
        "novelty": {
            "nearest": {
                "regime": model.families[nearest].regime,
                "parameters": dict(model.families[nearest].parameters),
            },
            "nearest_distance": float(np.sqrt(d2[nearest])),
            "threshold_distance": float(np.sqrt(model.novelty_d2)),
            "inlier_distance": float(np.sqrt(model.inlier_d2)),
            "n_features": len(FEATURES),
            "features_beyond_3_sd": outliers,
            "connected_fraction": float(connected_fraction),
            "min_reference_connected_fraction": model.min_connected_fraction,
            "in_words": None if in_library else OUTSIDE_WORDS,
        },
        "tempering": {
            "temperature": posterior.temperature,
            "distance_stretch": posterior.stretch,
            "outside_weight": posterior.outside_weight,
            "rule": (
                "log-likelihoods divided by the calibrated temperature, stretched by the nearest squared "
                "distance over the references' 90% quantile when farther; beyond the novelty threshold mixed "
                "with equal odds over the families with weight 1 - threshold / distance (squared)"
            ),
        },
        "references": {
            "path": str(reference_set.path),
            "preset": reference_set.preset,
            "fingerprint": reference_set.fingerprint,
            "feature_schema": FEATURE_SCHEMA,
            "n_families": len(model.families),
            "calibration": dict(model.calibration),
        },
    }
