"""Rank a measured specimen against a reference set: the matcher's public entry.

Everything here reads the regimes and parameters from the reference set's manifest, so a new
regime or parameter value in the library needs no change. Which families are one answer is
said in :mod:`service.match.universality`; the explanation is built in
:mod:`service.match.explanation`; parameter intervals in :mod:`service.match.parameters`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from service.caveats import Caveat
from service.errors import SpecimenError
from service.match.cache import cache_discrepancy, load_reference_table
from service.match.explanation import NO_CONFIDENT_VERDICT, OUTSIDE_WORDS, build_explanation
from service.match.library import ReferenceLibrary, library_of
from service.match.model import CONNECTED_MARGIN, ReferenceModel, fit_model
from service.match.parameters import parameter_estimates
from service.match.universality import UNIVERSALITY_CLASSES, universality_class, verdict_of
from service.match.vector import specimen_vector

__all__ = ["MatchResult", "ReferenceLibrary", "UNIVERSALITY_CLASSES", "match", "match_features", "reference_model", "universality_class"]

#: Cached reference vectors may differ from fresh ones by rounding only.
CACHE_TOLERANCE = 1e-9
#: The verdict is withheld when the log-odds of the best verdict against the next are within
#: this many nuisance spreads (``ReferenceModel.nuisance_log_odds_sd``) of even: another
#: camera could then turn the answer round (two-sided 95% of a normal spread).
ABSTAIN_Z = 1.96
#: ... and whatever that spread, a verdict needs at least this probability.
MIN_VERDICT_PROBABILITY = 0.5

@dataclass(frozen=True)
class MatchResult:
    """The ranking of one specimen against a reference set.

    Attributes
    ----------
    matches : tuple of dict
        Every family, best first: ``regime``, ``parameters``, ``probability``, ``distance``
        (Mahalanobis, at the specimen's size) and the ``ensembles`` interpolated.
    in_library : bool
        False when even the nearest family is beyond the novelty threshold, or the specimen
        is in pieces or one of several separate objects while every reference is one
        aggregate grown alone.
    parameter_estimates : dict
        ``{regime: {parameter: {value, ci95, std, spans_library_range, note, ...}}}``.
    explanation : dict
        The verdict in words, the deciding features, novelty and calibration records.
    warnings : tuple of str
    """

    matches: tuple[dict[str, Any], ...]
    in_library: bool
    parameter_estimates: dict[str, Any]
    explanation: dict[str, Any]
    warnings: tuple[str, ...] = ()

    @property
    def verdict(self) -> dict[str, Any] | None:
        return self.explanation.get("verdict")

    def to_dict(self) -> dict[str, Any]:
        """The matching keys of the analysis JSON."""
        return {
            "matches": [dict(m) for m in self.matches],
            "in_library": bool(self.in_library),
            "parameter_estimates": self.parameter_estimates,
            "explanation": self.explanation,
            "warnings": list(self.warnings),
        }


def reference_model(reference_set=None) -> ReferenceModel:
    """The fitted and calibrated model of a reference set (default: the bundled one).

    ``reference_set`` may be a :class:`ReferenceLibrary` (its model, loaded once), a
    ``ReferenceSet`` or a folder (read from the set's ``cache/`` folder when stored there
    for this code and these clusters, ``service.match.persist``, else fitted and stored).
    """
    return library_of(reference_set).model


def fit_reference_model(reference_set) -> ReferenceModel:
    """Fit and calibrate the model of a reference set from its feature cache (no stored model used)."""
    table = load_reference_table(reference_set)
    model = fit_model(reference_set, table)
    model.calibration["cache_discrepancy"] = cache_discrepancy(reference_set, table)
    return model


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


def verdict(model: ReferenceModel, probability: np.ndarray, in_library: bool) -> dict[str, Any]:
    """The verdict (universality class or regime) and whether it is confident.

    Families are summed into verdicts (:func:`service.match.universality.verdict_of`). The
    verdict is withheld ("no confident verdict") when its log-odds against the next verdict
    are within ``ABSTAIN_Z`` nuisance spreads of even, when its probability is below
    ``MIN_VERDICT_PROBABILITY``, or when the specimen is outside every reference.
    """
    names = [verdict_of(f.regime, f.parameters) for f in model.families]
    totals: dict[str, float] = {}
    for name, p in zip(names, probability):
        totals[name] = totals.get(name, 0.0) + float(p)
    ranked = sorted(totals.items(), key=lambda kv: -kv[1])
    best, p_best = ranked[0]
    p_next = ranked[1][1] if len(ranked) > 1 else 0.0
    log_odds = float(np.log(max(p_best, 1e-300)) - np.log(max(p_next, 1e-300)))
    needed = ABSTAIN_Z * model.nuisance_log_odds_sd
    reason = None
    if not in_library:
        reason = OUTSIDE_WORDS
    elif p_best < MIN_VERDICT_PROBABILITY:
        reason = f"the best verdict has probability {p_best:.2f}"
    elif log_odds < needed:
        reason = (f"{best} and {ranked[1][0]} are not separated beyond what drawing style alone changes "
                  f"(log-odds {log_odds:.2f} < {needed:.2f})")
    return {
        "name": best if reason is None else NO_CONFIDENT_VERDICT,
        "best": best,
        "probability": p_best,
        "runner_up": ranked[1][0] if len(ranked) > 1 else None,
        "log_odds": log_odds,
        "needed_log_odds": needed,
        "confident": reason is None,
        "reason": reason,
        "probabilities": dict(ranked),
    }


def match(features, *, reference_set=None, mask: np.ndarray | None = None,
          one_of_several: bool = False) -> MatchResult:
    """Rank a specimen against every regime and parameter set of a reference set.

    Parameters
    ----------
    features : Features
        The specimen's measurements (``service.features.measure``); its ``mask`` is what the
        matcher normalises and compares, unless ``mask`` is given.
    reference_set : ReferenceLibrary, ReferenceSet or path, optional
        What to rank against; a :class:`ReferenceLibrary` made once per process keeps its
        model loaded. Default: the bundled set's library (``default_library()``).
    mask : (H, W) bool ndarray, optional
        The specimen mask, when ``features`` does not carry it.
    one_of_several : bool
        The photograph shows other separate objects of the specimen's size (segmentation's
        ``several_objects``): the specimen is then outside the library, whose clusters each
        grew alone from one seed, whatever its features.

    Returns
    -------
    MatchResult

    Notes
    -----
    The specimen is resampled to one branch width per site (``normalise``) and measured on
    that lattice (``lattice_features``). The references went through the same two steps
    from drawings of every library cluster in several styles (branch thickness, blur,
    threshold level, JPEG: :mod:`service.match.nuisance`), so each family's spread holds
    what the drawing changes as well as what growth does. Family means and spreads are
    local fits on ``log N_eq``; each family's likelihood is Gaussian with its shrunk
    covariance; the posterior (uniform prior over families) is tempered by the temperature
    fitted on held-out references and further by the specimen's distance from the
    references (:meth:`ReferenceModel.posterior`).

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
    library = library_of(reference_set)
    reference_set, model = library.reference_set, library.model
    try:
        vector, normalisation = specimen_vector(mask)
    except SpecimenError as exc:
        return MatchResult(
            matches=(),
            in_library=False,
            parameter_estimates={},
            explanation={"summary": f"not compared with the references: {exc}"},
            warnings=(Caveat("not_compared", f"matching: {exc}"),),
        )
    values, log_sites = vector.values, float(np.log(vector.n_sites))
    evaluation = model.evaluate(values, log_sites)
    posterior = model.posterior(evaluation)
    probability = posterior.probability
    d2 = evaluation.d2
    order = np.argsort(-probability, kind="stable")
    nearest = int(np.argmin(d2))
    connected = vector.connected_fraction >= model.min_connected_fraction - CONNECTED_MARGIN
    in_library = bool(d2[nearest] <= model.novelty_d2 and connected and not one_of_several)
    matches = [_family_entry(model, reference_set, int(f), probability[f], d2[f], evaluation.where[f]) for f in order]

    warnings: list[str] = []
    if model.calibration["cache_discrepancy"] > CACHE_TOLERANCE:
        warnings.append(Caveat(
            "reference_cache_stale",
            "matching: the reference feature cache was computed by other measurement code than this one "
            f"(difference {model.calibration['cache_discrepancy']:.3g}); rebuild it with "
            "service.match.build_feature_cache",
        ))
    lo, hi = model.size_range
    if not lo / 1.5 <= vector.n_sites <= hi * 1.5:
        warnings.append(Caveat(
            "outside_library_sizes",
            f"matching: the specimen spans {vector.n_sites} branch widths squared, outside the library's sizes "
            f"{lo:.0f}-{hi:.0f}; references are compared at their nearest size",
        ))
    if not connected:
        warnings.append(Caveat(
            "specimen_in_pieces",
            f"matching: the specimen is in pieces (the largest holds {vector.connected_fraction:.0%} of it), "
            f"while every reference is one aggregate (at least {model.min_connected_fraction:.0%})",
        ))
    elif one_of_several:
        warnings.append(Caveat(
            "one_of_several",
            "matching: the specimen is one of several separate objects of its size in the photograph, while "
            "every reference grew alone from one seed; the ranking is only relative",
        ))
    elif not in_library:
        warnings.append(Caveat(
            "outside_library",
            f"matching: {OUTSIDE_WORDS} (nearest Mahalanobis distance {np.sqrt(d2[nearest]):.1f} > "
            f"{np.sqrt(model.novelty_d2):.1f}); the probabilities are tempered by that distance and the ranking "
            "is only relative",
        ))
    decided = verdict(model, probability, in_library)
    if not decided["confident"] and in_library:
        warnings.append(Caveat("no_confident_verdict", f"matching: {NO_CONFIDENT_VERDICT}: {decided['reason']}"))
    # Within a regime, where a parameter lies is read from the distance-tempered posterior; the
    # equal-odds mixing beyond the novelty threshold (doubt about the family) widens its
    # interval but does not drag the estimate towards the middle of the grid.
    estimates = parameter_estimates(model.families, posterior.tempered, model.parameter_nuisance_range)
    if posterior.outside_weight > 0:
        mixed = parameter_estimates(model.families, probability, model.parameter_nuisance_range)
        for regime, parameters in estimates.items():
            for name, estimate in parameters.items():
                lo = min(estimate["ci95"][0], mixed[regime][name]["ci95"][0])
                hi = max(estimate["ci95"][1], mixed[regime][name]["ci95"][1])
                grid = estimate["values_in_library"]
                estimate["ci95"] = [lo, hi]
                estimate["spans_library_range"] = bool(lo <= min(grid) + 1e-6 and hi >= max(grid) - 1e-6)
                estimate["note"] = (
                    f"{OUTSIDE_WORDS}: " + (
                        f"the 95% interval spans the whole library range ({min(grid):g} to {max(grid):g})"
                        if estimate["spans_library_range"] else f"{name} between {lo:.3g} and {hi:.3g} (95%)"
                    ) + f", estimate {estimate['value']:.3g}"
                )
    for regime, parameters in estimates.items():
        regime_probability = float(sum(p for f, p in zip(model.families, probability) if f.regime == regime))
        for estimate in parameters.values():
            estimate["regime_probability"] = regime_probability
    explanation = build_explanation(
        model=model, reference_set=reference_set, matches=matches, order=order, evaluation=evaluation,
        posterior=posterior, values=values, log_sites=log_sites, normalisation=normalisation,
        connected_fraction=vector.connected_fraction, in_library=in_library, verdict=decided,
    )
    return MatchResult(
        matches=tuple(matches),
        in_library=in_library,
        parameter_estimates=estimates,
        explanation=explanation,
        warnings=tuple(warnings),
    )


def match_features(features, *, reference_set=None, mask: np.ndarray | None = None,
                   one_of_several: bool = False) -> dict[str, Any]:
    """:func:`match` as the analysis JSON's matching keys (``MatchResult.to_dict()``):
    ``matches``, ``in_library``, ``parameter_estimates``, ``explanation``, ``warnings``."""
    return match(features, reference_set=reference_set, mask=mask, one_of_several=one_of_several).to_dict()

