"""Growth simulators: one module per regime, each a plain function returning a lattice.

Every simulator takes the number of particles (occupied sites) and an explicit seed and
returns a 2-D ``int32`` array whose non-zero cells are the occupied sites, numbered in
order of arrival 1..n, so growth can be replayed. Same seed, same array, bit for bit.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable

import numpy as np

#: Regime name -> module holding a function of the same name. The library builder and the
#: matcher iterate over this; a new regime is one module plus one line here. Modules are
#: imported on first use so that loading one simulator does not compile the others' kernels.
REGIMES: tuple[str, ...] = ("dla", "eden", "ballistic", "dbm")


def simulator(regime: str) -> Callable[..., np.ndarray]:
    """The growth function of ``regime``."""
    if regime not in REGIMES:
        raise ValueError(f"unknown regime {regime!r}; known: {list(REGIMES)}")
    return getattr(importlib.import_module(f"service.simulate.{regime}"), regime)


def grow(regime: str, n_particles: int, *, seed: int, **parameters) -> np.ndarray:
    """Grow one cluster of ``regime`` with its ``parameters`` (e.g. ``eta=1.0`` for DBM)."""
    return simulator(regime)(n_particles, seed=seed, **parameters)


def __getattr__(name: str):
    if name in REGIMES:
        return simulator(name)
    raise AttributeError(f"module 'service.simulate' has no attribute {name!r}")


__all__ = ["REGIMES", "grow", "simulator", *REGIMES]
