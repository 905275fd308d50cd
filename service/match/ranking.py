"""Rank a measured specimen against a reference set: the matcher's public entry.

Only the universality table below names regimes; everything else reads the regimes and
parameters from the reference set's manifest, so a new regime or parameter value in the
library needs no change here.
"""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

import numpy as np
from scipy import special

from service.errors import SpecimenError
from service.match.cache import _as_reference_set, cache_discrepancy, load_reference_table
from service.match.model import CONNECTED_MARGIN, ReferenceModel, fit_model
from service.match.persist import load_or_fit
from service.match.vector import FEATURE_SCHEMA, FEATURES, specimen_vector

#: Families that belong to one universality class, so either answer is right for either.
#: Members are (regime, {parameter: (low, high)}); a regime with no bounds matches any of
#: its parameter sets.
UNIVERSALITY_CLASSES: tuple[dict[str, Any], ...] = (
    {
        "name": "diffusion-limited growth",
        "members": (("dla", {}), ("dbm", {"eta": (1.0, 1.0)})),
        "note": (
            "DLA and the dielectric breakdown model with eta = 1 belong to one universality class "
            "(growth probability proportional to the Laplacian field; Niemeyer, Pietronero & Wiesmann, "
            "Phys. Rev. Lett. 52, 1033, 1984): either answer is right for either."
        ),
    },
    {
        "name": "compact growth",
        "members": (("eden", {}), ("dbm", {"eta": (0.0, 0.5)})),
        "note": (
            "Eden growth and the dielectric breakdown model with eta near 0 belong to one universality "
            "class (at eta = 0 every perimeter site is equally likely, which is Eden's rule; Niemeyer, "
            "Pietronero & Wiesmann 1984): either answer is right for either."
        ),
    },
)
#: Features listed in the explanation as deciding between the best and the runner-up.
N_DECIDING = 4
#: Features of a specimen beyond this many reference spreads are named when it is out of library.
OUTLIER_Z = 3.0

#: Cached reference vectors may differ from fresh ones by rounding only.
CACHE_TOLERANCE = 1e-9

_MODELS: dict[tuple[str, str], ReferenceModel] = {}
_DEFAULT_SET: list = []
_LOCK = threading.Lock()


def universality_class(regime: str, parameters: dict) -> str | None:
    """Name of the universality class (from ``UNIVERSALITY_CLASSES``) a family belongs to."""
    for entry in UNIVERSALITY_CLASSES:
        for member_regime, bounds in entry["members"]:
            if member_regime == regime and all(
                name in parameters and lo <= float(parameters[name]) <= hi for name, (lo, hi) in bounds.items()
            ):
                return entry["name"]
    return None


def _class_note(name: str | None) -> str | None:
    return next((e["note"] for e in UNIVERSALITY_CLASSES if e["name"] == name), None)


def _resolve(reference_set):
    if reference_set is not None:
        return _as_reference_set(reference_set)
    with _LOCK:
        if not _DEFAULT_SET:
            _DEFAULT_SET.append(_as_reference_set(None))
        return _DEFAULT_SET[0]


def reference_model(reference_set=None) -> ReferenceModel:
    """The fitted and calibrated model of a reference set (default: the bundled one).

    Read from the set's ``cache/`` folder when stored there for this code and these
    clusters (``service.match.persist``), else fitted (seconds) and stored; then kept in
    memory, keyed by the set's folder and fingerprint, so a rebuilt set is refitted.
    """
    reference_set = _resolve(reference_set)
    key = (str(Path(reference_set.path).resolve()), reference_set.fingerprint)
    with _LOCK:
        if key not in _MODELS:
            _MODELS[key] = load_or_fit(reference_set, lambda: fit_reference_model(reference_set))
        return _MODELS[key]


def fit_reference_model(reference_set) -> ReferenceModel:
    """Fit and calibrate the model of a reference set from its feature cache (no stored model used)."""
    table = load_reference_table(reference_set)
    model = fit_model(reference_set, table)
    model.calibration["cache_discrepancy"] = cache_discrepancy(reference_set, table)
    return model


def _numeric(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _parameter_estimates(model: ReferenceModel, scaled_loglik: np.ndarray) -> dict[str, Any]:
    """Posterior-weighted mean and spread of every numeric parameter that varies in a regime.

    Within a regime the family posteriors are renormalised, so the mean interpolates between
    the library's values (e.g. eta between 2 and 3) and the spread says how sharply the
    references decide.
    """
    regime_probability = special.softmax(scaled_loglik)
    out: dict[str, Any] = {}
    for regime in dict.fromkeys(f.regime for f in model.families):
        members = [i for i, f in enumerate(model.families) if f.regime == regime]
        weights = special.softmax(scaled_loglik[members])
        names = dict.fromkeys(n for i in members for n, v in model.families[i].parameters.items() if _numeric(v))
        for name in names:
            having = [k for k, i in enumerate(members) if name in model.families[members[k]].parameters]
            values = np.array([float(model.families[members[k]].parameters[name]) for k in having])
            if np.unique(values).size < 2:
                continue
            w = weights[having] / weights[having].sum()
            mean = float(w @ values)
            out.setdefault(regime, {})[name] = {
                "value": mean,
                "std": float(np.sqrt(max(float(w @ (values - mean) ** 2), 0.0))),
                "values_in_library": sorted(set(values.tolist())),
                "regime_probability": float(regime_probability[members].sum()),
                "method": "posterior-weighted mean over the regime's families (interpolates between library values)",
            }
    return out


def _family_entry(model: ReferenceModel, reference_set, f: int, probability: float, d2: float, where) -> dict[str, Any]:
    family = model.families[f]
    i, j, t = where
    ids = [reference_set.ensembles[int(e)].id for e in model.statistics.ensemble_ids[f]]
    return {
        "regime": family.regime,
        "parameters": dict(family.parameters),
        "probability": float(probability),
        "distance": float(np.sqrt(max(d2, 0.0))),
        "ensembles": [{"id": ids[i], "weight": 1.0 - t}] + ([{"id": ids[j], "weight": t}] if j != i else []),
    }


def _label(match: dict[str, Any]) -> str:
    parameters = ", ".join(f"{k}={v}" for k, v in match["parameters"].items())
    return (f"{match['regime']}{f' ({parameters})' if parameters else ''}: probability "
            f"{match['probability']:.2f}, Mahalanobis distance {match['distance']:.2f}")


def _feature_row(evaluation, values, f: int, n: int) -> dict[str, float]:
    mean, sd = float(evaluation.mean[f, n]), float(evaluation.sd[f, n])
    return {"mean": mean, "sd": sd, "z": float((values[n] - mean) / sd)}


def match_features(features, *, reference_set=None, mask: np.ndarray | None = None) -> dict[str, Any]:
    """Rank a specimen against every regime and parameter set of a reference set.

    Parameters
    ----------
    features : Features
        The specimen's measurements (``service.features.measure``); its ``mask`` is what the
        matcher normalises and compares, unless ``mask`` is given.
    reference_set : ReferenceSet or path, optional
        Default: the bundled set (``service.library.load_reference_set()``).
    mask : (H, W) bool ndarray, optional
        The specimen mask, when ``features`` does not carry it.

    Returns
    -------
    dict
        ``matches`` (best first: ``regime``, ``parameters``, ``probability``, ``distance``
        = Mahalanobis distance to the family at the specimen's size, and the ensembles
        interpolated), ``in_library``, ``parameter_estimates``, ``explanation``,
        ``warnings``.

    Notes
    -----
    The specimen is resampled to one branch width per site (``normalise``) and measured on
    that lattice (``lattice_features``); references went through the same two steps from
    photograph-like drawings of every library cluster. Family means are interpolated in
    ``log N_eq``; each family's likelihood is Gaussian with its shrunk covariance; the
    posterior (uniform prior over families) is tempered by the temperature fitted on held-
    out references. ``in_library`` is false when even the nearest family is farther than
    the novelty threshold (``ReferenceModel.novelty_d2``), or when the specimen is in pieces
    while every reference is one connected aggregate.

    References
    ----------
    .. [1] P. C. Mahalanobis, "On the generalised distance in statistics", Proc. Natl.
       Inst. Sci. India 2, 49 (1936).
    .. [2] C. Guo et al., "On calibration of modern neural networks", ICML (2017).
    """
    if mask is None:
        mask = getattr(features, "mask", None)
    if mask is None:
        raise ValueError("match_features needs the specimen mask: pass mask= or Features carrying .mask")
    reference_set = _resolve(reference_set)
    model = reference_model(reference_set)
    try:
        vector, normalisation = specimen_vector(mask)
    except SpecimenError as exc:
        return {
            "matches": [],
            "in_library": False,
            "parameter_estimates": {},
            "explanation": {"summary": f"not compared with the references: {exc}"},
            "warnings": [f"matching: {exc}"],
        }
    values, log_sites = vector.values, float(np.log(vector.n_sites))
    evaluation = model.evaluate(values, log_sites)
    d2 = evaluation.d2
    scaled = evaluation.loglik / model.temperature
    probability = special.softmax(scaled)
    order = np.argsort(-probability, kind="stable")
    nearest = int(np.argmin(d2))
    connected = vector.connected_fraction >= model.min_connected_fraction - CONNECTED_MARGIN
    in_library = bool(d2[nearest] <= model.novelty_d2 and connected)
    matches = [_family_entry(model, reference_set, int(f), probability[f], d2[f], evaluation.where[f]) for f in order]

    warnings: list[str] = []
    if model.calibration["cache_discrepancy"] > CACHE_TOLERANCE:
        warnings.append(
            "matching: the reference feature cache was computed by other measurement code than this one "
            f"(difference {model.calibration['cache_discrepancy']:.3g}); rebuild it with "
            "service.match.build_feature_cache"
        )
    lo, hi = model.size_range
    if not lo / 1.5 <= vector.n_sites <= hi * 1.5:
        warnings.append(
            f"matching: the specimen spans {vector.n_sites} branch widths squared, outside the library's sizes "
            f"{lo:.0f}-{hi:.0f}; references are compared at their nearest size"
        )
    if not connected:
        warnings.append(
            f"matching: the specimen is in pieces (the largest holds {vector.connected_fraction:.0%} of it), "
            f"while every reference is one aggregate (at least {model.min_connected_fraction:.0%})"
        )
    elif not in_library:
        warnings.append(
            f"matching: the specimen lies outside every reference ensemble (nearest Mahalanobis distance "
            f"{np.sqrt(d2[nearest]):.1f} > {np.sqrt(model.novelty_d2):.1f}); the ranking is only relative"
        )

    best, runner = int(order[0]), int(order[1]) if order.size > 1 else None
    rows = []
    for n, (name, description) in enumerate(FEATURES):
        row = {"feature": name, "description": description, "value": float(values[n]),
               "best": _feature_row(evaluation, values, best, n)}
        if runner is not None:
            row["runner_up"] = _feature_row(evaluation, values, runner, n)
            row["weight_of_evidence"] = 0.5 * (row["runner_up"]["z"] ** 2 - row["best"]["z"] ** 2)
        rows.append(row)
    deciding = sorted(rows, key=lambda r: -r.get("weight_of_evidence", 0.0))[:N_DECIDING]
    best_class = universality_class(model.families[best].regime, model.families[best].parameters)
    note = _class_note(best_class)
    outliers = [name for n, (name, _) in enumerate(FEATURES)
                if abs(_feature_row(evaluation, values, nearest, n)["z"]) > OUTLIER_Z]
    summary = f"best match {_label(matches[0])}"
    if runner is not None:
        summary += f"; runner-up {_label(matches[1])}"
        if best_class is not None and best_class == universality_class(
            model.families[runner].regime, model.families[runner].parameters
        ):
            summary += f"; both belong to one universality class ({best_class})"
    if not in_library:
        summary = "outside the library: " + summary
    regime_probability: dict[str, float] = {}
    for f, family in enumerate(model.families):
        regime_probability[family.regime] = regime_probability.get(family.regime, 0.0) + float(probability[f])
    explanation = {
        "summary": summary,
        "best": matches[0],
        "runner_up": matches[1] if runner is not None else None,
        "log_probability_ratio": float(scaled[best] - scaled[runner]) if runner is not None else None,
        "regime_probabilities": dict(sorted(regime_probability.items(), key=lambda kv: -kv[1])),
        "deciding_features": deciding,
        "weight_of_evidence": (
            "half the runner-up's squared z-score minus the best's: each feature's share of the "
            "log-likelihood ratio if features were uncorrelated (the ratio itself uses the full covariance)"
        ),
        "all_features": rows,
        "universality_note": note,
        "specimen": {**normalisation, "log_sites": log_sites},
        "novelty": {
            "nearest": {
                "regime": model.families[nearest].regime,
                "parameters": dict(model.families[nearest].parameters),
            },
            "nearest_distance": float(np.sqrt(d2[nearest])),
            "threshold_distance": float(np.sqrt(model.novelty_d2)),
            "n_features": len(FEATURES),
            "features_beyond_3_sd": outliers,
            "connected_fraction": float(vector.connected_fraction),
            "min_reference_connected_fraction": model.min_connected_fraction,
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
    return {
        "matches": matches,
        "in_library": in_library,
        "parameter_estimates": _parameter_estimates(model, scaled),
        "explanation": explanation,
        "warnings": warnings,
    }
