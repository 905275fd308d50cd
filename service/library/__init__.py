"""Reference sets: ensembles of simulated clusters grown on Dask, stored, and loaded.

``build_library`` grows a preset (``PRESETS``) and writes it in the format of
:mod:`service.library.storage`; ``load_reference_set`` opens one as a :class:`ReferenceSet`.
"""

from service.library.build import PRESETS, build_library
from service.library.load import ReferenceSet, default_library_dir, load_reference_set
from service.library.storage import SCHEMA_VERSION, Ensemble, EnsembleSpec

__all__ = [
    "PRESETS",
    "SCHEMA_VERSION",
    "Ensemble",
    "EnsembleSpec",
    "ReferenceSet",
    "build_library",
    "default_library_dir",
    "load_reference_set",
]
