"""Rank a specimen against the reference library: regime, parameters, confidence, novelty.

``match_features(features, reference_set=...)`` is the entry the analysis pipeline calls.
``build_feature_cache(reference_set)`` prepares a reference set once (on Dask).
"""

from service.match.cache import ReferenceTable, build_feature_cache, load_reference_table
from service.match.model import ReferenceModel, families_of, fit_model, held_out_scores
from service.match.normalise import NormalisedMask, normalise
from service.match.ranking import UNIVERSALITY_CLASSES, match_features, reference_model, universality_class
from service.match.vector import FEATURE_NAMES, FEATURE_SCHEMA, LatticeVector, lattice_features, reference_photo_mask

__all__ = [
    "FEATURE_NAMES",
    "FEATURE_SCHEMA",
    "LatticeVector",
    "NormalisedMask",
    "ReferenceModel",
    "ReferenceTable",
    "UNIVERSALITY_CLASSES",
    "build_feature_cache",
    "families_of",
    "fit_model",
    "held_out_scores",
    "lattice_features",
    "load_reference_table",
    "match_features",
    "normalise",
    "reference_model",
    "reference_photo_mask",
    "universality_class",
]
