"""The fitted reference model, stored beside the reference set's feature cache.

Fitting and calibrating the matcher's model takes seconds (a leave-one-out pass for every
shrinkage weight); reading it back takes milliseconds. :func:`load_or_fit` returns the
stored model when its key still holds, and otherwise fits it and stores it again.

The key ties a stored model to everything it was computed from:

- the reference set's fingerprint (checked by ``ReferenceSet.read_cache``) and its list of
  ensembles (regimes, parameters, seeds: the families come from there);
- the bytes of the cache entries the fit reads (the matcher's feature vectors);
- the code version: a digest of the source of every module that measures references or
  fits the model (``CODE_FOLDERS``), and the numpy and scipy versions. Any edit of the
  matcher or the feature code therefore invalidates the stored model, whatever it changed.

The model is stored without pickle (a reference set may come from elsewhere, and loading
it must not run code): :func:`encode` turns dataclasses, lists, tuples, dicts, numbers,
strings and numpy arrays into one JSON structure plus arrays, and :func:`decode` rebuilds
them, accepting only dataclasses defined in ``service.match``. Floats pass through JSON by
their shortest round-trip representation and arrays through ``.npy``, so the model read
back is the fitted one bit for bit.
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib
import json
import logging
import os
import sys
from collections.abc import Callable
from functools import lru_cache
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

log = logging.getLogger("ramiform.match")

#: Cache entry (``cache/<name>.npz``) holding the matcher's fitted model.
MODEL_NAME = "match-model"
#: Cache entries the model is fitted from (their bytes are part of the key).
MODEL_INPUTS = ("match-features-v{schema}",)
#: Source folders (relative to the repository root) whose code the stored model depends on.
CODE_FOLDERS = ("service/match", "service/features")
#: Source files outside them that turn stored clusters into the lattices references are measured on.
CODE_FILES = ("service/library/load.py", "service/library/storage.py")
#: Set to 0 to read stored models but never write them (a checkout that must not change,
#: such as a test run checking that the committed model is fresh).
STORE_ENV = "RAMIFORM_STORE_MODELS"
#: Dataclasses are rebuilt only from modules under this prefix.
TRUSTED_MODULES = "service.match."

_SOURCE_ROOT = Path(__file__).resolve().parents[2]
_STRUCTURE = "structure"
_KEY = "key"
_FORMAT = 1

T = TypeVar("T")


# --------------------------------------------------------------------------- key


@lru_cache(maxsize=1)
def code_version() -> str:
    """SHA-256 over the source of the model's code (``CODE_FOLDERS``, ``CODE_FILES``) and library versions."""
    import scipy

    digest = hashlib.sha256()
    files = sorted(
        {p for folder in CODE_FOLDERS for p in (_SOURCE_ROOT / folder).glob("*.py")}
        | {_SOURCE_ROOT / f for f in CODE_FILES}
    )
    for path in files:
        digest.update(path.relative_to(_SOURCE_ROOT).as_posix().encode() + b"\0")
        digest.update(path.read_bytes() + b"\0")
    versions = f"python {sys.version_info[:3]} numpy {np.__version__} scipy {scipy.__version__}"
    digest.update(versions.encode())
    return digest.hexdigest()


def model_key(reference_set) -> dict[str, Any]:
    """What a stored model must have been computed from to be used for ``reference_set``."""
    from service.match.vector import FEATURE_SCHEMA

    inputs = {}
    for template in MODEL_INPUTS:
        name = template.format(schema=FEATURE_SCHEMA)
        inputs[name] = _entry_digest(reference_set, name)
    ensembles = json.dumps(reference_set.manifest["ensembles"], sort_keys=True).encode()
    return {
        "format": _FORMAT,
        "code": code_version(),
        "ensembles": hashlib.sha256(ensembles).hexdigest(),
        "inputs": inputs,
    }


def _entry_digest(reference_set, name: str) -> str | None:
    for path in reference_set._cache_paths(name):
        try:
            return hashlib.sha256(path.read_bytes()).hexdigest()
        except OSError:
            continue
    return None


# --------------------------------------------------------------------------- store and load


def load_model(reference_set, *, name: str = MODEL_NAME) -> Any | None:
    """The model stored for ``reference_set`` if its key still holds, else None."""
    stored = reference_set.read_cache(name)
    if not isinstance(stored, dict) or _STRUCTURE not in stored or _KEY not in stored:
        return None
    try:
        if json.loads(str(stored.pop(_KEY))) != model_key(reference_set):
            return None
        return decode(json.loads(str(stored.pop(_STRUCTURE))), stored)
    except (ValueError, TypeError, KeyError, AttributeError, ImportError) as exc:
        log.warning("ignoring the stored model in %s: %s", reference_set.path, exc)
        return None


def store_model(reference_set, model: Any, *, name: str = MODEL_NAME) -> Path:
    """Write ``model`` under ``cache/<name>.npz`` with its key; returns the file (raises OSError)."""
    structure, arrays = encode(model)
    return reference_set.write_cache(name, {
        **arrays,
        _STRUCTURE: np.array(json.dumps(structure, allow_nan=True)),
        _KEY: np.array(json.dumps(model_key(reference_set), sort_keys=True)),
    })


def load_or_fit(reference_set, fit: Callable[[], T], *, name: str = MODEL_NAME) -> T:
    """The stored model, or ``fit()`` stored for next time.

    A folder that cannot be written (a read-only install) still works: the model is then
    fitted in memory, in every process, and a warning says so. With ``RAMIFORM_STORE_MODELS=0``
    nothing is written.
    """
    model = load_model(reference_set, name=name)
    if model is not None:
        return model
    model = fit()
    if os.environ.get(STORE_ENV, "1").strip() == "0":
        return model
    try:
        store_model(reference_set, model, name=name)
    except OSError as exc:
        log.warning("the fitted reference model could not be stored in %s (%s); it is refitted in every process",
                    reference_set.path, exc)
    except (TypeError, ValueError) as exc:  # the model holds something encode() does not know
        log.warning("the fitted reference model cannot be stored (%s); it is refitted in every process", exc)
    return model


def is_fresh(reference_set, *, name: str = MODEL_NAME) -> bool:
    """Whether a model is stored for ``reference_set`` under the current key."""
    return load_model(reference_set, name=name) is not None


def store_reference_model(reference_set) -> Path:
    """Fit the matcher's model of a reference set (or its path) and store it; ``library build`` calls this."""
    from service.match.cache import _as_reference_set
    from service.match.ranking import fit_reference_model

    reference_set = _as_reference_set(reference_set)
    return store_model(reference_set, fit_reference_model(reference_set))


# --------------------------------------------------------------------------- encoding


def encode(value: Any) -> tuple[Any, dict[str, np.ndarray]]:
    """A JSON-able structure and the arrays it refers to (``a0``, ``a1``, ...).

    Raises
    ------
    TypeError
        For anything but dataclass instances, lists, tuples, dicts, None, bool, int, float,
        str, numpy scalars and numpy arrays of numbers, booleans or strings.
    """
    arrays: dict[str, np.ndarray] = {}

    def array_ref(array: np.ndarray, tag: str) -> dict[str, str]:
        if array.dtype.hasobject:
            raise TypeError("arrays of Python objects cannot be stored")
        ref = f"a{len(arrays)}"
        arrays[ref] = array
        return {tag: ref}

    def walk(v: Any) -> Any:
        if isinstance(v, np.ndarray):
            return array_ref(v, "__array__")
        if isinstance(v, np.generic):  # before float: np.float64 is a float, and should stay numpy
            return array_ref(np.asarray(v), "__scalar__")
        if v is None or isinstance(v, (bool, int, float, str)):
            return v
        if dataclasses.is_dataclass(v) and not isinstance(v, type):
            cls = type(v)
            return {
                "__dataclass__": f"{cls.__module__}:{cls.__qualname__}",
                "fields": {f.name: walk(getattr(v, f.name)) for f in dataclasses.fields(v)},
            }
        if isinstance(v, tuple):
            return {"__tuple__": [walk(x) for x in v]}
        if isinstance(v, list):
            return [walk(x) for x in v]
        if isinstance(v, dict):
            if all(isinstance(k, str) and not k.startswith("__") for k in v):
                return {k: walk(x) for k, x in v.items()}
            return {"__items__": [[walk(k), walk(x)] for k, x in v.items()]}
        raise TypeError(f"cannot store a {type(v).__name__} in a model file")

    return walk(value), arrays


def decode(structure: Any, arrays: dict[str, np.ndarray]) -> Any:
    """Inverse of :func:`encode`."""

    def walk(v: Any) -> Any:
        if isinstance(v, list):
            return [walk(x) for x in v]
        if not isinstance(v, dict):
            return v
        if "__array__" in v:
            return arrays[v["__array__"]]
        if "__scalar__" in v:
            return arrays[v["__scalar__"]][()]
        if "__tuple__" in v:
            return tuple(walk(x) for x in v["__tuple__"])
        if "__items__" in v:
            return {_hashable(walk(k)): walk(x) for k, x in v["__items__"]}
        if "__dataclass__" in v:
            return _build(v["__dataclass__"], {k: walk(x) for k, x in v["fields"].items()})
        return {k: walk(x) for k, x in v.items()}

    return walk(structure)


def _hashable(key: Any) -> Any:
    return tuple(_hashable(k) for k in key) if isinstance(key, list) else key


def _build(name: str, values: dict[str, Any]) -> Any:
    module_name, _, qualname = name.partition(":")
    if not module_name.startswith(TRUSTED_MODULES):
        raise TypeError(f"the model file names a class outside {TRUSTED_MODULES}*: {name}")
    cls: Any = importlib.import_module(module_name)
    for part in qualname.split("."):
        cls = getattr(cls, part)
    if not (isinstance(cls, type) and dataclasses.is_dataclass(cls)):
        raise TypeError(f"{name} is not a dataclass")
    fields = dataclasses.fields(cls)
    if {f.name for f in fields} != set(values):
        raise TypeError(f"{name} has other fields than the stored model")
    instance = cls(**{f.name: values[f.name] for f in fields if f.init})
    for f in fields:
        if not f.init:
            object.__setattr__(instance, f.name, values[f.name])
    return instance
