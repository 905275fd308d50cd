"""Rank a specimen against the reference library: regime, parameters, confidence, novelty.

``match_features(features, reference_set=...)`` is the entry the analysis pipeline calls.
``build_feature_cache(reference_set)`` prepares a reference set once (on Dask).
"""

from service.match.cache import ReferenceTable, build_feature_cache, load_reference_table
from service.match.library import ReferenceLibrary, default_library, library_of
from service.match.model import ReferenceModel, families_of, fit_model, held_out_scores
from service.match.normalise import NormalisedMask, normalise
from service.match.nuisance import DrawingStyle, draw_cluster, drawing_styles, nuisance_grid
from service.match.ranking import MatchResult, match, match_features, reference_model
from service.match.universality import UNIVERSALITY_CLASSES, universality_class, verdict_of
from service.match.vector import FEATURE_NAMES, FEATURE_SCHEMA, LatticeVector, lattice_features, reference_photo_mask

__all__ = [
    "DrawingStyle",
    "FEATURE_NAMES",
    "FEATURE_SCHEMA",
    "LatticeVector",
    "MatchResult",
    "NormalisedMask",
    "ReferenceLibrary",
    "ReferenceModel",
    "ReferenceTable",
    "UNIVERSALITY_CLASSES",
    "build_feature_cache",
    "default_library",
    "draw_cluster",
    "drawing_styles",
    "families_of",
    "fit_model",
    "held_out_scores",
    "lattice_features",
    "library_of",
    "load_reference_table",
    "match",
    "match_features",
    "normalise",
    "nuisance_grid",
    "reference_model",
    "reference_photo_mask",
    "universality_class",
    "verdict_of",
]
